//! The integer-only LSTM step, for every scheme.
//!
//! # Schemes
//! | scheme | weights | hidden state `h` | input `x` |
//! |---|---|---|---|
//! | `w8a16` (default) | int8 | int16 Q0.15 | int16 |
//! | `w8a8` (least RAM) | int8 | int8 Q0.7 | int16 |
//! | `w16a16` (highest fidelity) | int16 | int16 Q0.15 | int16 |
//!
//! One step function serves all three (generic over the weight and hidden
//! element types); everything below holds for each, with "int16 Q0.15"
//! reading "int8 Q0.7" for the `w8a8` hidden state. The input stays int16
//! in `w8a8`: it is transient, so 8 bits there would cost accuracy and save
//! no RAM.
//!
//! # Numeric contract (DESIGN.md section 3)
//! - **Weights**: `int8`, symmetric, one scale per row (per gate output
//!   unit), values in `[-127, 127]`. Input normalization and the per-feature
//!   input scale are folded into layer 0's weights and bias on the host.
//! - **Input** `x`: `int16`, one real scale per feature (known only to the
//!   quantizer, which folded it into the weights).
//! - **Hidden** `h`: `int16` Q0.15.
//! - **Gate pre-activation**: `i32` with 19 fractional bits
//!   ([`crate::activation::PRE_FRAC`]). The two dot products
//!   `acc_x = Wx·x` and `acc_h = Wh·h` are exact: in `i32` for int8 weights
//!   (the constructor proves no row can overflow for any input), in `i64`
//!   for int16 weights, which are first brought into `i32` by a per-matrix
//!   rounding right shift just large enough for the worst row (computed by
//!   the constructor, so it never needs storing). They are requantized
//!   separately with per-row (multiplier, shift) pairs, then summed with the
//!   `i32` bias, saturating.
//! - **Gate outputs**: Q0.31 from the lookup tables. A saturated forget gate
//!   keeps 16 significant bits of `1 - f`, so a cell held for 10,000 steps
//!   decays as the float one does (see the long-memory test).
//! - **Cell**: `c16` is `int16` with `cell_frac` fractional bits chosen from
//!   the calibrated range; `c32` is `i32` with `cell_frac` up to 31
//!   (conventionally the c16 format plus 16 bits), which removes the dead
//!   band where rounding of `f*c` stops a small 16-bit cell from decaying.
//!   `c' = f*c + i*g`, saturating to the cell type.
//! - **Hidden update**: `h' = o * tanh(c')`, rounded to Q0.15 and clamped to
//!   `[-32767, 32767]` (symmetric, like the float value's open interval).
//! - **Head** (optional): per-row weights of the scheme's type; `y = requant(Wy·h) + b`
//!   with the bias in output units (so a large output offset cannot
//!   overflow the accumulator), saturated to `int16` with a per-output scale.
//! - **Rounding**: every rounding step is half away from zero
//!   ([`crate::fixed_point`]); requantization, `i*g` and the hidden update
//!   round twice (multiply-high, then shift), so they are within 1 LSB of
//!   the exact value, identically on every target. With int16 weights and
//!   a pre-shift `p > 0` there is a third rounding, before the multiply:
//!   the bound becomes `1 + M * 2^(p-1)` LSB for a real multiplier `M`
//!   (`M * 2^p` is below `5e-3` on the shipped example).
//!
//! # State
//! Caller-owned `i16` words, [`QModel::state_words`] of them: per layer
//! `h[H]` (`ceil(H/2)` words holding two int8 values each for `w8a8`) then
//! the cell (`H` words for `c16`, `2H` for `c32`, each value as low then
//! high half), then scratch for one layer's new `h`. All zero is the usual
//! initial state. [`StateBuf`] gives a fixed-capacity buffer that fits
//! in a `static`.

use crate::activation::{sigmoid, tanh, ActTable, TableKind, PRE_FRAC};
use crate::fixed_point::{mul_q31_nonneg, requant_nonneg, round_shr_inner, sat_i16, shift_signed};
use crate::float::{check_len, dim_mul};
use crate::{stack_layers, Error, Probe, MAX_LAYERS};
use bytemuck::Pod;
use heapless::Vec as HVec;

/// Width of the stored cell state.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
#[repr(u8)]
pub enum CellWidth {
    /// 16-bit cell: least RAM.
    C16 = 0,
    /// 32-bit cell: for long-memory models.
    C32 = 1,
}

impl CellWidth {
    /// `i16` words per cell value.
    pub const fn words(self) -> usize {
        match self {
            CellWidth::C16 => 1,
            CellWidth::C32 => 2,
        }
    }

    /// Largest valid number of fractional bits of the cell.
    pub const fn max_frac(self) -> u8 {
        match self {
            CellWidth::C16 => 15,
            CellWidth::C32 => 31,
        }
    }

    /// A short lower-case name (`c16`, `c32`).
    pub fn name(self) -> &'static str {
        match self {
            CellWidth::C16 => "c16",
            CellWidth::C32 => "c32",
        }
    }
}

/// Largest |value| of an `int16` input or hidden state, for the
/// accumulator bound.
const ACT_MAX: i64 = 32_768;

/// Integer scheme: weight and hidden-state widths.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
#[repr(u8)]
pub enum Scheme {
    /// int8 weights, int16 hidden state.
    W8A16 = 0,
    /// int8 weights, int8 hidden state (least RAM).
    W8A8 = 1,
    /// int16 weights, int16 hidden state (highest fidelity).
    W16A16 = 2,
}

impl Scheme {
    /// Every scheme, smallest flash first.
    pub const ALL: [Scheme; 3] = [Scheme::W8A8, Scheme::W8A16, Scheme::W16A16];

    /// From its code (the blob header byte).
    pub fn from_u8(v: u8) -> Option<Scheme> {
        Scheme::ALL.into_iter().find(|s| *s as u8 == v)
    }

