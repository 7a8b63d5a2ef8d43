//! Training a float next-step predictor: an LSTM (1 to
//! [`lapwing::MAX_LAYERS`] layers) plus a dense head, fitted to a recording
//! so that the input at step `t` predicts the input at step `t + 1`
//! (DESIGN.md section 8: the demo model is fitted by `lapwing fit`).
//!
//! # What is fitted
//!
//! - **Data.** `rows` is one recording, `T` rows of `X` finite features. The
//!   last [`FitOptions::val_fraction`] of the rows (rounded to the nearest
//!   row) is the validation part, the rest the training part; the two never
//!   share a step pair.
//! - **Normalization.** Per-feature mean and population standard deviation
//!   of the *training part* (two passes in `f64`) standardize every input
//!   and every target, `x_n = (x - mean) / std` (in `f32`). A feature that is
//!   constant over the training part is an error.
//! - **Model.** Layers of `H` units ([`FitOptions::hidden`]), gate order
//!   `i, f, g, o` as in [`lapwing::float`], and a head `Y = X`. The forward
//!   pass is the core's float step ([`lapwing::float::FloatModel::step`])
//!   written for a batch: the same formulas in `f32`, but pre-activations
//!   summed in another order and `sigmoid(x) = 1 / (1 + e^-x)`,
//!   `tanh(x) = 1 - 2 / (e^2x + 1)` evaluated with a vectorizable `e^x`
//!   (relative error below `3e-7`) instead of `libm`. The two agree to
//!   rounding: within `1e-5` (relative, floor 1) on every output, checked
//!   with the saved model in `tools/tests/fit_gradients.rs`.
//! - **Loss.** Mean squared error over every step, stream and feature of a
//!   window, on the *standardized* targets. The losses in [`FitResult`] are
//!   in those units (so predicting the training mean scores about 1).
//! - **Initialization** (seeded ChaCha8, as PyTorch `nn.LSTM` / `nn.Linear`
//!   do it): every weight and bias `U(-1/sqrt(H), 1/sqrt(H))` with `H` the
//!   layer's (for the head: its input's) hidden size, one bias per gate row
//!   (PyTorch has two); the forget-gate biases are then raised by 1, common
//!   practice for LSTMs (Jozefowicz et al., 2015) so memory is kept early in
//!   training.
//! - **Truncated BPTT, state carried.** The training part is cut into
//!   [`FitOptions::batch`] contiguous streams of equal length (a remainder of
//!   fewer than `batch` steps at the end is not used), trained in parallel.
//!   Each stream is walked in windows of [`FitOptions::window`] steps (the
//!   last window of an epoch may be shorter); one optimizer step per window.
//!   The LSTM state is **carried** from one window to the next of the same
//!   stream (gradients stop at the window boundary) and reset to zero at the
//!   start of every epoch, so the model learns from the long context it will
//!   see when it runs on a device, not from a cold start every 64 steps.
//! - **Optimizer.** Adam (Kingma & Ba, 2014) with bias correction,
//!   `beta1 = 0.9`, `beta2 = 0.999`, `eps = 1e-8` added to the corrected
//!   `sqrt(v)` (as PyTorch `torch.optim.Adam` does), learning rate
//!   [`FitOptions::lr`], no weight decay. Before each step the gradient is
//!   clipped by its global L2 norm (computed in `f64`): if the norm exceeds
//!   [`FitOptions::clip`] every gradient is scaled by `clip / norm`.
//! - **Validation and early stopping.** After every epoch the validation
//!   part is run as one stream from zero state (windows with carried state,
//!   forward only). The weights of the epoch with the lowest validation loss
//!   are kept; training stops after [`FitOptions::patience`] epochs in a row
//!   without a lower one, or after [`FitOptions::epochs`].
//! - **Output in raw units.** After training, the head's output
//!   de-standardization is folded into the head: row `r` of `head.w` is
//!   multiplied by `std[r]` and `head.b[r]` becomes `b[r] * std[r] +
//!   mean[r]` (in `f64`). So the returned model takes *standardized* inputs
//!   (layer 0 is not folded; [`FitResult::norm`] holds the normalization,
//!   saved as `norm.mean` / `norm.std` by [`crate::export::save_safetensors`])
//!   and predicts the next input in **raw units**. After
//!   [`FloatModelData::fold_normalization`] with that normalization it maps
//!   raw inputs to raw predictions.
//!
//! # Reproducibility and speed
//!
//! Single-threaded, no math-library calls in the engine (only `+ - * /`,
//! `sqrt`, integer powers and bit operations, all deterministic) and a fixed
//! order of every sum: the same rows, options and seed give bit-identical
//! weights (tested on the same build; nothing in the code depends on the
//! machine).
//!
//! The inner loops are matrix-vector and rank-update products over
//! contiguous rows, blocked so 32 outputs stay in registers (weights are
//! kept transposed during a window), and the activations are branch-free,
//! so the compiler vectorizes them even for the baseline x86-64 target.
//! Measured on one core of the development machine (release build): about
//! 6 x 10^5 training steps per second for X = 4, H = 32, one layer, batch
//! 16 (about 2.5 x 10^5 with two layers); 10^6 samples of a 4-feature
//! vibration-like signal reach their validation floor after 1-2 epochs and
//! stop early in under 20 s. The throughput test in
//! `tools/tests/fit_gradients.rs` prints the figure (`--ignored`).

use std::fmt::Debug;
use std::ops::{Add, AddAssign, Div, Mul, Sub};
use std::time::Instant;

use anyhow::{bail, Context, Result};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use crate::float_model::{FloatHeadData, FloatLayerData, FloatModelData};
use crate::import::Normalization;

/// Adam's first-moment decay (Kingma & Ba, 2014).
pub const ADAM_BETA1: f32 = 0.9;
/// Adam's second-moment decay (Kingma & Ba, 2014).
pub const ADAM_BETA2: f32 = 0.999;
/// Adam's denominator epsilon (Kingma & Ba, 2014).
pub const ADAM_EPS: f32 = 1e-8;

/// Largest number of trainable parameters accepted (2^26).
const MAX_PARAMS: usize = 1 << 26;
/// Largest number of values the per-window activation record may hold
/// (2^28, 1 GiB of `f32`): `window * batch * 9H` summed over the layers.
const MAX_TAPE: usize = 1 << 28;

/// Training options. [`Default`] gives the documented defaults.
#[derive(Clone, Debug, PartialEq)]
pub struct FitOptions {
    /// Hidden units per layer (default 32).
    pub hidden: usize,
    /// Stacked LSTM layers, 1 to [`lapwing::MAX_LAYERS`] (default 1).
    pub layers: usize,
    /// Truncated-BPTT window in steps (default 64).
    pub window: usize,
    /// Streams trained in parallel, one optimizer step per window over all
    /// of them (default 16).
    pub batch: usize,
    /// Largest number of epochs (default 30).
    pub epochs: usize,
    /// Early stopping: training stops once this many epochs in a row have
    /// not lowered the validation loss (default 4; 0 behaves as 1).
    pub patience: usize,
    /// Adam learning rate (default `1e-3`).
    pub lr: f32,
    /// Global gradient-norm clip (default 1.0; 0 disables clipping).
    pub clip: f32,
    /// Fraction of the rows, taken from the end, used for validation
    /// (default 0.1; must be in `(0, 1)`).
    pub val_fraction: f32,
    /// Seed of the weight initialization (ChaCha8; default 0).
    pub seed: u64,
    /// Draw a progress bar on stderr (hidden when stderr is not a terminal).
    pub progress: bool,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions {
            hidden: 32,
            layers: 1,
            window: 64,
            batch: 16,
            epochs: 30,
            patience: 4,
            lr: 1e-3,
            clip: 1.0,
            val_fraction: 0.1,
            seed: 0,
            progress: false,
        }
    }
}

