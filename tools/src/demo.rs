//! `lapwing demo`: the whole pipeline on the shipped demo scenario (the
//! invented greenhouse ventilation line of `demo-data/`).
//!
//! 1. generate the training, calibration and test sets from
//!    `demo-data/scenario.toml` (deterministic);
//! 2. take the shipped float model `demo-data/model.safetensors`, or fit a
//!    new one on the training set (`--refit`);
//! 3. quantize (`w8a16`, `c16`, compensated weight rounding unless asked
//!    otherwise) with the anomaly detector calibrated on the calibration set;
//! 4. report float vs device code on the test set, with plots;
//! 5. run the device detector on the test set against the labelled faults;
//! 6. generate the firmware module.
//!
//! Everything is written into the output directory; the summary names the
//! figures that matter.

use crate::blob::{encode, LoadedBlob};
use crate::calibrate::RangeMethod;
use crate::detector::{self, DetectOptions, DetectorOptions};
use crate::fit::{fit, FitOptions};
use crate::import::{import, ImportOptions};
use crate::quantize::QuantOptions;
use crate::report::{report_file, ReportOptions};
use crate::rounding::{quantize_data_aware, Rounding, RoundingOptions};
use crate::scenario::{self, DataSet, Scenario};
use crate::{codegen, data, export, inspect, output, pipeline, plot};
use anyhow::{Context, Result};
use serde::Serialize;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// Options of the demo.
#[derive(Clone, Debug)]
pub struct DemoOptions {
    /// The demo-data directory (scenario file and shipped weights).
    pub demo_data: PathBuf,
    /// Output directory (created if missing).
    pub out: PathBuf,
    /// Fit a new float model instead of using the shipped one.
    pub refit: bool,
    /// Weight rounding of the quantizer.
    pub rounding: Rounding,
    /// Print progress lines.
    pub verbose: bool,
}

/// The demo's headline figures.
#[derive(Clone, Debug, Serialize)]
pub struct DemoSummary {
    /// Scheme of the blob.
    pub scheme: String,
    /// Weight rounding (`nearest` or `compensated`).
    pub rounding: String,
    /// Test rows.
    pub test_rows: usize,
    /// Output SQNR over every test row, dB (fault rows included, where the
    /// inputs may leave the calibrated range).
    pub output_sqnr_db: f64,
    /// Median of the output SQNR over the report's windows, dB: the usual
    /// fidelity, less swayed by the fault stretches.
    pub output_sqnr_median_window_db: f64,
    /// Input values that sat at the int16 limit (beyond the calibrated
    /// range times the headroom).
    pub input_saturated: u64,
    /// Worst hidden-state SQNR, dB.
    pub hidden_sqnr_db: f64,
    /// Output drift first tenth vs last tenth, dB.
    pub drift_db: f64,
    /// Flash (blob + tables) and RAM in bytes.
    pub flash_bytes: usize,
    /// RAM in bytes.
    pub ram_bytes: usize,
    /// Injected fault events and how many the device detector found.
    pub faults: usize,
    /// Detected faults.
    pub detected: usize,
    /// False alarms per hour of normal running.
    pub false_alarms_per_hour: f64,
    /// Hours of normal running in the test set.
    pub normal_hours: f64,
    /// Float twin vs device detector: sample agreement.
    pub alarm_sample_agreement: f64,
    /// Largest onset shift between matched float and device alarms.
    pub alarm_max_onset_shift: usize,
    /// Files written.
    pub files: Vec<PathBuf>,
    /// Seconds taken.
    pub seconds: f64,
}

