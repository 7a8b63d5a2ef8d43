//! Lookup-table sigmoid and tanh for the integer step.
//!
//! # Formats
//! - **Input**: a gate pre-activation as `i32` with [`PRE_FRAC`] = 19
//!   fractional bits (LSB `2^-19`). The table covers `|x| < 16`; larger
//!   inputs clamp. An `int16` pre-activation in Q4.11 is passed as
//!   `(x as i32) << 8`.
//! - **Output**: `i32` in Q0.31 (LSB `2^-31`). Sigmoid returns `[0, 2^31)`,
//!   tanh `(-2^31, 2^31)`.
//!
//! # How
//! One table serves both functions. It holds `s(a) = sigmoid(-a)` for
//! `a` in `[0, 16]`, split into 16 unit-wide segments with `2^log2_knots`
//! intervals each. Each segment stores its knots as `u16` mantissas with
//! its own power-of-two scale, so the tail keeps 16 significant bits:
//! `1 - sigmoid(10)` is about `4.5e-5`, and a forget gate that must hold a
//! cell for 10,000 steps needs that small gap to be right to a fraction of a
//! percent (DESIGN.md section 3). Segment scales are capped at `2^31` (the
//! Q0.31 container), so beyond `|x| = 10` the gap keeps fewer than 16
//! significant bits but stays correctly rounded in Q0.31. Then, exactly by construction:
//! - `sigmoid(x) = 2^31 - s(x)` for `x >= 0` and `s(-x)` for `x < 0`, so
//!   `sigmoid(x) + sigmoid(-x) = 1`;
//! - `tanh(x) = 1 - 2 s(2|x|)` with the sign of `x`, so tanh is odd.
//!
//! Between knots the value is linearly interpolated with a 14-bit fraction,
//! rounding half away from zero. The tables are built at compile time by
//! `const fn` (with a compile-time `exp`, checked against `libm` in the
//! tests) and live in flash.
//!
//! # Accuracy (exhaustive test over every Q4.11 input; proptest at full
//! 19-bit input resolution)
//! [`STANDARD`] (1,072 bytes): sigmoid within 1.12 LSB of Q0.16 and tanh
//! within 1.11 LSB of Q0.15 of the exact functions on the Q4.11 grid
//! (1.18 LSB at full input resolution, asserted <= 1.5); `1 - sigmoid(x)` for
//! `x` in `[4, 16)` within 0.011 % relative (beyond 2 LSB of Q0.31).
//! [`COMPACT`] (304 bytes): within 6.5 LSB on the grid, 6.7 LSB at full
//! resolution (asserted <= 7).
//!
//! ```
//! use lapwing::activation::{sigmoid, tanh, STANDARD, PRE_FRAC};
//! let half = sigmoid(&STANDARD, 0);
//! assert_eq!(half, 1 << 30); // 0.5 in Q0.31
//! let t = tanh(&STANDARD, 1 << PRE_FRAC); // tanh(1.0)
//! assert!((t as f64 / 2f64.powi(31) - 0.761_594_2).abs() < 3e-5);
//! ```

/// Fractional bits of a gate pre-activation (`i32`, LSB `2^-19`).
pub const PRE_FRAC: u32 = 19;

/// Number of unit-wide segments: the table covers `[0, 16)`.
pub const SEGMENTS: usize = 16;

/// The table domain in pre-activation units: inputs clamp to `|x| < 16`.
pub const DOMAIN: i32 = (SEGMENTS as i32) << PRE_FRAC;

/// One Q0.31 unit (1.0) as `i64`, for conversions in tests and tools.
pub const ONE_Q31: f64 = 2_147_483_648.0;

/// A segmented sigmoid lookup table (see the module docs).
#[derive(Debug)]
pub struct ActTable {
    /// log2 of the knot intervals per unit of input.
    log2_knots: u32,
    /// Per segment: the mantissas of that segment hold `s * 2^shift`.
    shifts: [u8; SEGMENTS],
    /// `SEGMENTS * (2^log2_knots + 1)` mantissas, segment after segment.
    mant: &'static [u16],
}

