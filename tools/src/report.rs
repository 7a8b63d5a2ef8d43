//! The error report: the float reference and the device code side by side
//! on the same data, tensor by tensor, with error growth over time and the
//! footprint. This is what an engineer reads before flashing, and what the
//! error budget ([`crate::budget`]) checks.
//!
//! Types first; the engine ([`Reporter`], [`report_file`], [`report_rows`])
//! below them. The quantized side always runs a parsed blob through the
//! core's device step, so the report is the device's behaviour.
//!
//! Definitions:
//! - tensors are compared in real units: hidden state `h * 2^-frac`, cell
//!   `c * 2^-cell_frac`, gate outputs `g * 2^-31`, outputs times their scale,
//!   inputs after quantization (`input`, which shows clipping);
//! - a value is **saturated** when it sits at its format's limit: an
//!   input or head output at `int16` min/max, a hidden value at `+-(2^frac -
//!   1)`, a cell at its type's min/max, a gate whose pre-activation is at or
//!   beyond the table's input domain (`|x| >= 16`, where the table clamps);
//! - **drift**: SQNR over the first tenth of the steps against the last
//!   tenth, plus SQNR in consecutive windows (default: a hundredth of the
//!   run) and the worst one.

use crate::blob::AlignedBytes;
use crate::float_model::FloatModelData;
use crate::inspect;
use crate::metrics::ErrorAcc;
use crate::quantize::{input_to_int, QuantModelData};
use anyhow::{anyhow, bail, Result};
use lapwing::activation::{DOMAIN, ONE_Q31};
use lapwing::float::FloatModel;
use lapwing::model::Blob;
use lapwing::quant::{CellWidth, QModel};
use lapwing::Probe;
use serde::Serialize;
use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::Path;

/// Error figures of one tensor (all its values over all steps).
#[derive(Clone, Debug, Default, Serialize, PartialEq)]
pub struct TensorReport {
    /// Largest |float - quantized| in real units.
    pub max_abs: f64,
    /// Root mean square error in real units.
    pub rmse: f64,
    /// Signal-to-quantization-noise ratio, dB. In JSON, a value that is not
    /// finite is `null`: `+inf` when the two agree exactly (the usual
    /// case), `-inf` or undefined when the float signal is zero.
    pub sqnr_db: f64,
    /// Cosine similarity of the float and quantized value sequences.
    pub cosine: f64,
    /// How many quantized values sat at a saturation limit of their format
    /// (for gates: a pre-activation at or beyond the table's clamp point,
    /// `|x| >= 16`, or `>= 8` for the tanh gate g).
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
/// (`2^-15`): `2 * HIST_HALF + 1` bins of `bin_lsb` LSB centred on 0, the
/// first and last bins also counting everything beyond.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct ErrorHistogram {
    /// Counts per bin; bin `i` is centred on `(i - HIST_HALF) * bin_lsb` LSB.
    pub counts: Vec<u64>,
    /// Bin width in LSB (a power of two, chosen so that at least 99.5 % of
    /// all gate errors of the report fall inside the outer bins).
    pub bin_lsb: u32,
}

/// Half-width of [`ErrorHistogram`] in bins.
pub const HIST_HALF: i64 = 32;

/// Half-width of the fine histogram the report collects, in LSB.
const FINE_HALF: i64 = 4096;

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
    /// (`None` when the blob carries no detector).
    pub alarm_agreement: Option<f64>,
    /// Float twin vs device detector, when the blob carries one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub alarms: Option<crate::detector::AlarmAgreement>,
    /// Budget check.
    pub budget: BudgetResult,
    /// Data for the plots.
    #[serde(skip)]
    pub plot: PlotData,
    /// Cell values after the last step, per layer: `(float, quantized)` in
    /// real units (for long-memory checks).
    #[serde(skip)]
    pub last_cell: Vec<(Vec<f32>, Vec<f32>)>,
}

