//! The demo end to end (`lapwing demo` with the shipped weights) against the
//! anomaly-detection targets of DESIGN.md section 7 (our own design targets,
//! not an outside source): on the demo test set, the quantized w8a16
//! detector finds every injected fault, raises at most one false alarm per
//! hour of normal running, agrees with its float twin on at least 99.9 % of
//! the samples, and its alarms start at most 2 samples apart from the
//! twin's. Runs the whole pipeline (about 40 s in release builds).

use lapwing_tools::demo::{run, DemoOptions};
use lapwing_tools::rounding::Rounding;
use std::path::Path;

/// With the demo's default, compensated weight rounding.
#[test]
fn demo_meets_the_detection_targets() {
    let out = tempfile::tempdir().unwrap();
    let opts = DemoOptions {
        demo_data: Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo-data"),
        out: out.path().to_path_buf(),
        refit: false,
        rounding: Rounding::Compensated,
        verbose: false,
    };
    let s = run(&opts).unwrap();
    println!("{}", s.to_text(out.path()));
    assert_eq!(s.scheme, "w8a16-c16-standard");
    assert_eq!(s.faults, 8, "the scenario's test set injects 8 faults");
    assert_eq!(s.detected, s.faults, "missed faults");
    assert!(s.normal_hours >= 1.0, "{} h of normal running", s.normal_hours);
    assert!(s.false_alarms_per_hour <= 1.0, "{} false alarms per hour", s.false_alarms_per_hour);
    assert!(s.alarm_sample_agreement >= 0.999, "sample agreement {}", s.alarm_sample_agreement);
    assert!(s.alarm_max_onset_shift <= 2, "onset shift {} samples", s.alarm_max_onset_shift);
    // Fidelity in normal running: DESIGN.md section 9's w8a16 output target.
    assert!(s.output_sqnr_median_window_db >= 40.0, "{} dB", s.output_sqnr_median_window_db);
    for f in ["demo.lwq", "report.json", "detect.json", "model.rs", "test.csv", "calib.csv"] {
        assert!(out.path().join(f).is_file(), "{f} not written");
    }
    assert!(out.path().join("plots").read_dir().unwrap().count() >= 3, "plots not written");
}
