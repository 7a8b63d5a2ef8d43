//! The `lapwing` binary: exit codes, help, simulate + fit, and the built-in
//! example.

use std::process::Command;

fn lapwing(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_lapwing")).args(args).output().expect("run lapwing")
}

#[test]
fn help_lists_every_subcommand() {
    let out = lapwing(&["--help"]);
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    for cmd in
        ["fit", "quantize", "run", "report", "sweep", "inspect", "detect", "codegen", "simulate", "demo", "example"]
    {
        assert!(text.contains(&format!("  {cmd} ")), "--help does not list `{cmd}`:\n{text}");
    }
}

#[test]
fn simulate_and_fit_make_a_model_the_pipeline_takes() {
    let dir = tempfile::tempdir().unwrap();
    let p = |n: &str| dir.path().join(n).display().to_string();
    let scen = concat!(env!("CARGO_MANIFEST_DIR"), "/../demo-data/scenario.toml");
    let out = lapwing(&["simulate", scen, "--set", "sample", "-o", &p("sample.csv"), "--events", &p("ev.json")]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8_lossy(&out.stdout);
    // The hash pinned by tests/scenario_hash.rs for the sample set.
    assert!(text.contains("4000 rows") && text.contains("0x2aca5304916fcce3"), "{text}");
    let ev: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(p("ev.json")).unwrap()).unwrap();
    assert_eq!(ev[0]["kind"], "bearing");
    assert_eq!((ev[0]["start"].as_u64(), ev[0]["end"].as_u64()), (Some(1600), Some(2800)));

    let out =
        lapwing(&["fit", "--train", &p("sample.csv"), "-o", &p("m.safetensors"), "--hidden", "8", "--epochs", "3"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("X4 H8 x1 layer(s) + head Y4") && text.contains("wrote"), "{text}");
    let out = lapwing(&["quantize", &p("m.safetensors"), "--calib", &p("sample.csv"), "--detector", "-o", &p("m.lwq")]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let out = lapwing(&["detect", &p("m.lwq"), "--data", &p("sample.csv"), "--json", "-"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["confusion"]["faults"], 1);
}

#[test]
fn simulate_and_fit_refuse_bad_input_without_output() {
    let dir = tempfile::tempdir().unwrap();
    let p = |n: &str| dir.path().join(n).display().to_string();
    let scen = concat!(env!("CARGO_MANIFEST_DIR"), "/../demo-data/scenario.toml");
    let cases: Vec<(Vec<String>, &str)> = vec![
        (
            vec!["simulate".into(), scen.into(), "--set".into(), "holdout".into(), "-o".into(), p("a.csv")],
            "--set holdout",
        ),
        (vec!["simulate".into(), p("none.toml"), "-o".into(), p("a.csv")], "none.toml"),
        (vec!["simulate".into(), scen.into(), "-o".into(), p("a.txt")], "unsupported file type"),
        (vec!["simulate".into(), scen.into(), "-o".into(), p("missing/a.csv")], "does not exist"),
        (vec!["fit".into(), "--train".into(), p("none.csv"), "-o".into(), p("m.safetensors")], "none.csv"),
        (vec!["fit".into(), "--train".into(), scen.into(), "-o".into(), p("missing/m.safetensors")], "does not exist"),
    ];
    for (args, needle) in cases {
        let a: Vec<&str> = args.iter().map(String::as_str).collect();
        let out = lapwing(&a);
        assert_eq!(out.status.code(), Some(2), "{a:?}");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(err.contains(needle) && err.lines().count() == 1, "{a:?}: {err}");
    }
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0, "output left behind");
    // A training file with a non-numeric cell names the line and column.
    std::fs::write(p("bad.csv"), "a,b\n1,2\n3,x\n").unwrap();
    let out = lapwing(&["fit", "--train", &p("bad.csv"), "-o", &p("m.safetensors")]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("bad.csv") && err.contains("line 3"), "{err}");
    assert!(!dir.path().join("m.safetensors").exists());
}

#[test]
fn example_json_reports_fidelity() {
    let out = lapwing(&["example", "--steps", "3000", "--json"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON on stdout");
    assert_eq!(v["scheme"], "w8a16-c16-standard");
    assert_eq!(v["steps"], 3000);
    let output = &v["tensors"]["output"];
    // DESIGN.md section 9 target for w8a16.
    assert!(output["sqnr_db"].as_f64().unwrap() >= 40.0, "{output}");
    assert_eq!(v["footprint"]["ram_bytes"], 192);
}

#[test]
fn bad_option_values_are_usage_errors() {
    let out = lapwing(&["example", "--cell", "c64"]);
    assert_eq!(out.status.code(), Some(2));
    let out = lapwing(&["example", "--steps", "0"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("--steps"));
}