impl ActTable {
    /// Bytes of flash the table occupies (mantissas plus segment shifts).
    pub const fn flash_bytes(&self) -> usize {
        self.mant.len() * 2 + SEGMENTS
    }

    /// Knot intervals per unit of input.
    pub const fn knots_per_unit(&self) -> usize {
        1 << self.log2_knots
    }

    /// `sigmoid(-a)` in Q0.31 for `a` in `[0, DOMAIN)`; the callers clamp
    /// (outside that range the value is meaningless, never a panic).
    ///
    /// The same integers as the plain formulation (segment, knot, 14-bit
    /// fraction, interpolation rounded half away from zero, segment scale),
    /// with the arithmetic folded:
    /// - the knot index `seg * (2^log2_knots + 1) + j` is
    ///   `(a >> fb) + seg`, as `a >> fb = seg * 2^log2_knots + j`;
    /// - the fraction `frac` in `[0, 2^fb)` becomes 14 bits as
    ///   `(frac * 2^14 + 2^(fb-1)) >> fb`: for `fb <= 14` the added half is
    ///   below one step of `frac * 2^14`, a multiple of `2^fb`, so it is the
    ///   exact left shift; for `fb > 14` it is `(frac + 2^(fb-15)) >> (fb-14)`
    ///   with numerator and divisor scaled by `2^14`. `fb = 19 - log2_knots`
    ///   is at most 18 (`log2_knots >= 1`, asserted at compile time), so
    ///   `frac * 2^14 < 2^32` fits `u32`;
    /// - the rounding shift of `d = (y1 - y0) * f14` (`|d| < 2^30`) by 14
    ///   is `(d + 2^13 - [d < 0]) >> 14`.
    #[inline(always)]
    fn s_neg(&self, a: u32) -> i32 {
        let fb = PRE_FRAC - self.log2_knots;
        let seg = (a >> PRE_FRAC) as usize;
        let base = (a >> fb) as usize + seg;
        let frac = a & ((1 << fb) - 1);
        let f14 = ((frac << 14) + (1 << (fb - 1))) >> fb;
        let (y0, y1) = match self.mant.get(base..base + 2) {
            Some(&[y0, y1]) => (y0 as i32, y1 as i32),
            _ => (0, 0),
        };
        let d = (y1 - y0) * f14 as i32;
        let y = y0 + ((d + (1 << 13) + (d >> 31)) >> 14);
        // y < 2^16 and sh >= 16, so the shift stays below 2^31.
        let sh = self.shifts.get(seg & (SEGMENTS - 1)).copied().unwrap_or(31) as u32;
        y << (31 - sh)
    }
}

/// Logistic sigmoid of a Q.19 pre-activation, in Q0.31 (`[0, 2^31)`).
///
/// Exactly `sigmoid(x) + sigmoid(-x) = 2^31` for every `x > i32::MIN`.
#[inline]
pub fn sigmoid(table: &ActTable, x: i32) -> i32 {
    // |x| clamped to the table (|i32::MIN| = 2^31 clamps too).
    let s = table.s_neg(x.unsigned_abs().min(DOMAIN as u32 - 1));
    if x >= 0 {
        // s is in [1, 2^30] (every knot scales into that range and
        // interpolation stays between knots: test `knots_in_range`), so
        // 2^31 - s is in [2^30, 2^31 - 1] and needs no saturation.
        (1u32 << 31).wrapping_sub(s as u32) as i32
    } else {
        s
    }
}

/// Hyperbolic tangent of a Q.19 pre-activation, in Q0.31.
///
/// Odd by construction: `tanh(-x) = -tanh(x)` for every `x > i32::MIN`.
#[inline]
pub fn tanh(table: &ActTable, x: i32) -> i32 {
    // 2|x| clamped to the table: |x| >= DOMAIN/2 gives DOMAIN - 1.
    let a2 = (x.unsigned_abs().min(DOMAIN as u32 / 2) << 1).min(DOMAIN as u32 - 1);
    // s_neg is in [1, 2^30] (test `knots_in_range`), so the difference is
    // in [0, 2^30 - 1] and doubling it stays below 2^31.
    let t = ((1 << 30) - table.s_neg(a2)) << 1;
    if x < 0 {
        -t
    } else {
        t
    }
}