/// Options of the report.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct ReportOptions {
    /// Steps per drift window (default: a hundredth of the run, at least 1).
    pub window: Option<usize>,
    /// Traced window for the output plot: `(first step, steps)` (default:
    /// up to 500 steps centred on the worst window).
    pub trace: Option<(usize, usize)>,
}

/// Collects one step's values per layer and unit.
struct Collect<T> {
    pre: Vec<Vec<[T; 4]>>,
    gates: Vec<Vec<[T; 4]>>,
    cell: Vec<Vec<T>>,
    hidden: Vec<Vec<T>>,
}

impl<T: Copy + Default> Collect<T> {
    fn new(hidden: &[usize]) -> Self {
        Collect {
            pre: hidden.iter().map(|h| vec![[T::default(); 4]; *h]).collect(),
            gates: hidden.iter().map(|h| vec![[T::default(); 4]; *h]).collect(),
            cell: hidden.iter().map(|h| vec![T::default(); *h]).collect(),
            hidden: hidden.iter().map(|h| vec![T::default(); *h]).collect(),
        }
    }
}

impl<T: Copy> Probe<T> for Collect<T> {
    fn gates(&mut self, layer: usize, unit: usize, pre: &[T; 4], act: &[T; 4]) {
        if let Some(g) = self.gates.get_mut(layer).and_then(|l| l.get_mut(unit)) {
            *g = *act;
        }
        if let Some(p) = self.pre.get_mut(layer).and_then(|l| l.get_mut(unit)) {
            *p = *pre;
        }
    }
    fn state(&mut self, layer: usize, unit: usize, cell: T, hidden: T) {
        if let Some(c) = self.cell.get_mut(layer).and_then(|l| l.get_mut(unit)) {
            *c = cell;
        }
        if let Some(h) = self.hidden.get_mut(layer).and_then(|l| l.get_mut(unit)) {
            *h = hidden;
        }
    }
}

/// Error and saturation accumulator of one tensor.
#[derive(Clone, Copy, Default)]
struct TensorAcc {
    err: ErrorAcc,
    saturated: u64,
}

impl TensorAcc {
    fn add(&mut self, float: f64, quant: f64, saturated: bool) {
        self.err.add(float, quant);
        self.saturated += u64::from(saturated);
    }

    fn report(&self) -> TensorReport {
        let s = self.err.stats();
        let count = s.count as u64;
        TensorReport {
            max_abs: s.max_abs,
            rmse: s.rmse,
            sqnr_db: s.sqnr_db,
            cosine: s.cosine,
            saturated: self.saturated,
            saturation_rate: if count == 0 { 0.0 } else { self.saturated as f64 / count as f64 },
            count,
        }
    }
}

/// Per-step signal and noise energy of one tensor, for drift.
#[derive(Default)]
struct Energy {
    steps: Vec<(f64, f64)>,
}

impl Energy {
    fn push(&mut self, float: &[f64], quant: &[f64]) {
        let (mut sig, mut noise) = (0.0, 0.0);
        for (f, q) in float.iter().zip(quant) {
            sig += f * f;
            noise += (f - q) * (f - q);
        }
        self.steps.push((sig, noise));
    }

    fn sqnr(steps: &[(f64, f64)]) -> f64 {
        let (sig, noise) = steps.iter().fold((0.0, 0.0), |(a, b), (s, n)| (a + s, b + n));
        if noise == 0.0 {
            f64::INFINITY
        } else if sig == 0.0 {
            f64::NEG_INFINITY
        } else {
            10.0 * (sig / noise).log10()
        }
    }