    /// The name (`w8a16`, `w8a8`, `w16a16`).
    pub fn name(self) -> &'static str {
        match self {
            Scheme::W8A16 => "w8a16",
            Scheme::W8A8 => "w8a8",
            Scheme::W16A16 => "w16a16",
        }
    }

    /// Bytes per weight.
    pub const fn weight_bytes(self) -> usize {
        match self {
            Scheme::W8A16 | Scheme::W8A8 => 1,
            Scheme::W16A16 => 2,
        }
    }

    /// Largest weight magnitude (symmetric range).
    pub const fn weight_max(self) -> i32 {
        match self {
            Scheme::W8A16 | Scheme::W8A8 => 127,
            Scheme::W16A16 => 32_767,
        }
    }

    /// Fractional bits of the hidden state (15 for Q0.15, 7 for Q0.7).
    pub const fn hidden_frac(self) -> u32 {
        match self {
            Scheme::W8A16 | Scheme::W16A16 => 15,
            Scheme::W8A8 => 7,
        }
    }

    /// `i16` words holding `n` hidden values.
    pub const fn hidden_words(self, n: usize) -> usize {
        match self {
            Scheme::W8A16 | Scheme::W16A16 => n,
            Scheme::W8A8 => n.div_ceil(2),
        }
    }
}

/// A weight matrix, borrowed; the element type follows the scheme.
#[derive(Clone, Copy, Debug)]
pub enum Weights<'a> {
    /// int8 weights (`w8a16`, `w8a8`).
    I8(&'a [i8]),
    /// int16 weights (`w16a16`).
    I16(&'a [i16]),
}

impl Weights<'_> {
    /// Number of weights.
    pub fn len(&self) -> usize {
        match self {
            Weights::I8(w) => w.len(),
            Weights::I16(w) => w.len(),
        }
    }

    /// True when empty.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Bytes as stored.
    pub fn bytes(&self) -> usize {
        match self {
            Weights::I8(w) => w.len(),
            Weights::I16(w) => 2 * w.len(),
        }
    }

    fn is_i16(&self) -> bool {
        matches!(self, Weights::I16(_))
    }
}

/// What the DSP kernels need of an activation element (`src/dsp.rs`);
/// nothing on other targets.
#[cfg(lapwing_dsp)]
use crate::dsp::DspAct as Simd;
#[cfg(not(lapwing_dsp))]
trait Simd {}
#[cfg(not(lapwing_dsp))]
impl<T> Simd for T {}

/// An integer element of weights or activations.
trait Elem: Copy + Pod + Default + Simd {
    fn to_i32(self) -> i32;
}

impl Elem for i8 {
    #[inline(always)]
    fn to_i32(self) -> i32 {
        self as i32
    }
}

impl Elem for i16 {
    #[inline(always)]
    fn to_i32(self) -> i32 {
        self as i32
    }
}

/// A weight element with its exact dot products.
///
/// The kernels are plain Rust written so that the compiler maps them onto
/// the target's multiply-accumulate instructions (checked in the firmware's
/// disassembly, see README's performance section): int8 rows two per pass,
/// so each activation load serves two multiplies (`ldrsb`, `smlabb` on DSP
/// cores; four rows spill registers), int16 rows one per pass, which LLVM
/// turns into dual multiply-accumulates (`smlald`) on cores with the DSP
/// extension. Every sum is exact, so the result does not depend on the
/// order of the additions and is the same integer on every target.
trait Weight: Elem {
    /// Whether rows may need a pre-shift into `i32` (int16 weights; int8
    /// rows are refused unless their sums fit `i32`, so their pre-shift is
    /// always 0).
    const WIDE: bool;
    /// Exact `sum w[i] * v[i]`.
    fn dot<A: Elem>(w: &[Self], v: &[A]) -> i64;
    /// Exact `sum w[g][i] * v[i]` for four rows `g` at once (each row as
    /// long as `v`; a shorter row sums over its length).
    fn dot4<A: Elem>(w: [&[Self]; 4], v: &[A]) -> [i64; 4];
    /// The slice when `w` holds this type (validated by [`QModel::new`]),
    /// else empty.
    fn slice(w: Weights<'_>) -> &[Self];
}

impl Weight for i8 {
    const WIDE: bool = false;
    /// Accumulates in `i32`: the constructors prove `sum |w| * 32768` fits,
    /// so no row can overflow; `wrapping_add` only avoids a debug panic path.
    #[inline]
    fn dot<A: Elem>(w: &[i8], v: &[A]) -> i64 {
        w.iter().zip(v).fold(0i32, |acc, (a, b)| acc.wrapping_add(a.to_i32() * b.to_i32())) as i64
    }
    /// Two rows per pass (two `i32` accumulators): four would leave
    /// too few registers on Cortex-M and spill. Cores with the DSP
    /// extension take `sxtb16`/`smlad` kernels instead (`src/dsp.rs`,
    /// the same integers).
    #[inline]
    fn dot4<A: Elem>(w: [&[i8]; 4], v: &[A]) -> [i64; 4] {
        #[cfg(lapwing_dsp)]
        if let Some(s) = crate::dsp::dot4_i8(w, v) {
            return s.map(i64::from);
        }
        {
            let [w0, w1, w2, w3] = w;
            let dot2 = |w0: &[i8], w1: &[i8]| {
                let (mut a0, mut a1) = (0i32, 0i32);
                for ((p, q), x) in w0.iter().zip(w1).zip(v) {
                    let x = x.to_i32();
                    a0 = a0.wrapping_add(p.to_i32() * x);
                    a1 = a1.wrapping_add(q.to_i32() * x);
                }
                (a0 as i64, a1 as i64)
            };
            let (a0, a1) = dot2(w0, w1);
            let (a2, a3) = dot2(w2, w3);
            [a0, a1, a2, a3]
        }
    }
    fn slice(w: Weights<'_>) -> &[i8] {
        match w {
            Weights::I8(w) => w,
            Weights::I16(_) => &[],
        }
    }
}

impl Weight for i16 {
    const WIDE: bool = true;
    /// Accumulates in `i64`: each product is below `2^30` and rows are at
    /// most `2^16` long, so the sum stays below `2^46`.
    #[inline]
    fn dot<A: Elem>(w: &[i16], v: &[A]) -> i64 {
        w.iter().zip(v).fold(0i64, |acc, (a, b)| acc.wrapping_add((a.to_i32() * b.to_i32()) as i64))
    }
    /// One row per pass: the plain fold, which LLVM turns into dual 16-bit
    /// multiplies with 64-bit accumulate (`smlald`) on DSP cores. Sharing
    /// the activation loads between rows stops that (each load must feed
    /// one multiply pair), and so did an explicit pairwise loop.
    #[inline]
    fn dot4<A: Elem>(w: [&[i16]; 4], v: &[A]) -> [i64; 4] {
        let [w0, w1, w2, w3] = w;
        [Self::dot(w0, v), Self::dot(w1, v), Self::dot(w2, v), Self::dot(w3, v)]
    }
    fn slice(w: Weights<'_>) -> &[i16] {
        match w {
            Weights::I16(w) => w,
            Weights::I8(_) => &[],
        }
    }
}

/// A hidden-state element: its format and the hidden update's rounding.
trait Hidden: Elem {
    /// Fractional bits.
    const FRAC: u32;
    /// Largest magnitude (the clamp is symmetric).
    const MAX: i32;
    fn from_i32(v: i32) -> Self;
}

impl Hidden for i16 {
    const FRAC: u32 = 15;
    const MAX: i32 = i16::MAX as i32;
    #[inline(always)]
    fn from_i32(v: i32) -> Self {
        v as i16
    }
}

impl Hidden for i8 {
    const FRAC: u32 = 7;
    const MAX: i32 = i8::MAX as i32;
    #[inline(always)]
    fn from_i32(v: i32) -> Self {
        v as i8
    }
}

/// One quantized LSTM layer (borrowed, typically from flash).
#[derive(Clone, Copy, Debug)]
pub struct QLayer<'a> {
    input: usize,
    hidden: usize,
    w_x: Weights<'a>,
    w_h: Weights<'a>,
    bias: &'a [i32],
    rq_x: RowScales<'a>,
    rq_h: RowScales<'a>,
    cell_frac: u8,
    /// Right shift taking `acc_x` / `acc_h` into `i32` (0 for int8 weights).
    pre_x: u8,
    pre_h: u8,
}

