//! Owned float LSTM weights, as importers and `fit` produce them.
//!
//! Layout (DESIGN.md section 4, Lapwing's own): per layer `w_x [4H, X]`,
//! `w_h [4H, H]`, one folded bias `b [4H]`, gate order `i, f, g, o`; an
//! optional head `w [Y, H]`, `b [Y]`.

use anyhow::{bail, Result};
use lapwing::float::{FloatHead, FloatLayer, FloatModel};

/// One layer's float weights.
#[derive(Clone, Debug, PartialEq)]
pub struct FloatLayerData {
    /// Input features X.
    pub input: usize,
    /// Hidden units H.
    pub hidden: usize,
    /// `[4H, X]` row-major.
    pub w_x: Vec<f32>,
    /// `[4H, H]` row-major.
    pub w_h: Vec<f32>,
    /// `[4H]`, input and recurrent biases folded.
    pub b: Vec<f32>,
}

/// A dense head.
#[derive(Clone, Debug, PartialEq)]
pub struct FloatHeadData {
    /// Input (last hidden) size H.
    pub input: usize,
    /// Outputs Y.
    pub output: usize,
    /// `[Y, H]` row-major.
    pub w: Vec<f32>,
    /// `[Y]`.
    pub b: Vec<f32>,
}

/// A whole float model.
#[derive(Clone, Debug, PartialEq)]
pub struct FloatModelData {
    /// Layers, first to last.
    pub layers: Vec<FloatLayerData>,
    /// Optional head.
    pub head: Option<FloatHeadData>,
}

impl FloatModelData {
    /// A borrowed view the core's float reference runs.
    ///
    /// # Errors
    /// Any shape inconsistency, as the core reports it.
    pub fn view(&self) -> Result<FloatModel<'_>> {
        let layers = self
            .layers
            .iter()
            .enumerate()
            .map(|(k, l)| {
                FloatLayer::new(l.input, l.hidden, &l.w_x, &l.w_h, &l.b).map_err(|e| anyhow::anyhow!("layer {k}: {e}"))
            })
            .collect::<Result<Vec<_>>>()?;
        let head = match &self.head {
            Some(h) => Some(FloatHead::new(h.input, h.output, &h.w, &h.b).map_err(|e| anyhow::anyhow!("head: {e}"))?),
            None => None,
        };
        FloatModel::new(&layers, head).map_err(|e| anyhow::anyhow!("model: {e}"))
    }

    /// Input features X.
    pub fn input_len(&self) -> usize {
        self.layers.first().map_or(0, |l| l.input)
    }

    /// Checks every weight is finite.
    ///
    /// # Errors
    /// Names the tensor and the flat index of the first NaN or infinity.
    pub fn check_finite(&self) -> Result<()> {
        for (k, l) in self.layers.iter().enumerate() {
            for (name, t) in [("w_x", &l.w_x), ("w_h", &l.w_h), ("b", &l.b)] {
                if let Some((i, v)) = t.iter().enumerate().find(|(_, v)| !v.is_finite()) {
                    bail!("layers.{k}.{name}[{i}] is {v} (weights must be finite)");
                }
            }
        }
        if let Some(h) = &self.head {
            for (name, t) in [("w", &h.w), ("b", &h.b)] {
                if let Some((i, v)) = t.iter().enumerate().find(|(_, v)| !v.is_finite()) {
                    bail!("head.{name}[{i}] is {v} (weights must be finite)");
                }
            }
        }
        Ok(())
    }

    /// Folds input normalization `x_n = (x - mean) / std` into layer 0, so the
    /// model takes raw inputs: `W' = W / std` per column and
    /// `b' = b - sum_c W[r][c] * mean[c] / std[c]` (computed in f64).
    ///
    /// # Errors
    /// Length mismatch, or a `std` that is not finite and positive.
    pub fn fold_normalization(&mut self, mean: &[f32], std: &[f32]) -> Result<()> {
        let Some(l0) = self.layers.first_mut() else { bail!("model has no layers") };
        if mean.len() != l0.input || std.len() != l0.input {
            bail!("normalization has {} means and {} stds, layer 0 takes {} features", mean.len(), std.len(), l0.input);
        }
        if let Some((i, s)) = std.iter().enumerate().find(|(_, s)| !(s.is_finite() && **s > 0.0)) {
            bail!("norm.std[{i}] = {s} must be finite and positive");
        }
        for (row, b) in l0.w_x.chunks_exact_mut(l0.input).zip(l0.b.iter_mut()) {
            let mut shift = 0.0f64;
            for (c, ((w, m), s)) in row.iter_mut().zip(mean).zip(std).enumerate() {
                let wn = *w as f64 / *s as f64;
                if !(wn as f32).is_finite() {
                    bail!("norm.std[{c}] = {s:e} is too small: folding it overflows a layer-0 weight");
                }
                shift += wn * *m as f64;
                *w = wn as f32;
            }
            *b = (*b as f64 - shift) as f32;
        }
        Ok(())
    }
}

/// Runs the float model over `inputs` from zero state; returns one output
/// vector per step.
///
/// # Errors
/// Shape errors from the core.
pub fn run_float(model: &FloatModelData, inputs: &[Vec<f32>]) -> Result<Vec<Vec<f32>>> {
    let m = model.view()?;
    let mut state = vec![0.0f32; m.state_len()];
    let mut out = vec![0.0f32; m.output_len()];
    let mut all = Vec::with_capacity(inputs.len());
    for (t, x) in inputs.iter().enumerate() {
        m.step(&mut state, x, &mut out).map_err(|e| anyhow::anyhow!("step {t}: {e}"))?;
        all.push(out.clone());
    }
    Ok(all)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folding_normalization_matches_normalizing_inputs() {
        let base = crate::synth::random_model(
            &crate::synth::ModelSpec { input: 3, hidden: 4, layers: 1, output: Some(2), gain: 1.0 },
            7,
        );
        let mean = [1.0f32, -2.0, 0.5];
        let std = [2.0f32, 0.5, 3.0];
        let mut folded = base.clone();
        folded.fold_normalization(&mean, &std).unwrap();
        let raw = crate::synth::random_walk(3, 200, 11);
        let normed: Vec<Vec<f32>> =
            raw.iter().map(|x| x.iter().zip(&mean).zip(&std).map(|((v, m), s)| (v - m) / s).collect()).collect();
        let a = run_float(&base, &normed).unwrap();
        let b = run_float(&folded, &raw).unwrap();
        for (ra, rb) in a.iter().zip(&b) {
            for (va, vb) in ra.iter().zip(rb) {
                assert!((va - vb).abs() < 1e-5, "{va} vs {vb}");
            }
        }
    }

    #[test]
    fn non_finite_weights_are_named() {
        let mut m = crate::synth::random_model(
            &crate::synth::ModelSpec { input: 2, hidden: 2, layers: 2, output: None, gain: 1.0 },
            1,
        );
        m.layers[1].w_h[3] = f32::NAN;
        let e = m.check_finite().unwrap_err().to_string();
        assert!(e.contains("layers.1.w_h[3]"), "{e}");
    }
}
