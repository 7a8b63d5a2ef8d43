//! Fixed-point arithmetic shared by every integer path in Lapwing.
//!
//! Every rounding step here is **round half away from zero**, the one rule
//! used everywhere in the crate, so that the host and the device produce the
//! same integers bit for bit. Composite operations (a high multiply followed
//! by a right shift) round twice and so stay within 1 LSB of the exact
//! result rather than 0.5; they are still deterministic and identical on
//! every target. Requantization follows the integer-arithmetic-only
//! scheme of Jacob et al. 2018 (arXiv:1712.05877, section 2.2): a real scale
//! `M` is written as `M0 * 2^-n` with `M0` in `[0.5, 1)` held as a Q31 integer,
//! and applied with a saturating rounding doubling high multiply followed by a
//! rounding right shift. (Their reference code rounds ties of the high
//! multiply upwards; Lapwing rounds ties away from zero, as documented.)
//!
//! ```
//! use lapwing::fixed_point::{mul_q31, round_shr, Requant};
//! // 0.5 * 0.5 = 0.25 in Q31.
//! assert_eq!(mul_q31(1 << 30, 1 << 30), 1 << 29);
//! // -1.5 rounds away from zero to -2.
//! assert_eq!(round_shr(-3, 1), -2);
//! // Multiply an accumulator by the real scale 0.0123.
//! let rq = Requant::from_real(0.0123).unwrap();
//! assert_eq!(rq.apply(10_000), 123);
//! ```

/// Saturating rounding doubling high multiply: `round(a * b / 2^31)`.
///
/// Read `a` and `b` as Q31 numbers (or one of them as an integer and the other
/// as a Q31 factor); the result is their product in the same format.
/// Ties round away from zero. The only case that overflows,
/// `i32::MIN * i32::MIN` (which is `+1.0`), saturates to `i32::MAX`.
/// Error bound: at most 0.5 LSB from the exact product.
#[inline]
pub const fn mul_q31(a: i32, b: i32) -> i32 {
    if a == i32::MIN && b == i32::MIN {
        return i32::MAX;
    }
    let ab = (a as i64) * (b as i64);
    // |ab| < 2^62 here, so adding 2^30 cannot overflow. Ties away from
    // zero in one step: floor((ab + 2^30) / 2^31) for ab >= 0 and
    // floor((ab + 2^30 - 1) / 2^31) = -floor((|ab| + 2^30) / 2^31) for
    // ab < 0 (branch-free: a multiply, an add with carry and a shift).
    ((ab + (1 << 30) - (ab < 0) as i64) >> 31) as i32
}

/// Rounding arithmetic right shift: `round(x / 2^shift)`, ties away from zero.
///
/// Defined for every `shift`; for `shift >= 32` the result is 0 except
/// `i32::MIN >> 32`, which is exactly -0.5 and rounds to -1.
/// Error bound: at most 0.5 LSB of the result.
#[inline]
pub const fn round_shr(x: i32, shift: u32) -> i32 {
    if shift == 0 {
        return x;
    }
    if shift >= 32 {
        return if shift == 32 && x == i32::MIN { -1 } else { 0 };
    }
    let mask = ((1u32 << shift) - 1) as i32;
    let rem = x & mask;
    let threshold = (mask >> 1) + (x < 0) as i32;
    (x >> shift) + (rem > threshold) as i32
}

/// Saturating left shift: `x * 2^shift`, clamped to the `i32` range.
#[inline]
pub const fn sat_shl(x: i32, shift: u32) -> i32 {
    if x == 0 {
        return 0;
    }
    if shift >= 31 {
        return if x > 0 { i32::MAX } else { i32::MIN };
    }
    let limit = i32::MAX >> shift;
    if x > limit {
        i32::MAX
    } else if x < -limit - 1 {
        i32::MIN
    } else {
        x << shift
    }
}

/// Shift left (`shift > 0`, saturating) or right (`shift < 0`, rounding half
/// away from zero) by a signed amount.
#[inline]
pub const fn shift_signed(x: i32, shift: i32) -> i32 {
    if shift >= 0 {
        sat_shl(x, shift as u32)
    } else {
        round_shr(x, shift.unsigned_abs())
    }
}

