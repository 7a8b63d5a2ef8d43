//! Calibration: run the float model over recorded data and record the
//! ranges that choose the integer formats.
//!
//! Method: absolute maximum per quantity (min/max calibration). The
//! percentile method arrives with the model pipeline's `calibrate` options.

use crate::float_model::FloatModelData;
use anyhow::{bail, Result};
use lapwing::Probe;

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

struct RangeProbe<'a> {
    layers: &'a mut [LayerRanges],
}

impl Probe<f32> for RangeProbe<'_> {
    fn gates(&mut self, layer: usize, _unit: usize, pre: &[f32; 4], _act: &[f32; 4]) {
        if let Some(l) = self.layers.get_mut(layer) {
            for (m, p) in l.pre_absmax.iter_mut().zip(pre) {
                *m = m.max(p.abs());
            }
        }
    }
    fn state(&mut self, layer: usize, _unit: usize, cell: f32, hidden: f32) {
        if let Some(l) = self.layers.get_mut(layer) {
            l.cell_absmax = l.cell_absmax.max(cell.abs());
            l.hidden_absmax = l.hidden_absmax.max(hidden.abs());
        }
    }
}

/// Runs `model` from zero state over `inputs` and records absolute maxima.
///
/// # Errors
/// Empty data, a row with the wrong feature count, or a non-finite value.
pub fn observe(model: &FloatModelData, inputs: &[Vec<f32>]) -> Result<Ranges> {
    if inputs.is_empty() {
        bail!("calibration data has no rows");
    }
    let m = model.view()?;
    let mut ranges = Ranges {
        input_absmax: vec![0.0; m.input_len()],
        layers: vec![LayerRanges::default(); m.layers().len()],
        output_absmax: vec![0.0; m.output_len()],
        steps: inputs.len(),
    };
    let mut state = vec![0.0f32; m.state_len()];
    let mut out = vec![0.0f32; m.output_len()];
    for (t, x) in inputs.iter().enumerate() {
        if let Some(i) = x.iter().position(|v| !v.is_finite()) {
            bail!("calibration row {t}, feature {i} is {} (data must be finite)", x[i]);
        }
        let mut probe = RangeProbe { layers: &mut ranges.layers };
        m.step_probed(&mut state, x, &mut out, &mut probe).map_err(|e| anyhow::anyhow!("calibration row {t}: {e}"))?;
        for (a, v) in ranges.input_absmax.iter_mut().zip(x) {
            *a = a.max(v.abs());
        }
        for (a, v) in ranges.output_absmax.iter_mut().zip(&out) {
            *a = a.max(v.abs());
        }
    }
    Ok(ranges)
}