/// Per-row requantization: a Q31 multiplier and a shift per row (see
/// [`Requant`](crate::fixed_point::Requant)), stored as two arrays so the shifts take one byte each.
#[derive(Clone, Copy, Debug)]
pub struct RowScales<'a> {
    mult: &'a [i32],
    shift: &'a [i8],
}

impl<'a> RowScales<'a> {
    /// Multipliers in `[0, 2^31)` and shifts in `[-31, 62]`, one each per row.
    ///
    /// # Errors
    /// [`Error::Shape`] when the lengths differ; [`Error::Format`] for a
    /// multiplier or shift out of range.
    pub fn new(mult: &'a [i32], shift: &'a [i8]) -> Result<Self, Error> {
        check_len("requant shifts", shift.len(), mult.len())?;
        if let Some(m) = mult.iter().find(|m| **m < 0) {
            return Err(Error::Format { what: "requant multiplier", value: *m });
        }
        if let Some(s) = shift.iter().find(|s| !(-31..=62).contains(*s)) {
            return Err(Error::Format { what: "requant shift", value: *s as i32 });
        }
        Ok(RowScales { mult, shift })
    }

    /// Rows covered.
    pub fn len(&self) -> usize {
        self.mult.len()
    }

    /// True when there are no rows.
    pub fn is_empty(&self) -> bool {
        self.mult.is_empty()
    }

    /// Bytes as stored (4 per multiplier, 1 per shift).
    pub fn bytes(&self) -> usize {
        4 * self.mult.len() + self.shift.len()
    }

    /// Requantizes row `row`'s accumulator after a rounding right shift by
    /// `pre` (see [`pre_shift_for`]); `pre == 0` is the plain `i32` path.
    ///
    /// The same integers as [`Requant::apply`](crate::fixed_point::Requant::apply): the constructor keeps every
    /// multiplier in `[0, 2^31)` and every shift in `[-31, 62]`, and
    /// [`QLayer::new`] / [`QHead::new`] check that `shift - pre >= -31`
    /// (see [`requant_nonneg`] for the proof of each shortcut).
    #[inline(always)]
    fn apply(&self, row: usize, acc: i64, pre: u8) -> i32 {
        let acc32 = if pre == 0 { acc as i32 } else { round_shr64_lo(acc, pre as u32) };
        match (self.mult.get(row), self.shift.get(row)) {
            (Some(m), Some(s)) => requant_nonneg(acc32, *m, *s as i32 - pre as i32),
            _ => 0,
        }
    }

    /// Checks that every shift minus `pre` stays a valid requantization shift.
    fn check_pre(&self, pre: u8) -> Result<(), Error> {
        match self.shift.iter().find(|s| (**s as i32 - pre as i32) < -31) {
            Some(s) => {
                Err(Error::Format { what: "requant shift after the int16 pre-shift", value: *s as i32 - pre as i32 })
            }
            None => Ok(()),
        }
    }
}

