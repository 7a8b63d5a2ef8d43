//! Calibration: run the float model over recorded data and record the
//! ranges that choose the integer formats.
//!
//! Every format in the `w8a16` scheme is symmetric (zero point 0), so each
//! quantity is summarized by one magnitude. Two methods:
//! - [`RangeMethod::MinMax`]: the largest |value| seen (`max(|min|, |max|)`),
//!   which never clips the calibration data;
//! - [`RangeMethod::Percentile`]: the p-th percentile of |value|, which
//!   ignores rare outliers (spikes, glitches) at the price of saturating
//!   them, and buys resolution for everything else. Percentiles come from a
//!   log-spaced histogram with 64 bins per octave (relative resolution
//!   about 1.1%), so calibration streams with fixed memory.
//!
//! The forget and input gates' pre-activations are summarized per gate over
//! all units; the cell and hidden state per layer; inputs and outputs per
//! feature.

use crate::float_model::FloatModelData;
use anyhow::{bail, Result};
use lapwing::float::FloatModel;
use lapwing::Probe;

/// How a range is taken from the observed values.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub enum RangeMethod {
    /// Largest magnitude seen.
    #[default]
    MinMax,
    /// The given percentile (in `(0, 100]`) of the magnitudes.
    Percentile(f64),
}

/// Observed ranges of one layer.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct LayerRanges {
    /// Largest |pre-activation| per gate (`i, f, g, o`).
    pub pre_absmax: [f32; 4],
    /// Largest |cell|.
    pub cell_absmax: f32,
    /// Largest |hidden|.
    pub hidden_absmax: f32,
}

/// Observed ranges of a whole model over a data set.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Ranges {
    /// Largest |x| per input feature.
    pub input_absmax: Vec<f32>,
    /// Per layer.
    pub layers: Vec<LayerRanges>,
    /// Largest |output| per output value (head outputs, or last hidden).
    pub output_absmax: Vec<f32>,
    /// Steps observed.
    pub steps: usize,
}

/// Bins per octave of the magnitude histogram.
const BINS_PER_OCTAVE: f64 = 64.0;
/// Smallest magnitude resolved (2^-24); smaller values count as zero.
const MIN_LOG2: f64 = -24.0;
/// Octaves covered (up to 2^40; larger values land in the last bin, and the
/// exact maximum caps every percentile anyway).
const OCTAVES: f64 = 64.0;
const BINS: usize = (BINS_PER_OCTAVE * OCTAVES) as usize + 1;

/// Streaming summary of one quantity's magnitudes.
#[derive(Clone, Debug)]
struct Magnitude {
    max: f32,
    count: u64,
    /// Allocated only for the percentile method.
    hist: Vec<u64>,
}

impl Magnitude {
    fn new(method: RangeMethod) -> Self {
        let hist = match method {
            RangeMethod::MinMax => Vec::new(),
            RangeMethod::Percentile(_) => vec![0; BINS],
        };
        Magnitude { max: 0.0, count: 0, hist }
    }

    fn push(&mut self, v: f32) {
        let a = v.abs();
        self.max = self.max.max(a);
        self.count += 1;
        if !self.hist.is_empty() {
            let bin = if a > 0.0 {
                (((a as f64).log2() - MIN_LOG2) * BINS_PER_OCTAVE).floor().clamp(0.0, (BINS - 1) as f64) as usize
            } else {
                0
            };
            if let Some(h) = self.hist.get_mut(bin) {
                *h += 1;
            }
        }
    }

    fn range(&self, method: RangeMethod) -> f32 {
        let RangeMethod::Percentile(p) = method else { return self.max };
        let need = ((p / 100.0) * self.count as f64).ceil().max(1.0) as u64;
        let mut seen = 0u64;
        for (i, h) in self.hist.iter().enumerate() {
            seen += h;
            if seen >= need {
                // Upper edge of the bin, never above the exact maximum.
                let edge = 2f64.powf(MIN_LOG2 + (i + 1) as f64 / BINS_PER_OCTAVE) as f32;
                return edge.min(self.max);
            }
        }
        self.max
    }
}

struct LayerStats {
    pre: [Magnitude; 4],
    cell: Magnitude,
    hidden: Magnitude,
}

struct StatsProbe<'a> {
    layers: &'a mut [LayerStats],
}

impl Probe<f32> for StatsProbe<'_> {
    fn gates(&mut self, layer: usize, _unit: usize, pre: &[f32; 4], _act: &[f32; 4]) {
        if let Some(l) = self.layers.get_mut(layer) {
            for (m, p) in l.pre.iter_mut().zip(pre) {
                m.push(*p);
            }
        }
    }
    fn state(&mut self, layer: usize, _unit: usize, cell: f32, hidden: f32) {
        if let Some(l) = self.layers.get_mut(layer) {
            l.cell.push(cell);
            l.hidden.push(hidden);
        }
    }
}

/// Streaming calibration: feed rows one at a time with [`Calibrator::push`]
/// (the model's state carries across rows, as on the device), then
/// [`Calibrator::finish`].
pub struct Calibrator<'m> {
    model: FloatModel<'m>,
    method: RangeMethod,
    state: Vec<f32>,
    out: Vec<f32>,
    input: Vec<Magnitude>,
    layers: Vec<LayerStats>,
    output: Vec<Magnitude>,
    steps: usize,
}