// ---------------------------------------------------------------------------
// Compile-time table generation.

const LN2: f64 = core::f64::consts::LN_2;

/// `e^x` for `x` in `[-64, 0]`, at compile time: range reduction by ln 2 and
/// a 27-term Taylor series (relative error near 1e-15, checked against
/// `libm::exp` in the tests).
const fn exp_nonpos(x: f64) -> f64 {
    let t = x / LN2;
    let n = if t < 0.0 { (t - 0.5) as i64 } else { (t + 0.5) as i64 };
    let r = x - n as f64 * LN2;
    let mut sum = 1.0;
    let mut term = 1.0;
    let mut k = 1;
    while k < 28 {
        term = term * r / k as f64;
        sum += term;
        k += 1;
    }
    // 2^n as an f64 built from its bits (n is in [-93, 0] here).
    let pow2 = f64::from_bits(((1023 + n) as u64) << 52);
    sum * pow2
}

/// `sigmoid(-a)` for `a >= 0`, at compile time.
const fn sigmoid_neg(a: f64) -> f64 {
    let e = exp_nonpos(-a);
    e / (1.0 + e)
}

/// The stored value of a knot at `a`: `s(a)` lowered by half the chord
/// error of linear interpolation, `h^2/16 * s''(a)` with
/// `s'' = s (1 - s)(1 - 2 s)`, so the interpolation error is centred on zero
/// instead of one-signed (halves the worst case; `s(0) = 0.5` stays exact).
const fn knot_value(a: f64, k_per: usize) -> f64 {
    let s = sigmoid_neg(a);
    let h = 1.0 / k_per as f64;
    s - h * h / 16.0 * s * (1.0 - s) * (1.0 - 2.0 * s)
}

const fn round_pos(v: f64) -> u32 {
    (v + 0.5) as u32
}

const fn pow2(k: u32) -> f64 {
    f64::from_bits(((1023 + k as i64) as u64) << 52)
}

// The two builders below run only at compile time (static initializers):
// an out-of-bounds index there is a compile error, never a run-time panic.

/// Per-segment scale: the largest `sh <= 31` with `round(s(seg) * 2^sh) <= 65535`.
#[allow(clippy::indexing_slicing)]
const fn segment_shifts() -> [u8; SEGMENTS] {
    let mut out = [0u8; SEGMENTS];
    let mut k = 0;
    while k < SEGMENTS {
        let top = sigmoid_neg(k as f64);
        let mut sh = 16u32;
        while sh < 31 && round_pos(top * pow2(sh + 1)) <= 65_535 {
            sh += 1;
        }
        out[k] = sh as u8;
        k += 1;
    }
    out
}

const SHIFTS: [u8; SEGMENTS] = segment_shifts();

/// Builds the mantissas of a table with `2^log2_knots` intervals per unit.
///
/// The last knot of a segment is rounded up from the next segment's first
/// knot so that the function stays monotone across segment boundaries.
#[allow(clippy::indexing_slicing)]
const fn build_mantissas<const N: usize>(log2_knots: u32) -> [u16; N] {
    let k_per = 1usize << log2_knots;
    let per_seg = k_per + 1;
    let mut out = [0u16; N];
    let mut seg = 0;
    while seg < SEGMENTS {
        let sh = SHIFTS[seg] as u32;
        let mut j = 0;
        while j <= k_per {
            let a = seg as f64 + j as f64 / k_per as f64;
            let v = if j == k_per && seg + 1 < SEGMENTS {
                let sh_next = SHIFTS[seg + 1] as u32;
                let fine = round_pos(knot_value(a, k_per) * pow2(sh_next));
                let d = 1u32 << (sh_next - sh);
                fine.div_ceil(d)
            } else {
                round_pos(knot_value(a, k_per) * pow2(sh))
            };
            out[seg * per_seg + j] = if v > 65_535 { 65_535 } else { v as u16 };
            j += 1;
        }
        seg += 1;
    }
    out
}

// s_neg needs 1 <= log2_knots (its fraction arithmetic fits u32 then).
const _: () = assert!(STANDARD_LOG2 >= 1 && COMPACT_LOG2 >= 1 && STANDARD_LOG2 < PRE_FRAC);