impl<'a> QLayer<'a> {
    /// A layer with `input` features and `hidden` units.
    ///
    /// - `w_x`: `[4H, X]`, `w_h`: `[4H, H]`, row-major, gates `i, f, g, o`,
    ///   both int8 or both int16;
    /// - `bias`: `[4H]` in pre-activation units (LSB `2^-19`);
    /// - `rq_x`, `rq_h`: `[4H]` row scales taking `acc_x`/`acc_h` to
    ///   pre-activation units;
    /// - `cell_frac`: fractional bits of the cell.
    ///
    /// # Errors
    /// [`Error::Shape`] for wrong lengths, a zero dimension or mixed weight
    /// types; [`Error::AccumulatorBound`] when `sum |w| * 32768` of an int8
    /// row exceeds `i32::MAX`; [`Error::Format`] when an int16 matrix's
    /// pre-shift pushes a requantization shift below -31. The cell format
    /// and the scheme are checked by [`QModel::new`].
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        input: usize,
        hidden: usize,
        w_x: Weights<'a>,
        w_h: Weights<'a>,
        bias: &'a [i32],
        rq_x: RowScales<'a>,
        rq_h: RowScales<'a>,
        cell_frac: u8,
    ) -> Result<Self, Error> {
        if input == 0 || hidden == 0 {
            return Err(Error::Shape { what: "layer dimension", expected: 1, got: 0 });
        }
        let rows = dim_mul("hidden units", 4, hidden)?;
        check_len("w_x", w_x.len(), dim_mul("w_x", rows, input)?)?;
        check_len("w_h", w_h.len(), dim_mul("w_h", rows, hidden)?)?;
        check_len("bias", bias.len(), rows)?;
        check_len("rq_x", rq_x.len(), rows)?;
        check_len("rq_h", rq_h.len(), rows)?;
        if w_x.is_i16() != w_h.is_i16() {
            return Err(Error::Shape { what: "w_h element size (must match w_x)", expected: 0, got: 1 });
        }
        let pre_x = check_bound("input weights", 0, w_x, input)?;
        let pre_h = check_bound("recurrent weights", 0, w_h, hidden)?;
        rq_x.check_pre(pre_x)?;
        rq_h.check_pre(pre_h)?;
        Ok(QLayer { input, hidden, w_x, w_h, bias, rq_x, rq_h, cell_frac, pre_x, pre_h })
    }

    /// Input features X.
    pub fn input(&self) -> usize {
        self.input
    }

    /// Hidden units H.
    pub fn hidden(&self) -> usize {
        self.hidden
    }

    /// Fractional bits of the cell.
    pub fn cell_frac(&self) -> u8 {
        self.cell_frac
    }

    /// Weight and bias bytes of this layer as stored.
    pub fn weight_bytes(&self) -> usize {
        self.w_x.bytes() + self.w_h.bytes() + 4 * self.bias.len() + self.rq_x.bytes() + self.rq_h.bytes()
    }
}

/// Worst-case |accumulator| of one weight row against any `int16` input:
/// `sum |w| * 32768`. A row is accepted only when this is at most `i32::MAX`.
/// The host quantizer uses the same function for its readable refusal.
pub fn worst_case_accumulator(row: &[i8]) -> i64 {
    row.iter().map(|v| (*v as i64).abs()).sum::<i64>() * ACT_MAX
}

/// Checks the accumulator bound and returns the pre-shift: 0 for int8
/// weights (a row that could overflow `i32` is refused); for int16 weights
/// the smallest shift that brings every row's worst case below `2^30`.
fn check_bound(what: &'static str, layer: usize, w: Weights<'_>, cols: usize) -> Result<u8, Error> {
    match w {
        Weights::I8(w) => {
            for (row, r) in
                (0..w.len() / cols.max(1)).map(|k| w.get(k * cols..(k + 1) * cols).unwrap_or(&[])).enumerate()
            {
                if worst_case_accumulator(r) > i32::MAX as i64 {
                    return Err(Error::AccumulatorBound { what, layer, row });
                }
            }
            Ok(0)
        }
        Weights::I16(w) => {
            let worst = (0..w.len() / cols.max(1))
                .map(|k| w.get(k * cols..(k + 1) * cols).unwrap_or(&[]))
                .map(|r| r.iter().map(|v| (*v as i64).abs()).sum::<i64>() * ACT_MAX)
                .max()
                .unwrap_or(0);
            // The step's 32-bit rounding shift takes pre-shifts up to 31
            // (2^61 of worst case: never for a row that fits in memory).
            match pre_shift_for(worst) {
                p @ 0..=31 => Ok(p),
                _ => Err(Error::AccumulatorBound { what, layer, row: 0 }),
            }
        }
    }
}

/// The smallest right shift `p` with `worst >> p < 2^30`, so the rounded,
/// shifted accumulator fits `i32` with room to spare.
pub fn pre_shift_for(worst: i64) -> u8 {
    let mut p = 0u8;
    while p < 40 && (worst >> p) >= (1 << 30) {
        p += 1;
    }
    p
}

/// Rounding right shift of an `i64`, half away from zero (as
/// [`round_shr`](crate::fixed_point::round_shr)); `n` in `1..=62`. The reference for [`round_shr64_lo`].
#[cfg(test)]
fn round_shr64(x: i64, n: u32) -> i64 {
    // Branch-free, the same integers: floor((x + half - [x < 0]) / 2^n)
    // rounds ties away from zero (|x| < 2^62, so the sum cannot overflow).
    (x + (1i64 << (n - 1)) - (x < 0) as i64) >> n
}

/// `round_shr64(x, n) as i32` for `n` in `1..=31` (the int16 pre-shift,
/// which [`QLayer::new`] and [`QHead::new`] keep in that range), from
/// 32-bit halves: the low word of the 64-bit rounding shift is the low
/// word shifted right with the high word's bottom `n` bits above it.
#[inline(always)]
fn round_shr64_lo(x: i64, n: u32) -> i32 {
    let n = n & 31;
    // 2^(n-1) - [x < 0] fits i32 (n <= 31), and |x| < 2^62.
    let half = (1u32 << ((n.wrapping_sub(1)) & 31)) as i32 + (x >> 63) as i32;
    let w = x + half as i64;
    ((w as u32 >> n) | (((w >> 32) as u32) << ((32 - n) & 31))) as i32
}