    fn drift(&self, window: usize) -> Drift {
        let t = self.steps.len();
        let tenth = (t / 10).max(1).min(t);
        let first = Self::sqnr(self.steps.get(..tenth).unwrap_or(&[]));
        let last = Self::sqnr(self.steps.get(t - tenth..).unwrap_or(&[]));
        let window = window.clamp(1, t.max(1));
        // Windows of `window` steps; a last piece shorter than half a window
        // joins the one before it, so a stub never becomes the worst window.
        let mut bounds: Vec<(usize, usize)> = (0..t).step_by(window).map(|s| (s, (s + window).min(t))).collect();
        if bounds.len() > 1 && bounds.last().is_some_and(|(a, b)| 2 * (b - a) < window) {
            if let Some((_, end)) = bounds.pop() {
                if let Some(last) = bounds.last_mut() {
                    last.1 = end;
                }
            }
        }
        let windows: Vec<f64> = bounds.iter().map(|(a, b)| Self::sqnr(self.steps.get(*a..*b).unwrap_or(&[]))).collect();
        let (worst_i, worst) =
            windows
                .iter()
                .enumerate()
                .fold((0, f64::INFINITY), |(bi, bv), (i, v)| if *v < bv { (i, *v) } else { (bi, bv) });
        let drift_db = if first == last { 0.0 } else { first - last };
        Drift {
            first_tenth_sqnr_db: first,
            last_tenth_sqnr_db: last,
            drift_db,
            window_steps: window,
            worst_window_sqnr_db: worst,
            worst_window_step: worst_i * window,
            windows_sqnr_db: windows,
        }
    }
}

/// Streaming float-vs-device comparison: [`Reporter::push`] each input row
/// (state carries across rows), then [`Reporter::finish`].
pub struct Reporter<'a> {
    float: FloatModel<'a>,
    blob: &'a Blob<'a>,
    model: &'a QModel<'a>,
    hidden: Vec<usize>,
    hidden_unit: f64,
    hidden_max: i32,
    cell_unit: Vec<f64>,
    fs: Vec<f32>,
    qs: Vec<i16>,
    fo: Vec<f32>,
    qo: Vec<i16>,
    fc: Collect<f32>,
    qc: Collect<i32>,
    input: TensorAcc,
    output: TensorAcc,
    layer_hidden: Vec<TensorAcc>,
    layer_cell: Vec<TensorAcc>,
    layer_gates: Vec<[TensorAcc; 4]>,
    out_energy: Energy,
    hidden_energy: Vec<Energy>,
    hist: Vec<[Vec<u64>; 4]>,
    trace_float: Vec<f32>,
    trace_quant: Vec<f32>,
    steps: usize,
    detect: Option<DetectPair<'a>>,
}

/// The device detector and its float twin, run side by side.
struct DetectPair<'a> {
    device: &'a lapwing::detect::Detector<'a>,
    state: lapwing::detect::DetectorState,
    twin: crate::detector::FloatDetector,
    alarms_quant: Vec<bool>,
    alarms_float: Vec<bool>,
}

