//! Streaming fixed-point anomaly detection on the prediction residual of a
//! next-step predictor (DESIGN.md section 7).
//!
//! Per step `t`, with device inputs `x[t]` (int16) and the model's previous
//! outputs `y[t-1]` (int16, its prediction of `x[t]`):
//! 1. **Residual**, normalized per feature by the calibrated spread:
//!    `z_i = x_i * a_i - y_i * b_i` with `a_i = s_x,i / spread_i` and
//!    `b_i = s_y,i / spread_i` held as requantization multipliers, giving
//!    `z_i` with [`Z_FRAC`] fractional bits (saturated to `|z| < 2^7`
//!    standard units).
//! 2. **Score** `sum z_i^2`, exact in `i64`, kept with [`SCORE_FRAC`]
//!    fractional bits in a `u32` (saturating).
//! 3. **Smoothing**: shift-based EWMA, `s += round((score - s) / 2^k)`.
//! 4. **Decision**: a sample *exceeds* when `s > raise`; the alarm raises
//!    when at least `k_of` of the last `n` samples exceeded, and clears when
//!    none of the last `n` samples was above the lower `clear` level
//!    (hysteresis).
//!
//! The first `warmup` steps only update the smoothing (the model's state is
//! still settling and `y[t-1]` does not exist at `t = 0`): they never
//! exceed.
//!
//! Parameters come from the blob ([`crate::model::Blob::detector`]); the
//! state is caller-owned ([`DetectorState`], fits in a `static`).

use crate::fixed_point::Requant;
use crate::Error;
use heapless::Deque;

/// Fractional bits of the normalized residual `z`.
pub const Z_FRAC: u32 = 12;
/// Fractional bits of the score and the smoothed score.
pub const SCORE_FRAC: u32 = 16;
/// Longest decision window `n`.
pub const MAX_WINDOW: usize = 64;
/// Largest |z| kept (in `Z_FRAC` units): 128 standard units.
const Z_MAX: i64 = (128 << Z_FRAC) - 1;

/// Detector parameters, validated (see [`Detector::new`]).
#[derive(Clone, Copy, Debug)]
pub struct Detector<'a> {
    /// Interleaved per-feature `(a_mult, a_shift, b_mult, b_shift)`.
    scales: &'a [i32],
    features: usize,
    warmup: u32,
    ewma_shift: u8,
    k_of: u8,
    window: u8,
    raise: u32,
    clear: u32,
}

/// What one update decided.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub struct Decision {
    /// This step's score (`SCORE_FRAC` fractional bits).
    pub score: u32,
    /// The smoothed score.
    pub smoothed: u32,
    /// Whether the smoothed score is above the raise level.
    pub exceeds: bool,
    /// Whether the alarm is on after this step.
    pub alarm: bool,
}

/// Caller-owned detector state: smoothed score, decision history, alarm.
#[derive(Clone, Debug)]
pub struct DetectorState {
    smoothed: u32,
    steps: u32,
    alarm: bool,
    /// Per past sample: bit 0 above raise, bit 1 above clear.
    history: Deque<u8, MAX_WINDOW>,
    above_raise: u8,
    above_clear: u8,
}

impl DetectorState {
    /// The initial state (no alarm, nothing seen).
    pub const fn new() -> Self {
        DetectorState { smoothed: 0, steps: 0, alarm: false, history: Deque::new(), above_raise: 0, above_clear: 0 }
    }

    /// Back to the initial state.
    pub fn reset(&mut self) {
        *self = DetectorState::new();
    }

    /// Whether the alarm is on.
    pub fn alarm(&self) -> bool {
        self.alarm
    }
}

impl Default for DetectorState {
    fn default() -> Self {
        Self::new()
    }
}

fn scale(mult: i32, shift: i32, v: i32) -> i64 {
    Requant { mult, shift }.apply(v) as i64
}