/// A quantized dense head `y = requant(W h) + b` (borrowed).
#[derive(Clone, Copy, Debug)]
pub struct QHead<'a> {
    input: usize,
    output: usize,
    w: Weights<'a>,
    bias: &'a [i32],
    rq: RowScales<'a>,
    pre: u8,
}

impl<'a> QHead<'a> {
    /// A head from `input` hidden units to `output` values: `w` is `[Y, H]`
    /// (int8 or int16), `bias` `[Y]` in output units, `rq` `[Y]` row scales taking the
    /// accumulator to the output's `int16` scale.
    ///
    /// # Errors
    /// As [`QLayer::new`].
    pub fn new(input: usize, output: usize, w: Weights<'a>, bias: &'a [i32], rq: RowScales<'a>) -> Result<Self, Error> {
        if input == 0 || output == 0 {
            return Err(Error::Shape { what: "head dimension", expected: 1, got: 0 });
        }
        check_len("head weight", w.len(), dim_mul("head weight", input, output)?)?;
        check_len("head bias", bias.len(), output)?;
        check_len("head rq", rq.len(), output)?;
        let pre = check_bound("head weights", 0, w, input)?;
        rq.check_pre(pre)?;
        Ok(QHead { input, output, w, bias, rq, pre })
    }

    /// Output values Y.
    pub fn output(&self) -> usize {
        self.output
    }

    /// Weight, bias and requantization bytes of the head as stored.
    pub fn weight_bytes(&self) -> usize {
        self.w.bytes() + 4 * self.bias.len() + self.rq.bytes()
    }
}

/// A validated quantized model: after [`QModel::new`] succeeds, a step can
/// fail only on the caller's buffer lengths.
#[derive(Clone, Debug)]
pub struct QModel<'a> {
    layers: HVec<QLayer<'a>, MAX_LAYERS>,
    head: Option<QHead<'a>>,
    scheme: Scheme,
    cell: CellWidth,
    table: &'static ActTable,
    table_kind: TableKind,
}

impl<'a> QModel<'a> {
    /// Stacks validated layers and an optional head.
    ///
    /// # Errors
    /// [`Error::LayerCount`]; [`Error::Shape`] when dimensions do not chain
    /// or a weight type does not match the scheme; [`Error::Format`] when a
    /// layer's `cell_frac` exceeds the cell width's maximum (15 for `c16`,
    /// 31 for `c32`).
    pub fn new(
        layers: &[QLayer<'a>],
        head: Option<QHead<'a>>,
        scheme: Scheme,
        cell: CellWidth,
        table: TableKind,
    ) -> Result<Self, Error> {
        if let Some(l) = layers.iter().find(|l| l.cell_frac > cell.max_frac()) {
            return Err(Error::Format { what: "cell_frac", value: l.cell_frac as i32 });
        }
        let wide = scheme == Scheme::W16A16;
        let mismatch = layers.iter().any(|l| l.w_x.is_i16() != wide) || head.is_some_and(|h| h.w.is_i16() != wide);
        if mismatch {
            let bytes = scheme.weight_bytes();
            return Err(Error::Shape { what: "weight element bytes (scheme)", expected: bytes, got: 3 - bytes });
        }
        let v = stack_layers(layers, |l| (l.input, l.hidden), head.as_ref().map(|h| h.input))?;
        let Some(t) = table.table() else {
            return Err(Error::Format {
                what: "activation table not linked in this build (cargo feature)",
                value: table as i32,
            });
        };
        Ok(QModel { layers: v, head, scheme, cell, table: t, table_kind: table })
    }

    /// The layers, first to last.
    pub fn layers(&self) -> &[QLayer<'a>] {
        &self.layers
    }

    /// The head, if any.
    pub fn head(&self) -> Option<&QHead<'a>> {
        self.head.as_ref()
    }

    /// The scheme.
    pub fn scheme(&self) -> Scheme {
        self.scheme
    }

    /// The cell width.
    pub fn cell(&self) -> CellWidth {
        self.cell
    }

    /// The activation table in use.
    pub fn table_kind(&self) -> TableKind {
        self.table_kind
    }

    /// Input features of the first layer.
    pub fn input_len(&self) -> usize {
        self.layers.first().map_or(0, |l| l.input)
    }

    /// Values one step writes: Y with a head, else the last H.
    pub fn output_len(&self) -> usize {
        match (&self.head, self.layers.last()) {
            (Some(h), _) => h.output,
            (None, Some(l)) => l.hidden,
            (None, None) => 0,
        }
    }

    /// `i16` words of caller-owned state (hidden, cell and scratch).
    pub fn state_words(&self) -> usize {
        state_words_for(self.layers.iter().map(|l| l.hidden), self.scheme, self.cell)
    }

    /// Multiply-accumulates per step (all dot products).
    pub fn macs_per_step(&self) -> usize {
        let layers: usize = self.layers.iter().map(|l| 4 * l.hidden * (l.input + l.hidden)).sum();
        layers + self.head.as_ref().map_or(0, |h| h.input * h.output)
    }

    /// One time step on `int16` inputs; writes `int16` outputs (head values
    /// in their per-output scale, or the last hidden state in its format).
    ///
    /// # Errors
    /// [`Error::StateSize`], [`Error::InputSize`], [`Error::OutputSize`] when
    /// a buffer has the wrong length; nothing is modified then.
    pub fn step(&self, state: &mut [i16], x: &[i16], out: &mut [i16]) -> Result<(), Error> {
        self.step_probed(state, x, out, &mut ())
    }