/// What [`fit`] returns.
#[derive(Clone, Debug)]
pub struct FitResult {
    /// The fitted model of the best epoch: layer 0 takes *standardized*
    /// inputs (fold [`FitResult::norm`] for raw ones), the head predicts the
    /// next input in raw units (see the module docs).
    pub model: FloatModelData,
    /// Per-feature mean and population std of the training part.
    pub norm: Normalization,
    /// Mean training loss of each epoch (standardized units, averaged over
    /// the epoch's windows while the weights were changing).
    pub train_loss: Vec<f32>,
    /// Validation loss after each epoch (standardized units).
    pub val_loss: Vec<f32>,
    /// Index into [`FitResult::val_loss`] of the epoch whose weights were
    /// kept (0-based).
    pub best_epoch: usize,
    /// Validation loss of the initial (untrained) weights.
    pub initial_val_loss: f32,
    /// Training step pairs per epoch (streams x stream length).
    pub train_steps: usize,
    /// Validation step pairs.
    pub val_steps: usize,
    /// Wall-clock seconds spent training and validating.
    pub seconds: f64,
}

impl FitResult {
    /// A short text summary: shape, epochs, losses, throughput.
    pub fn to_text(&self) -> String {
        let best = self.val_loss.get(self.best_epoch).copied().unwrap_or(f32::NAN);
        let mut s = format!(
            "fitted LSTM X{} H{} x{} layer(s) + head Y{}: {} epoch(s) run, best epoch {}\n",
            self.norm.mean.len(),
            self.model.layers.first().map_or(0, |l| l.hidden),
            self.model.layers.len(),
            self.model.head.as_ref().map_or(0, |h| h.output),
            self.val_loss.len(),
            self.best_epoch + 1,
        );
        s += &format!(
            "  validation loss (standardized MSE): {:.5} untrained -> {best:.5} ({} validation steps)\n",
            self.initial_val_loss, self.val_steps
        );
        s += &format!(
            "  {} training steps per epoch, {:.1} s, {:.0} steps/s (forward + backward)\n",
            self.train_steps,
            self.seconds,
            self.samples_per_second()
        );
        s
    }

    /// Training throughput: training step pairs processed (forward and
    /// backward) per second of wall-clock time, validation included in the
    /// time.
    pub fn samples_per_second(&self) -> f64 {
        let done = (self.train_steps as f64) * (self.train_loss.len() as f64);
        if self.seconds > 0.0 {
            done / self.seconds
        } else {
            0.0
        }
    }
}

// ---------------------------------------------------------------------------
// Scalars: the same code runs in f32 (training) and f64 (gradient checks).

/// A float type the engine runs in.
trait Real:
    Copy
    + Debug
    + Default
    + PartialOrd
    + Add<Output = Self>
    + Sub<Output = Self>
    + Mul<Output = Self>
    + Div<Output = Self>
    + AddAssign
{
    const ZERO: Self;
    const ONE: Self;
    fn sigmoid(self) -> Self;
    fn tanh(self) -> Self;
    fn of_f32(v: f32) -> Self;
    fn of_f64(v: f64) -> Self;
    fn to_f32(self) -> f32;
    fn to_f64(self) -> f64;
}

impl Real for f32 {
    const ZERO: f32 = 0.0;
    const ONE: f32 = 1.0;
    #[inline(always)]
    fn sigmoid(self) -> f32 {
        1.0 / (1.0 + exp_f32(-self))
    }
    #[inline(always)]
    fn tanh(self) -> f32 {
        1.0 - 2.0 / (exp_f32(2.0 * self) + 1.0)
    }
    fn of_f32(v: f32) -> f32 {
        v
    }
    fn of_f64(v: f64) -> f32 {
        v as f32
    }
    fn to_f32(self) -> f32 {
        self
    }
    fn to_f64(self) -> f64 {
        self as f64
    }
}

/// `e^x` in `f32`, branch-free so that loops over it vectorize (libm's
/// `expf` and `tanhf` are calls the compiler cannot vectorize, and took
/// half the training time). Cody-Waite reduction `x = k ln2 + r`,
/// `|r| <= ln2 / 2`, `k` rounded to nearest by the `1.5 * 2^23` trick, then
/// the degree-6 polynomial of Cephes `expf` (S. L. Moshier) and `2^k` built
/// in the exponent bits. The input is clamped to `[-87, 87]`, so the result
/// is a normal number. Relative error below `3e-7` against `f64` (unit test
/// `fast_exp_is_accurate`).
#[inline(always)]
fn exp_f32(x: f32) -> f32 {
    const MAGIC: f32 = 12_582_912.0; // 1.5 * 2^23: adding it rounds to an integer
    let x = x.clamp(-87.0, 87.0);
    let kf = x * std::f32::consts::LOG2_E + MAGIC;
    let ki = (kf.to_bits() as i32).wrapping_sub(MAGIC.to_bits() as i32);
    let k = kf - MAGIC;
    let r = x - k * 0.693_359_4 - k * -2.121_944_4e-4;
    let mut p = 1.987_569_1e-4f32;
    p = p * r + 1.398_199_9e-3;
    p = p * r + 8.333_452e-3;
    p = p * r + 4.166_579_6e-2;
    p = p * r + 1.666_666_5e-1;
    p = p * r + 0.5; // Cephes: 5.0000001201e-1, which rounds to 0.5 in f32
    let e = p * r * r + r + 1.0;
    e * f32::from_bits(((ki + 127) << 23) as u32)
}

impl Real for f64 {
    const ZERO: f64 = 0.0;
    const ONE: f64 = 1.0;
    #[inline]
    fn sigmoid(self) -> f64 {
        1.0 / (1.0 + (-self).exp())
    }
    #[inline]
    fn tanh(self) -> f64 {
        f64::tanh(self)
    }
    fn of_f32(v: f32) -> f64 {
        v as f64
    }
    fn of_f64(v: f64) -> f64 {
        v
    }
    fn to_f32(self) -> f32 {
        self as f32
    }
    fn to_f64(self) -> f64 {
        self
    }
}

/// `y += a * x` elementwise (vectorizes: no reduction).
#[inline(always)]
fn axpy<R: Real>(y: &mut [R], a: R, x: &[R]) {
    for (yi, xi) in y.iter_mut().zip(x) {
        *yi += a * *xi;
    }
}

/// Columns per register block in [`gemv_acc`] and [`gemm_acc`].
const BLK: usize = 32;

/// `z[r] += sum_c v[c] * wt[c][r]` (`wt` row-major `[v.len()][z.len()]`),
/// adding the terms to each `z[r]` in order of `c`. Blocks of [`BLK`]
/// outputs stay in registers while the rows stream past.
#[inline]
fn gemv_acc<R: Real>(z: &mut [R], v: &[R], wt: &[R]) {
    let n = z.len();
    if n == 0 {
        return;
    }
    let full = n / BLK * BLK;
    let (zf, zr) = z.split_at_mut(full);
    for (bi, zb) in zf.chunks_exact_mut(BLK).enumerate() {
        let off = bi * BLK;
        let mut acc = [R::ZERO; BLK];
        acc.copy_from_slice(zb);
        for (vc, row) in v.iter().zip(wt.chunks_exact(n)) {
            for (a, w) in acc.iter_mut().zip(&row[off..off + BLK]) {
                *a += *vc * *w;
            }
        }
        zb.copy_from_slice(&acc);
    }
    if !zr.is_empty() {
        for (vc, row) in v.iter().zip(wt.chunks_exact(n)) {
            axpy(zr, *vc, &row[full..]);
        }
    }
}