/// Runs the demo.
///
/// # Errors
/// Any step's error, named by the step.
pub fn run(opts: &DemoOptions) -> Result<DemoSummary> {
    let t0 = Instant::now();
    let say = |msg: &str| {
        if opts.verbose {
            // Never panics on a closed stderr, unlike `eprintln!`.
            let _ = std::io::Write::write_all(&mut std::io::stderr(), format!("demo: {msg}\n").as_bytes());
        }
    };
    let scen = Scenario::load(&opts.demo_data.join("scenario.toml"))?;
    // The shipped model is read before any data set is generated, so a
    // missing or broken one fails at once.
    let shipped = if opts.refit {
        None
    } else {
        Some(import(&opts.demo_data.join("model.safetensors"), &ImportOptions::default())?)
    };
    std::fs::create_dir_all(&opts.out).with_context(|| format!("cannot create {}", opts.out.display()))?;
    let mut files = Vec::new();
    let write_set = |set: DataSet| -> Result<(PathBuf, usize)> {
        let g = scenario::generate(&scen, set).with_context(|| format!("generating the {} set", set.name()))?;
        let p = opts.out.join(format!("{}.csv", set.name()));
        scenario::write(&g, &p)?;
        Ok((p, g.rows.len()))
    };
    say(&format!("generating the data sets from {}", opts.demo_data.join("scenario.toml").display()));
    let (calib, _) = write_set(DataSet::Calib)?;
    let (test, test_rows) = write_set(DataSet::Test)?;
    files.extend([calib.clone(), test.clone()]);

    let imported = if let Some(imported) = shipped {
        imported
    } else {
        say("fitting a new float model on the training set (--refit)");
        let (train, _) = write_set(DataSet::Train)?;
        files.push(train.clone());
        let rows = data::read(&train, false)?.rows;
        let r = fit(&rows, &FitOptions { progress: opts.verbose, ..FitOptions::default() })?;
        let p = opts.out.join("model.safetensors");
        export::save_safetensors(&r.model, Some(&r.norm), &p)?;
        files.push(p.clone());
        import(&p, &ImportOptions::default())?
    };

    say(&format!("quantizing (w8a16, c16, {} rounding) with the anomaly detector", opts.rounding.name()));
    let mut model = imported.model.clone();
    if let Some(n) = &imported.norm {
        model.fold_normalization(&n.mean, &n.std)?;
    }
    let ranges = pipeline::calibrate_file(&model, &calib, RangeMethod::MinMax, false)?;
    let calib_rows = data::read(&calib, false)?.rows;
    let ropts = RoundingOptions { rounding: opts.rounding, ..Default::default() };
    let mut q = quantize_data_aware(&model, &ranges, &QuantOptions::default(), &ropts, &calib_rows)?;
    let params = detector::calibrate(&model, &calib_rows, &DetectorOptions::default())?;
    q.detector = Some(detector::to_fixed(&params, &q.input_scale, &q.output_scale)?);
    let blob_path = opts.out.join("demo.lwq");
    output::write_atomic(&blob_path, &encode(&q)?)?;
    files.push(blob_path.clone());
    let blob = LoadedBlob::read(&blob_path)?;
    let parsed = blob.parse()?;

    say("reporting float vs device code on the test set");
    let report = report_file(&model, &parsed, &test, &ReportOptions::default(), opts.verbose)?;
    let plots = opts.out.join("plots");
    std::fs::create_dir_all(&plots).with_context(|| format!("cannot create {}", plots.display()))?;
    files.extend(plot::write_plots(&report, &plots, Some(40.0))?);
    let report_json = opts.out.join("report.json");
    output::write_text(&report_json, &(serde_json::to_string_pretty(&report)? + "\n"))?;
    files.push(report_json);

    say("running the device detector on the test set");
    let dopts = DetectOptions::default();
    let detection = detector::detect_file(&parsed, &test, &dopts, opts.verbose)?;
    let detect_json = opts.out.join("detect.json");
    output::write_text(&detect_json, &(serde_json::to_string_pretty(&detection)? + "\n"))?;
    files.push(detect_json);

    let module = opts.out.join("model.rs");
    output::write_text(&module, &codegen::module(blob.bytes(), &inspect::inspect(&parsed), "demo.lwq"))?;
    files.push(module);

    let c = detection.confusion.clone().context("the test set has no labels")?;
    let alarms = report.alarms.clone().unwrap_or_default();
    let hidden = report
        .tensors
        .iter()
        .filter(|(n, _)| n.ends_with(".hidden"))
        .map(|(_, t)| t.sqnr_db)
        .fold(f64::INFINITY, f64::min);
    Ok(DemoSummary {
        scheme: report.scheme.clone(),
        rounding: opts.rounding.name().to_string(),
        test_rows,
        output_sqnr_db: report.tensors.get("output").map_or(f64::NAN, |t| t.sqnr_db),
        output_sqnr_median_window_db: report.drift.get("output").map_or(f64::NAN, |d| median(&d.windows_sqnr_db)),
        input_saturated: report.tensors.get("input").map_or(0, |t| t.saturated),
        hidden_sqnr_db: hidden,
        drift_db: report.drift.get("output").map_or(f64::NAN, |d| d.drift_db),
        flash_bytes: report.footprint.flash_bytes,
        ram_bytes: report.footprint.ram_bytes,
        faults: c.faults,
        detected: c.detected,
        false_alarms_per_hour: c.false_alarms_per_hour,
        normal_hours: c.normal_hours,
        alarm_sample_agreement: alarms.sample_agreement,
        alarm_max_onset_shift: alarms.max_onset_shift,
        files,
        seconds: t0.elapsed().as_secs_f64(),
    })
}

/// Median of the finite values (NaN when there are none).
fn median(v: &[f64]) -> f64 {
    let mut f: Vec<f64> = v.iter().copied().filter(|x| x.is_finite()).collect();
    f.sort_by(f64::total_cmp);
    match f.len() {
        0 => f64::NAN,
        n if n % 2 == 1 => f[n / 2],
        n => 0.5 * (f[n / 2 - 1] + f[n / 2]),
    }
}

impl DemoSummary {
    /// The closing summary.
    pub fn to_text(&self, out: &Path) -> String {
        let mut s = String::new();
        let _ =
            writeln!(s, "Lapwing demo: greenhouse ventilation line (invented scenario), {} test rows", self.test_rows);
        let _ = writeln!(
            s,
            "  quantized model {} ({} rounding) vs the float reference: output SQNR {:.1} dB in the median window, \
             {:.1} dB over all rows",
            self.scheme, self.rounding, self.output_sqnr_median_window_db, self.output_sqnr_db
        );
        let _ = writeln!(
            s,
            "    (over all rows the hidden state is at {:.1} dB: the faults drive {} input values past the calibrated range)",
            self.hidden_sqnr_db, self.input_saturated
        );
        let _ = writeln!(s, "  footprint: {} B flash (blob + tables), {} B RAM", self.flash_bytes, self.ram_bytes);
        let _ = writeln!(
            s,
            "  device detector: {} of {} injected faults detected; {:.2} false alarms per hour over {:.2} h of normal running",
            self.detected, self.faults, self.false_alarms_per_hour, self.normal_hours
        );
        let _ = writeln!(
            s,
            "  float twin vs device alarms: {:.3} % sample agreement, onset shift at most {} samples",
            100.0 * self.alarm_sample_agreement,
            self.alarm_max_onset_shift
        );
        let _ = writeln!(
            s,
            "  everything is in {} (plots in {}/plots), {:.0} s",
            out.display(),
            out.display(),
            self.seconds
        );
        s
    }
}