    /// [`QModel::step`] reporting every gate, cell and hidden value to `probe`
    /// (the hidden state in the scheme's format: Q0.15, or Q0.7 for `w8a8`).
    ///
    /// # Errors
    /// As [`QModel::step`].
    pub fn step_probed<P: Probe<i32>>(
        &self,
        state: &mut [i16],
        x: &[i16],
        out: &mut [i16],
        probe: &mut P,
    ) -> Result<(), Error> {
        let need = self.state_words();
        if state.len() != need {
            return Err(Error::StateSize { expected: need, got: state.len() });
        }
        if x.len() != self.input_len() {
            return Err(Error::InputSize { expected: self.input_len(), got: x.len() });
        }
        if out.len() != self.output_len() {
            return Err(Error::OutputSize { expected: self.output_len(), got: out.len() });
        }
        match self.scheme {
            Scheme::W8A16 => self.run::<i8, i16, P>(state, x, out, probe),
            Scheme::W8A8 => self.run::<i8, i8, P>(state, x, out, probe),
            Scheme::W16A16 => self.run::<i16, i16, P>(state, x, out, probe),
        }
    }

    /// The step for one (weight, hidden) element pair; buffers are checked.
    fn run<W: Weight, A: Hidden, P: Probe<i32>>(
        &self,
        state: &mut [i16],
        x: &[i16],
        out: &mut [i16],
        probe: &mut P,
    ) -> Result<(), Error> {
        let cw = self.cell.words();
        let layer_words: usize = self.layers.iter().map(|l| self.scheme.hidden_words(l.hidden) + l.hidden * cw).sum();
        let (mut rest, scratch) =
            state.split_at_mut_checked(layer_words).ok_or(Error::StateSize { expected: layer_words, got: 0 })?;
        let scratch: &mut [A] = cast_state(scratch)?;
        let mut prev: Option<&[A]> = None;
        for (k, layer) in self.layers.iter().enumerate() {
            let hw = self.scheme.hidden_words(layer.hidden);
            let (hc, tail) =
                rest.split_at_mut_checked(hw + layer.hidden * cw).ok_or(Error::StateSize { expected: hw, got: 0 })?;
            rest = tail;
            let (h_words, c) = hc.split_at_mut_checked(hw).ok_or(Error::StateSize { expected: hw, got: 0 })?;
            let h: &mut [A] = cast_state(h_words)?;
            let got = h.len();
            let h = h.get_mut(..layer.hidden).ok_or(Error::StateSize { expected: layer.hidden, got })?;
            let ctx = StepCtx { layer, k, cell: self.cell, table: self.table };
            match prev {
                None => layer_step::<W, A, i16, P>(&ctx, x, h, c, scratch, probe),
                Some(p) => layer_step::<W, A, A, P>(&ctx, p, h, c, scratch, probe),
            }
            prev = Some(h);
        }
        let last = prev.unwrap_or(&[]);
        match &self.head {
            Some(head) => {
                let w = W::slice(head.w);
                let n = head.input;
                let rows =
                    head.bias.iter().enumerate().map(|(r, b)| (r, (w.get(r * n..(r + 1) * n).unwrap_or(&[]), b)));
                for (o, (r, (row, b))) in out.iter_mut().zip(rows) {
                    let pre = if W::WIDE { head.pre } else { 0 };
                    *o = sat_i16(head.rq.apply(r, W::dot(row, last), pre).saturating_add(*b));
                }
            }
            None => {
                for (o, v) in out.iter_mut().zip(last) {
                    *o = v.to_i32() as i16;
                }
            }
        }
        Ok(())
    }
}

/// Views state words as hidden-state elements (`i16` as is; `i8` two per
/// word). Never fails for these types; the error only avoids a panic path.
fn cast_state<A: Elem>(words: &mut [i16]) -> Result<&mut [A], Error> {
    bytemuck::try_cast_slice_mut(words).map_err(|_| Error::StateSize { expected: 0, got: 0 })
}

/// `i16` state words for layers of the given hidden sizes, scheme and cell
/// width: per layer the hidden state and the cell, plus scratch for the
/// largest layer's new hidden state.
pub fn state_words_for(hidden: impl Iterator<Item = usize> + Clone, scheme: Scheme, cell: CellWidth) -> usize {
    let hmax = hidden.clone().max().unwrap_or(0);
    hidden.map(|h| scheme.hidden_words(h) + h * cell.words()).sum::<usize>() + scheme.hidden_words(hmax)
}

/// A fixed-capacity, zero-initialised state buffer that can live in a
/// `static` (`N` `i16` words; check `N >= model.state_words()` at start-up,
/// or let [`QModel::step`] report [`Error::StateSize`] on the slice).
#[derive(Clone, Debug)]
pub struct StateBuf<const N: usize> {
    words: [i16; N],
}

impl<const N: usize> StateBuf<N> {
    /// All-zero state.
    pub const fn new() -> Self {
        StateBuf { words: [0; N] }
    }

    /// The first `len` words, or `None` when the capacity is smaller.
    pub fn words_mut(&mut self, len: usize) -> Option<&mut [i16]> {
        self.words.get_mut(..len)
    }

    /// Zeroes the state (a new sequence).
    pub fn reset(&mut self) {
        self.words = [0; N];
    }
}

impl<const N: usize> Default for StateBuf<N> {
    fn default() -> Self {
        Self::new()
    }
}

#[inline]
fn read_cell(c: &[i16], j: usize, cell: CellWidth) -> i32 {
    match cell {
        CellWidth::C16 => c.get(j).copied().unwrap_or(0) as i32,
        CellWidth::C32 => {
            let lo = c.get(2 * j).copied().unwrap_or(0) as u16 as u32;
            let hi = c.get(2 * j + 1).copied().unwrap_or(0) as u16 as u32;
            ((hi << 16) | lo) as i32
        }
    }
}

#[inline]
fn write_cell(c: &mut [i16], j: usize, cell: CellWidth, v: i32) {
    match cell {
        CellWidth::C16 => {
            if let Some(s) = c.get_mut(j) {
                *s = v as i16;
            }
        }
        CellWidth::C32 => {
            if let Some(s) = c.get_mut(2 * j) {
                *s = v as u32 as u16 as i16;
            }
            if let Some(s) = c.get_mut(2 * j + 1) {
                *s = ((v as u32) >> 16) as u16 as i16;
            }
        }
    }
}

