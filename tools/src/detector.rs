//! The anomaly detector on the host: calibration from normal data, the
//! conversion to the device's fixed-point parameters, the float twin the
//! report compares the device with, and event bookkeeping (alarms,
//! labelled faults, agreement).
//!
//! Calibration (on normal running, with the float model):
//! 1. spread per feature: the RMS of the one-step prediction residual
//!    `x[t] - y[t-1]` after the warm-up;
//! 2. the smoothed scores of the calibration data under the float twin;
//!    the raise level is their `quantile` times `margin`, the clear level
//!    `hysteresis` times the raise level.

use crate::float_model::FloatModelData;
use anyhow::{bail, Result};
use lapwing::detect::{Detector, SCORE_FRAC, Z_FRAC};
use lapwing::fixed_point::Requant;
use serde::Serialize;
use std::collections::VecDeque;

/// Options of the detector calibration (the `quantize` options).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct DetectorOptions {
    /// Quantile of normal smoothed scores (default 0.999).
    pub quantile: f64,
    /// Factor above that quantile for the raise level (default 2.5: chosen
    /// on two test sets of the demo scenario generated with other seeds
    /// than the shipped one, where 1.5 gave false alarms and slowly growing
    /// faults crossed the level while it hovered in the noise).
    pub margin: f64,
    /// Clear level as a fraction of the raise level (default 0.5).
    pub hysteresis: f64,
    /// Exceeding samples needed in the window to raise (default 3).
    pub k_of: u8,
    /// Window length in samples (default 5).
    pub window: u8,
    /// EWMA smoothing shift: weight `2^-shift` (default 3).
    pub ewma_shift: u8,
    /// Steps at the start that never exceed (default 200).
    pub warmup: u32,
}

impl Default for DetectorOptions {
    fn default() -> Self {
        DetectorOptions::DEFAULT
    }
}

impl DetectorOptions {
    /// The documented defaults (also the CLI's).
    pub const DEFAULT: DetectorOptions = DetectorOptions {
        quantile: 0.999,
        margin: 2.5,
        hysteresis: 0.5,
        k_of: 3,
        window: 5,
        ewma_shift: 3,
        warmup: 200,
    };

    /// Checks every option, naming the bad one.
    ///
    /// # Errors
    /// An option out of range.
    pub fn validate(&self) -> Result<()> {
        if !(self.quantile > 0.0 && self.quantile < 1.0) {
            bail!("detector quantile {} must be in (0, 1)", self.quantile);
        }
        if !(self.margin.is_finite() && self.margin >= 1.0) {
            bail!("detector margin {} must be at least 1", self.margin);
        }
        if !(self.hysteresis > 0.0 && self.hysteresis <= 1.0) {
            bail!("detector hysteresis {} must be in (0, 1]", self.hysteresis);
        }
        if self.window == 0 || self.window as usize > lapwing::detect::MAX_WINDOW {
            bail!("detector window {} must be in 1..={}", self.window, lapwing::detect::MAX_WINDOW);
        }
        if self.k_of == 0 || self.k_of > self.window {
            bail!("detector k {} must be in 1..={} (the window)", self.k_of, self.window);
        }
        if self.ewma_shift > 15 {
            bail!("detector EWMA shift {} must be at most 15", self.ewma_shift);
        }
        Ok(())
    }
}

/// Calibrated detector parameters in real units.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct DetectorParams {
    /// Residual spread per feature (real units).
    pub spread: Vec<f64>,
    /// Raise level of the smoothed score (squared standard units).
    pub raise: f64,
    /// Clear level.
    pub clear: f64,
    /// Warm-up steps.
    pub warmup: u32,
    /// EWMA shift.
    pub ewma_shift: u8,
    /// k of n.
    pub k_of: u8,
    /// n.
    pub window: u8,
}

/// One step of the float twin: the same rules as [`lapwing::detect`] in f64.
#[derive(Clone, Debug)]
pub struct FloatDetector {
    p: DetectorParams,
    smoothed: f64,
    steps: u32,
    alarm: bool,
    history: VecDeque<(bool, bool)>,
}