const STANDARD_LOG2: u32 = 5;
const STANDARD_LEN: usize = SEGMENTS * ((1 << STANDARD_LOG2) + 1);
#[cfg(feature = "standard-table")]
static STANDARD_MANT: [u16; STANDARD_LEN] = build_mantissas::<STANDARD_LEN>(STANDARD_LOG2);

const COMPACT_LOG2: u32 = 3;
const COMPACT_LEN: usize = SEGMENTS * ((1 << COMPACT_LOG2) + 1);
#[cfg(feature = "compact-table")]
static COMPACT_MANT: [u16; COMPACT_LEN] = build_mantissas::<COMPACT_LEN>(COMPACT_LOG2);

/// The default table: 32 knot intervals per unit, 1,072 bytes of flash.
///
/// Measured bound: sigmoid within 1.12 LSB of Q0.16, tanh within 1.11 LSB
/// of Q0.15 (asserted <= 1.5, DESIGN.md section 9; exhaustive test `standard_table_error_bound`).
#[cfg(feature = "standard-table")]
#[cfg(feature = "standard-table")]
pub static STANDARD: ActTable = ActTable { log2_knots: STANDARD_LOG2, shifts: SHIFTS, mant: &STANDARD_MANT };

/// The small table for tight flash: 8 knot intervals per unit, 304 bytes.
///
/// Measured bound: sigmoid within 6.5 LSB of Q0.16, tanh within 6.5 LSB of
/// Q0.15 on the Q4.11 grid (exhaustive test `compact_table_error_bound`),
/// 6.7 LSB at full input resolution (asserted <= 7 by a proptest).
#[cfg(feature = "compact-table")]
pub static COMPACT: ActTable = ActTable { log2_knots: COMPACT_LOG2, shifts: SHIFTS, mant: &COMPACT_MANT };

/// Which built-in table a model uses (stored in the model as a byte).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
#[repr(u8)]
pub enum TableKind {
    /// [`STANDARD`]: 1,072 bytes.
    Standard = 0,
    /// [`COMPACT`]: 304 bytes.
    Compact = 1,
}

impl TableKind {
    /// The table this kind names, when this build links it. Both are linked
    /// by default (cargo features `standard-table` and `compact-table`); a
    /// firmware that knows its model's table can turn the other off and save
    /// its flash.
    pub fn table(self) -> Option<&'static ActTable> {
        match self {
            #[cfg(feature = "standard-table")]
            TableKind::Standard => Some(&STANDARD),
            #[cfg(feature = "compact-table")]
            TableKind::Compact => Some(&COMPACT),
            #[allow(unreachable_patterns)]
            _ => None,
        }
    }

    /// Flash bytes of this table (whether or not this build links it).
    pub const fn flash_bytes(self) -> usize {
        let mant = match self {
            TableKind::Standard => STANDARD_LEN,
            TableKind::Compact => COMPACT_LEN,
        };
        2 * mant + SEGMENTS
    }

    /// The kind for a stored byte, if it names one.
    pub fn from_u8(v: u8) -> Option<TableKind> {
        match v {
            0 => Some(TableKind::Standard),
            1 => Some(TableKind::Compact),
            _ => None,
        }
    }

    /// A short lower-case name (`standard`, `compact`).
    pub fn name(self) -> &'static str {
        match self {
            TableKind::Standard => "standard",
            TableKind::Compact => "compact",
        }
    }
}

#[cfg(test)]
mod tests {
    extern crate std;
    use super::*;
    use proptest::prelude::*;
    use std::println;

    const Q16: f64 = 65_536.0;
    const Q15: f64 = 32_768.0;

    fn exact_sigmoid(x: f64) -> f64 {
        1.0 / (1.0 + libm::exp(-x))
    }