/// `g[c][r] += sum_b a[b][c] * d[b][r]` for `g` `[C][N]`, `a` `[B][C]`, `d`
/// `[B][N]` (row-major, `C = cols`, `N = n`), adding the terms to each
/// element in order of `b`.
#[inline]
fn gemm_acc<R: Real>(g: &mut [R], a: &[R], d: &[R], cols: usize, n: usize) {
    if n == 0 || cols == 0 {
        return;
    }
    let full = n / BLK * BLK;
    for (c, grow) in g.chunks_exact_mut(n).enumerate() {
        let (gf, gr) = grow.split_at_mut(full);
        for (bi, gb) in gf.chunks_exact_mut(BLK).enumerate() {
            let off = bi * BLK;
            let mut acc = [R::ZERO; BLK];
            acc.copy_from_slice(gb);
            for (arow, drow) in a.chunks_exact(cols).zip(d.chunks_exact(n)) {
                let av = arow.get(c).copied().unwrap_or(R::ZERO);
                for (acc_k, dv) in acc.iter_mut().zip(&drow[off..off + BLK]) {
                    *acc_k += av * *dv;
                }
            }
            gb.copy_from_slice(&acc);
        }
        if !gr.is_empty() {
            for (arow, drow) in a.chunks_exact(cols).zip(d.chunks_exact(n)) {
                axpy(gr, arow.get(c).copied().unwrap_or(R::ZERO), &drow[full..]);
            }
        }
    }
}

/// Sequential dot product, in the core's order (`lapwing::float`).
#[inline]
fn dot<R: Real>(a: &[R], b: &[R]) -> R {
    a.iter().zip(b).fold(R::ZERO, |s, (x, y)| s + *x * *y)
}

// ---------------------------------------------------------------------------
// Shapes and the flat parameter vector.

/// One layer's shape and the offsets of its tensors in the flat vector.
#[derive(Clone, Copy, Debug, PartialEq)]
struct LayerShape {
    input: usize,
    hidden: usize,
    w_x: usize,
    w_h: usize,
    b: usize,
}

/// The head's shape and offsets.
#[derive(Clone, Copy, Debug, PartialEq)]
struct HeadShape {
    input: usize,
    output: usize,
    w: usize,
    b: usize,
}

/// Shapes of a model and the layout of its flat parameter vector: per layer
/// `w_x [4H, X]`, `w_h [4H, H]`, `b [4H]` (row-major, as
/// [`FloatLayerData`]), then the head's `w [Y, H]`, `b [Y]`.
#[derive(Clone, Debug, PartialEq)]
struct Shapes {
    layers: Vec<LayerShape>,
    head: Option<HeadShape>,
    len: usize,
}

impl Shapes {
    fn new(dims: &[(usize, usize)], head_out: Option<usize>) -> Result<Shapes> {
        let mut off = 0usize;
        let mut take = |n: Option<usize>| -> Result<usize> {
            let start = off;
            off = n
                .and_then(|n| off.checked_add(n))
                .filter(|e| *e <= MAX_PARAMS)
                .ok_or_else(|| anyhow::anyhow!("the model has more than {MAX_PARAMS} parameters"))?;
            Ok(start)
        };
        let mut layers = Vec::with_capacity(dims.len());
        for &(input, hidden) in dims {
            let g4 = hidden.checked_mul(4);
            let w_x = take(g4.and_then(|g| g.checked_mul(input)))?;
            let w_h = take(g4.and_then(|g| g.checked_mul(hidden)))?;
            let b = take(g4)?;
            layers.push(LayerShape { input, hidden, w_x, w_h, b });
        }
        let last = dims.last().map_or(0, |d| d.1);
        let head = match head_out {
            Some(output) => {
                let w = take(output.checked_mul(last))?;
                let b = take(Some(output))?;
                Some(HeadShape { input: last, output, w, b })
            }
            None => None,
        };
        Ok(Shapes { layers, head, len: off })
    }

    fn of(model: &FloatModelData) -> Result<Shapes> {
        model.view()?;
        let dims: Vec<(usize, usize)> = model.layers.iter().map(|l| (l.input, l.hidden)).collect();
        Shapes::new(&dims, model.head.as_ref().map(|h| h.output))
    }

    fn input(&self) -> usize {
        self.layers.first().map_or(0, |l| l.input)
    }

    fn last_hidden(&self) -> usize {
        self.layers.last().map_or(0, |l| l.hidden)
    }

    fn output(&self) -> usize {
        self.head.map_or(self.last_hidden(), |h| h.output)
    }

    fn max_hidden(&self) -> usize {
        self.layers.iter().map(|l| l.hidden).max().unwrap_or(0)
    }

    /// The model's weights as one flat vector (this layout).
    fn flatten<R: Real>(&self, model: &FloatModelData) -> Vec<R> {
        let mut p = Vec::with_capacity(self.len);
        for l in &model.layers {
            p.extend(l.w_x.iter().chain(&l.w_h).chain(&l.b).map(|v| R::of_f32(*v)));
        }
        if let Some(h) = &model.head {
            p.extend(h.w.iter().chain(&h.b).map(|v| R::of_f32(*v)));
        }
        p
    }

    /// A flat vector (this layout) as model-shaped tensors.
    fn unflatten<R: Real>(&self, p: &[R]) -> FloatModelData {
        let f = |a: usize, n: usize| p.iter().skip(a).take(n).map(|v| v.to_f32()).collect::<Vec<f32>>();
        let layers = self
            .layers
            .iter()
            .map(|l| FloatLayerData {
                input: l.input,
                hidden: l.hidden,
                w_x: f(l.w_x, 4 * l.hidden * l.input),
                w_h: f(l.w_h, 4 * l.hidden * l.hidden),
                b: f(l.b, 4 * l.hidden),
            })
            .collect();
        let head = self.head.map(|h| FloatHeadData {
            input: h.input,
            output: h.output,
            w: f(h.w, h.output * h.input),
            b: f(h.b, h.output),
        });
        FloatModelData { layers, head }
    }
}

// ---------------------------------------------------------------------------
// The engine: batched forward over a window, backward through it.

/// One layer's record of a window and its work buffers. Index `[t][b][..]`
/// means step `t` of the window, stream `b`.
struct LayerTape<R> {
    /// Gate outputs `i, f, g, o` after the nonlinearity, `[T][B][4H]`.
    gates: Vec<R>,
    /// Cell state, `[T + 1][B][H]`; slot 0 is the state before the window.
    c: Vec<R>,
    /// Hidden state, `[T + 1][B][H]`; slot 0 is the state before the window.
    h: Vec<R>,
    /// `tanh(c)` after each step, `[T][B][H]`.
    tc: Vec<R>,
    /// `w_x` transposed, `[X_k][4H]`.
    wx_t: Vec<R>,
    /// `w_h` transposed, `[H][4H]`.
    wh_t: Vec<R>,
    /// Gradient of `w_x`, transposed, `[X_k][4H]`.
    gwx_t: Vec<R>,
    /// Gradient of `w_h`, transposed, `[H][4H]`.
    gwh_t: Vec<R>,
    /// Loss gradient reaching `h` and `c` of the previous step, `[B][H]`.
    dh_rec: Vec<R>,
    dc_rec: Vec<R>,
}

struct Engine<R> {
    shapes: Shapes,
    t_cap: usize,
    batch: usize,
    tapes: Vec<LayerTape<R>>,
    /// Outputs, `[T][B][Y]`.
    y: Vec<R>,
    /// Pre-activation gradients of one layer and step, `[B][4H]`.
    dz: Vec<R>,
    /// Loss gradient reaching the current layer's `h` from above (the head
    /// or the next layer), `[B][H]`; and the one for the layer below.
    dh_above: Vec<R>,
    dh_below: Vec<R>,
}