/// What the float twin decided in one step.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct FloatDecision {
    /// Score of this step.
    pub score: f64,
    /// Smoothed score.
    pub smoothed: f64,
    /// Above the raise level.
    pub exceeds: bool,
    /// Alarm after this step.
    pub alarm: bool,
}

impl FloatDetector {
    /// A twin with the given parameters, in its initial state.
    pub fn new(p: DetectorParams) -> Self {
        FloatDetector { p, smoothed: 0.0, steps: 0, alarm: false, history: VecDeque::new() }
    }

    /// The parameters.
    pub fn params(&self) -> &DetectorParams {
        &self.p
    }

    /// The real-valued parameters a device detector encodes, given the
    /// blob's input scales (spread from `a = s_x / spread`).
    pub fn params_of(d: &Detector<'_>, input_scale: &[f32]) -> DetectorParams {
        let scales = d.scales();
        let (warmup, ewma_shift, k_of, window, raise, clear) = d.settings();
        let unit = (1u64 << Z_FRAC) as f64;
        let spread = scales
            .chunks_exact(4)
            .zip(input_scale)
            .map(|(q, s)| *s as f64 / (Requant { mult: q[0], shift: q[1] }.to_real() / unit))
            .collect();
        let su = (1u64 << SCORE_FRAC) as f64;
        DetectorParams { spread, raise: raise as f64 / su, clear: clear as f64 / su, warmup, ewma_shift, k_of, window }
    }

    /// One step: real input `x[t]` and the float model's previous output.
    pub fn update(&mut self, x: &[f32], y_prev: &[f32]) -> FloatDecision {
        let score: f64 = x
            .iter()
            .zip(y_prev)
            .zip(&self.p.spread)
            .map(|((x, y), s)| {
                let z = (*x as f64 - *y as f64) / s;
                z * z
            })
            .sum();
        let warm = self.steps < self.p.warmup;
        self.steps = self.steps.saturating_add(1);
        if warm {
            return FloatDecision { score, smoothed: self.smoothed, exceeds: false, alarm: self.alarm };
        }
        self.smoothed += (score - self.smoothed) / (1u64 << self.p.ewma_shift) as f64;
        let exceeds = self.smoothed > self.p.raise;
        if self.history.len() >= self.p.window as usize {
            self.history.pop_front();
        }
        self.history.push_back((exceeds, self.smoothed > self.p.clear));
        let raised = self.history.iter().filter(|h| h.0).count();
        let above_clear = self.history.iter().filter(|h| h.1).count();
        if !self.alarm && raised >= self.p.k_of as usize {
            self.alarm = true;
        } else if self.alarm && above_clear == 0 {
            self.alarm = false;
        }
        FloatDecision { score, smoothed: self.smoothed, exceeds, alarm: self.alarm }
    }
}