/// Saturating narrowing to `i16`.
#[inline]
pub const fn sat_i16(x: i32) -> i16 {
    if x > i16::MAX as i32 {
        i16::MAX
    } else if x < i16::MIN as i32 {
        i16::MIN
    } else {
        x as i16
    }
}

/// Saturating narrowing to `i8`.
#[inline]
pub const fn sat_i8(x: i32) -> i8 {
    if x > i8::MAX as i32 {
        i8::MAX
    } else if x < i8::MIN as i32 {
        i8::MIN
    } else {
        x as i8
    }
}

/// Returns true if and only if narrowing `x` to `i16` would saturate.
#[inline]
pub const fn saturates_i16(x: i32) -> bool {
    x > i16::MAX as i32 || x < i16::MIN as i32
}

/// A real scale factor as a Q31 multiplier and a power-of-two shift.
///
/// Represents `mult * 2^-31 * 2^-shift`. A positive `shift` is a rounding
/// right shift after the rounding high multiply (two roundings, within 1
/// LSB); a negative `shift` (scales of one and above) divides the exact
/// 64-bit product `acc * mult` by `2^(31 + shift)` with one rounding, then
/// saturates. `mult` is in `[2^30, 2^31)` for non-zero scales, 0 for a zero
/// scale.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub struct Requant {
    /// Q31 mantissa, in `[2^30, 2^31)`, or 0.
    pub mult: i32,
    /// Power-of-two exponent: right shift if positive, left shift if negative.
    pub shift: i32,
}

/// Why a real scale cannot be turned into a [`Requant`].
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum ScaleError {
    /// The scale is negative, NaN or infinite.
    NotFinitePositive,
    /// The scale is below `2^-63` or at least `2^31`: outside what a Q31
    /// multiplier with a shift in `[-31, 62]` represents.
    OutOfRange,
}

impl core::fmt::Display for ScaleError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            ScaleError::NotFinitePositive => f.write_str("scale is negative, NaN or infinite"),
            ScaleError::OutOfRange => f.write_str("scale is outside [2^-63, 2^31)"),
        }
    }
}

impl core::error::Error for ScaleError {}

impl Requant {
    /// The identity scale (1.0).
    pub const ONE: Requant = Requant { mult: 1 << 30, shift: -1 };

    /// Turns a real scale into a Q31 multiplier and a shift (host side).
    ///
    /// `mult = round(m * 2^31)` with `scale = m * 2^-shift`, `m` in
    /// `[0.5, 1)`, ties away from zero; relative error at most `2^-31`.
    /// A zero scale gives the zero multiplier.
    ///
    /// # Errors
    /// [`ScaleError::NotFinitePositive`] for negative, NaN or infinite
    /// scales; [`ScaleError::OutOfRange`] outside `[2^-63, 2^31)`.
    pub fn from_real(scale: f64) -> Result<Requant, ScaleError> {
        if !(scale.is_finite() && scale >= 0.0) {
            return Err(ScaleError::NotFinitePositive);
        }
        if scale == 0.0 {
            return Ok(Requant { mult: 0, shift: 0 });
        }
        let (m, e) = libm::frexp(scale); // scale = m * 2^e, m in [0.5, 1)
        let mut mult = libm::round(m * 2_147_483_648.0) as i64;
        let mut e = e;
        if mult == 1 << 31 {
            mult >>= 1;
            e += 1;
        }
        let shift = -e;
        if !(-31..=62).contains(&shift) {
            return Err(ScaleError::OutOfRange);
        }
        Ok(Requant { mult: mult as i32, shift })
    }

    /// The real scale this pair represents.
    pub fn to_real(self) -> f64 {
        self.mult as f64 / 2_147_483_648.0 * libm::exp2(-(self.shift as f64))
    }