impl<R: Real> Engine<R> {
    fn new(shapes: &Shapes, t_cap: usize, batch: usize) -> Result<Engine<R>> {
        let t_cap = t_cap.max(1);
        let tape: usize = shapes.layers.iter().map(|l| l.hidden.saturating_mul(9)).fold(0usize, usize::saturating_add);
        if t_cap.saturating_add(1).saturating_mul(batch).saturating_mul(tape) > MAX_TAPE {
            bail!(
                "window x batch is too large: the activation record of one window would exceed {MAX_TAPE} values; \
                 use a shorter window or a smaller batch"
            );
        }
        let tapes = shapes
            .layers
            .iter()
            .map(|l| {
                let (hd, g4) = (l.hidden, 4 * l.hidden);
                LayerTape {
                    gates: vec![R::ZERO; t_cap * batch * g4],
                    c: vec![R::ZERO; (t_cap + 1) * batch * hd],
                    h: vec![R::ZERO; (t_cap + 1) * batch * hd],
                    tc: vec![R::ZERO; t_cap * batch * hd],
                    wx_t: vec![R::ZERO; l.input * g4],
                    wh_t: vec![R::ZERO; hd * g4],
                    gwx_t: vec![R::ZERO; l.input * g4],
                    gwh_t: vec![R::ZERO; hd * g4],
                    dh_rec: vec![R::ZERO; batch * hd],
                    dc_rec: vec![R::ZERO; batch * hd],
                }
            })
            .collect();
        let wide = shapes.max_hidden().max(shapes.input());
        Ok(Engine {
            shapes: shapes.clone(),
            t_cap,
            batch,
            tapes,
            y: vec![R::ZERO; t_cap * batch * shapes.output()],
            dz: vec![R::ZERO; batch * 4 * shapes.max_hidden()],
            dh_above: vec![R::ZERO; batch * wide],
            dh_below: vec![R::ZERO; batch * wide],
        })
    }

    /// Zero state before the next window.
    fn reset_state(&mut self) {
        let n = self.batch;
        for (tape, l) in self.tapes.iter_mut().zip(&self.shapes.layers) {
            tape.h.iter_mut().take(n * l.hidden).for_each(|v| *v = R::ZERO);
            tape.c.iter_mut().take(n * l.hidden).for_each(|v| *v = R::ZERO);
        }
    }

    /// The state after step `t_len` of the last window becomes the state
    /// before the next window.
    fn carry_state(&mut self, t_len: usize) {
        let n = self.batch;
        for (tape, l) in self.tapes.iter_mut().zip(&self.shapes.layers) {
            let w = n * l.hidden;
            tape.h.copy_within(t_len * w..(t_len + 1) * w, 0);
            tape.c.copy_within(t_len * w..(t_len + 1) * w, 0);
        }
    }

    /// Copies the weights into the transposed per-window layout.
    fn load(&mut self, p: &[R]) {
        for (tape, l) in self.tapes.iter_mut().zip(&self.shapes.layers) {
            let g4 = 4 * l.hidden;
            transpose(&p[l.w_x..l.w_x + g4 * l.input], g4, l.input, &mut tape.wx_t);
            transpose(&p[l.w_h..l.w_h + g4 * l.hidden], g4, l.hidden, &mut tape.wh_t);
        }
    }

    /// Forward over `t_len` steps of `xs` (`[T][B][X]`) from the state in
    /// slot 0; fills the tapes and `self.y`. Call [`Engine::load`] first.
    fn forward(&mut self, p: &[R], xs: &[R], t_len: usize) {
        let nb = self.batch;
        let xn = self.shapes.input();
        for t in 0..t_len {
            for k in 0..self.tapes.len() {
                let Some(l) = self.shapes.layers.get(k).copied() else { continue };
                let (below, rest) = self.tapes.split_at_mut(k);
                let Some(cur) = rest.first_mut() else { continue };
                let (hd, g4) = (l.hidden, 4 * l.hidden);
                let bias = &p[l.b..l.b + g4];
                let inputs: &[R] = match below.last() {
                    None => &xs[t * nb * xn..(t + 1) * nb * xn],
                    Some(prev) => &prev.h[(t + 1) * nb * l.input..(t + 2) * nb * l.input],
                };
                let (h_old, h_new) = cur.h.split_at_mut((t + 1) * nb * hd);
                let (c_old, c_new) = cur.c.split_at_mut((t + 1) * nb * hd);
                let gates = &mut cur.gates[t * nb * g4..(t + 1) * nb * g4];
                let tcs = &mut cur.tc[t * nb * hd..(t + 1) * nb * hd];
                let (wx_t, wh_t) = (&cur.wx_t, &cur.wh_t);
                let iter = inputs
                    .chunks_exact(l.input)
                    .zip(h_old[t * nb * hd..].chunks_exact(hd))
                    .zip(c_old[t * nb * hd..].chunks_exact(hd))
                    .zip(gates.chunks_exact_mut(g4))
                    .zip(h_new.chunks_exact_mut(hd))
                    .zip(c_new.chunks_exact_mut(hd))
                    .zip(tcs.chunks_exact_mut(hd));
                for ((((((x, hp), cp), z), hn), cn), tc) in iter {
                    z.copy_from_slice(bias);
                    gemv_acc(z, x, wx_t);
                    gemv_acc(z, hp, wh_t);
                    let (zifg, zo) = z.split_at_mut(3 * hd);
                    let (zif, zg) = zifg.split_at_mut(2 * hd);
                    // Separate loops (not a chained iterator) so each vectorizes.
                    for v in zif.iter_mut() {
                        *v = v.sigmoid();
                    }
                    for v in zo.iter_mut() {
                        *v = v.sigmoid();
                    }
                    for v in zg.iter_mut() {
                        *v = v.tanh();
                    }
                    let (zi, zf) = zif.split_at(hd);
                    let (zi, zf, zg, zo, cp) = (&zi[..hd], &zf[..hd], &zg[..hd], &zo[..hd], &cp[..hd]);
                    let (cn, tc, hn) = (&mut cn[..hd], &mut tc[..hd], &mut hn[..hd]);
                    for j in 0..hd {
                        let c = zf[j] * cp[j] + zi[j] * zg[j];
                        let tch = c.tanh();
                        cn[j] = c;
                        tc[j] = tch;
                        hn[j] = zo[j] * tch;
                    }
                }
            }
            // Output: the head on the last layer's h, or that h itself.
            let hd = self.shapes.last_hidden();
            let yn = self.shapes.output();
            let Some(top) = self.tapes.last() else { return };
            let tops = &top.h[(t + 1) * nb * hd..(t + 2) * nb * hd];
            let ys = &mut self.y[t * nb * yn..(t + 1) * nb * yn];
            for (h, y) in tops.chunks_exact(hd).zip(ys.chunks_exact_mut(yn)) {
                match self.shapes.head {
                    Some(hs) => {
                        let w = &p[hs.w..hs.w + hs.output * hs.input];
                        let b = &p[hs.b..hs.b + hs.output];
                        for ((yv, row), bv) in y.iter_mut().zip(w.chunks_exact(hs.input)).zip(b) {
                            *yv = dot(row, h) + *bv;
                        }
                    }
                    None => y.copy_from_slice(h),
                }
            }
        }
    }