/// Calibrates the detector on normal data with the float model, which must
/// be a next-step predictor (its head has one output per input).
///
/// # Errors
/// A model that is not a next-step predictor, too few rows after the
/// warm-up, a feature whose residual never varies, or bad options.
pub fn calibrate(model: &FloatModelData, rows: &[Vec<f32>], opts: &DetectorOptions) -> Result<DetectorParams> {
    opts.validate()?;
    let m = model.view()?;
    let x = m.input_len();
    if model.head.is_none() || m.output_len() != x {
        bail!(
            "the detector needs a next-step predictor: a head with one output per input ({x}), the model has {}",
            if model.head.is_some() { format!("{} outputs", m.output_len()) } else { "no head".to_string() }
        );
    }
    let warm = opts.warmup as usize;
    if rows.len() < warm + 100 {
        bail!("detector calibration needs at least {} rows (warm-up {warm} + 100), got {}", warm + 100, rows.len());
    }
    // Pass 1: predictions and residual spread.
    let mut state = vec![0.0f32; m.state_len()];
    let mut out = vec![0.0f32; x];
    let mut preds: Vec<Vec<f32>> = Vec::with_capacity(rows.len());
    let mut sq = vec![0.0f64; x];
    let mut n = 0usize;
    for (t, row) in rows.iter().enumerate() {
        if t > warm {
            if let Some(prev) = preds.last() {
                for ((a, v), p) in sq.iter_mut().zip(row).zip(prev) {
                    *a += (*v as f64 - *p as f64).powi(2);
                }
                n += 1;
            }
        }
        m.step(&mut state, row, &mut out).map_err(|e| anyhow::anyhow!("detector calibration row {t}: {e}"))?;
        preds.push(out.clone());
    }
    let spread: Vec<f64> = sq.iter().map(|s| (s / n.max(1) as f64).sqrt()).collect();
    if let Some(i) = spread.iter().position(|s| !(*s > 0.0 && s.is_finite())) {
        bail!("feature {i}: the prediction residual never varies on the calibration data, so it cannot be normalized");
    }
    // Pass 2: smoothed scores under the twin with no alarm levels.
    let mut twin = FloatDetector::new(DetectorParams {
        spread: spread.clone(),
        raise: f64::INFINITY,
        clear: f64::INFINITY,
        warmup: opts.warmup,
        ewma_shift: opts.ewma_shift,
        k_of: opts.k_of,
        window: opts.window,
    });
    let mut scores = Vec::with_capacity(rows.len());
    let zero = vec![0.0f32; x];
    for (t, row) in rows.iter().enumerate() {
        let prev = if t == 0 { &zero } else { &preds[t - 1] };
        let d = twin.update(row, prev);
        if t >= warm {
            scores.push(d.smoothed);
        }
    }
    scores.sort_by(f64::total_cmp);
    let idx = ((opts.quantile * scores.len() as f64).ceil() as usize).clamp(1, scores.len()) - 1;
    let q = scores.get(idx).copied().unwrap_or(0.0);
    let raise = q * opts.margin;
    Ok(DetectorParams {
        spread,
        raise,
        clear: raise * opts.hysteresis,
        warmup: opts.warmup,
        ewma_shift: opts.ewma_shift,
        k_of: opts.k_of,
        window: opts.window,
    })
}

/// Device detector parameters, as stored in the blob.
#[derive(Clone, Debug, PartialEq)]
pub struct QuantDetectorData {
    /// `[warmup, ewma_shift, k, n, raise, clear, 0, 0]` (levels as `u32`
    /// bit patterns).
    pub info: [i32; 8],
    /// Per feature `(a_mult, a_shift, b_mult, b_shift)`.
    pub scales: Vec<i32>,
}

/// Fixed-point detector parameters for a model with the given input and
/// output scales.
///
/// # Errors
/// A scale ratio no requantization can hold, or levels beyond `u32`.
pub fn to_fixed(p: &DetectorParams, input_scale: &[f32], output_scale: &[f32]) -> Result<QuantDetectorData> {
    let unit = (1u64 << Z_FRAC) as f64;
    let mut scales = Vec::with_capacity(4 * p.spread.len());
    for (i, ((sx, sy), spread)) in input_scale.iter().zip(output_scale).zip(&p.spread).enumerate() {
        for real in [*sx as f64 / spread * unit, *sy as f64 / spread * unit] {
            let rq =
                Requant::from_real(real).map_err(|e| anyhow::anyhow!("detector feature {i}: scale {real:e}: {e}"))?;
            scales.extend([rq.mult, rq.shift]);
        }
    }
    let level = |v: f64, what: &str| -> Result<i32> {
        let f = (v * (1u64 << SCORE_FRAC) as f64).round();
        if !(0.0..=u32::MAX as f64).contains(&f) {
            bail!("detector {what} level {v} is out of the device's range");
        }
        Ok(f as u32 as i32)
    };
    Ok(QuantDetectorData {
        info: [
            i32::try_from(p.warmup).map_err(|_| anyhow::anyhow!("detector warm-up {} too long", p.warmup))?,
            p.ewma_shift as i32,
            p.k_of as i32,
            p.window as i32,
            level(p.raise, "raise")?,
            level(p.clear, "clear")?,
            0,
            0,
        ],
        scales,
    })
}