/// What one layer's step needs besides its buffers.
struct StepCtx<'l, 'a> {
    layer: &'l QLayer<'a>,
    k: usize,
    cell: CellWidth,
    table: &'static ActTable,
}

/// One layer's step: weights `W`, hidden state `A`, input `X` (the model
/// input for layer 0, the previous layer's hidden state after).
///
/// Unit `j`'s four gate rows (`j`, `H + j`, `2H + j`, `3H + j`) are computed
/// in one pass of [`Weight::dot4`] per matrix, walking every per-row array
/// with one zipped iterator (no index arithmetic or bounds check per row).
fn layer_step<W: Weight, A: Hidden, X: Elem, P: Probe<i32>>(
    ctx: &StepCtx<'_, '_>,
    x: &[X],
    h: &mut [A],
    c: &mut [i16],
    scratch: &mut [A],
    probe: &mut P,
) {
    let layer = ctx.layer;
    let (hd, xi) = (layer.hidden, layer.input);
    let frac = layer.cell_frac as u32;
    let (w_x, w_h) = (W::slice(layer.w_x), W::slice(layer.w_h));
    // Int8 rows always have pre-shift 0 (`check_bound`): a constant, so
    // their requantization compiles without the 64-bit pre-shift path.
    let (pre_x, pre_h) = if W::WIDE { (layer.pre_x, layer.pre_h) } else { (0, 0) };
    // Gate g's weight rows (rows g*H .. (g+1)*H), unit by unit, walked by
    // zipped iterators: no index arithmetic or bounds check per row.
    let gate = |g: usize| gate_rows(w_x, hd, xi, g).zip(gate_rows(w_h, hd, hd, g));
    let units = gate(0).zip(gate(1)).zip(gate(2)).zip(gate(3));
    for (j, ((((g0, g1), g2), g3), hn)) in units.zip(scratch.iter_mut()).enumerate() {
        let r = [j, hd + j, 2 * hd + j, 3 * hd + j];
        let ax = W::dot4([g0.0, g1.0, g2.0, g3.0], x);
        let ah = W::dot4([g0.1, g1.1, g2.1, g3.1], h);
        let pre = [
            pre_act(layer, r[0], ax[0], ah[0], pre_x, pre_h),
            pre_act(layer, r[1], ax[1], ah[1], pre_x, pre_h),
            pre_act(layer, r[2], ax[2], ah[2], pre_x, pre_h),
            pre_act(layer, r[3], ax[3], ah[3], pre_x, pre_h),
        ];
        let gi = sigmoid(ctx.table, pre[0]);
        let gf = sigmoid(ctx.table, pre[1]);
        let gg = tanh(ctx.table, pre[2]);
        let go = sigmoid(ctx.table, pre[3]);
        let c_old = read_cell(c, j, ctx.cell);
        // Sigmoid outputs are in [1, 2^31) (activation::sigmoid), so the
        // gate factors take the non-negative multiply; its results are in
        // the range round_shr_inner needs.
        let fc = mul_q31_nonneg(gf, c_old);
        let ig = round_shr_inner(mul_q31_nonneg(gi, gg), 31 - frac);
        let mut c_new = fc.saturating_add(ig);
        if ctx.cell == CellWidth::C16 {
            c_new = sat_i16(c_new) as i32;
        }
        let t = tanh(ctx.table, shift_signed(c_new, PRE_FRAC as i32 - frac as i32));
        // |o * tanh| < 1, but rounding can reach -1.0: clamp symmetrically
        // so h stays in (-1, 1) like the float value.
        let h_new = round_shr_inner(mul_q31_nonneg(go, t), 31 - A::FRAC).clamp(-A::MAX, A::MAX);
        probe.gates(ctx.k, j, &pre, &[gi, gf, gg, go]);
        probe.state(ctx.k, j, c_new, h_new);
        write_cell(c, j, ctx.cell, c_new);
        *hn = A::from_i32(h_new);
    }
    for (hv, s) in h.iter_mut().zip(scratch.iter()) {
        *hv = *s;
    }
}

/// Gate row `r`'s pre-activation: both requantized dot products plus the bias.
#[inline(always)]
fn pre_act(layer: &QLayer<'_>, r: usize, ax: i64, ah: i64, pre_x: u8, pre_h: u8) -> i32 {
    let b = layer.bias.get(r).copied().unwrap_or(0);
    layer.rq_x.apply(r, ax, pre_x).saturating_add(layer.rq_h.apply(r, ah, pre_h)).saturating_add(b)
}

/// Gate `g`'s `hd` rows of `n` weights each, one by one (none when the
/// matrix is shorter, which validated layers never are).
#[inline(always)]
fn gate_rows<W>(w: &[W], hd: usize, n: usize, g: usize) -> Rows<'_, W> {
    Rows { rest: w.get(g * hd * n..(g + 1) * hd * n).unwrap_or(&[]), n }
}

/// Consecutive rows of `n` elements. Not `chunks_exact`: its assertion
/// that `n > 0` is a panic path the optimiser keeps at `opt-level = "z"`.
/// A zero `n` (never for validated layers) yields empty rows, and the
/// caller's zip with the hidden state bounds the iteration.
struct Rows<'a, W> {
    rest: &'a [W],
    n: usize,
}

impl<'a, W> Iterator for Rows<'a, W> {
    type Item = &'a [W];
    #[inline(always)]
    fn next(&mut self) -> Option<&'a [W]> {
        let (row, rest) = self.rest.split_at_checked(self.n)?;
        self.rest = rest;
        Some(row)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fixed_point::Requant;

    static STATIC_STATE: StateBuf<64> = StateBuf::new();

    const M1: [i32; 4] = [1 << 30; 4];
    const S1: [i8; 4] = [-1; 4];