    /// Backward through the last [`Engine::forward`] of `t_len` steps, given
    /// the loss gradient `dy` (`[T][B][Y]`); writes the whole gradient into
    /// `grad` (the flat layout of `p`). Gradients stop at the window's
    /// initial state (truncated BPTT).
    fn backward(&mut self, p: &[R], xs: &[R], dy: &[R], t_len: usize, grad: &mut [R]) {
        let nb = self.batch;
        let xn = self.shapes.input();
        let yn = self.shapes.output();
        let top_h = self.shapes.last_hidden();
        grad.iter_mut().for_each(|g| *g = R::ZERO);
        for tape in &mut self.tapes {
            for v in [&mut tape.gwx_t, &mut tape.gwh_t, &mut tape.dh_rec, &mut tape.dc_rec] {
                v.iter_mut().for_each(|g| *g = R::ZERO);
            }
        }
        let n_layers = self.tapes.len();
        for t in (0..t_len).rev() {
            // Head: dh of the last layer's h, per stream; head gradients.
            let Some(top) = self.tapes.last() else { return };
            let h_tops = &top.h[(t + 1) * nb * top_h..(t + 2) * nb * top_h];
            let dys = &dy[t * nb * yn..(t + 1) * nb * yn];
            let dh_all = &mut self.dh_above[..nb * top_h];
            match self.shapes.head {
                Some(hs) => {
                    dh_all.iter_mut().for_each(|v| *v = R::ZERO);
                    let w = &p[hs.w..hs.w + hs.output * hs.input];
                    let (gw, gb) = grad[hs.w..hs.b + hs.output].split_at_mut(hs.output * hs.input);
                    for ((dyv, h_top), dh) in
                        dys.chunks_exact(yn).zip(h_tops.chunks_exact(top_h)).zip(dh_all.chunks_exact_mut(top_h))
                    {
                        for ((d, grow), gbv) in dyv.iter().zip(gw.chunks_exact_mut(hs.input)).zip(gb.iter_mut()) {
                            *gbv += *d;
                            axpy(grow, *d, h_top);
                        }
                        gemv_acc(dh, dyv, w);
                    }
                }
                None => dh_all.copy_from_slice(dys),
            }
            for k in (0..n_layers).rev() {
                let Some(l) = self.shapes.layers.get(k).copied() else { continue };
                let (hd, g4) = (l.hidden, 4 * l.hidden);
                let (below, rest) = self.tapes.split_at_mut(k);
                let Some(cur) = rest.first_mut() else { continue };
                let xs_t: &[R] = match below.last() {
                    None => &xs[t * nb * xn..(t + 1) * nb * xn],
                    Some(prev) => &prev.h[(t + 1) * nb * l.input..(t + 2) * nb * l.input],
                };
                let hps = &cur.h[t * nb * hd..(t + 1) * nb * hd];
                let cps = &cur.c[t * nb * hd..(t + 1) * nb * hd];
                let gates_t = &cur.gates[t * nb * g4..(t + 1) * nb * g4];
                let tcs = &cur.tc[t * nb * hd..(t + 1) * nb * hd];
                let dzs = &mut self.dz[..nb * g4];
                let per_stream = dzs
                    .chunks_exact_mut(g4)
                    .zip(gates_t.chunks_exact(g4))
                    .zip(cps.chunks_exact(hd))
                    .zip(tcs.chunks_exact(hd))
                    .zip(self.dh_above.chunks_exact(hd))
                    .zip(cur.dh_rec.chunks_exact(hd))
                    .zip(cur.dc_rec.chunks_exact_mut(hd));
                for ((((((dz, gates), cp), tc), dh_in), dh_rec), dc_rec) in per_stream {
                    let (gi, rest) = gates.split_at(hd);
                    let (gf, rest) = rest.split_at(hd);
                    let (gg, go) = rest.split_at(hd);
                    let (dzi, rest) = dz.split_at_mut(hd);
                    let (dzf, rest) = rest.split_at_mut(hd);
                    let (dzg, dzo) = rest.split_at_mut(hd);
                    let (gi, gf, gg, go, cp, tc) = (&gi[..hd], &gf[..hd], &gg[..hd], &go[..hd], &cp[..hd], &tc[..hd]);
                    let (dzi, dzf, dzg, dzo) = (&mut dzi[..hd], &mut dzf[..hd], &mut dzg[..hd], &mut dzo[..hd]);
                    let (dh_in, dh_rec, dc_rec) = (&dh_in[..hd], &dh_rec[..hd], &mut dc_rec[..hd]);
                    for j in 0..hd {
                        let (i, f, g, o) = (gi[j], gf[j], gg[j], go[j]);
                        let dhj = dh_in[j] + dh_rec[j];
                        let tcj = tc[j];
                        let dc = dc_rec[j] + dhj * o * (R::ONE - tcj * tcj);
                        dzi[j] = dc * g * i * (R::ONE - i);
                        dzf[j] = dc * cp[j] * f * (R::ONE - f);
                        dzg[j] = dc * i * (R::ONE - g * g);
                        dzo[j] = dhj * tcj * o * (R::ONE - o);
                        dc_rec[j] = dc * f;
                    }
                }
                let dzs = &self.dz[..nb * g4];
                let gb = &mut grad[l.b..l.b + g4];
                for dz in dzs.chunks_exact(g4) {
                    for (gbv, d) in gb.iter_mut().zip(dz) {
                        *gbv += *d;
                    }
                }
                gemm_acc(&mut cur.gwx_t, xs_t, dzs, l.input, g4);
                gemm_acc(&mut cur.gwh_t, hps, dzs, hd, g4);
                if t > 0 {
                    let w_h = &p[l.w_h..l.w_h + g4 * hd];
                    for (dh_rec, dz) in cur.dh_rec.chunks_exact_mut(hd).zip(dzs.chunks_exact(g4)) {
                        dh_rec.iter_mut().for_each(|v| *v = R::ZERO);
                        gemv_acc(dh_rec, dz, w_h);
                    }
                }
                if k > 0 {
                    let w_x = &p[l.w_x..l.w_x + g4 * l.input];
                    let dxs = &mut self.dh_below[..nb * l.input];
                    for (dx, dz) in dxs.chunks_exact_mut(l.input).zip(dzs.chunks_exact(g4)) {
                        dx.iter_mut().for_each(|v| *v = R::ZERO);
                        gemv_acc(dx, dz, w_x);
                    }
                    std::mem::swap(&mut self.dh_above, &mut self.dh_below);
                }
            }
        }
        for (tape, l) in self.tapes.iter().zip(&self.shapes.layers) {
            let g4 = 4 * l.hidden;
            transpose(&tape.gwx_t, l.input, g4, &mut grad[l.w_x..l.w_x + g4 * l.input]);
            transpose(&tape.gwh_t, l.hidden, g4, &mut grad[l.w_h..l.w_h + g4 * l.hidden]);
        }
    }
}

/// `dst[c][r] = src[r][c]` for a row-major `src` of `rows x cols`.
fn transpose<R: Real>(src: &[R], rows: usize, cols: usize, dst: &mut [R]) {
    for (r, row) in src.chunks_exact(cols).take(rows).enumerate() {
        for (c, v) in row.iter().enumerate() {
            if let Some(d) = dst.get_mut(c * rows + r) {
                *d = *v;
            }
        }
    }
}

/// Sum of squared errors of `y` against `target` (in `f64`), and
/// `dy = 2 (y - target) * scale`.
fn squared_error<R: Real>(y: &[R], target: &[R], scale: R, dy: &mut [R]) -> f64 {
    let two = R::of_f32(2.0) * scale;
    let mut sum = 0.0f64;
    for ((yv, tv), d) in y.iter().zip(target).zip(dy.iter_mut()) {
        let e = *yv - *tv;
        sum += e.to_f64() * e.to_f64();
        *d = two * e;
    }
    sum
}

// ---------------------------------------------------------------------------
// Public single-sequence entry points.

/// Checks a sequence: `n` rows of `width` finite values each.
fn check_rows(what: &str, rows: &[Vec<f32>], width: usize) -> Result<()> {
    for (t, row) in rows.iter().enumerate() {
        if row.len() != width {
            bail!("{what} row {t} has {} values, expected {width}", row.len());
        }
        if let Some(c) = row.iter().position(|v| !v.is_finite()) {
            bail!("{what} row {t}, column {c} is {} (values must be finite)", row[c]);
        }
    }
    Ok(())
}

fn flat_rows<R: Real>(rows: &[Vec<f32>]) -> Vec<R> {
    rows.iter().flat_map(|r| r.iter().map(|v| R::of_f32(*v))).collect()
}

/// Loss and flat gradient of one sequence from zero state, in `R`.
fn sequence_loss_grad<R: Real>(
    shapes: &Shapes,
    p: &[R],
    inputs: &[Vec<f32>],
    targets: &[Vec<f32>],
) -> Result<(f64, Vec<R>)> {
    let t_len = inputs.len();
    let mut eng = Engine::<R>::new(shapes, t_len, 1)?;
    let xs = flat_rows::<R>(inputs);
    let ts = flat_rows::<R>(targets);
    eng.load(p);
    eng.forward(p, &xs, t_len);
    let n = t_len * shapes.output();
    let mut dy = vec![R::ZERO; n];
    let sum = squared_error(&eng.y[..n], &ts, R::of_f64(1.0 / n as f64), &mut dy);
    let mut grad = vec![R::ZERO; shapes.len];
    eng.backward(p, &xs, &dy, t_len, &mut grad);
    Ok((sum / n as f64, grad))
}