impl<'a> Reporter<'a> {
    /// Compares `float` (the reference) with the device model in `blob`.
    ///
    /// # Errors
    /// The two models have different shapes.
    pub fn new(float: &'a FloatModelData, blob: &'a Blob<'a>) -> Result<Self> {
        let fm = float.view()?;
        let qm = blob.model();
        let same_layers =
            fm.layers().iter().zip(qm.layers()).all(|(f, q)| f.input() == q.input() && f.hidden() == q.hidden());
        if fm.layers().len() != qm.layers().len()
            || !same_layers
            || fm.input_len() != qm.input_len()
            || fm.output_len() != qm.output_len()
        {
            bail!(
                "the float model and the blob have different shapes (float: {} layers, {} inputs, {} outputs; \
                 blob: {} layers, {} inputs, {} outputs)",
                fm.layers().len(),
                fm.input_len(),
                fm.output_len(),
                qm.layers().len(),
                qm.input_len(),
                qm.output_len()
            );
        }
        let hidden: Vec<usize> = fm.layers().iter().map(|l| l.hidden()).collect();
        let frac = qm.scheme().hidden_frac();
        let nl = hidden.len();
        Ok(Reporter {
            hidden_unit: 1.0 / (1u64 << frac) as f64,
            hidden_max: (1i32 << frac) - 1,
            cell_unit: qm.layers().iter().map(|l| 1.0 / (1u64 << l.cell_frac()) as f64).collect(),
            fs: vec![0.0; fm.state_len()],
            qs: vec![0; qm.state_words()],
            fo: vec![0.0; fm.output_len()],
            qo: vec![0; qm.output_len()],
            fc: Collect::new(&hidden),
            qc: Collect::new(&hidden),
            input: TensorAcc::default(),
            output: TensorAcc::default(),
            layer_hidden: vec![TensorAcc::default(); nl],
            layer_cell: vec![TensorAcc::default(); nl],
            layer_gates: vec![[TensorAcc::default(); 4]; nl],
            out_energy: Energy::default(),
            hidden_energy: (0..nl).map(|_| Energy::default()).collect(),
            hist: (0..nl).map(|_| std::array::from_fn(|_| vec![0u64; (2 * FINE_HALF + 1) as usize])).collect(),
            trace_float: Vec::new(),
            trace_quant: Vec::new(),
            steps: 0,
            detect: blob.detector().map(|d| DetectPair {
                device: d,
                state: lapwing::detect::DetectorState::new(),
                twin: crate::detector::FloatDetector::new(crate::detector::FloatDetector::params_of(
                    d,
                    blob.input_scale(),
                )),
                alarms_quant: Vec::new(),
                alarms_float: Vec::new(),
            }),
            hidden,
            float: fm,
            blob,
            model: qm,
        })
    }

    /// One step of both models on the real-valued input `x`.
    ///
    /// # Errors
    /// Wrong feature count or a non-finite value.
    pub fn push(&mut self, x: &[f32]) -> Result<()> {
        let t = self.steps;
        if let Some(i) = x.iter().position(|v| !v.is_finite()) {
            bail!("row {t}, feature {i} is {} (data must be finite)", x[i]);
        }
        let xq = input_to_int(x, self.blob.input_scale());
        if let Some(dp) = &mut self.detect {
            // Before either model steps, the outputs still hold the previous
            // step's predictions of x[t].
            let dec = dp.device.update(&mut dp.state, &xq, &self.qo).map_err(|e| anyhow!("row {t}: detector: {e}"))?;
            dp.alarms_quant.push(dec.alarm);
            dp.alarms_float.push(dp.twin.update(x, &self.fo).alarm);
        }
        self.float.step_probed(&mut self.fs, x, &mut self.fo, &mut self.fc).map_err(|e| anyhow!("row {t}: {e}"))?;
        self.model.step_probed(&mut self.qs, &xq, &mut self.qo, &mut self.qc).map_err(|e| anyhow!("row {t}: {e}"))?;
        let edge = |v: i16| v == i16::MAX || v == i16::MIN;
        for ((f, q), s) in x.iter().zip(&xq).zip(self.blob.input_scale()) {
            self.input.add(*f as f64, *q as f64 * *s as f64, edge(*q));
        }
        let has_head = self.model.head().is_some();
        let out_f: Vec<f64> = self.fo.iter().map(|v| *v as f64).collect();
        let out_q: Vec<f64> =
            self.qo.iter().zip(self.blob.output_scale()).map(|(v, s)| *v as f64 * *s as f64).collect();
        for ((f, q), raw) in out_f.iter().zip(&out_q).zip(&self.qo) {
            let sat = if has_head { edge(*raw) } else { (*raw as i32).abs() >= self.hidden_max };
            self.output.add(*f, *q, sat);
        }
        self.out_energy.push(&out_f, &out_q);
        self.trace_float.extend_from_slice(&self.fo);
        self.trace_quant.extend(out_q.iter().map(|v| *v as f32));
        let cell = self.model.cell();
        for k in 0..self.hidden.len() {
            let (fc, qc) = (&self.fc, &self.qc);
            let mut hf = Vec::with_capacity(self.hidden[k]);
            let mut hq = Vec::with_capacity(self.hidden[k]);
            for j in 0..self.hidden[k] {
                let qh = qc.hidden[k][j];
                let h_real = qh as f64 * self.hidden_unit;
                self.layer_hidden[k].add(fc.hidden[k][j] as f64, h_real, qh.abs() >= self.hidden_max);
                hf.push(fc.hidden[k][j] as f64);
                hq.push(h_real);
                let qcell = qc.cell[k][j];
                let cell_sat = match cell {
                    CellWidth::C16 => qcell >= i16::MAX as i32 || qcell <= i16::MIN as i32,
                    CellWidth::C32 => qcell == i32::MAX || qcell == i32::MIN,
                };
                self.layer_cell[k].add(fc.cell[k][j] as f64, qcell as f64 * self.cell_unit[k], cell_sat);
                for g in 0..4 {
                    let (gf, gq) = (fc.gates[k][j][g] as f64, qc.gates[k][j][g] as f64 / ONE_Q31);
                    // The tanh gate (g) reads the table at 2x, so it clamps at half the domain.
                    let edge = if g == 2 { DOMAIN as u32 / 2 } else { DOMAIN as u32 };
                    self.layer_gates[k][g].add(gf, gq, qc.pre[k][j][g].unsigned_abs() >= edge);
                    let lsb = ((gq - gf) * 32_768.0).round().clamp(-FINE_HALF as f64, FINE_HALF as f64) as i64;
                    if let Some(c) = self.hist[k][g].get_mut((lsb + FINE_HALF) as usize) {
                        *c += 1;
                    }
                }
            }
            self.hidden_energy[k].push(&hf, &hq);
        }
        self.steps += 1;
        Ok(())
    }