    /// Applies the scale to an accumulator: `round(acc * mult * 2^-31 * 2^-shift)`.
    ///
    /// Saturates to the `i32` range. Error bound: within 1 LSB of the exact
    /// product of `acc` and the represented scale (one rounding in the high
    /// multiply, one in the right shift; a left shift rounds once).
    #[inline]
    pub const fn apply(self, acc: i32) -> i32 {
        if self.shift < 0 {
            // Left shift: one rounding of the exact 64-bit product, so no
            // precision or range is lost before the multiply.
            let p = acc as i64 * self.mult as i64; // |p| < 2^62
            let s = self.shift.unsigned_abs();
            let r = 31_u32.saturating_sub(s);
            let mag = if r == 0 { p.unsigned_abs() } else { (p.unsigned_abs() + (1u64 << (r - 1))) >> r };
            let v = if p < 0 { -(mag as i64) } else { mag as i64 };
            if v > i32::MAX as i64 {
                i32::MAX
            } else if v < i32::MIN as i64 {
                i32::MIN
            } else {
                v as i32
            }
        } else {
            round_shr(mul_q31(acc, self.mult), self.shift as u32)
        }
    }
}

/// The exact 64-bit product of two `i32`, from four 16-bit partial
/// products: `a = ah 2^16 + al`, `b = bh 2^16 + bl` with `al`, `bl` in
/// `[0, 2^16)` and `ah`, `bh` in `[-2^15, 2^15)`, so `al bl < 2^32` fits
/// `u32`, `|ah bl|` and `|al bh|` are below `2^31` and `|ah bh| <= 2^30`;
/// the sum is then exact in `i64`.
///
/// Armv6-M has no 32x32->64 multiply, and LLVM calls the general 64x64
/// routine (`__aeabi_lmul`, about 40 instructions with the call) for an
/// `i64` product there; this form is about 25 inline. Cores with `smull`
/// do it in one instruction, so [`mul_wide`] uses it only on Armv6-M.
#[inline(always)]
pub(crate) fn mul_wide_halves(a: i32, b: i32) -> i64 {
    let (ah, al) = (a >> 16, a & 0xffff);
    let (bh, bl) = (b >> 16, b & 0xffff);
    let lo = (al as u32).wrapping_mul(bl as u32) as i64;
    let mid = (ah * bl) as i64 + (al * bh) as i64;
    (((ah * bh) as i64) << 32) + (mid << 16) + lo
}

/// `a as i64 * b as i64`. On Armv6-M (recognised as the Arm targets
/// without 32-bit compare-and-swap, which stable Rust can test; Armv8-M
/// Baseline has it and keeps the plain product) from
/// [`mul_wide_halves`]; the same integer everywhere (tested).
#[inline(always)]
pub(crate) fn mul_wide(a: i32, b: i32) -> i64 {
    if cfg!(all(target_arch = "arm", not(target_has_atomic = "32"))) {
        mul_wide_halves(a, b)
    } else {
        a as i64 * b as i64
    }
}

/// [`Requant::apply`] for a multiplier in `[0, 2^31)` and a shift in
/// `[-31, 62]` (what [`crate::quant::RowScales`] validates): the same
/// integer for every `acc`, in fewer instructions.
///
/// Why each step is exact (`p = acc * mult`, `neg = [acc < 0]`):
/// - `mult >= 0`, so `p < 0` only when `acc < 0`; and when `mult == 0`,
///   `p == 0` and subtracting `neg` below a positive rounding constant
///   leaves the floor at 0. So the sign of `acc` replaces the sign of the
///   64-bit product. `mult != i32::MIN`, so the saturating case of
///   [`mul_q31`] never occurs.
/// - Right shift (`shift >= 0`): `q = mul_q31(acc, mult)` lies in
///   `[-(2^31 - 1), 2^31 - 2]` (`|p| <= 2^31 (2^31 - 1)`, and the largest
///   positive product, `(2^31 - 1)^2`, rounds to `2^31 - 2`). Rounding `q`
///   by `s >= 1` places, half away from zero, is
///   `floor((q + 2^(s-1) - [q < 0]) / 2^s)`; with `y = q - [q < 0]` (no
///   overflow: `q > i32::MIN`) that is `((y >> (s - 1)) + 1) >> 1` by
///   nested floor division, and `+ 1` cannot overflow (`q <= 2^31 - 2`).
///   For `s >= 32` the result is 0 ([`round_shr`] gives -1 only for
///   `i32::MIN`, which `q` never is), and so is `((y >> 31) + 1) >> 1`, so
///   the shift clamps at 31.
/// - Left shift (`shift = -k`, `k` in `1..=31`, `r = 31 - k`): the one
///   rounding of `p / 2^r` half away from zero is
///   `floor((2p + 2^r - neg) / 2^(r+1))` for every `r >= 0` (for `r >= 1`
///   the half in `-neg/2` does not move the floor of an integer over
///   `2^r`; for `r = 0` it gives `p`), a 64-bit arithmetic shift by
///   `r + 1` in `1..=31`, then the `i32` saturation. `|2p| < 2^63`.
///
/// Tested against [`Requant::apply`] over the whole input range.
#[inline(always)]
pub(crate) fn requant_nonneg(acc: i32, mult: i32, shift: i32) -> i32 {
    let neg = acc >> 31; // -1 or 0
    if shift >= 0 {
        let q = ((mul_wide(acc, mult) + ((1 << 30) + neg) as i64) >> 31) as i32;
        round_shr_inner(q, shift as u32)
    } else {
        let n = (32 + shift) as u32 & 31; // r + 1, in 1..=31
                                          // 2^r - neg in 32 bits: r <= 30, so at most 2^30.
        let half = ((1u32 << ((n - 1) & 31)) as i32 + neg) as i64;
        let w = (mul_wide(acc, mult) << 1) + half;
        let (lo, hi) = (w as u32, (w >> 32) as i32);
        let v = ((lo >> n) | ((hi as u32) << (32 - n))) as i32;
        if hi >> n == v >> 31 {
            v
        } else if hi < 0 {
            i32::MIN
        } else {
            i32::MAX
        }
    }
}