impl<'m> Calibrator<'m> {
    /// A calibrator for `model` starting from zero state.
    ///
    /// # Errors
    /// An inconsistent model, or a percentile outside `(0, 100]`.
    pub fn new(model: &'m FloatModelData, method: RangeMethod) -> Result<Self> {
        if let RangeMethod::Percentile(p) = method {
            if !(p > 0.0 && p <= 100.0) {
                bail!("percentile {p} must be in (0, 100]");
            }
        }
        let m = model.view()?;
        let mag = || Magnitude::new(method);
        Ok(Calibrator {
            state: vec![0.0; m.state_len()],
            out: vec![0.0; m.output_len()],
            input: (0..m.input_len()).map(|_| mag()).collect(),
            layers: (0..m.layers().len())
                .map(|_| LayerStats { pre: [mag(), mag(), mag(), mag()], cell: mag(), hidden: mag() })
                .collect(),
            output: (0..m.output_len()).map(|_| mag()).collect(),
            model: m,
            method,
            steps: 0,
        })
    }

    /// Runs one step on `x` and records every quantity.
    ///
    /// # Errors
    /// Wrong feature count or a non-finite value (named by row and feature).
    pub fn push(&mut self, x: &[f32]) -> Result<()> {
        let t = self.steps;
        if let Some((i, v)) = x.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            bail!("calibration row {t}, feature {i} is {v} (data must be finite)");
        }
        let mut probe = StatsProbe { layers: &mut self.layers };
        self.model
            .step_probed(&mut self.state, x, &mut self.out, &mut probe)
            .map_err(|e| anyhow::anyhow!("calibration row {t}: {e}"))?;
        for (m, v) in self.input.iter_mut().zip(x) {
            m.push(*v);
        }
        for (m, v) in self.output.iter_mut().zip(&self.out) {
            m.push(*v);
        }
        self.steps += 1;
        Ok(())
    }

    /// The ranges by the chosen method.
    ///
    /// # Errors
    /// No rows were pushed.
    pub fn finish(self) -> Result<Ranges> {
        if self.steps == 0 {
            bail!("calibration data has no rows");
        }
        let r = |m: &Magnitude| m.range(self.method);
        Ok(Ranges {
            input_absmax: self.input.iter().map(r).collect(),
            layers: self
                .layers
                .iter()
                .map(|l| LayerRanges {
                    pre_absmax: [r(&l.pre[0]), r(&l.pre[1]), r(&l.pre[2]), r(&l.pre[3])],
                    cell_absmax: r(&l.cell),
                    hidden_absmax: r(&l.hidden),
                })
                .collect(),
            output_absmax: self.output.iter().map(r).collect(),
            steps: self.steps,
        })
    }
}

/// Runs `model` from zero state over `inputs` and records the largest
/// magnitudes (min/max method).
///
/// # Errors
/// Empty data, a row with the wrong feature count, or a non-finite value.
pub fn observe(model: &FloatModelData, inputs: &[Vec<f32>]) -> Result<Ranges> {
    observe_with(model, inputs, RangeMethod::MinMax)
}

/// As [`observe`], with a chosen range method.
///
/// # Errors
/// As [`observe`], and a percentile outside `(0, 100]`.
pub fn observe_with(model: &FloatModelData, inputs: &[Vec<f32>], method: RangeMethod) -> Result<Ranges> {
    let mut c = Calibrator::new(model, method)?;
    for x in inputs {
        c.push(x)?;
    }
    c.finish()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn percentile_ignores_rare_outliers_and_minmax_does_not() {
        let mut mm = Magnitude::new(RangeMethod::MinMax);
        let mut pc = Magnitude::new(RangeMethod::Percentile(99.0));
        // 1,000 values uniform in (0, 1], then 5 spikes of 100.
        for i in 1..=1000 {
            let v = i as f32 / 1000.0 * if i % 2 == 0 { 1.0 } else { -1.0 };
            mm.push(v);
            pc.push(v);
        }
        for _ in 0..5 {
            mm.push(100.0);
            pc.push(-100.0);
        }
        assert_eq!(mm.range(RangeMethod::MinMax), 100.0);
        let p = pc.range(RangeMethod::Percentile(99.0));
        // The 99th percentile of the 1,005 magnitudes is the 995th smallest,
        // 0.995; one histogram bin is 2^(1/64) - 1 = 1.1% wide.
        assert!((0.995..=0.995 * 1.011).contains(&p), "{p}");
        assert_eq!(pc.range(RangeMethod::Percentile(100.0)), 100.0);
    }

    #[test]
    fn streaming_equals_batch_and_percentile_is_tighter() {
        let spec = crate::synth::ModelSpec { input: 3, hidden: 6, layers: 2, output: Some(2), gain: 1.0 };
        let m = crate::synth::random_model(&spec, 4);
        let data = crate::synth::random_walk(3, 3000, 8);
        let batch = observe(&m, &data).unwrap();
        let mut c = Calibrator::new(&m, RangeMethod::MinMax).unwrap();
        for x in &data {
            c.push(x).unwrap();
        }
        assert_eq!(c.finish().unwrap(), batch);
        let p = observe_with(&m, &data, RangeMethod::Percentile(99.0)).unwrap();
        for (a, b) in p.input_absmax.iter().zip(&batch.input_absmax) {
            assert!(a <= b && *a > 0.5 * b, "{a} vs {b}");
        }
        assert!(p.layers[1].cell_absmax <= batch.layers[1].cell_absmax);
    }

    #[test]
    fn bad_percentiles_and_empty_data_are_errors() {
        let spec = crate::synth::ModelSpec { input: 1, hidden: 2, layers: 1, output: None, gain: 1.0 };
        let m = crate::synth::random_model(&spec, 4);
        assert!(Calibrator::new(&m, RangeMethod::Percentile(0.0)).is_err());
        assert!(Calibrator::new(&m, RangeMethod::Percentile(101.0)).is_err());
        assert!(observe(&m, &[]).unwrap_err().to_string().contains("no rows"));
    }
}