    /// The report.
    ///
    /// # Errors
    /// No rows were pushed.
    pub fn finish(self, opts: &ReportOptions) -> Result<Report> {
        let t = self.steps;
        if t == 0 {
            bail!("no data rows to compare on");
        }
        let window = opts.window.unwrap_or((t / 100).max(1));
        let mut tensors = BTreeMap::new();
        tensors.insert("input".to_string(), self.input.report());
        tensors.insert("output".to_string(), self.output.report());
        let mut drift = BTreeMap::new();
        let out_drift = self.out_energy.drift(window);
        for k in 0..self.hidden.len() {
            tensors.insert(format!("layer{k}.hidden"), self.layer_hidden[k].report());
            tensors.insert(format!("layer{k}.cell"), self.layer_cell[k].report());
            for (g, name) in ["i", "f", "g", "o"].iter().enumerate() {
                tensors.insert(format!("layer{k}.gate.{name}"), self.layer_gates[k][g].report());
            }
            drift.insert(format!("layer{k}.hidden"), self.hidden_energy[k].drift(window));
        }
        let y = self.model.output_len();
        // Default trace: 500 steps around the worst window.
        let (start, len) = opts.trace.unwrap_or_else(|| {
            let len = t.min(500);
            let centre = out_drift.worst_window_step + window / 2;
            (centre.saturating_sub(len / 2).min(t - len), len)
        });
        let start = start.min(t - 1);
        let end = start.saturating_add(len.max(1)).min(t);
        let rows = |v: &[f32]| -> Vec<Vec<f32>> {
            v.get(start * y..end * y).unwrap_or(&[]).chunks(y.max(1)).map(<[f32]>::to_vec).collect()
        };
        let has_head = self.model.head().is_some();
        let plot = PlotData {
            trace_start: start,
            trace_float: rows(&self.trace_float),
            trace_quant: rows(&self.trace_quant),
            output_names: (0..y).map(|i| format!("{}{i}", if has_head { "y" } else { "h" })).collect(),
            sqnr_windows: out_drift.windows_sqnr_db.iter().enumerate().map(|(i, v)| (i * window, *v)).collect(),
            gate_hist: coarse_histograms(&self.hist),
        };
        drift.insert("output".to_string(), out_drift);
        let alarms = self.detect.as_ref().map(|d| crate::detector::agreement(&d.alarms_float, &d.alarms_quant));
        let info = inspect::inspect(self.blob);
        let f = &info.footprint;
        let last_cell = (0..self.hidden.len())
            .map(|k| {
                let fl = self.fc.cell[k].clone();
                let ql = self.qc.cell[k].iter().map(|v| (*v as f64 * self.cell_unit[k]) as f32).collect();
                (fl, ql)
            })
            .collect();
        Ok(Report {
            scheme: format!("{}-{}-{}", info.scheme, info.cell, info.table),
            steps: t,
            tensors,
            drift,
            footprint: ReportFootprint {
                flash_bytes: f.flash_bytes,
                blob_bytes: f.blob_bytes,
                table_bytes: f.table_bytes,
                ram_bytes: f.ram_bytes,
                macs_per_step: f.macs_per_step,
            },
            alarm_agreement: alarms.as_ref().map(|a| a.sample_agreement),
            alarms,
            budget: BudgetResult { passed: true, checked: false, violations: Vec::new() },
            plot,
            last_cell,
        })
    }
}