fn check_sequence(model: &FloatModelData, inputs: &[Vec<f32>], targets: &[Vec<f32>]) -> Result<Shapes> {
    let shapes = Shapes::of(model).context("invalid model")?;
    model.check_finite()?;
    if inputs.is_empty() {
        bail!("no input steps");
    }
    if inputs.len() != targets.len() {
        bail!("{} input steps but {} target steps", inputs.len(), targets.len());
    }
    check_rows("input", inputs, shapes.input())?;
    check_rows("target", targets, shapes.output())?;
    Ok(shapes)
}

/// Mean squared error of the model's outputs against `targets` over one
/// window, and its analytic gradient (backpropagation through time), for
/// tests and gradient checks.
///
/// The model runs from zero state over `inputs` exactly as in training
/// (inputs used as given, no normalization); the loss is
/// `mean((y[t][r] - targets[t][r])^2)` over all steps and outputs, as
/// PyTorch's `nn.MSELoss()` defines it. Outputs are the head's, or the last
/// layer's `h` without a head. Computed in `f32`, loss summed in `f64`.
///
/// Returns `(loss, grads)` with `grads` shaped like `model` (each tensor
/// holds `dloss/dweight` of the same element).
///
/// # Errors
/// Shapes that do not form a model, non-finite weights, no steps, input and
/// target counts that differ, a row of the wrong width or a non-finite value
/// (row and column named).
pub fn loss_and_grad(
    model: &FloatModelData,
    inputs: &[Vec<f32>],
    targets: &[Vec<f32>],
) -> Result<(f32, FloatModelData)> {
    let shapes = check_sequence(model, inputs, targets)?;
    let p = shapes.flatten::<f32>(model);
    let (loss, grad) = sequence_loss_grad::<f32>(&shapes, &p, inputs, targets)?;
    Ok((loss as f32, shapes.unflatten(&grad)))
}

/// Runs the model over `inputs` from zero state with the training engine's
/// forward pass (the one [`fit`] trains with) and returns one output vector
/// per step. Agrees with [`crate::float_model::run_float`] to rounding.
///
/// # Errors
/// As [`loss_and_grad`] for the model and the inputs.
pub fn predict(model: &FloatModelData, inputs: &[Vec<f32>]) -> Result<Vec<Vec<f32>>> {
    let shapes = Shapes::of(model).context("invalid model")?;
    model.check_finite()?;
    check_rows("input", inputs, shapes.input())?;
    let window = inputs.len().clamp(1, 256);
    let mut eng = Engine::<f32>::new(&shapes, window, 1)?;
    let p = shapes.flatten::<f32>(model);
    eng.load(&p);
    let yn = shapes.output();
    let mut out = Vec::with_capacity(inputs.len());
    for chunk in inputs.chunks(window) {
        let xs = flat_rows::<f32>(chunk);
        eng.forward(&p, &xs, chunk.len());
        out.extend(eng.y.chunks_exact(yn).take(chunk.len()).map(<[f32]>::to_vec));
        eng.carry_state(chunk.len());
    }
    Ok(out)
}

// ---------------------------------------------------------------------------
// Training.

fn check_options(o: &FitOptions) -> Result<()> {
    if o.hidden == 0 {
        bail!("hidden units must be at least 1");
    }
    if o.layers == 0 || o.layers > lapwing::MAX_LAYERS {
        bail!("layers must be 1 to {}, got {}", lapwing::MAX_LAYERS, o.layers);
    }
    if o.window == 0 {
        bail!("window must be at least 1 step");
    }
    if o.batch == 0 {
        bail!("batch must be at least 1 stream");
    }
    if o.epochs == 0 {
        bail!("epochs must be at least 1");
    }
    if !(o.lr.is_finite() && o.lr > 0.0) {
        bail!("learning rate must be finite and positive, got {}", o.lr);
    }
    if !(o.clip.is_finite() && o.clip >= 0.0) {
        bail!("gradient clip must be finite and >= 0 (0 disables it), got {}", o.clip);
    }
    if !(o.val_fraction.is_finite() && o.val_fraction > 0.0 && o.val_fraction < 1.0) {
        bail!("validation fraction must be between 0 and 1 (exclusive), got {}", o.val_fraction);
    }
    Ok(())
}

/// Per-feature mean and population standard deviation (two passes, f64).
fn normalization(rows: &[Vec<f32>], x: usize) -> Result<Normalization> {
    let n = rows.len() as f64;
    let mut mean = vec![0.0f64; x];
    for r in rows {
        for (m, v) in mean.iter_mut().zip(r) {
            *m += *v as f64;
        }
    }
    mean.iter_mut().for_each(|m| *m /= n);
    let mut var = vec![0.0f64; x];
    for r in rows {
        for ((s, m), v) in var.iter_mut().zip(&mean).zip(r) {
            let d = *v as f64 - m;
            *s += d * d;
        }
    }
    let std: Vec<f32> = var.iter().map(|s| (s / n).sqrt() as f32).collect();
    if let Some(i) = std.iter().position(|s| !(s.is_finite() && *s > 0.0)) {
        bail!(
            "feature column {} is constant over the training part (std {}), so it cannot be standardized",
            i + 1,
            std[i]
        );
    }
    let mean: Vec<f32> = mean.iter().map(|m| *m as f32).collect();
    if let Some(i) = mean.iter().position(|m| !m.is_finite()) {
        bail!("feature column {}: the mean overflows f32", i + 1);
    }
    Ok(Normalization { mean, std })
}

/// PyTorch-like initialization (see the module docs).
fn init_params(shapes: &Shapes, seed: u64) -> Vec<f32> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut p = vec![0.0f32; shapes.len];
    let fill = |p: &mut [f32], k: f32, rng: &mut ChaCha8Rng| {
        for v in p {
            *v = rng.random_range(-k..k);
        }
    };
    for l in &shapes.layers {
        let k = 1.0 / (l.hidden as f32).sqrt();
        let g4 = 4 * l.hidden;
        fill(&mut p[l.w_x..l.w_x + g4 * l.input], k, &mut rng);
        fill(&mut p[l.w_h..l.w_h + g4 * l.hidden], k, &mut rng);
        fill(&mut p[l.b..l.b + g4], k, &mut rng);
        for v in &mut p[l.b + l.hidden..l.b + 2 * l.hidden] {
            *v += 1.0;
        }
    }
    if let Some(h) = shapes.head {
        let k = 1.0 / (h.input as f32).sqrt();
        fill(&mut p[h.w..h.w + h.output * h.input], k, &mut rng);
        fill(&mut p[h.b..h.b + h.output], k, &mut rng);
    }
    p
}

/// Adam state.
struct Adam {
    lr: f32,
    m: Vec<f32>,
    v: Vec<f32>,
    steps: i32,
}

impl Adam {
    fn new(n: usize, lr: f32) -> Adam {
        Adam { lr, m: vec![0.0; n], v: vec![0.0; n], steps: 0 }
    }

    fn step(&mut self, p: &mut [f32], g: &[f32]) {
        self.steps = self.steps.saturating_add(1);
        let bc1 = 1.0 - (ADAM_BETA1 as f64).powi(self.steps);
        let bc2 = 1.0 - (ADAM_BETA2 as f64).powi(self.steps);
        let step = (self.lr as f64 / bc1) as f32;
        let inv_sqrt_bc2 = (1.0 / bc2.sqrt()) as f32;
        for (((pv, gv), m), v) in p.iter_mut().zip(g).zip(&mut self.m).zip(&mut self.v) {
            *m = ADAM_BETA1 * *m + (1.0 - ADAM_BETA1) * *gv;
            *v = ADAM_BETA2 * *v + (1.0 - ADAM_BETA2) * *gv * *gv;
            *pv -= step * *m / (v.sqrt() * inv_sqrt_bc2 + ADAM_EPS);
        }
    }
}

