//! `lapwing report` and `lapwing sweep` through the binary on the shipped
//! example: JSON keys, plots, budget exit codes (0 within, 1 violated, 2 bad
//! input).

mod common;

use common::*;
use std::path::Path;
use std::process::Output;

/// Quantizes the shipped example into `dir` with the given headroom.
fn blob(dir: &Path, headroom: &str) -> String {
    let p = dir.join("example.lwq").display().to_string();
    let o = lapwing(&[
        "quantize",
        &example("lstm_x4_h16.safetensors"),
        "--calib",
        &example("signal.csv"),
        "-o",
        &p,
        "--headroom",
        headroom,
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    p
}

#[test]
fn report_json_has_every_documented_key_and_plots_are_written() {
    let dir = tempfile::tempdir().unwrap();
    let b = blob(dir.path(), "1.6");
    let plots = dir.path().join("plots");
    std::fs::create_dir(&plots).unwrap();
    let json = dir.path().join("report.json");
    let o = lapwing(&[
        "report",
        &b,
        "--float",
        &example("lstm_x4_h16.safetensors"),
        "--data",
        &example("signal_test.csv"),
        "--json",
        &json.display().to_string(),
        "--plot",
        &plots.display().to_string(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("layer1.gate.f") && text.contains("first tenth"), "{text}");
    let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert_eq!(v["scheme"], "w8a16-c16-standard");
    assert_eq!(v["steps"], 4000);
    let mut names = vec!["output".to_string()];
    for k in 0..2 {
        names.push(format!("layer{k}.hidden"));
        names.push(format!("layer{k}.cell"));
        for g in ["i", "f", "g", "o"] {
            names.push(format!("layer{k}.gate.{g}"));
        }
    }
    for n in &names {
        for key in ["max_abs", "rmse", "sqnr_db", "cosine", "saturated"] {
            assert!(v["tensors"][n][key].is_number(), "tensors.{n}.{key} missing: {}", v["tensors"][n]);
        }
    }
    for key in ["first_tenth_sqnr_db", "last_tenth_sqnr_db"] {
        assert!(v["drift"]["output"][key].is_number(), "drift.output.{key}");
    }
    for key in ["flash_bytes", "ram_bytes", "macs_per_step"] {
        assert!(v["footprint"][key].is_u64(), "footprint.{key}");
    }
    assert_eq!(v["footprint"]["ram_bytes"], 160);
    assert_eq!(v["budget"]["passed"], true);
    assert!(v["budget"]["violations"].as_array().unwrap().is_empty());
    for f in ["output_trace.svg", "output_error.svg", "gate_error_hist.svg"] {
        let svg = std::fs::read_to_string(plots.join(f)).unwrap();
        assert!(svg.starts_with("<svg") && svg.contains("step"), "{f}");
    }
}

fn report_with_budget(b: &str, budget: &str) -> Output {
    lapwing(&[
        "report",
        b,
        "--float",
        &example("lstm_x4_h16.safetensors"),
        "--data",
        &example("signal_test.csv"),
        "--budget",
        budget,
    ])
}

#[test]
fn budget_exit_codes() {
    let dir = tempfile::tempdir().unwrap();
    let shipped = root().join("examples/budget/fan-monitor.toml").display().to_string();
    // Headroom 1.6: within the shipped budget.
    let b = blob(dir.path(), "1.6");
    let o = report_with_budget(&b, &shipped);
    assert_eq!(o.status.code(), Some(0), "{}{}", String::from_utf8_lossy(&o.stdout), stderr(&o));
    // A budget that must fail: 70 dB output SQNR and 100 B of RAM.
    let strict = dir.path().join("strict.toml");
    std::fs::write(&strict, "output_sqnr_min_db = 70.0\nram_max_bytes = 100\n").unwrap();
    let o = report_with_budget(&b, &strict.display().to_string());
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.contains("output_sqnr_min_db") && text.contains("below the budget's 70.0 dB"), "{text}");
    assert!(text.contains("ram_max_bytes") && text.contains("160 B"), "{text}");
    // The default headroom lets held-out data saturate the head output:
    // the shipped budget's saturation limit catches it.
    let tight = dir.path().join("tight");
    std::fs::create_dir(&tight).unwrap();
    let b125 = blob(&tight, "1.25");
    let o = report_with_budget(&b125, &shipped);
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stdout).contains("saturation_rate_max"));
    // Bad budget: exit 2, one line naming the file and the key.
    let bad = dir.path().join("bad.toml");
    std::fs::write(&bad, "output_sqnr_min = 40.0\n").unwrap();
    let o = report_with_budget(&b, &bad.display().to_string());
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(e.contains("bad.toml") && e.contains("output_sqnr_min") && e.trim_end().lines().count() == 1, "{e}");
}

#[test]
fn sweep_reports_every_configuration_and_recommends_one() {
    let dir = tempfile::tempdir().unwrap();
    let json = dir.path().join("sweep.json");
    let o = lapwing(&[
        "sweep",
        &example("lstm_x4_h16.safetensors"),
        "--calib",
        &example("signal.csv"),
        "--data",
        &example("signal_test.csv"),
        "--headroom",
        "1.6",
        "--budget",
        &root().join("examples/budget/fan-monitor.toml").display().to_string(),
        "--json",
        &json.display().to_string(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let rows = v["rows"].as_array().unwrap();
    // 3 schemes x 2 cells x 2 tables x 2 roundings (nearest, compensated).
    assert_eq!(rows.len(), 24);
    assert_eq!(rows.iter().filter(|r| r["rounding"] == "compensated").count(), 12);
    let i = v["recommended"].as_u64().expect("a recommendation") as usize;
    let best = &rows[i];
    assert_eq!(best["within_budget"], true);
    let size = |r: &serde_json::Value| r["flash_bytes"].as_u64().unwrap() + r["ram_bytes"].as_u64().unwrap();
    for r in rows.iter().filter(|r| r["within_budget"] == true) {
        assert!(size(best) <= size(r), "{} is not the smallest passing row", best["scheme"]);
    }
    // w16a16 weights take more flash than w8a16's, and w8a8 less RAM.
    let find = |s: &str, rounding: &str| rows.iter().find(|r| r["scheme"] == s && r["rounding"] == rounding).unwrap();
    let (w16, w8, w8a8) = (
        find("w16a16-c16-standard", "nearest"),
        find("w8a16-c16-standard", "nearest"),
        find("w8a8-c16-standard", "nearest"),
    );
    assert!(w16["flash_bytes"].as_u64() > w8["flash_bytes"].as_u64());
    assert!(w8a8["ram_bytes"].as_u64() < w8["ram_bytes"].as_u64());
    // The rounding changes which integers are stored, not the footprint.
    let comp = find("w8a16-c16-standard", "compensated");
    assert_eq!(comp["flash_bytes"], w8["flash_bytes"]);
    assert_eq!(comp["ram_bytes"], w8["ram_bytes"]);
}

/// `sweep --firmware`: instruction counts scaled from the firmware check's
/// measurements of the demo-shaped model on one target (here a small file
/// in the check's format); configurations it did not measure show none.
#[test]
fn sweep_scales_measured_instruction_counts() {
    let dir = tempfile::tempdir().unwrap();
    let meas = dir.path().join("measurements.json");
    let run = |target: &str, model: &str, scheme: &str, ipm: f64| {
        serde_json::json!({"kind": "run", "target": target, "model": model, "scheme": scheme, "cell": "c16",
            "table": "standard", "instructions_per_mac": ipm, "macs_per_step": 4736})
    };
    let file = serde_json::json!({"runs": [
        run("thumbv7em-none-eabihf", "demo X4 H32 Y4", "w8a16", 10.0),
        run("thumbv7em-none-eabihf", "example X4 H16x2 Y2", "w8a8", 99.0),
        run("thumbv6m-none-eabi", "demo X4 H32 Y4", "w8a8", 20.0),
    ]});
    std::fs::write(&meas, file.to_string()).unwrap();
    let json = dir.path().join("sweep.json");
    let args = |target: &str| {
        vec![
            "sweep".to_string(),
            example("lstm_x4_h16.safetensors"),
            "--calib".into(),
            example("signal.csv"),
            "--data".into(),
            example("signal_test.csv"),
            "--headroom".into(),
            "1.6".into(),
            "--rounding".into(),
            "nearest".into(),
            "--firmware".into(),
            meas.display().to_string(),
            "--target".into(),
            target.to_string(),
            "--json".into(),
            json.display().to_string(),
        ]
    };
    let a = args("thumbv7em-none-eabihf");
    let o = lapwing(&a.iter().map(String::as_str).collect::<Vec<_>>());
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert_eq!(v["measured_target"], "thumbv7em-none-eabihf");
    for r in v["rows"].as_array().unwrap() {
        let scaled = &r["instructions_per_step_scaled"];
        if r["scheme"] == "w8a16-c16-standard" {
            // 10 instructions per MAC x the example's 3,360 MACs per step.
            assert_eq!(r["macs_per_step"], 3360);
            assert_eq!(scaled, 33_600, "{r}");
        } else {
            // Not measured on this target, or measured on another model shape only.
            assert!(scaled.is_null(), "{r}");
        }
    }
    // A target the file does not have: exit 2, naming the file and the targets it has.
    let b = args("thumbv8m.main-none-eabihf");
    let o = lapwing(&b.iter().map(String::as_str).collect::<Vec<_>>());
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(e.contains("measurements.json") && e.contains("thumbv6m-none-eabi"), "{e}");
}
