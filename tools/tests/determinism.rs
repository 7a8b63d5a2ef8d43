//! Determinism: the same inputs give byte-identical files across runs of
//! the `lapwing` binary (separate processes, separate directories, so no
//! state, hash-map order, time stamp or output path can leak into them):
//! blobs of every kind, generated modules, run outputs, report and sweep
//! JSON with the report's text and plots, detector results, fitted models
//! and simulated data.

mod common;

use common::*;
use std::path::{Path, PathBuf};

/// Runs `lapwing` with `args`, where `{}` stands for the directory `dir`;
/// returns standard output.
fn run_in(dir: &Path, args: &[&str]) -> Vec<u8> {
    let d = dir.display().to_string();
    let args: Vec<String> = args.iter().map(|a| a.replace("{}", &d)).collect();
    let refs: Vec<&str> = args.iter().map(String::as_str).collect();
    let o = lapwing(&refs);
    assert!(o.status.success(), "{refs:?}: {}", stderr(&o));
    o.stdout
}

/// Every file under `dir`, by relative path, with its bytes.
fn files(dir: &Path) -> Vec<(PathBuf, Vec<u8>)> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else {
                out.push((p.strip_prefix(dir).unwrap().to_path_buf(), std::fs::read(&p).unwrap()));
            }
        }
    }
    out.sort();
    out
}

/// Runs the same command list in two fresh directories; every file written
/// and every standard output must be identical (standard output with the
/// directory's name replaced, since messages name the files they wrote);
/// returns how many files were compared.
fn twice(commands: &[Vec<&str>]) -> usize {
    let (a, b) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    for cmd in commands {
        let ta = String::from_utf8(run_in(a.path(), cmd)).unwrap().replace(&a.path().display().to_string(), "{}");
        let tb = String::from_utf8(run_in(b.path(), cmd)).unwrap().replace(&b.path().display().to_string(), "{}");
        // `fit` prints its wall-clock training time; its model file is compared.
        if cmd.first() != Some(&"fit") {
            assert_eq!(ta, tb, "{cmd:?}: standard output differs between runs");
        }
    }
    let (fa, fb) = (files(a.path()), files(b.path()));
    assert_eq!(fa.len(), fb.len());
    for ((pa, ba), (pb, bb)) in fa.iter().zip(&fb) {
        assert_eq!(pa, pb);
        assert!(ba == bb, "{} differs between runs", pa.display());
    }
    fa.len()
}

#[test]
fn quantize_codegen_run_report_sweep_are_byte_identical() {
    let (m, d, t) = (example("lstm_x4_h16.safetensors"), example("signal.csv"), example("signal_test.csv"));
    let n = twice(&[
        vec!["quantize", &m, "--calib", &d, "-o", "{}/a.lwq"],
        vec![
            "quantize",
            &m,
            "--calib",
            &d,
            "--scheme",
            "w16a16",
            "--cell",
            "c32",
            "--table",
            "compact",
            "--rounding",
            "compensated",
            "--bias-correction",
            "--range",
            "percentile",
            "-o",
            "{}/b.lwq",
        ],
        vec!["quantize", &m, "--calib", &d, "--scheme", "w8a8", "--norm", "data", "-o", "{}/c.lwq"],
        vec!["codegen", "{}/a.lwq", "-o", "{}/a.rs"],
        vec!["inspect", "{}/b.lwq", "--json"],
        vec!["run", "{}/a.lwq", "--data", &t, "-o", "{}/run.csv"],
        vec!["run", "{}/c.lwq", "--data", &t, "--int", "-o", "{}/run_int.csv"],
        vec!["run", &m, "--data", &t, "-o", "{}/run_float.csv"],
        vec!["report", "{}/a.lwq", "--float", &m, "--data", &t, "--json", "{}/report.json"],
        vec!["report", "{}/b.lwq", "--float", &m, "--data", &t, "--plot", "{}", "--window", "200"],
        vec!["sweep", &m, "--calib", &d, "--data", &t, "--json", "{}/sweep.json"],
    ]);
    assert!(n >= 12, "only {n} files compared");
}

#[test]
fn a_blob_does_not_depend_on_its_path() {
    let dir = tempfile::tempdir().unwrap();
    let (m, d) = (example("lstm_x4_h16.safetensors"), example("signal.csv"));
    run_in(dir.path(), &["quantize", &m, "--calib", &d, "-o", "{}/one.lwq"]);
    std::fs::create_dir(dir.path().join("sub")).unwrap();
    run_in(dir.path(), &["quantize", &m, "--calib", &d, "-o", "{}/sub/two.lwq"]);
    let one = std::fs::read(dir.path().join("one.lwq")).unwrap();
    assert!(one == std::fs::read(dir.path().join("sub/two.lwq")).unwrap());
}

#[test]
fn simulate_fit_and_detect_are_byte_identical() {
    let scen = root().join("demo-data/scenario.toml").display().to_string();
    let demo_model = root().join("demo-data/model.safetensors").display().to_string();
    let n = twice(&[
        vec!["simulate", &scen, "--set", "sample", "-o", "{}/s.csv", "--events", "{}/ev.json"],
        vec!["simulate", &scen, "--set", "sample", "-o", "{}/s.npy"],
        vec!["fit", "--train", "{}/s.csv", "-o", "{}/m.safetensors", "--hidden", "4", "--epochs", "2"],
        vec!["quantize", &demo_model, "--calib", "{}/s.csv", "--detector", "-o", "{}/det.lwq"],
        vec!["detect", "{}/det.lwq", "--data", "{}/s.csv", "--json", "{}/detect.json"],
    ]);
    assert_eq!(n, 6);
}