/// Scales `g` so its global L2 norm is at most `clip` (0: no clipping).
/// Returns the norm before clipping.
fn clip_global_norm(g: &mut [f32], clip: f32) -> f64 {
    let norm = g.iter().map(|v| (*v as f64) * (*v as f64)).sum::<f64>().sqrt();
    if clip > 0.0 && norm > clip as f64 {
        let s = (clip as f64 / norm) as f32;
        g.iter_mut().for_each(|v| *v *= s);
    }
    norm
}

/// Mean validation loss: the rows `data[start..start + pairs + 1]` as one
/// stream from zero state.
fn validate(eng: &mut Engine<f32>, p: &[f32], data: &[f32], x: usize, start: usize, pairs: usize) -> f64 {
    eng.load(p);
    eng.reset_state();
    let mut sum = 0.0f64;
    let mut dy = vec![0.0f32; eng.t_cap * x];
    let mut j = 0;
    while j < pairs {
        let t_len = eng.t_cap.min(pairs - j);
        let a = (start + j) * x;
        let xs = &data[a..a + t_len * x];
        let ts = &data[a + x..a + (t_len + 1) * x];
        eng.forward(p, xs, t_len);
        sum += squared_error(&eng.y[..t_len * x], ts, 1.0, &mut dy[..t_len * x]);
        eng.carry_state(t_len);
        j += t_len;
    }
    sum / (pairs * x) as f64
}

/// Fits a next-step predictor to `rows` (one recording, `T` rows of `X`
/// features) as described in the module docs.
///
/// # Errors
/// Invalid options (0 hidden units, layers outside `1..=MAX_LAYERS`, window,
/// batch or epochs 0, a learning rate that is not finite and positive, a
/// negative or non-finite clip, a validation fraction outside `(0, 1)`), no
/// rows, rows of differing widths or with non-finite values (row and column
/// named), too few rows for the split (the validation part needs 2 rows, the
/// training part `batch + 1`), a feature constant over the training part,
/// a window x batch too large to record, or a loss that becomes non-finite
/// (training diverged; lower the learning rate).
pub fn fit(rows: &[Vec<f32>], opts: &FitOptions) -> Result<FitResult> {
    check_options(opts)?;
    let Some(first) = rows.first() else { bail!("no data rows to fit") };
    let x = first.len();
    if x == 0 {
        bail!("the data has no feature columns");
    }
    check_rows("data", rows, x)?;
    let n = rows.len();
    let n_val = ((n as f64) * opts.val_fraction as f64).round() as usize;
    let n_train = n.saturating_sub(n_val);
    if n_val < 2 {
        bail!(
            "too few rows: {n} rows x validation fraction {} gives {n_val} validation rows, at least 2 are needed",
            opts.val_fraction
        );
    }
    if n_train < opts.batch + 1 {
        bail!(
            "too few rows: the training part has {n_train} rows, batch {} needs at least {} (one step per stream)",
            opts.batch,
            opts.batch + 1
        );
    }
    let norm = normalization(&rows[..n_train], x)?;
    let mut data = Vec::with_capacity(n * x);
    for r in rows {
        data.extend(r.iter().zip(&norm.mean).zip(&norm.std).map(|((v, m), s)| (v - m) / s));
    }

    let dims: Vec<(usize, usize)> =
        (0..opts.layers).map(|k| (if k == 0 { x } else { opts.hidden }, opts.hidden)).collect();
    let shapes = Shapes::new(&dims, Some(x))?;
    let mut params = init_params(&shapes, opts.seed);

    let nb = opts.batch;
    let seg = (n_train - 1) / nb;
    let t_cap = opts.window.min(seg);
    let windows = seg.div_ceil(t_cap);
    let train_steps = seg * nb;
    let val_pairs = n_val - 1;
    let mut eng = Engine::<f32>::new(&shapes, t_cap, nb)?;
    let mut val_eng = Engine::<f32>::new(&shapes, opts.window.min(val_pairs), 1)?;
    let mut adam = Adam::new(shapes.len, opts.lr);
    let mut grad = vec![0.0f32; shapes.len];
    let mut xs = vec![0.0f32; t_cap * nb * x];
    let mut ts = vec![0.0f32; t_cap * nb * x];
    let mut dy = vec![0.0f32; t_cap * nb * x];

    let bar = progress_bar(opts, windows);
    let started = Instant::now();
    let initial_val = validate(&mut val_eng, &params, &data, x, n_train, val_pairs);
    let mut best = (initial_val, params.clone(), 0usize);
    let mut best_seen = false;
    let mut since_best = 0usize;
    let mut train_loss = Vec::new();
    let mut val_loss = Vec::new();
    for epoch in 0..opts.epochs {
        eng.reset_state();
        let mut sum = 0.0f64;
        let mut count = 0usize;
        bar.set_position(0);
        for w in 0..windows {
            let j0 = w * t_cap;
            let t_len = t_cap.min(seg - j0);
            for t in 0..t_len {
                for b in 0..nb {
                    let src = (b * seg + j0 + t) * x;
                    let dst = (t * nb + b) * x;
                    xs[dst..dst + x].copy_from_slice(&data[src..src + x]);
                    ts[dst..dst + x].copy_from_slice(&data[src + x..src + 2 * x]);
                }
            }
            let m = t_len * nb * x;
            eng.load(&params);
            eng.forward(&params, &xs[..m], t_len);
            let sse = squared_error(&eng.y[..m], &ts[..m], 1.0 / m as f32, &mut dy[..m]);
            if !sse.is_finite() {
                bar.finish_and_clear();
                bail!("training diverged in epoch {} (loss is {sse}); try a lower learning rate", epoch + 1);
            }
            eng.backward(&params, &xs[..m], &dy[..m], t_len, &mut grad);
            clip_global_norm(&mut grad, opts.clip);
            adam.step(&mut params, &grad);
            eng.carry_state(t_len);
            sum += sse;
            count += m;
            bar.inc(1);
            if w % 16 == 0 {
                bar.set_message(status(epoch, opts.epochs, sum / count as f64, &val_loss, best.0));
            }
        }
        let tl = sum / count.max(1) as f64;
        let vl = validate(&mut val_eng, &params, &data, x, n_train, val_pairs);
        if !(vl.is_finite() && params.iter().all(|v| v.is_finite())) {
            bar.finish_and_clear();
            bail!("training diverged in epoch {} (validation loss {vl}); try a lower learning rate", epoch + 1);
        }
        train_loss.push(tl as f32);
        val_loss.push(vl as f32);
        if !best_seen || vl < best.0 {
            best = (vl, params.clone(), epoch);
            best_seen = true;
            since_best = 0;
        } else {
            since_best += 1;
        }
        bar.set_message(status(epoch, opts.epochs, tl, &val_loss, best.0));
        if since_best >= opts.patience.max(1) {
            break;
        }
    }
    bar.finish_and_clear();
    let seconds = started.elapsed().as_secs_f64();

    let mut model = shapes.unflatten(&best.1);
    if let Some(h) = model.head.as_mut() {
        destandardize_head(h, &norm);
    }
    model.check_finite().context("the fitted model")?;
    Ok(FitResult {
        model,
        norm,
        train_loss,
        val_loss,
        best_epoch: best.2,
        initial_val_loss: initial_val as f32,
        train_steps,
        val_steps: val_pairs,
        seconds,
    })
}