/// A run of consecutive alarm samples: `[start, end)`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
pub struct Event {
    /// First row.
    pub start: usize,
    /// One past the last row.
    pub end: usize,
}

/// Runs of `true` in `flags`.
pub fn events(flags: &[bool]) -> Vec<Event> {
    let mut v = Vec::new();
    let mut start = None;
    for (i, f) in flags.iter().enumerate() {
        match (f, start) {
            (true, None) => start = Some(i),
            (false, Some(s)) => {
                v.push(Event { start: s, end: i });
                start = None;
            }
            _ => {}
        }
    }
    if let Some(s) = start {
        v.push(Event { start: s, end: flags.len() });
    }
    v
}

/// Float vs device alarms over the same rows.
#[derive(Clone, Debug, Default, PartialEq, Serialize)]
pub struct AlarmAgreement {
    /// Fraction of rows where both alarms agree.
    pub sample_agreement: f64,
    /// Alarm events of the float twin.
    pub events_float: usize,
    /// Alarm events of the device detector.
    pub events_quant: usize,
    /// Float events overlapped by a device event.
    pub events_matched: usize,
    /// Largest |onset difference| in rows over matched events.
    pub max_onset_shift: usize,
    /// Every matched pair: the float event and the first device event
    /// overlapping it.
    pub matched: Vec<MatchedAlarm>,
}

/// A float twin alarm and the device alarm matched to it.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct MatchedAlarm {
    /// The float twin's alarm.
    pub float: Event,
    /// The device's alarm.
    pub quant: Event,
}

/// Compares two alarm sequences of equal length.
pub fn agreement(float: &[bool], quant: &[bool]) -> AlarmAgreement {
    let n = float.len().min(quant.len());
    let same = float.iter().zip(quant).filter(|(a, b)| a == b).count();
    let (ef, eq) = (events(float), events(quant));
    let mut pairs = Vec::new();
    let mut shift = 0;
    for f in &ef {
        if let Some(q) = eq.iter().find(|q| q.start < f.end && f.start < q.end) {
            pairs.push(MatchedAlarm { float: *f, quant: *q });
            shift = shift.max(f.start.abs_diff(q.start));
        }
    }
    AlarmAgreement {
        sample_agreement: if n == 0 { 1.0 } else { same as f64 / n as f64 },
        events_float: ef.len(),
        events_quant: eq.len(),
        events_matched: pairs.len(),
        max_onset_shift: shift,
        matched: pairs,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn events_and_agreement() {
        let f = [false, true, true, false, false, true, false];
        let q = [false, false, true, true, false, false, false];
        assert_eq!(events(&f), vec![Event { start: 1, end: 3 }, Event { start: 5, end: 6 }]);
        let a = agreement(&f, &q);
        assert_eq!((a.events_float, a.events_quant, a.events_matched, a.max_onset_shift), (2, 1, 1, 1));
        assert!((a.sample_agreement - 4.0 / 7.0).abs() < 1e-12);
    }

    #[test]
    fn fixed_point_parameters_round_trip_to_the_twin() {
        let p = DetectorParams {
            spread: vec![0.5, 2.0],
            raise: 12.5,
            clear: 6.25,
            warmup: 10,
            ewma_shift: 3,
            k_of: 2,
            window: 4,
        };
        let q = to_fixed(&p, &[1e-3, 2e-3], &[1e-3, 4e-3]).unwrap();
        let d = Detector::new(2, &q.scales, 10, 3, 2, 4, q.info[4] as u32, q.info[5] as u32).unwrap();
        let back = FloatDetector::params_of(&d, &[1e-3, 2e-3]);
        for (a, b) in back.spread.iter().zip(&p.spread) {
            assert!((a / b - 1.0).abs() < 1e-6, "{a} vs {b}");
        }
        assert!((back.raise - 12.5).abs() < 1e-4 && (back.clear - 6.25).abs() < 1e-4);
    }

    #[test]
    fn device_and_twin_agree_on_a_clear_step_change() {
        // Residual 0 then 3 spreads on feature 0: both raise within the same step.
        let p =
            DetectorParams { spread: vec![1.0], raise: 4.0, clear: 2.0, warmup: 0, ewma_shift: 1, k_of: 2, window: 3 };
        let q = to_fixed(&p, &[1.0 / 1024.0], &[1.0 / 1024.0]).unwrap();
        let d = Detector::new(1, &q.scales, 0, 1, 2, 3, q.info[4] as u32, q.info[5] as u32).unwrap();
        let mut st = lapwing::detect::DetectorState::new();
        let mut twin = FloatDetector::new(p);
        for t in 0..40 {
            let r = if (10..25).contains(&t) { 3.0f32 } else { 0.0 };
            let dev = d.update(&mut st, &[(r * 1024.0) as i16], &[0]).unwrap();
            let fl = twin.update(&[r], &[0.0]);
            assert_eq!(dev.alarm, fl.alarm, "step {t}");
        }
    }
}

/// One alarm of the device detector.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Alarm {
    /// First row with the alarm on.
    pub start: usize,
    /// One past the last row with the alarm on.
    pub end: usize,
    /// Largest smoothed score during the alarm (squared standard units).
    pub peak_score: f64,
}