    fn tiny() -> ([i8; 4], [i8; 4], [i32; 4], RowScales<'static>) {
        // Requant::from_real(1.0) is (2^30, -1): 2^30 * acc * 2 / 2^31.
        let rq = Requant::from_real(1.0).unwrap();
        assert_eq!((rq.mult, rq.shift), (M1[0], S1[0] as i32));
        ([10, 10, 10, 10], [0; 4], [0; 4], RowScales::new(&M1, &S1).unwrap())
    }

    #[test]
    fn state_fits_in_a_static() {
        // The buffer type has a const constructor, so firmware can keep state in a static.
        assert_eq!(STATIC_STATE.words.len(), 64);
    }

    #[test]
    fn cell_words_round_trip() {
        let mut c = [0i16; 4];
        for v in [0, 1, -1, i32::MAX, i32::MIN, 123_456_789, -98_765] {
            write_cell(&mut c, 1, CellWidth::C32, v);
            assert_eq!(read_cell(&c, 1, CellWidth::C32), v);
        }
    }

    #[test]
    fn wrong_sizes_are_errors_not_panics() {
        let (wx, wh, b, rq) = tiny();
        let l = QLayer::new(1, 1, Weights::I8(&wx), Weights::I8(&wh), &b, rq, rq, 13).unwrap();
        let m = QModel::new(&[l], None, Scheme::W8A16, CellWidth::C16, TableKind::Standard).unwrap();
        assert_eq!(m.state_words(), 3);
        let mut st = [0i16; 2];
        assert_eq!(m.step(&mut st, &[1], &mut [0]), Err(Error::StateSize { expected: 3, got: 2 }));
        let mut st = [0i16; 3];
        assert_eq!(m.step(&mut st, &[1, 2], &mut [0]), Err(Error::InputSize { expected: 1, got: 2 }));
        assert_eq!(m.step(&mut st, &[1], &mut []), Err(Error::OutputSize { expected: 1, got: 0 }));
        assert_eq!(st, [0; 3]);
        assert!(matches!(
            QModel::new(&[l], None, Scheme::W8A16, CellWidth::C32, TableKind::Standard).map(|m| m.state_words()),
            Ok(4)
        ));
        let bad = QLayer::new(1, 1, Weights::I8(&wx), Weights::I8(&wh), &b, rq, rq, 20).unwrap();
        assert_eq!(
            QModel::new(&[bad], None, Scheme::W8A16, CellWidth::C16, TableKind::Standard).unwrap_err(),
            Error::Format { what: "cell_frac", value: 20 }
        );
    }

    #[test]
    fn accumulator_bound_is_enforced() {
        // 600 weights of 127 times 32768 exceeds 2^31: refused.
        let wx = [127i8; 4 * 600];
        let wh = [0i8; 4];
        let b = [0i32; 4];
        let rq = RowScales::new(&M1, &S1).unwrap();
        assert_eq!(
            QLayer::new(600, 1, Weights::I8(&wx), Weights::I8(&wh), &b, rq, rq, 13).unwrap_err(),
            Error::AccumulatorBound { what: "input weights", layer: 0, row: 0 }
        );
        assert!(QLayer::new(516, 1, Weights::I8(&wx[..4 * 516]), Weights::I8(&wh), &b, rq, rq, 13).is_ok());
    }

    #[test]
    fn huge_dimensions_are_errors_not_overflows() {
        // Found in review: 4 * hidden wrapped to 0 and was accepted.
        let none = RowScales::new(&[], &[]).unwrap();
        assert!(matches!(
            QLayer::new(1, usize::MAX / 4 + 1, Weights::I8(&[]), Weights::I8(&[]), &[], none, none, 0),
            Err(Error::Shape { .. })
        ));
        let two = RowScales::new(&M1[..2], &S1[..2]).unwrap();
        assert!(matches!(QHead::new(usize::MAX / 2 + 1, 2, Weights::I8(&[]), &[], two), Err(Error::Shape { .. })));
        assert!(matches!(
            crate::float::FloatLayer::new(usize::MAX / 4 + 1, 1, &[], &[0.0; 4], &[0.0; 4]),
            Err(Error::Shape { .. })
        ));
    }

    #[test]
    fn bad_requant_is_refused() {
        assert_eq!(
            RowScales::new(&M1, &[0, 0, 99, 0]).unwrap_err(),
            Error::Format { what: "requant shift", value: 99 }
        );
        assert_eq!(
            RowScales::new(&[0, -5, 0, 0], &S1).unwrap_err(),
            Error::Format { what: "requant multiplier", value: -5 }
        );
        assert!(matches!(RowScales::new(&M1, &S1[..3]), Err(Error::Shape { .. })));
        let (wx, wh, b, _) = tiny();
        let short = RowScales::new(&M1[..3], &S1[..3]).unwrap();
        assert!(matches!(
            QLayer::new(1, 1, Weights::I8(&wx), Weights::I8(&wh), &b, short, short, 13),
            Err(Error::Shape { .. })
        ));
    }
}

#[cfg(test)]
mod shift_tests {
    use super::{round_shr64, round_shr64_lo};
    use proptest::prelude::*;

    #[test]
    fn round_shr64_lo_edges() {
        let xs = [0i64, 1, -1, 2, -2, 3, -3, (1 << 61) - 1, -(1 << 61), 1 << 40, -(1 << 40) - 1];
        for x in xs {
            for n in 1..=31 {
                assert_eq!(round_shr64_lo(x, n), round_shr64(x, n) as i32, "x {x} n {n}");
            }
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(4096))]
        #[test]
        fn round_shr64_lo_matches(x in -(1i64 << 62) + 1..(1i64 << 62), n in 1u32..=31) {
            prop_assert_eq!(round_shr64_lo(x, n), round_shr64(x, n) as i32);
        }

        #[test]
        fn round_shr64_lo_matches_small(x in -(1i64 << 34)..(1i64 << 34), n in 1u32..=31) {
            prop_assert_eq!(round_shr64_lo(x, n), round_shr64(x, n) as i32);
        }
    }
}