/// Folds the target de-standardization into the head: `w[r][..] *= std[r]`,
/// `b[r] = b[r] * std[r] + mean[r]` (in f64).
fn destandardize_head(h: &mut FloatHeadData, norm: &Normalization) {
    for (((row, b), m), s) in h.w.chunks_exact_mut(h.input).zip(&mut h.b).zip(&norm.mean).zip(&norm.std) {
        for w in row.iter_mut() {
            *w = (*w as f64 * *s as f64) as f32;
        }
        *b = (*b as f64 * *s as f64 + *m as f64) as f32;
    }
}

fn status(epoch: usize, epochs: usize, train: f64, val: &[f32], best: f64) -> String {
    match val.len() > epoch {
        true => format!("epoch {}/{epochs} train {train:.5} val {:.5} best {best:.5}", epoch + 1, val[epoch]),
        false => format!("epoch {}/{epochs} train {train:.5} best val {best:.5}", epoch + 1),
    }
}

fn progress_bar(opts: &FitOptions, windows: usize) -> ProgressBar {
    if !opts.progress {
        return ProgressBar::hidden();
    }
    let bar = ProgressBar::with_draw_target(Some(windows as u64), ProgressDrawTarget::stderr());
    if let Ok(style) = ProgressStyle::with_template("fit [{bar:30}] {pos}/{len} windows  {msg}  {elapsed}") {
        bar.set_style(style.progress_chars("=> "));
    }
    bar
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::synth::{random_model, random_walk, ModelSpec};

    /// Central finite differences in f64 on the same engine, generic code
    /// instantiated for f64: a textbook check (common practice), step 1e-6.
    fn check_fd(model: &FloatModelData, steps: usize, seed: u64) {
        let shapes = Shapes::of(model).unwrap();
        let p = shapes.flatten::<f64>(model);
        let inputs = random_walk(shapes.input(), steps, seed);
        let targets = random_walk(shapes.output(), steps, seed + 1);
        let (_, grad) = sequence_loss_grad::<f64>(&shapes, &p, &inputs, &targets).unwrap();
        let eps = 1e-6;
        let mut worst = 0.0f64;
        for i in 0..p.len() {
            let mut q = p.clone();
            q[i] = p[i] + eps;
            let (lp, _) = sequence_loss_grad::<f64>(&shapes, &q, &inputs, &targets).unwrap();
            q[i] = p[i] - eps;
            let (lm, _) = sequence_loss_grad::<f64>(&shapes, &q, &inputs, &targets).unwrap();
            let fd = (lp - lm) / (2.0 * eps);
            // Rounding of the difference quotient is about 1e-16 / eps =
            // 1e-10 absolute; truncation is O(eps^2).
            let diff = (fd - grad[i]).abs();
            let scale = fd.abs().max(grad[i].abs());
            worst = worst.max(diff / scale.max(1e-4));
            assert!(diff <= 1e-6 * scale + 1e-9, "param {i}: analytic {} vs finite difference {fd}", grad[i]);
        }
        println!("f64 finite differences: worst error {worst:.2e} (relative, floor 1e-4) over {} parameters", p.len());
    }

    #[test]
    fn gradients_match_f64_finite_differences() {
        let m = random_model(&ModelSpec { input: 2, hidden: 3, layers: 2, output: Some(2), gain: 1.5 }, 4);
        check_fd(&m, 5, 10);
        // No head, three layers, mixed sizes via the default init gain.
        let m = random_model(&ModelSpec { input: 3, hidden: 2, layers: 3, output: None, gain: 2.0 }, 5);
        check_fd(&m, 6, 20);
    }

    #[test]
    fn carried_state_in_windows_equals_one_long_window() {
        let m = random_model(&ModelSpec { input: 2, hidden: 4, layers: 2, output: Some(2), gain: 1.0 }, 8);
        let inputs = random_walk(2, 50, 3);
        let whole = predict(&m, &inputs).unwrap();
        let shapes = Shapes::of(&m).unwrap();
        let p = shapes.flatten::<f32>(&m);
        let mut eng = Engine::<f32>::new(&shapes, 7, 1).unwrap();
        eng.load(&p);
        let mut got = Vec::new();
        for chunk in inputs.chunks(7) {
            eng.forward(&p, &flat_rows::<f32>(chunk), chunk.len());
            got.extend(eng.y.chunks_exact(2).take(chunk.len()).map(<[f32]>::to_vec));
            eng.carry_state(chunk.len());
        }
        assert_eq!(whole, got);
    }

    #[test]
    fn batch_streams_are_independent() {
        // Two streams in one batch give the same outputs as each alone.
        let m = random_model(&ModelSpec { input: 2, hidden: 3, layers: 2, output: Some(2), gain: 1.0 }, 2);
        let shapes = Shapes::of(&m).unwrap();
        let p = shapes.flatten::<f32>(&m);
        let a = random_walk(2, 9, 1);
        let b = random_walk(2, 9, 2);
        let mut xs = Vec::new();
        for t in 0..9 {
            xs.extend(&a[t]);
            xs.extend(&b[t]);
        }
        let mut eng = Engine::<f32>::new(&shapes, 9, 2).unwrap();
        eng.load(&p);
        eng.forward(&p, &xs, 9);
        let pa = predict(&m, &a).unwrap();
        let pb = predict(&m, &b).unwrap();
        for t in 0..9 {
            assert_eq!(&eng.y[t * 4..t * 4 + 2], &pa[t][..]);
            assert_eq!(&eng.y[t * 4 + 2..t * 4 + 4], &pb[t][..]);
        }
    }

    #[test]
    fn adam_first_step_moves_each_weight_by_lr() {
        // Kingma & Ba (2014), section 2.1: with bias correction the first
        // step is lr * g / (|g| + eps), i.e. about lr * sign(g).
        let mut adam = Adam::new(3, 0.01);
        let mut p = [1.0f32, 1.0, 1.0];
        adam.step(&mut p, &[0.5, -2.0, 0.0]);
        assert!((p[0] - 0.99).abs() < 1e-6 && (p[1] - 1.01).abs() < 1e-6 && p[2] == 1.0, "{p:?}");
    }

    #[test]
    fn fast_exp_is_accurate() {
        // Reference: f64 `exp`/`tanh` (libm). Relative error of e^x, absolute
        // error of sigmoid and tanh, on a dense grid over [-90, 90].
        let (mut e_rel, mut s_abs, mut t_abs) = (0.0f64, 0.0f64, 0.0f64);
        for i in -900_000..=900_000 {
            let x = i as f32 * 1e-4;
            let xe = x.clamp(-87.0, 87.0) as f64;
            e_rel = e_rel.max(((exp_f32(x) as f64) - xe.exp()).abs() / xe.exp());
            let xd = x as f64;
            s_abs = s_abs.max((x.sigmoid() as f64 - 1.0 / (1.0 + (-xd).exp())).abs());
            t_abs = t_abs.max((Real::tanh(x) as f64 - xd.tanh()).abs());
        }
        println!("e^x rel {e_rel:.2e}, sigmoid abs {s_abs:.2e}, tanh abs {t_abs:.2e}");
        assert!(e_rel < 3e-7, "{e_rel}");
        assert!(s_abs < 2e-7 && t_abs < 3e-7, "{s_abs} {t_abs}");
        assert_eq!(1.0f32.sigmoid(), 1.0 / (1.0 + exp_f32(-1.0)));
        assert_eq!(Real::tanh(50.0f32), 1.0);
        assert_eq!(Real::tanh(-50.0f32), -1.0);
        assert_eq!(100.0f32.sigmoid(), 1.0);
        assert!((-100.0f32).sigmoid() >= 0.0);
    }

    #[test]
    fn clipping_scales_to_the_global_norm() {
        let mut g = [3.0f32, 4.0];
        assert_eq!(clip_global_norm(&mut g, 1.0), 5.0);
        assert!((g[0] - 0.6).abs() < 1e-7 && (g[1] - 0.8).abs() < 1e-7);
        let mut g = [3.0f32, 4.0];
        clip_global_norm(&mut g, 0.0);
        assert_eq!(g, [3.0, 4.0]);
    }
}
