//! The `lapwing` binary: exit codes, help and the built-in example.

use std::process::Command;

fn lapwing(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_lapwing")).args(args).output().expect("run lapwing")
}

#[test]
fn help_lists_every_planned_subcommand() {
    let out = lapwing(&["--help"]);
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    for cmd in ["fit", "quantize", "run", "report", "sweep", "inspect", "detect", "codegen", "demo"] {
        assert!(text.contains(&format!("  {cmd} ")), "--help does not list `{cmd}`:\n{text}");
    }
}

#[test]
fn unimplemented_subcommands_say_so_and_exit_2() {
    for cmd in ["fit", "simulate"] {
        let out = lapwing(&[cmd, "model.safetensors"]);
        assert_eq!(out.status.code(), Some(2), "`lapwing {cmd}` exit status");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(err.contains("not implemented yet") && err.lines().count() == 1, "`lapwing {cmd}`: {err}");
    }
}

#[test]
fn demo_json_reports_fidelity() {
    let out = lapwing(&["demo", "--steps", "3000", "--json"]);
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
    let out = lapwing(&["demo", "--cell", "c64"]);
    assert_eq!(out.status.code(), Some(2));
    let out = lapwing(&["demo", "--steps", "0"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("--steps"));
}
