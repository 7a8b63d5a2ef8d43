//! Error metrics between a reference signal and a test signal.

/// Summary of `test` against `reference`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ErrorStats {
    /// Largest |reference - test|.
    pub max_abs: f64,
    /// Root mean square of the difference.
    pub rmse: f64,
    /// Signal-to-quantization-noise ratio in dB:
    /// `10 log10(sum ref^2 / sum (ref - test)^2)`; infinite when equal.
    pub sqnr_db: f64,
    /// Cosine similarity of the two signals (1 when identical in direction).
    pub cosine: f64,
    /// Values compared.
    pub count: usize,
}

/// Running accumulator for [`ErrorStats`].
///
/// ```
/// use lapwing_tools::metrics::ErrorAcc;
/// let mut acc = ErrorAcc::default();
/// acc.add_all(&[1.0, -1.0], &[0.9, -1.1]);
/// let s = acc.stats();
/// // signal 2, noise 0.02: 10 log10(100) = 20 dB.
/// assert!((s.sqnr_db - 20.0).abs() < 1e-4);
/// ```
#[derive(Clone, Copy, Debug, Default)]
pub struct ErrorAcc {
    sig: f64,
    noise: f64,
    test_sq: f64,
    cross: f64,
    max_abs: f64,
    count: usize,
}

impl ErrorAcc {
    /// Adds one pair of values.
    pub fn add(&mut self, reference: f64, test: f64) {
        let d = reference - test;
        self.sig += reference * reference;
        self.noise += d * d;
        self.test_sq += test * test;
        self.cross += reference * test;
        self.max_abs = self.max_abs.max(d.abs());
        self.count += 1;
    }

    /// Adds pairs from two slices.
    pub fn add_all(&mut self, reference: &[f32], test: &[f32]) {
        for (r, t) in reference.iter().zip(test) {
            self.add(*r as f64, *t as f64);
        }
    }

    /// The statistics so far.
    pub fn stats(&self) -> ErrorStats {
        let n = self.count.max(1) as f64;
        let sqnr_db = if self.noise == 0.0 { f64::INFINITY } else { 10.0 * (self.sig / self.noise).log10() };
        let denom = (self.sig * self.test_sq).sqrt();
        let cosine = if denom == 0.0 {
            if self.noise == 0.0 {
                1.0
            } else {
                0.0
            }
        } else {
            self.cross / denom
        };
        ErrorStats { max_abs: self.max_abs, rmse: (self.noise / n).sqrt(), sqnr_db, cosine, count: self.count }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hand_computed_values() {
        let mut a = ErrorAcc::default();
        a.add_all(&[3.0, 4.0], &[3.0, 3.0]);
        let s = a.stats();
        // noise = 1, signal = 25: SQNR = 10 log10(25) = 13.979 dB; RMSE = sqrt(1/2).
        assert!((s.sqnr_db - 13.979_400_086_720_377).abs() < 1e-9);
        assert!((s.rmse - 0.5f64.sqrt()).abs() < 1e-12);
        assert_eq!(s.max_abs, 1.0);
        // cosine = (9 + 12) / (5 * sqrt(18)).
        assert!((s.cosine - 21.0 / (5.0 * 18f64.sqrt())).abs() < 1e-12);
    }

    #[test]
    fn sine_quantization_noise_formula() {
        // Common practice (any DSP textbook): a full-scale sine quantized
        // uniformly to N bits has SQNR = 6.02 N + 1.76 dB.
        // The sine peaks at the largest code, 2^(N-1) - 1 steps (not clipped),
        // which lowers the formula by 20 log10((2^(N-1) - 1) / 2^(N-1)) dB.
        for bits in [8u32, 12, 16] {
            let peak = ((1u64 << (bits - 1)) - 1) as f64;
            let mut a = ErrorAcc::default();
            for t in 0..200_000 {
                let x = (t as f64 * 0.012_345_678).sin();
                let q = (x * peak).round() / peak;
                a.add(x, q);
            }
            let expected = 6.02 * bits as f64 + 1.76 + 20.0 * (peak / (peak + 1.0)).log10();
            let got = a.stats().sqnr_db;
            assert!((got - expected).abs() < 0.2, "{bits} bits: {got} dB vs {expected} dB");
        }
    }
}