impl<'a> Detector<'a> {
    /// A detector for `features` features.
    ///
    /// - `scales`: `[features, 4]` interleaved `(a_mult, a_shift, b_mult,
    ///   b_shift)`: requantizations taking the input and the prediction to
    ///   standard units with `Z_FRAC` fractional bits;
    /// - `warmup`: steps that never exceed;
    /// - `ewma_shift`: smoothing `s += (score - s) / 2^ewma_shift` (0..=15);
    /// - `k_of` of the last `window` samples raise the alarm
    ///   (`1 <= k_of <= window <= MAX_WINDOW`);
    /// - `raise`, `clear`: levels of the smoothed score (`clear <= raise`).
    ///
    /// # Errors
    /// [`Error::Shape`] for a wrong `scales` length; [`Error::Format`] for a
    /// parameter out of range.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        features: usize,
        scales: &'a [i32],
        warmup: u32,
        ewma_shift: u8,
        k_of: u8,
        window: u8,
        raise: u32,
        clear: u32,
    ) -> Result<Self, Error> {
        let need = features.checked_mul(4).ok_or(Error::Shape { what: "detector scales", expected: 0, got: 0 })?;
        if scales.len() != need || features == 0 {
            return Err(Error::Shape { what: "detector scales", expected: need, got: scales.len() });
        }
        for q in scales.chunks_exact(4) {
            if let [am, ash, bm, bsh] = q {
                if *am < 0 || *bm < 0 {
                    return Err(Error::Format { what: "detector multiplier", value: (*am).min(*bm) });
                }
                if let Some(s) = [*ash, *bsh].into_iter().find(|s| !(-31..=62).contains(s)) {
                    return Err(Error::Format { what: "detector shift", value: s });
                }
            }
        }
        if ewma_shift > 15 {
            return Err(Error::Format { what: "detector EWMA shift", value: ewma_shift as i32 });
        }
        if window == 0 || window as usize > MAX_WINDOW {
            return Err(Error::Format { what: "detector window", value: window as i32 });
        }
        if k_of == 0 || k_of > window {
            return Err(Error::Format { what: "detector k of n", value: k_of as i32 });
        }
        if clear > raise {
            return Err(Error::Format { what: "detector clear level above raise level", value: clear as i32 });
        }
        Ok(Detector { scales, features, warmup, ewma_shift, k_of, window, raise, clear })
    }

    /// Features (inputs of the model, and outputs of its head).
    pub fn features(&self) -> usize {
        self.features
    }

    /// The interleaved per-feature `(a_mult, a_shift, b_mult, b_shift)`.
    pub fn scales(&self) -> &'a [i32] {
        self.scales
    }

    /// `(warmup, ewma_shift, k_of, window, raise, clear)`.
    pub fn settings(&self) -> (u32, u8, u8, u8, u32, u32) {
        (self.warmup, self.ewma_shift, self.k_of, self.window, self.raise, self.clear)
    }

    /// The score of `x` against the prediction `y_prev`, without updating
    /// anything.
    ///
    /// # Errors
    /// [`Error::InputSize`] / [`Error::OutputSize`] for wrong lengths.
    pub fn score(&self, x: &[i16], y_prev: &[i16]) -> Result<u32, Error> {
        if x.len() != self.features {
            return Err(Error::InputSize { expected: self.features, got: x.len() });
        }
        if y_prev.len() != self.features {
            return Err(Error::OutputSize { expected: self.features, got: y_prev.len() });
        }
        let mut sum: u64 = 0;
        for ((xi, yi), q) in x.iter().zip(y_prev).zip(self.scales.chunks_exact(4)) {
            if let [am, ash, bm, bsh] = q {
                let z = (scale(*am, *ash, *xi as i32) - scale(*bm, *bsh, *yi as i32)).clamp(-Z_MAX, Z_MAX);
                sum = sum.saturating_add((z * z) as u64);
            }
        }
        // z^2 has 2 * Z_FRAC fractional bits; keep SCORE_FRAC, rounding.
        let drop = 2 * Z_FRAC - SCORE_FRAC;
        let s = (sum + (1 << (drop - 1))) >> drop;
        Ok(s.min(u32::MAX as u64) as u32)
    }

    /// One step: the input `x[t]` and the model's previous output
    /// `y_prev = y[t-1]` (ignored during warm-up; pass anything of the right
    /// length at `t = 0`).
    ///
    /// # Errors
    /// As [`Detector::score`]; the state is unchanged then.
    pub fn update(&self, st: &mut DetectorState, x: &[i16], y_prev: &[i16]) -> Result<Decision, Error> {
        let score = self.score(x, y_prev)?;
        let warm = st.steps < self.warmup;
        st.steps = st.steps.saturating_add(1);
        if warm {
            return Ok(Decision { score, smoothed: st.smoothed, exceeds: false, alarm: st.alarm });
        }
        // EWMA with a rounding shift, in i64 (no overflow for u32 operands).
        let diff = score as i64 - st.smoothed as i64;
        let k = self.ewma_shift as u32;
        let step = if k == 0 {
            diff
        } else {
            let half = 1i64 << (k - 1);
            if diff >= 0 {
                (diff + half) >> k
            } else {
                -((half - diff) >> k)
            }
        };
        st.smoothed = (st.smoothed as i64 + step).clamp(0, u32::MAX as i64) as u32;
        let exceeds = st.smoothed > self.raise;
        let flags = u8::from(exceeds) | (u8::from(st.smoothed > self.clear) << 1);
        if st.history.len() >= self.window as usize {
            if let Some(old) = st.history.pop_front() {
                st.above_raise = st.above_raise.saturating_sub(old & 1);
                st.above_clear = st.above_clear.saturating_sub((old >> 1) & 1);
            }
        }
        // Cannot fail: the window is at most MAX_WINDOW and one was popped.
        let _ = st.history.push_back(flags);
        st.above_raise = st.above_raise.saturating_add(flags & 1);
        st.above_clear = st.above_clear.saturating_add((flags >> 1) & 1);
        if !st.alarm && st.above_raise >= self.k_of {
            st.alarm = true;
        } else if st.alarm && st.above_clear == 0 {
            st.alarm = false;
        }
        Ok(Decision { score, smoothed: st.smoothed, exceeds, alarm: st.alarm })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Unit scales: a = b = 1.0 * 2^Z_FRAC per device unit.
    fn unit_scales() -> [i32; 8] {
        let rq = Requant::from_real((1u32 << Z_FRAC) as f64).unwrap();
        [rq.mult, rq.shift, rq.mult, rq.shift, rq.mult, rq.shift, rq.mult, rq.shift]
    }

    #[test]
    fn score_is_the_sum_of_squared_residuals() {
        let s = unit_scales();
        let d = Detector::new(2, &s, 0, 0, 1, 1, 10 << SCORE_FRAC, 5 << SCORE_FRAC).unwrap();
        // Residuals 3 and -4: 9 + 16 = 25.
        assert_eq!(d.score(&[5, 0], &[2, 4]).unwrap(), 25 << SCORE_FRAC);
        // Saturation of z at 128 units: (127.99)^2 * 2 fits u32 with 16 bits.
        let big = d.score(&[32_767, -32_768], &[-32_768, 32_767]).unwrap();
        assert_eq!(big as i64, (2 * Z_MAX * Z_MAX + (1 << 7)) >> 8);
    }

    #[test]
    fn k_of_n_raises_and_hysteresis_clears() {
        let s = unit_scales();
        // Raise above 4, clear below 1; 2 of the last 3 samples; no smoothing.
        let d = Detector::new(2, &s, 0, 0, 2, 3, 4 << SCORE_FRAC, 1 << SCORE_FRAC).unwrap();
        let mut st = DetectorState::new();
        let mut run = |r: i16| d.update(&mut st, &[r, 0], &[0, 0]).unwrap().alarm;
        assert!(!run(3)); // 9 > 4: one exceed of the last three
        assert!(run(3)); // two of three: alarm
        assert!(run(0)); // below clear, but the window still holds a sample above it
        assert!(run(0));
        assert!(!run(1)); // score 1 is not above the clear level: three quiet samples clear it
        assert!(!run(3)); // raising again takes two of three
        assert!(run(3));
    }

    #[test]
    fn warmup_never_exceeds_and_ewma_rounds() {
        let s = unit_scales();
        let d = Detector::new(2, &s, 2, 1, 1, 1, 0, 0).unwrap();
        let mut st = DetectorState::new();
        assert!(!d.update(&mut st, &[9, 0], &[0, 0]).unwrap().exceeds);
        assert!(!d.update(&mut st, &[9, 0], &[0, 0]).unwrap().exceeds);
        let dec = d.update(&mut st, &[1, 0], &[0, 0]).unwrap();
        // s = 0 + round((1 - 0) / 2) in score units (2^16 / 2 = 2^15).
        assert_eq!(dec.smoothed, 1 << (SCORE_FRAC - 1));
        assert!(dec.exceeds && dec.alarm);
    }

    #[test]
    fn bad_parameters_are_errors() {
        let s = unit_scales();
        assert!(Detector::new(3, &s, 0, 0, 1, 1, 0, 0).is_err());
        assert!(Detector::new(2, &s, 0, 16, 1, 1, 0, 0).is_err());
        assert!(Detector::new(2, &s, 0, 0, 0, 1, 0, 0).is_err());
        assert!(Detector::new(2, &s, 0, 0, 2, 1, 0, 0).is_err());
        assert!(Detector::new(2, &s, 0, 0, 1, 65, 0, 0).is_err());
        assert!(Detector::new(2, &s, 0, 0, 1, 1, 1, 2).is_err());
        let d = Detector::new(2, &s, 0, 0, 1, 1, 0, 0).unwrap();
        assert!(d.score(&[1], &[0, 0]).is_err());
        assert!(d.update(&mut DetectorState::new(), &[1, 1], &[0]).is_err());
    }
}