/// [`mul_q31`] when `a >= 0` (a gate value, in `[0, 2^31)`): the same
/// integer. As in [`requant_nonneg`], the sign of `b` stands for the sign
/// of the product (`a == 0` gives 0 either way) and `a != i32::MIN`. The
/// result is in `[-(2^31 - 1), 2^31 - 2]`, the range
/// [`round_shr_inner`] needs.
#[inline(always)]
pub(crate) fn mul_q31_nonneg(a: i32, b: i32) -> i32 {
    ((mul_wide(a, b) + ((1 << 30) + (b >> 31)) as i64) >> 31) as i32
}

/// [`round_shr`] for `x` in `[-(2^31 - 1), 2^31 - 2]` and any `shift`
/// (the proof is in [`requant_nonneg`]): `((y >> (s - 1)) + 1) >> 1` with
/// `y = x - [x < 0]`, the shift clamped at 31.
#[inline(always)]
pub(crate) fn round_shr_inner(x: i32, shift: u32) -> i32 {
    if shift == 0 {
        x
    } else {
        let y = x + (x >> 31);
        let n = if shift > 32 { 31 } else { shift - 1 };
        ((y >> n) + 1) >> 1
    }
}

/// Converts a real value to the nearest integer of a fixed-point format with
/// `frac` fractional bits, ties away from zero, saturating to `i32` (host side).
pub fn to_fixed_i32(x: f64, frac: i32) -> i32 {
    let v = libm::round(x * libm::exp2(frac as f64));
    if v.is_nan() {
        0
    } else if v >= i32::MAX as f64 {
        i32::MAX
    } else if v <= i32::MIN as f64 {
        i32::MIN
    } else {
        v as i32
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Exact model of `round(v / 2^s)` with ties away from zero, in i128.
    fn exact_round_div_pow2(v: i128, s: u32) -> i128 {
        if s == 0 {
            return v;
        }
        let d = 1i128 << s;
        let mag = (v.abs() + d / 2) / d;
        if v < 0 {
            -mag
        } else {
            mag
        }
    }

    #[test]
    fn mul_q31_edge_cases() {
        // Jacob et al. 2018: the one overflowing case saturates.
        assert_eq!(mul_q31(i32::MIN, i32::MIN), i32::MAX);
        assert_eq!(mul_q31(i32::MIN, i32::MAX), -i32::MAX);
        assert_eq!(mul_q31(i32::MAX, i32::MAX), i32::MAX - 1);
        assert_eq!(mul_q31(0, i32::MIN), 0);
        // Ties: 1 * 2^30 / 2^31 = 0.5 -> 1, and -0.5 -> -1 (away from zero).
        assert_eq!(mul_q31(1, 1 << 30), 1);
        assert_eq!(mul_q31(-1, 1 << 30), -1);
        assert_eq!(mul_q31(3, 1 << 30), 2); // 1.5 -> 2
        assert_eq!(mul_q31(-3, 1 << 30), -2); // -1.5 -> -2
    }

    #[test]
    fn round_shr_edge_cases() {
        assert_eq!(round_shr(5, 1), 3);
        assert_eq!(round_shr(-5, 1), -3);
        assert_eq!(round_shr(4, 1), 2);
        assert_eq!(round_shr(-1, 1), -1);
        assert_eq!(round_shr(1, 1), 1);
        assert_eq!(round_shr(i32::MIN, 31), -1);
        assert_eq!(round_shr(i32::MAX, 31), 1);
        assert_eq!(round_shr(i32::MIN, 32), -1);
        assert_eq!(round_shr(i32::MAX, 32), 0);
        assert_eq!(round_shr(i32::MIN, 40), 0);
        assert_eq!(round_shr(7, 0), 7);
    }

    #[test]
    fn saturation_edges() {
        assert_eq!(sat_i16(40_000), i16::MAX);
        assert_eq!(sat_i16(-40_000), i16::MIN);
        assert_eq!(sat_i8(-129), i8::MIN);
        assert_eq!(sat_shl(1, 31), i32::MAX);
        assert_eq!(sat_shl(-1, 31), i32::MIN);
        assert_eq!(sat_shl(-1, 30), -(1 << 30));
        assert_eq!(sat_shl(1 << 20, 11), i32::MAX);
        assert_eq!(sat_shl(-(1 << 20), 11), i32::MIN);
        assert_eq!(sat_shl(-(1 << 20), 10), -(1 << 30));
        assert!(saturates_i16(32_768));
        assert!(!saturates_i16(-32_768));
    }

    #[test]
    fn from_real_round_trips() {
        for &s in &[1.0, 0.5, 0.75, 1e-6, 3.0e-12, 123.456, 0.999_999_999_9] {
            let rq = Requant::from_real(s).unwrap();
            assert!(rq.mult >= 1 << 30, "{s}: {rq:?}");
            let back = rq.to_real();
            assert!(((back - s) / s).abs() <= 1.0 / 2_147_483_648.0, "{s} -> {back}");
        }
        assert_eq!(Requant::ONE.to_real(), 1.0);
        assert_eq!(Requant::from_real(1.0).unwrap(), Requant::ONE);
        assert_eq!(Requant::from_real(0.0).unwrap().apply(12345), 0);
        assert_eq!(Requant::from_real(-1.0), Err(ScaleError::NotFinitePositive));
        assert_eq!(Requant::from_real(f64::NAN), Err(ScaleError::NotFinitePositive));
        assert_eq!(Requant::from_real(1e-30), Err(ScaleError::OutOfRange));
        assert_eq!(Requant::from_real(1e12), Err(ScaleError::OutOfRange));
    }

    #[test]
    fn to_fixed_matches_fixed_crate() {
        // Cross-check against the `fixed` crate's float-to-fixed conversion on
        // values that are not ties (where every round-to-nearest rule agrees).
        use fixed::types::I4F12;
        for i in -2000..2000 {
            let x = i as f64 * 0.003_7 + 0.000_01;
            let ours = to_fixed_i32(x, 12);
            let theirs = I4F12::saturating_from_num(x).to_bits() as i32;
            assert_eq!(ours, theirs, "x = {x}");
        }
        // And the Q0.15 format used for hidden states.
        use fixed::types::I1F15;
        for i in -1000..=1000 {
            let x = i as f64 / 1000.0 * 0.999;
            assert_eq!(to_fixed_i32(x, 15), I1F15::from_num(x).to_bits() as i32);
        }
        // Ties follow Lapwing's documented rule: half away from zero.
        assert_eq!(to_fixed_i32(2.5 / 4096.0, 12), 3);
        assert_eq!(to_fixed_i32(-2.5 / 4096.0, 12), -3);
        assert_eq!(to_fixed_i32(1e10, 12), i32::MAX);
        assert_eq!(to_fixed_i32(f64::NAN, 12), 0);
    }

    #[test]
    fn mul_q31_matches_fixed_crate() {
        // The `fixed` crate's I1F31 multiply truncates; compare within 1 LSB
        // and exactly against our own exact model.
        use fixed::types::I1F31;
        let vals = [i32::MIN + 1, -123_456_789, -1, 0, 1, 77, 1 << 30, 2_000_000_000];
        for &a in &vals {
            for &b in &vals {
                let theirs = (I1F31::from_bits(a).wrapping_mul(I1F31::from_bits(b))).to_bits();
                let ours = mul_q31(a, b);
                assert!((ours as i64 - theirs as i64).abs() <= 1, "{a} * {b}");
            }
        }
    }

    proptest! {
        #[test]
        fn mul_q31_is_exact_rounding(a in any::<i32>(), b in any::<i32>()) {
            let exact = exact_round_div_pow2(a as i128 * b as i128, 31);
            let exact = exact.clamp(i32::MIN as i128, i32::MAX as i128);
            prop_assert_eq!(mul_q31(a, b) as i128, exact);
        }

        #[test]
        fn round_shr_is_exact_rounding(x in any::<i32>(), s in 0u32..40) {
            prop_assert_eq!(round_shr(x, s) as i128, exact_round_div_pow2(x as i128, s));
        }

        #[test]
        fn sat_shl_matches_exact(x in any::<i32>(), s in 0u32..40) {
            let exact = (x as i128) << s.min(100);
            let exact = exact.clamp(i32::MIN as i128, i32::MAX as i128);
            prop_assert_eq!(sat_shl(x, s) as i128, exact);
        }

        #[test]
        fn requant_within_one_lsb(acc in any::<i32>(), scale_exp in -40i32..20, mant in 0.5f64..1.0) {
            // The Jacob et al. 2018 requantization rule against exact f64/i128 math.
            let scale = mant * libm::exp2(scale_exp as f64);
            let rq = Requant::from_real(scale).unwrap();
            let exact = acc as f64 * rq.to_real();
            let got = rq.apply(acc) as f64;
            let clamped = exact.clamp(i32::MIN as f64, i32::MAX as f64);
            prop_assert!((got - clamped).abs() <= 1.0, "acc {} scale {} got {} exact {}", acc, scale, got, exact);
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(8192))]
        #[test]
        fn requant_nonneg_matches_apply(acc in any::<i32>(), mult in 0i32..=i32::MAX, shift in -31i32..=62) {
            let rq = Requant { mult, shift };
            prop_assert_eq!(requant_nonneg(acc, mult, shift), rq.apply(acc));
        }

        #[test]
        fn mul_q31_nonneg_matches(a in prop_oneof![Just(0), Just(1), Just(i32::MAX), 0i32..=i32::MAX],
                                  b in prop_oneof![Just(i32::MIN), Just(-1), Just(0), Just(i32::MAX), any::<i32>()],
                                  s in 0u32..40) {
            prop_assert_eq!(mul_q31_nonneg(a, b), mul_q31(a, b));
            prop_assert_eq!(round_shr_inner(mul_q31_nonneg(a, b), s), round_shr(mul_q31(a, b), s));
        }

        #[test]
        fn mul_wide_halves_is_exact(
            a in prop_oneof![Just(i32::MIN), Just(i32::MAX), Just(-1), Just(0), Just(0xffff), Just(-0x10000), any::<i32>()],
            b in prop_oneof![Just(i32::MIN), Just(i32::MAX), Just(-1), Just(0), Just(0xffff), Just(-0x10000), any::<i32>()],
        ) {
            prop_assert_eq!(mul_wide_halves(a, b), a as i64 * b as i64);
            prop_assert_eq!(mul_wide(a, b), a as i64 * b as i64);
        }

        #[test]
        fn requant_nonneg_matches_apply_at_edges(
            acc in prop_oneof![Just(i32::MIN), Just(i32::MIN + 1), Just(-1), Just(0), Just(1), Just(i32::MAX), any::<i32>(), -(1i32 << 16)..(1 << 16)],
            // Multipliers with many trailing zeros make rounding ties common.
            mult in prop_oneof![Just(0), Just(1), Just(1 << 30), Just(i32::MAX), 0i32..=i32::MAX, (0i32..64).prop_map(|m| m << 25)],
            shift in prop_oneof![Just(-31), Just(-30), Just(-1), Just(0), Just(1), Just(31), Just(32), Just(33), Just(62), -31i32..=62],
        ) {
            prop_assert_eq!(requant_nonneg(acc, mult, shift), Requant { mult, shift }.apply(acc));
        }
    }
}
