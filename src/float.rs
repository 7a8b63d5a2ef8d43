//! The float reference LSTM (`f32`, `libm`), the ground truth for "float".
//!
//! Same shapes and gate order as the integer step in [`crate::quant`]:
//! gates `i, f, g, o` stacked row-wise in `4H` rows,
//!
//! ```text
//! i = sigmoid(Wxi x + Whi h + bi)    f = sigmoid(Wxf x + Whf h + bf)
//! g = tanh(Wxg x + Whg h + bg)       o = sigmoid(Wxo x + Who h + bo)
//! c' = f*c + i*g                     h' = o*tanh(c')
//! ```
//!
//! with one folded bias per gate row, 1 to [`MAX_LAYERS`] stacked layers and
//! an optional dense head `y = Wy h + by` on the last layer. It matches
//! PyTorch `nn.LSTM` to within `1e-5` on the golden vectors in
//! `tests/data/golden/` (test `tests/float_vs_pytorch.rs`).
//!
//! State is caller-owned: `f32` words, [`FloatModel::state_len`] of them
//! (per layer `h[H]` then `c[H]`, then `H_max` words of scratch). Zeroed
//! state is the usual initial state.
//!
//! ```
//! use lapwing::float::{FloatLayer, FloatModel};
//! // One layer, X = 1, H = 1, all gates driven by the input only.
//! let w_x = [1.0f32, 1.0, 1.0, 1.0];
//! let w_h = [0.0f32; 4];
//! let b = [0.0f32; 4];
//! let layer = FloatLayer::new(1, 1, &w_x, &w_h, &b)?;
//! let model = FloatModel::new(&[layer], None)?;
//! let mut state = [0.0f32; 3];
//! let mut out = [0.0f32; 1];
//! model.step(&mut state, &[0.5], &mut out)?;
//! assert!(out[0] > 0.0);
//! # Ok::<(), lapwing::Error>(())
//! ```

use crate::{stack_layers, Error, Probe, MAX_LAYERS};
use heapless::Vec as HVec;

/// One LSTM layer's float weights (borrowed).
#[derive(Clone, Copy, Debug)]
pub struct FloatLayer<'a> {
    input: usize,
    hidden: usize,
    w_x: &'a [f32],
    w_h: &'a [f32],
    b: &'a [f32],
}

impl<'a> FloatLayer<'a> {
    /// A layer with `input` features and `hidden` units.
    ///
    /// `w_x` is `[4H, X]`, `w_h` is `[4H, H]`, `b` is `[4H]`, row-major,
    /// gate order `i, f, g, o`.
    ///
    /// # Errors
    /// [`Error::Shape`] when a slice length does not match, or a dimension is 0.
    pub fn new(input: usize, hidden: usize, w_x: &'a [f32], w_h: &'a [f32], b: &'a [f32]) -> Result<Self, Error> {
        if input == 0 || hidden == 0 {
            return Err(Error::Shape { what: "layer dimension", expected: 1, got: 0 });
        }
        let rows = dim_mul("hidden units", 4, hidden)?;
        check_len("w_x", w_x.len(), dim_mul("w_x", rows, input)?)?;
        check_len("w_h", w_h.len(), dim_mul("w_h", rows, hidden)?)?;
        check_len("bias", b.len(), rows)?;
        Ok(FloatLayer { input, hidden, w_x, w_h, b })
    }

    /// Input features X.
    pub fn input(&self) -> usize {
        self.input
    }

    /// Hidden units H.
    pub fn hidden(&self) -> usize {
        self.hidden
    }
}

/// A dense head `y = W h + b` (borrowed), `W` is `[Y, H]`.
#[derive(Clone, Copy, Debug)]
pub struct FloatHead<'a> {
    input: usize,
    output: usize,
    w: &'a [f32],
    b: &'a [f32],
}

impl<'a> FloatHead<'a> {
    /// A head from `input` hidden units to `output` values.
    ///
    /// # Errors
    /// [`Error::Shape`] when a slice length does not match, or a dimension is 0.
    pub fn new(input: usize, output: usize, w: &'a [f32], b: &'a [f32]) -> Result<Self, Error> {
        if input == 0 || output == 0 {
            return Err(Error::Shape { what: "head dimension", expected: 1, got: 0 });
        }
        check_len("head weight", w.len(), dim_mul("head weight", input, output)?)?;
        check_len("head bias", b.len(), output)?;
        Ok(FloatHead { input, output, w, b })
    }