    /// Max errors over every Q4.11 input: (sigmoid in Q0.16 LSB, tanh in
    /// Q0.15 LSB, worst relative error of 1 - sigmoid on [4, 16)).
    fn measure(table: &ActTable) -> (f64, f64, f64) {
        let mut worst_s: f64 = 0.0;
        let mut worst_t: f64 = 0.0;
        let mut worst_tail: f64 = 0.0;
        let mut prev_s = i32::MIN;
        let mut prev_t = i32::MIN;
        for raw in i16::MIN..=i16::MAX {
            let xq = (raw as i32) << 8;
            let x = raw as f64 / 2048.0;
            let s = sigmoid(table, xq);
            let t = tanh(table, xq);
            // Reference: libm exp/tanh in f64.
            let es = (s as f64 / ONE_Q31 - exact_sigmoid(x)).abs() * Q16;
            let et = (t as f64 / ONE_Q31 - libm::tanh(x)).abs() * Q15;
            worst_s = worst_s.max(es);
            worst_t = worst_t.max(et);
            if x >= 4.0 {
                // Relative error of the gap 1 - sigmoid, beyond the Q0.31
                // container's own resolution (2 LSB).
                let gap_q = 1.0 - s as f64 / ONE_Q31;
                let gap = exact_sigmoid(-x);
                let excess = ((gap_q - gap).abs() - 2.0 / ONE_Q31).max(0.0);
                worst_tail = worst_tail.max(excess / gap);
            }
            // Monotone (non-decreasing) over the whole input range.
            assert!(s >= prev_s, "sigmoid not monotone at {raw}");
            assert!(t >= prev_t, "tanh not monotone at {raw}");
            prev_s = s;
            prev_t = t;
            // Symmetry, exact by construction: check it anyway (1 LSB allowed by DESIGN.md).
            if raw > i16::MIN {
                let neg = sigmoid(table, -xq);
                assert!((s as i64 + neg as i64 - (1i64 << 31)).abs() <= 1, "sigmoid symmetry at {raw}");
                assert_eq!(tanh(table, -xq), -t, "tanh oddness at {raw}");
            }
        }
        (worst_s, worst_t, worst_tail)
    }

    #[test]
    fn compile_time_exp_matches_libm() {
        for i in 0..=6400 {
            let x = -(i as f64) * 0.01;
            let ours = exp_nonpos(x);
            let reference = libm::exp(x); // libm as the outside reference
            assert!(((ours - reference) / reference).abs() < 1e-13, "exp({x})");
        }
    }

    #[test]
    fn standard_table_error_bound() {
        let (s, t, tail) = measure(&STANDARD);
        println!(
            "standard table ({} bytes): sigmoid max error {s:.3} LSB Q0.16, tanh max error {t:.3} LSB Q0.15, \
             tail 1-sigmoid relative error {tail:.2e} (vs libm, all 65,536 Q4.11 inputs)",
            STANDARD.flash_bytes()
        );
        // DESIGN.md section 9: max |table - exact| <= 1.5 LSB of the output format.
        assert!(s <= 1.5, "sigmoid error {s} LSB");
        assert!(t <= 1.5, "tanh error {t} LSB");
        assert!(tail <= 1e-3, "tail relative error {tail}");
        assert!(STANDARD.flash_bytes() + COMPACT.flash_bytes() <= 2560);
    }

    #[test]
    fn compact_table_error_bound() {
        let (s, t, tail) = measure(&COMPACT);
        println!(
            "compact table ({} bytes): sigmoid max error {s:.3} LSB Q0.16, tanh max error {t:.3} LSB Q0.15, \
             tail relative error {tail:.2e}",
            COMPACT.flash_bytes()
        );
        assert!(s <= 6.5, "sigmoid error {s} LSB");
        assert!(t <= 6.5, "tanh error {t} LSB");
    }

    #[test]
    fn extremes_clamp() {
        for table in [&STANDARD, &COMPACT] {
            assert_eq!(sigmoid(table, i32::MIN), sigmoid(table, -DOMAIN));
            assert_eq!(sigmoid(table, i32::MAX), sigmoid(table, DOMAIN));
            assert!(sigmoid(table, i32::MAX) < i32::MAX);
            assert!(sigmoid(table, i32::MIN) > 0);
            assert_eq!(tanh(table, 0), 0);
            assert!(tanh(table, i32::MAX) > 0 && tanh(table, i32::MIN) < 0);
        }
    }