/// Event-level comparison with labelled faults.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Confusion {
    /// Labelled fault events (runs of label 1).
    pub faults: usize,
    /// Faults overlapped by an alarm (within the grace time after their end).
    pub detected: usize,
    /// Faults no alarm overlapped.
    pub missed: usize,
    /// The missed faults' row ranges.
    pub missed_events: Vec<Event>,
    /// Alarms that overlap no fault (with grace).
    pub false_alarms: usize,
    /// Rows labelled normal (0).
    pub normal_rows: usize,
    /// Hours of normal running at the sample rate.
    pub normal_hours: f64,
    /// False alarms per hour of normal running.
    pub false_alarms_per_hour: f64,
    /// Rows from each detected fault's start to its first alarm's start (0
    /// when the alarm was already on).
    pub detection_delays: Vec<usize>,
}

/// Options of `detect`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct DetectOptions {
    /// Sample rate of the data, for the per-hour figure (default 400 Hz, the
    /// demo scenario's).
    pub sample_rate_hz: f64,
    /// Time after a fault's end during which an alarm still counts as that
    /// fault's (default 1 s).
    pub grace_s: f64,
}

impl Default for DetectOptions {
    fn default() -> Self {
        DetectOptions { sample_rate_hz: 400.0, grace_s: 1.0 }
    }
}

/// What `detect` found.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Detection {
    /// Rows processed.
    pub rows: usize,
    /// Every alarm.
    pub alarms: Vec<Alarm>,
    /// With labelled data: the event-level confusion.
    pub confusion: Option<Confusion>,
}

/// Compares alarms with labelled fault events.
pub fn confusion(alarms: &[Alarm], labels: &[u8], opts: &DetectOptions) -> Confusion {
    let faults = events(&labels.iter().map(|l| *l == 1).collect::<Vec<_>>());
    let grace = (opts.grace_s * opts.sample_rate_hz).round().max(0.0) as usize;
    let overlaps = |a: &Alarm, f: &Event| a.start < f.end + grace && f.start < a.end;
    let mut missed_events = Vec::new();
    let mut delays = Vec::new();
    for f in &faults {
        match alarms.iter().find(|a| overlaps(a, f)) {
            Some(a) => delays.push(a.start.saturating_sub(f.start)),
            None => missed_events.push(*f),
        }
    }
    let false_alarms = alarms.iter().filter(|a| !faults.iter().any(|f| overlaps(a, f))).count();
    let normal_rows = labels.iter().filter(|l| **l == 0).count();
    let normal_hours = normal_rows as f64 / opts.sample_rate_hz / 3600.0;
    Confusion {
        faults: faults.len(),
        detected: faults.len() - missed_events.len(),
        missed: missed_events.len(),
        missed_events,
        false_alarms,
        normal_rows,
        normal_hours,
        false_alarms_per_hour: if normal_hours > 0.0 { false_alarms as f64 / normal_hours } else { 0.0 },
        detection_delays: delays,
    }
}

