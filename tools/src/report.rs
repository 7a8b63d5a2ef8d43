//! The error report: the float reference and the device code side by side
//! on the same data, tensor by tensor, with error growth over time and the
//! footprint. This is what an engineer reads before flashing, and what the
//! error budget ([`crate::budget`]) checks.
//!
//! (Types first; the computation lives below them.)

use serde::Serialize;
use std::collections::BTreeMap;

/// Error figures of one tensor (all its values over all steps).
#[derive(Clone, Debug, Default, Serialize, PartialEq)]
pub struct TensorReport {
    /// Largest |float - quantized| in real units.
    pub max_abs: f64,
    /// Root mean square error in real units.
    pub rmse: f64,
    /// Signal-to-quantization-noise ratio, dB (`+inf` serialized as `null`
    /// when the two agree exactly).
    pub sqnr_db: f64,
    /// Cosine similarity of the float and quantized value sequences.
    pub cosine: f64,
    /// How many quantized values sat at a saturation limit of their format
    /// (for gates: a pre-activation at or beyond the table's input domain).
    pub saturated: u64,
    /// `saturated` divided by the values compared.
    pub saturation_rate: f64,
    /// Values compared (steps x units).
    pub count: u64,
}

/// Error growth over time for one tensor.
#[derive(Clone, Debug, Default, Serialize, PartialEq)]
pub struct Drift {
    /// SQNR over the first tenth of the steps, dB.
    pub first_tenth_sqnr_db: f64,
    /// SQNR over the last tenth of the steps, dB.
    pub last_tenth_sqnr_db: f64,
    /// `first - last`: positive when the error grew (dB).
    pub drift_db: f64,
    /// Steps per window of the windowed SQNR.
    pub window_steps: usize,
    /// The lowest windowed SQNR, dB.
    pub worst_window_sqnr_db: f64,
    /// First step of that window.
    pub worst_window_step: usize,
    /// SQNR of every window, in order (dB).
    pub windows_sqnr_db: Vec<f64>,
}

/// Device footprint of the quantized model.
#[derive(Clone, Debug, Default, Serialize, PartialEq)]
pub struct ReportFootprint {
    /// Model data in flash: blob plus the activation table.
    pub flash_bytes: usize,
    /// The blob alone.
    pub blob_bytes: usize,
    /// The activation table compiled into the core.
    pub table_bytes: usize,
    /// Caller-owned state, scratch included.
    pub ram_bytes: usize,
    /// Multiply-accumulates per step.
    pub macs_per_step: usize,
}

/// One violated budget limit.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct Violation {
    /// The budget key, e.g. `output_sqnr_min_db`.
    pub limit: String,
    /// What was measured.
    pub measured: f64,
    /// What the budget allows.
    pub allowed: f64,
    /// A readable sentence: what, measured vs allowed.
    pub message: String,
}

/// Result of checking a budget.
#[derive(Clone, Debug, Default, Serialize, PartialEq)]
pub struct BudgetResult {
    /// True when no limit is violated (also true when no budget was given).
    pub passed: bool,
    /// Whether a budget was checked at all.
    pub checked: bool,
    /// Every violated limit.
    pub violations: Vec<Violation>,
}

/// Histogram of quantized-minus-float errors of one gate, in LSB of Q0.15
/// (`2^-15`), bins of one LSB from `-HIST_HALF` to `+HIST_HALF`, with the
/// first and last bins also counting everything beyond.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct ErrorHistogram {
    /// Counts per bin; bin `i` covers `[i - HIST_HALF - 0.5, i - HIST_HALF + 0.5)` LSB.
    pub counts: Vec<u64>,
}

/// Half-width of [`ErrorHistogram`] in LSB.
pub const HIST_HALF: i64 = 32;

/// Series the plots draw (not part of the JSON report).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct PlotData {
    /// First step of the traced window.
    pub trace_start: usize,
    /// Float outputs over the window: `[step][output]`.
    pub trace_float: Vec<Vec<f32>>,
    /// Quantized outputs (real units) over the window.
    pub trace_quant: Vec<Vec<f32>>,
    /// Output names (`y0`, ... or `h0`, ...).
    pub output_names: Vec<String>,
    /// Windowed output SQNR: `(first step of window, dB)`.
    pub sqnr_windows: Vec<(usize, f64)>,
    /// Per layer, per gate (`i, f, g, o`): error histograms.
    pub gate_hist: Vec<[ErrorHistogram; 4]>,
}

/// The whole report.
#[derive(Clone, Debug, Default, Serialize, PartialEq)]
pub struct Report {
    /// Scheme, e.g. `w8a16-c16-standard`.
    pub scheme: String,
    /// Steps compared.
    pub steps: usize,
    /// Per tensor: `output`, `layer<k>.hidden`, `layer<k>.cell`,
    /// `layer<k>.gate.<i|f|g|o>`.
    pub tensors: BTreeMap<String, TensorReport>,
    /// Error growth: `output`, and `layer<k>.hidden`.
    pub drift: BTreeMap<String, Drift>,
    /// Footprint on the device.
    pub footprint: ReportFootprint,
    /// Fraction of samples where the float and quantized detectors agree
    /// (`None` until the model carries a detector).
    pub alarm_agreement: Option<f64>,
    /// Budget check.
    pub budget: BudgetResult,
    /// Data for the plots.
    #[serde(skip)]
    pub plot: PlotData,
}