/// Rebins the fine 1-LSB gate histograms into [`ErrorHistogram`]s with one
/// common power-of-two bin width that keeps 99.5 % of all errors inside.
fn coarse_histograms(fine: &[[Vec<u64>; 4]]) -> Vec<[ErrorHistogram; 4]> {
    let total: u64 = fine.iter().flatten().flatten().sum();
    let within = |half: i64| -> u64 {
        fine.iter()
            .flatten()
            .map(|h| {
                h.iter().enumerate().filter(|(i, _)| (*i as i64 - FINE_HALF).abs() <= half).map(|(_, c)| c).sum::<u64>()
            })
            .sum()
    };
    let mut bin = 1i64;
    // Inside means inside the inner bins: the outer ones start half a bin
    // before HIST_HALF * bin and also hold everything beyond.
    while bin < FINE_HALF / HIST_HALF && (within(bin * HIST_HALF - bin / 2 - 1) as f64) < 0.995 * total as f64 {
        bin *= 2;
    }
    fine.iter()
        .map(|l| {
            std::array::from_fn(|g| {
                let mut counts = vec![0u64; (2 * HIST_HALF + 1) as usize];
                for (i, c) in l[g].iter().enumerate() {
                    let e = i as i64 - FINE_HALF;
                    // Round to the nearest bin centre, half away from zero.
                    let b = (e.signum() * ((e.abs() + bin / 2) / bin)).clamp(-HIST_HALF, HIST_HALF);
                    if let Some(slot) = counts.get_mut((b + HIST_HALF) as usize) {
                        *slot += c;
                    }
                }
                ErrorHistogram { counts, bin_lsb: bin as u32 }
            })
        })
        .collect()
}

/// Reports `float` against `blob` over the rows of a data file (streamed).
///
/// # Errors
/// Data errors (named by file, line and column), a feature-count mismatch,
/// or models of different shapes.
pub fn report_file(
    float: &FloatModelData,
    blob: &Blob<'_>,
    data: &Path,
    opts: &ReportOptions,
    progress: bool,
) -> Result<Report> {
    let mut r = Reporter::new(float, blob)?;
    let want = blob.model().input_len();
    crate::data::for_each_row(data, progress, |_, x, _| {
        if x.len() != want {
            bail!("has {} feature columns but the model takes {want} inputs", x.len());
        }
        r.push(x)
    })?;
    r.finish(opts).map_err(|e| anyhow!("{}: {e}", data.display()))
}

/// Reports `float` against `blob` over rows in memory.
///
/// # Errors
/// As [`Reporter::push`] and [`Reporter::finish`].
pub fn report_rows(float: &FloatModelData, blob: &Blob<'_>, rows: &[Vec<f32>], opts: &ReportOptions) -> Result<Report> {
    let mut r = Reporter::new(float, blob)?;
    for x in rows {
        r.push(x)?;
    }
    r.finish(opts)
}