/// Runs the blob's device model and detector over a data file (streamed).
///
/// # Errors
/// A blob without a detector, data errors, or a feature-count mismatch.
pub fn detect_file(
    blob: &lapwing::model::Blob<'_>,
    data: &std::path::Path,
    opts: &DetectOptions,
    progress: bool,
) -> Result<Detection> {
    let Some(det) = blob.detector() else {
        bail!("the blob has no detector: quantize with --detector to calibrate one");
    };
    let m = blob.model();
    let mut state = vec![0i16; m.state_words()];
    let mut out = vec![0i16; m.output_len()];
    let mut st = lapwing::detect::DetectorState::new();
    let mut alarms: Vec<Alarm> = Vec::new();
    let mut open: Option<Alarm> = None;
    let mut labels = Vec::new();
    let mut labelled = true;
    let su = (1u64 << SCORE_FRAC) as f64;
    let mut rows = 0usize;
    crate::data::for_each_row(data, progress, |t, x, label| {
        if x.len() != m.input_len() {
            bail!("has {} feature columns but the model takes {} inputs", x.len(), m.input_len());
        }
        let xq = crate::quantize::input_to_int(x, blob.input_scale());
        let d = det.update(&mut st, &xq, &out).map_err(|e| anyhow::anyhow!("{e}"))?;
        m.step(&mut state, &xq, &mut out).map_err(|e| anyhow::anyhow!("{e}"))?;
        let score = d.smoothed as f64 / su;
        match (&mut open, d.alarm) {
            (None, true) => open = Some(Alarm { start: t, end: t + 1, peak_score: score }),
            (Some(a), true) => {
                a.end = t + 1;
                a.peak_score = a.peak_score.max(score);
            }
            (Some(a), false) => {
                alarms.push(*a);
                open = None;
            }
            (None, false) => {}
        }
        match label {
            Some(l) => labels.push(l),
            None => labelled = false,
        }
        rows = t + 1;
        Ok(())
    })?;
    if let Some(a) = open {
        alarms.push(a);
    }
    let confusion = (labelled && !labels.is_empty()).then(|| confusion(&alarms, &labels, opts));
    Ok(Detection { rows, alarms, confusion })
}

impl Detection {
    /// A readable summary: every alarm, then the confusion.
    pub fn to_text(&self, opts: &DetectOptions) -> String {
        use std::fmt::Write as _;
        let mut s = String::new();
        let _ = writeln!(s, "{} alarm(s) over {} rows", self.alarms.len(), self.rows);
        for a in &self.alarms {
            let _ = writeln!(
                s,
                "  rows {:>9} .. {:>9} ({:.2} s)  peak score {:.1}",
                a.start,
                a.end,
                (a.end - a.start) as f64 / opts.sample_rate_hz,
                a.peak_score
            );
        }
        if let Some(c) = &self.confusion {
            let _ = writeln!(
                s,
                "labelled faults: {} detected, {} missed of {}; false alarms: {} in {:.2} h of normal running \
                 ({:.2} per hour at {} Hz)",
                c.detected,
                c.missed,
                c.faults,
                c.false_alarms,
                c.normal_hours,
                c.false_alarms_per_hour,
                opts.sample_rate_hz
            );
            for m in &c.missed_events {
                let _ = writeln!(s, "  missed: rows {} .. {}", m.start, m.end);
            }
        }
        s
    }
}
