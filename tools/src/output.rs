//! Output files written atomically: the content goes to a temporary file in
//! the destination's directory, is synced, and only then renamed over the
//! destination. The destination either keeps its old content or gets the
//! whole new one; an error never leaves a partial file behind.

use anyhow::{bail, Context, Result};
use std::fs::File;
use std::path::Path;

/// Writes `path` atomically; `fill` writes the content into the temporary
/// file. On Unix the new file gets the usual permissions (`0o666` minus the
/// umask), not the temporary file's private ones.
///
/// # Errors
/// A path without a file name, a destination directory that does not exist
/// (named in the message), an error from `fill`, or an I/O error.
pub fn write_atomic_with(path: &Path, fill: impl FnOnce(&File) -> Result<()>) -> Result<()> {
    let name = path.display();
    let dir = check_destination(path)?;
    let mut builder = tempfile::Builder::new();
    builder.prefix(".lapwing-").suffix(".tmp");
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        builder.permissions(std::fs::Permissions::from_mode(0o666));
    }
    let tmp = builder
        .tempfile_in(dir)
        .with_context(|| format!("cannot write {name}: cannot create a temporary file in {}", dir.display()))?;
    fill(tmp.as_file())?;
    tmp.as_file().sync_all().with_context(|| format!("cannot write {name}"))?;
    tmp.persist(path).map_err(|e| e.error).with_context(|| format!("cannot write {name}: cannot rename into place"))?;
    Ok(())
}

/// Checks that `path` can be a destination: it names a file and its
/// directory exists. Commands call it before long work so a typo in the
/// output path fails at once; returns the directory.
///
/// # Errors
/// A path without a file name, or a directory that does not exist (named).
pub fn check_destination(path: &Path) -> Result<&Path> {
    let name = path.display();
    if path.file_name().is_none() {
        bail!("cannot write {name}: not a file name");
    }
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    if !dir.is_dir() {
        bail!("cannot write {name}: directory {} does not exist", dir.display());
    }
    Ok(dir)
}

/// Writes `bytes` to `path` atomically (see [`write_atomic_with`]).
///
/// # Errors
/// As [`write_atomic_with`].
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    use std::io::Write;
    write_atomic_with(path, |mut f| f.write_all(bytes).with_context(|| format!("cannot write {}", path.display())))
}

/// Writes text to `path` atomically.
///
/// # Errors
/// As [`write_atomic_with`].
pub fn write_text(path: &Path, text: &str) -> Result<()> {
    write_atomic(path, text.as_bytes())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_failing_writer_leaves_nothing_and_keeps_the_old_file() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("out.bin");
        write_atomic(&p, b"old").unwrap();
        let e = write_atomic_with(&p, |_| bail!("boom")).unwrap_err();
        assert!(e.to_string().contains("boom"));
        assert_eq!(std::fs::read(&p).unwrap(), b"old");
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1, "a temporary file was left behind");
        let missing = dir.path().join("nope").join("x.bin");
        let e = write_atomic(&missing, b"x").unwrap_err().to_string();
        assert!(e.contains("does not exist") && e.contains("nope"), "{e}");
    }
}