    #[test]
    fn knots_in_range() {
        // What sigmoid and tanh rely on to skip saturation: every knot,
        // scaled to Q0.31, is in [1, 2^30] (interpolated values lie between
        // two knots, so they are too).
        for table in [&STANDARD, &COMPACT] {
            let per_seg = table.knots_per_unit() + 1;
            assert_eq!(table.mant.len(), SEGMENTS * per_seg);
            for (k, m) in table.mant.iter().enumerate() {
                let v = (*m as u64) << (31 - table.shifts[k / per_seg] as u32);
                assert!((1..=1 << 30).contains(&v), "knot {k}: {v}");
            }
        }
    }

    /// The lookup as first written (clamp, segment, knot, fraction,
    /// interpolation, scale), kept to prove the folded one gives the same
    /// integers.
    fn s_neg_reference(t: &ActTable, a: i32) -> i32 {
        use crate::fixed_point::round_shr;
        let a = a.clamp(0, DOMAIN - 1);
        let seg = (a >> PRE_FRAC) as usize;
        let within = a & ((1 << PRE_FRAC) - 1);
        let fb = PRE_FRAC - t.log2_knots;
        let j = (within >> fb) as usize;
        let frac = within & ((1 << fb) - 1);
        let f14 = if fb <= 14 { frac << (14 - fb) } else { (frac + (1 << (fb - 15))) >> (fb - 14) };
        let base = seg * ((1usize << t.log2_knots) + 1) + j;
        let y0 = t.mant[base] as i32;
        let y1 = t.mant[base + 1] as i32;
        let y = y0 + round_shr((y1 - y0) * f14, 14);
        y << (31 - t.shifts[seg] as u32)
    }

    fn sigmoid_reference(t: &ActTable, x: i32) -> i32 {
        if x >= 0 {
            (i32::MAX - s_neg_reference(t, x)).saturating_add(1)
        } else {
            s_neg_reference(t, x.saturating_neg())
        }
    }

    fn tanh_reference(t: &ActTable, x: i32) -> i32 {
        let a = x.saturating_abs();
        let a2 = if a >= DOMAIN / 2 { DOMAIN - 1 } else { a * 2 };
        let v = ((1 << 30) - s_neg_reference(t, a2)) << 1;
        let v = if v < 0 { i32::MAX } else { v };
        if x < 0 {
            -v
        } else {
            v
        }
    }

    #[test]
    fn lookup_matches_reference_everywhere() {
        // Every input of the table's domain and beyond (every 7th in a
        // debug build), and the extremes.
        let step = if cfg!(debug_assertions) { 7 } else { 1 };
        let edges = [i32::MIN, i32::MIN + 1, -DOMAIN - 1, -DOMAIN, DOMAIN - 1, DOMAIN, i32::MAX - 1, i32::MAX];
        for table in [&STANDARD, &COMPACT] {
            for x in (-DOMAIN - 64..DOMAIN + 64).step_by(step).chain(edges) {
                assert_eq!(sigmoid(table, x), sigmoid_reference(table, x), "sigmoid({x})");
                assert_eq!(tanh(table, x), tanh_reference(table, x), "tanh({x})");
            }
        }
    }

    proptest! {
        #[test]
        fn fine_inputs_within_bound(x in -(20i32 << PRE_FRAC)..(20i32 << PRE_FRAC)) {
            // Inputs between the Q4.11 grid points (the step uses all 19 bits).
            let xf = x as f64 / (1u32 << PRE_FRAC) as f64;
            let s = sigmoid(&STANDARD, x) as f64 / ONE_Q31;
            let t = tanh(&STANDARD, x) as f64 / ONE_Q31;
            let xs = xf.clamp(-16.0, 16.0);
            let xt = xf.clamp(-8.0, 8.0);
            prop_assert!((s - exact_sigmoid(xs)).abs() * Q16 <= 1.5);
            prop_assert!((t - libm::tanh(xt)).abs() * Q15 <= 1.5);
            let sc = sigmoid(&COMPACT, x) as f64 / ONE_Q31;
            let tc = tanh(&COMPACT, x) as f64 / ONE_Q31;
            prop_assert!((sc - exact_sigmoid(xs)).abs() * Q16 <= 7.0);
            prop_assert!((tc - libm::tanh(xt)).abs() * Q15 <= 7.0);
        }
    }
}
