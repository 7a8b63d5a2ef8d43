//! The shipped error budget `examples/budget/fan-monitor.toml`, checked the
//! way a firmware repository would check its own: load the budget, get a
//! report, `assert_within`.
//!
//! Template for users: copy this file, point `BUDGET` at your budget and make
//! `report_for_test` produce your model's report. Only `report_for_test` is
//! synthetic here (the report function does not exist yet); everything else
//! stays when it is swapped for a real report.

use lapwing_tools::budget::{assert_within, Budget};
use lapwing_tools::report::{Drift, Report, ReportFootprint, TensorReport};
use std::collections::BTreeMap;
use std::path::PathBuf;

/// The shipped budget, relative to the workspace root.
const BUDGET: &str = "examples/budget/fan-monitor.toml";

fn budget() -> Budget {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("..").join(BUDGET);
    Budget::load(&path).unwrap_or_else(|e| panic!("{e:#}"))
}

/// The report under test. Synthetic for now: figures in the range the
/// README measures for w8a16 (output 44-48 dB, hidden 46-50 dB) and the
/// footprint of `examples/pipeline/` (2 layers, H=16, 4 inputs, 2 outputs).
/// Swap for the real report (`lapwing_tools::report::...` on the model,
/// blob and data) once it exists.
fn report_for_test() -> Report {
    let steps = 10_000;
    let (hidden, outputs) = (16u64, 2u64);
    let tensor = |sqnr_db: f64, saturated: u64, count: u64| TensorReport {
        max_abs: 2e-3,
        rmse: 3e-4,
        sqnr_db,
        cosine: 0.99998,
        saturated,
        saturation_rate: saturated as f64 / count as f64,
        count,
    };
    let drift = |first: f64, last: f64| Drift {
        first_tenth_sqnr_db: first,
        last_tenth_sqnr_db: last,
        drift_db: first - last,
        window_steps: 500,
        worst_window_sqnr_db: last - 0.3,
        worst_window_step: 9_500,
        windows_sqnr_db: vec![first, (first + last) / 2.0, last],
    };

    let per_layer = steps * hidden;
    let mut tensors = BTreeMap::new();
    tensors.insert("output".to_string(), tensor(45.3, 0, steps * outputs));
    let mut drifts = BTreeMap::new();
    drifts.insert("output".to_string(), drift(45.6, 45.0));
    for k in 0..2 {
        tensors.insert(format!("layer{k}.hidden"), tensor(48.1 - k as f64, 0, per_layer));
        tensors.insert(format!("layer{k}.cell"), tensor(44.2 - k as f64, 0, per_layer));
        for (g, saturated) in [("i", 4), ("f", 12), ("g", 2), ("o", 3)] {
            tensors.insert(format!("layer{k}.gate.{g}"), tensor(52.0, saturated, per_layer));
        }
        drifts.insert(format!("layer{k}.hidden"), drift(48.3 - k as f64, 47.9 - k as f64));
    }
    Report {
        scheme: "w8a16-c16-standard".into(),
        steps: steps as usize,
        tensors,
        drift: drifts,
        footprint: ReportFootprint {
            flash_bytes: 5704 + 1072,
            blob_bytes: 5704,
            table_bytes: 1072,
            ram_bytes: 160,
            macs_per_step: 3360,
        },
        alarm_agreement: None,
        ..Report::default()
    }
}

#[test]
fn shipped_budget_is_the_documented_one() {
    let b = budget();
    assert_eq!(b.output_sqnr_min_db, Some(40.0));
    assert_eq!(b.hidden_sqnr_min_db, Some(40.0));
    assert_eq!(b.drift_max_db, Some(3.0));
    assert_eq!(b.saturation_rate_max, Some(0.001));
    assert_eq!(b.flash_max_bytes, Some(16 * 1024));
    assert_eq!(b.ram_max_bytes, Some(2 * 1024));
    // No detector yet: the key is shown commented out only.
    assert_eq!(b.alarm_agreement_min, None);
}

#[test]
fn model_is_within_budget() {
    if let Err(e) = assert_within(&report_for_test(), &budget()) {
        panic!("{e:#}");
    }
}

#[test]
fn degraded_model_fails_naming_each_limit() {
    let budget = budget();
    let mut report = report_for_test();
    report.tensors.get_mut("output").expect("the report has an output tensor").sqnr_db = 30.0;
    report.footprint.ram_bytes = 4096;

    let result = budget.check(&report).unwrap_or_else(|e| panic!("{e:#}"));
    assert!(result.checked && !result.passed);
    let found: Vec<(&str, f64, f64)> =
        result.violations.iter().map(|v| (v.limit.as_str(), v.measured, v.allowed)).collect();
    assert_eq!(found, [("output_sqnr_min_db", 30.0, 40.0), ("ram_max_bytes", 4096.0, 2048.0)]);

    let message = match assert_within(&report, &budget) {
        Ok(()) => panic!("a report with output SQNR 30 dB and 4096 B of RAM passed {BUDGET}"),
        Err(e) => e.to_string(),
    };
    println!("{message}");
    let lines: Vec<&str> = message.lines().collect();
    assert_eq!(lines.len(), 3, "a header and one line per violation:\n{message}");
    assert!(lines[1].contains("output SQNR 30.0 dB is below the budget's 40.0 dB (output_sqnr_min_db)"), "{message}");
    assert!(lines[2].contains("RAM 4096 B is above the budget's 2048 B (ram_max_bytes)"), "{message}");
}