    /// Output values Y.
    pub fn output(&self) -> usize {
        self.output
    }
}

/// `a * b`, or [`Error::Shape`] naming `what` when the product overflows.
pub(crate) fn dim_mul(what: &'static str, a: usize, b: usize) -> Result<usize, Error> {
    a.checked_mul(b).ok_or(Error::Shape { what, expected: usize::MAX, got: a })
}

pub(crate) fn check_len(what: &'static str, got: usize, expected: usize) -> Result<(), Error> {
    if got == expected {
        Ok(())
    } else {
        Err(Error::Shape { what, expected, got })
    }
}

/// A stacked float LSTM with an optional head.
#[derive(Clone, Debug)]
pub struct FloatModel<'a> {
    layers: HVec<FloatLayer<'a>, MAX_LAYERS>,
    head: Option<FloatHead<'a>>,
}

impl<'a> FloatModel<'a> {
    /// Stacks `layers` (1 to [`MAX_LAYERS`]) and an optional head.
    ///
    /// # Errors
    /// [`Error::LayerCount`] for 0 or too many layers; [`Error::Shape`] when a
    /// layer's input is not the previous layer's hidden size, or the head's
    /// input is not the last hidden size.
    pub fn new(layers: &[FloatLayer<'a>], head: Option<FloatHead<'a>>) -> Result<Self, Error> {
        let v = stack_layers(layers, |l| (l.input, l.hidden), head.as_ref().map(|h| h.input))?;
        Ok(FloatModel { layers: v, head })
    }

    /// The layers, first to last.
    pub fn layers(&self) -> &[FloatLayer<'a>] {
        &self.layers
    }

    /// The head, if any.
    pub fn head(&self) -> Option<&FloatHead<'a>> {
        self.head.as_ref()
    }

    /// Input features of the first layer.
    pub fn input_len(&self) -> usize {
        self.layers.first().map_or(0, |l| l.input)
    }

    /// Length of one step's output: Y with a head, else the last H.
    pub fn output_len(&self) -> usize {
        match (&self.head, self.layers.last()) {
            (Some(h), _) => h.output,
            (None, Some(l)) => l.hidden,
            (None, None) => 0,
        }
    }

    /// `f32` words of state: `2H` per layer plus `H_max` scratch.
    pub fn state_len(&self) -> usize {
        let hmax = self.layers.iter().map(|l| l.hidden).max().unwrap_or(0);
        self.layers.iter().map(|l| 2 * l.hidden).sum::<usize>() + hmax
    }

    /// One time step: consumes `x` (X values), updates `state`, writes the
    /// head output (or the last hidden state) to `out`.
    ///
    /// # Errors
    /// [`Error::StateSize`], [`Error::InputSize`] or [`Error::OutputSize`]
    /// when a buffer has the wrong length; nothing is modified then.
    pub fn step(&self, state: &mut [f32], x: &[f32], out: &mut [f32]) -> Result<(), Error> {
        self.step_probed(state, x, out, &mut ())
    }

    /// [`FloatModel::step`] reporting every gate, cell and hidden value to `probe`.
    ///
    /// # Errors
    /// As [`FloatModel::step`].
    pub fn step_probed<P: Probe<f32>>(
        &self,
        state: &mut [f32],
        x: &[f32],
        out: &mut [f32],
        probe: &mut P,
    ) -> Result<(), Error> {
        if state.len() != self.state_len() {
            return Err(Error::StateSize { expected: self.state_len(), got: state.len() });
        }
        if x.len() != self.input_len() {
            return Err(Error::InputSize { expected: self.input_len(), got: x.len() });
        }
        if out.len() != self.output_len() {
            return Err(Error::OutputSize { expected: self.output_len(), got: out.len() });
        }
        let layers_len: usize = self.layers.iter().map(|l| 2 * l.hidden).sum();
        let (mut rest, scratch) = state.split_at_mut(layers_len);
        let mut prev_h: Option<&[f32]> = None;
        for (k, layer) in self.layers.iter().enumerate() {
            let (hc, tail) = rest.split_at_mut(2 * layer.hidden);
            rest = tail;
            let (h, c) = hc.split_at_mut(layer.hidden);
            let input = prev_h.unwrap_or(x);
            layer_step(layer, k, input, h, c, scratch, probe);
            prev_h = Some(h);
        }
        let last = prev_h.unwrap_or(x);
        match &self.head {
            Some(head) => {
                for ((o, row), b) in out.iter_mut().zip(head.w.chunks_exact(head.input)).zip(head.b) {
                    *o = dot(row, last) + b;
                }
            }
            None => {
                for (o, v) in out.iter_mut().zip(last) {
                    *o = *v;
                }
            }
        }
        Ok(())
    }
}

