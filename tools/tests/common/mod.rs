//! Helpers shared by the CLI tests: the workspace root, the shipped example
//! files, running the `lapwing` binary, the check every refused command must
//! pass, and edited copies of the shipped model.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// The workspace root.
pub fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

/// A file of the shipped example `examples/pipeline/`.
pub fn example(name: &str) -> String {
    root().join("examples/pipeline").join(name).display().to_string()
}

/// Runs `lapwing` with `args`.
pub fn lapwing(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_lapwing")).args(args).output().expect("run lapwing")
}

/// Standard error as text.
pub fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// Runs a command that must fail: exit status 2, one line on stderr that
/// contains every `needles`, and `out` not created (or left as it was).
pub fn refuses(args: &[&str], out: &Path, needles: &[&str]) {
    refuses_all(args, &[out], needles);
}

/// What a refused command must leave behind: exit status 2; one line on
/// stderr, `lapwing: error: ...`, containing every `needles` (no panic
/// message, backtrace or debug dump, even with `RUST_BACKTRACE=1`); every
/// path in `outs` exactly as before (absent stays absent, an existing file
/// keeps its bytes); and no new file beside them (no temporary leftovers).
pub fn refuses_all(args: &[&str], outs: &[&Path], needles: &[&str]) {
    let before: Vec<_> = outs.iter().map(|p| snapshot(p)).collect();
    let o = Command::new(env!("CARGO_BIN_EXE_lapwing"))
        .args(args)
        .env("RUST_BACKTRACE", "1")
        .output()
        .expect("run lapwing");
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{args:?}: exit status {:?}: {err}", o.status.code());
    assert_eq!(err.trim_end().lines().count(), 1, "{args:?}: not one line: {err}");
    assert!(err.starts_with("lapwing: error: "), "{args:?}: {err}");
    for bad in ["panicked", "backtrace", "RUST_BACKTRACE", "Error {", "Os {"] {
        assert!(!err.contains(bad), "{args:?}: {err:?} contains {bad:?}");
    }
    for n in needles {
        assert!(err.contains(n), "{args:?}: {err:?} does not mention {n:?}");
    }
    for (p, b) in outs.iter().zip(before) {
        assert!(snapshot(p) == b, "{args:?} created or changed {} (or files beside it)", p.display());
    }
}

/// A file's bytes (`None` when absent) and the names in its directory.
fn snapshot(p: &Path) -> (Option<Vec<u8>>, Vec<std::ffi::OsString>) {
    let dir = p.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new("."));
    let mut names: Vec<_> =
        std::fs::read_dir(dir).map(|r| r.filter_map(|e| e.ok()).map(|e| e.file_name()).collect()).unwrap_or_default();
    names.sort();
    (std::fs::read(p).ok().filter(|_| p.is_file()), names)
}

/// The shipped split-layout model (`examples/pipeline/lstm_x4_h16.safetensors`)
/// re-serialized as `dir/name` after `edit` on its `(name, shape, values)`
/// list (sorted by name); returns the path.
pub fn write_model(dir: &Path, name: &str, edit: impl FnOnce(&mut Vec<(String, Vec<usize>, Vec<f32>)>)) -> String {
    let bytes = std::fs::read(root().join("examples/pipeline/lstm_x4_h16.safetensors")).unwrap();
    let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let mut tensors: Vec<(String, Vec<usize>, Vec<f32>)> = st
        .tensors()
        .into_iter()
        .map(|(n, v)| {
            let vals = v.data().chunks_exact(4).map(|c| f32::from_le_bytes(c.try_into().unwrap())).collect();
            (n, v.shape().to_vec(), vals)
        })
        .collect();
    tensors.sort_by(|a, b| a.0.cmp(&b.0));
    edit(&mut tensors);
    let raw: Vec<(String, Vec<usize>, Vec<u8>)> =
        tensors.into_iter().map(|(n, s, v)| (n, s, v.iter().flat_map(|x| x.to_le_bytes()).collect())).collect();
    let views: Vec<(String, safetensors::tensor::TensorView<'_>)> = raw
        .iter()
        .map(|(n, s, b)| {
            (n.clone(), safetensors::tensor::TensorView::new(safetensors::Dtype::F32, s.clone(), b).unwrap())
        })
        .collect();
    let p = dir.join(name);
    safetensors::serialize_to_file(views, &None, &p).unwrap();
    p.display().to_string()
}