/// Reports a quantized model held in memory: it is encoded to a blob and
/// parsed first, so the device code path is the one measured.
///
/// # Errors
/// As [`report_rows`], or an encoding error.
pub fn report_quantized(
    float: &FloatModelData,
    q: &QuantModelData,
    rows: &[Vec<f32>],
    opts: &ReportOptions,
) -> Result<Report> {
    let bytes = AlignedBytes::from_bytes(&crate::blob::encode(q)?);
    let blob = Blob::parse(bytes.bytes()).map_err(|e| anyhow!("internal: {e}"))?;
    report_rows(float, &blob, rows, opts)
}

/// Display order: input, output, then per layer hidden, cell, gates i f g o.
fn tensor_order(name: &str) -> (usize, usize, usize) {
    match name {
        "input" => (0, 0, 0),
        "output" => (1, 0, 0),
        _ => {
            let (layer, kind) = name.strip_prefix("layer").and_then(|r| r.split_once('.')).unwrap_or(("", name));
            let k = layer.parse().unwrap_or(usize::MAX);
            let order = ["hidden", "cell", "gate.i", "gate.f", "gate.g", "gate.o"];
            (2, k, order.iter().position(|o| *o == kind).unwrap_or(order.len()))
        }
    }
}

fn db(v: f64) -> String {
    if v == f64::INFINITY {
        "exact".to_string()
    } else {
        format!("{v:.1}")
    }
}

impl Report {
    /// A readable report for the terminal.
    pub fn to_text(&self) -> String {
        let mut s = String::new();
        let f = &self.footprint;
        let _ = writeln!(s, "Float reference vs device code, scheme {}, {} steps", self.scheme, self.steps);
        let _ = writeln!(
            s,
            "footprint: flash {} B ({} B blob + {} B activation table), RAM {} B, {} MACs per step\n",
            f.flash_bytes, f.blob_bytes, f.table_bytes, f.ram_bytes, f.macs_per_step
        );
        let _ = writeln!(
            s,
            "{:<16} {:>10} {:>10} {:>9} {:>10} {:>11}",
            "tensor", "max abs", "RMSE", "SQNR dB", "cosine", "saturated"
        );
        let mut names: Vec<&String> = self.tensors.keys().collect();
        names.sort_by_key(|n| tensor_order(n));
        for n in names {
            if let Some(t) = self.tensors.get(n) {
                let _ = writeln!(
                    s,
                    "{:<16} {:>10.2e} {:>10.2e} {:>9} {:>10.6} {:>10.4}%",
                    n,
                    t.max_abs,
                    t.rmse,
                    db(t.sqnr_db),
                    t.cosine,
                    100.0 * t.saturation_rate
                );
            }
        }
        let _ = writeln!(s, "\nerror over time (SQNR dB): first tenth -> last tenth (drift), worst window");
        for (n, d) in &self.drift {
            let _ = writeln!(
                s,
                "{:<16} {:>7} -> {:>7} ({:+.1} dB), worst {} at step {} ({} steps per window)",
                n,
                db(d.first_tenth_sqnr_db),
                db(d.last_tenth_sqnr_db),
                d.drift_db,
                db(d.worst_window_sqnr_db),
                d.worst_window_step,
                d.window_steps
            );
        }
        if let Some(a) = &self.alarms {
            let _ = writeln!(
                s,
                "\nalarms, float twin vs device detector: sample agreement {:.4} %, events {} float / {} device, \
                 {} matched, largest onset shift {} samples",
                100.0 * a.sample_agreement,
                a.events_float,
                a.events_quant,
                a.events_matched,
                a.max_onset_shift
            );
        }
        if self.budget.checked {
            if self.budget.passed {
                let _ = writeln!(s, "\nbudget: all limits hold");
            } else {
                let _ = writeln!(s, "\nbudget: {} limit(s) violated", self.budget.violations.len());
                for v in &self.budget.violations {
                    let _ = writeln!(s, "  - {}", v.message);
                }
            }
        }
        s
    }
}