#[inline]
fn dot(w: &[f32], v: &[f32]) -> f32 {
    w.iter().zip(v).map(|(a, b)| a * b).sum()
}

/// Logistic sigmoid in `f32` via `libm::expf`.
#[inline]
pub fn sigmoid(x: f32) -> f32 {
    1.0 / (1.0 + libm::expf(-x))
}

fn layer_step<P: Probe<f32>>(
    layer: &FloatLayer<'_>,
    k: usize,
    x: &[f32],
    h: &mut [f32],
    c: &mut [f32],
    scratch: &mut [f32],
    probe: &mut P,
) {
    let hd = layer.hidden;
    let row = |g: usize, j: usize| {
        let r = g * hd + j;
        let wx = layer.w_x.get(r * layer.input..(r + 1) * layer.input).unwrap_or(&[]);
        let wh = layer.w_h.get(r * hd..(r + 1) * hd).unwrap_or(&[]);
        dot(wx, x) + dot(wh, h) + layer.b.get(r).copied().unwrap_or(0.0)
    };
    for (j, (hn, cj)) in scratch.iter_mut().zip(c.iter_mut()).enumerate().take(hd) {
        let pre = [row(0, j), row(1, j), row(2, j), row(3, j)];
        let i = sigmoid(pre[0]);
        let f = sigmoid(pre[1]);
        let g = libm::tanhf(pre[2]);
        let o = sigmoid(pre[3]);
        let c_new = f * *cj + i * g;
        let h_new = o * libm::tanhf(c_new);
        probe.gates(k, j, &pre, &[i, f, g, o]);
        probe.state(k, j, c_new, h_new);
        *cj = c_new;
        *hn = h_new;
    }
    for (hv, s) in h.iter_mut().zip(scratch.iter()) {
        *hv = *s;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shape_errors_are_reported() {
        let w = [0.0f32; 8];
        assert_eq!(
            FloatLayer::new(2, 1, &w[..7], &w[..4], &w[..4]).unwrap_err(),
            Error::Shape { what: "w_x", expected: 8, got: 7 }
        );
        let l1 = FloatLayer::new(2, 1, &w, &w[..4], &w[..4]).unwrap();
        let l2 = FloatLayer::new(2, 1, &w, &w[..4], &w[..4]).unwrap();
        assert!(matches!(FloatModel::new(&[l1, l2], None), Err(Error::Shape { .. })));
        assert!(matches!(FloatModel::new(&[], None), Err(Error::LayerCount { got: 0 })));
        let m = FloatModel::new(&[l1], None).unwrap();
        let mut st = [0.0f32; 2];
        assert_eq!(m.step(&mut st, &[0.0, 0.0], &mut [0.0]).unwrap_err(), Error::StateSize { expected: 3, got: 2 });
        let mut st = [0.0f32; 3];
        assert!(matches!(m.step(&mut st, &[0.0], &mut [0.0]), Err(Error::InputSize { .. })));
        assert!(matches!(m.step(&mut st, &[0.0, 0.0], &mut []), Err(Error::OutputSize { .. })));
    }

    #[test]
    fn hand_computed_single_unit() {
        // X = 1, H = 1: pre-activations are w*x + b per gate.
        let w_x = [0.5f32, -0.25, 1.0, 2.0];
        let w_h = [0.0f32; 4];
        let b = [0.1f32, 0.2, -0.3, 0.0];
        let l = FloatLayer::new(1, 1, &w_x, &w_h, &b).unwrap();
        let m = FloatModel::new(&[l], None).unwrap();
        let mut st = [0.0f32; 3];
        let mut out = [0.0f32];
        m.step(&mut st, &[1.0], &mut out).unwrap();
        let i = 1.0 / (1.0 + (-0.6f64).exp());
        let g = (0.7f64).tanh();
        let o = 1.0 / (1.0 + (-2.0f64).exp());
        let c = i * g;
        let h = o * c.tanh();
        assert!((st[1] as f64 - c).abs() < 1e-6);
        assert!((out[0] as f64 - h).abs() < 1e-6);
    }
}
