//! Seeded random models and signals (ChaCha8, reproducible across runs and
//! versions) for tests, the built-in example and benchmarks. Invented data:
//! never a claim about real machines.

use crate::float_model::{FloatHeadData, FloatLayerData, FloatModelData};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Shape of a random model.
#[derive(Clone, Copy, Debug)]
pub struct ModelSpec {
    /// Input features X.
    pub input: usize,
    /// Hidden units H (all layers).
    pub hidden: usize,
    /// Stacked layers.
    pub layers: usize,
    /// Head outputs Y, or no head.
    pub output: Option<usize>,
    /// Multiplier on the usual `U(-1/sqrt(H), 1/sqrt(H))` initialisation.
    pub gain: f32,
}

/// A random, well-conditioned LSTM: weights `U(-g/sqrt(H), g/sqrt(H))`,
/// forget-gate bias raised by 1 (common practice for trained LSTMs).
pub fn random_model(spec: &ModelSpec, seed: u64) -> FloatModelData {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let k = spec.gain / (spec.hidden as f32).sqrt();
    let uni = |n: usize, rng: &mut ChaCha8Rng| (0..n).map(|_| rng.random_range(-k..k)).collect::<Vec<f32>>();
    let mut layers = Vec::new();
    for l in 0..spec.layers {
        let input = if l == 0 { spec.input } else { spec.hidden };
        let h = spec.hidden;
        let w_x = uni(4 * h * input, &mut rng);
        let w_h = uni(4 * h * h, &mut rng);
        let mut b = uni(4 * h, &mut rng);
        for v in &mut b[h..2 * h] {
            *v += 1.0;
        }
        layers.push(FloatLayerData { input, hidden: h, w_x, w_h, b });
    }
    let head = spec.output.map(|y| FloatHeadData {
        input: spec.hidden,
        output: y,
        w: uni(y * spec.hidden, &mut rng),
        b: uni(y, &mut rng),
    });
    FloatModelData { layers, head }
}

/// A mean-reverting random walk per feature plus a slow sine, roughly in
/// `[-2, 2]`: `T` rows of `X` values.
pub fn random_walk(features: usize, steps: usize, seed: u64) -> Vec<Vec<f32>> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut level = vec![0.0f32; features];
    let phase: Vec<f32> = (0..features).map(|_| rng.random_range(0.0..std::f32::consts::TAU)).collect();
    (0..steps)
        .map(|t| {
            level
                .iter_mut()
                .zip(&phase)
                .map(|(v, p)| {
                    *v = 0.98 * *v + rng.random_range(-0.15f32..0.15);
                    *v + 0.8 * (t as f32 * 0.05 + p).sin()
                })
                .collect()
        })
        .collect()
}

/// A stationary, bounded signal per feature: three sines of seeded
/// frequencies and phases plus uniform noise, peak at most 1.6. Unlike
/// [`random_walk`], a long stretch never leaves the range a shorter
/// calibration stretch has seen, so it isolates quantization error from
/// input clipping.
pub fn sine_mix(features: usize, steps: usize, seed: u64) -> Vec<Vec<f32>> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let parts: Vec<[(f32, f32, f32); 3]> = (0..features)
        .map(|_| {
            std::array::from_fn(|i| {
                let freq = rng.random_range(0.005f32..0.2) / (1 + i) as f32;
                (0.5 / (1 + i) as f32, freq, rng.random_range(0.0..std::f32::consts::TAU))
            })
        })
        .collect();
    (0..steps)
        .map(|t| {
            parts
                .iter()
                .map(|p| {
                    let tone: f32 = p.iter().map(|(a, f, ph)| a * (t as f32 * f + ph).sin()).sum();
                    tone + rng.random_range(-0.1f32..0.1)
                })
                .collect()
        })
        .collect()
}
