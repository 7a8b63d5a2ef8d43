//! The built-in quantize-and-compare example: a seeded random LSTM
//! (X = 4, H = 32, one layer, head Y = 4) on a seeded random-walk signal,
//! calibrated on one stretch of data and compared on another.

use crate::calibrate::observe;
use crate::compare::{compare, Comparison};
use crate::quantize::{quantize, QuantOptions};
use crate::synth::{random_model, random_walk, ModelSpec};
use anyhow::Result;

/// The example's model shape.
pub const SPEC: ModelSpec = ModelSpec { input: 4, hidden: 32, layers: 1, output: Some(4), gain: 1.0 };

/// Runs the example: calibrate on `calib_steps`, compare over `steps`.
///
/// # Errors
/// Propagates quantizer and comparison errors.
pub fn run(opts: &QuantOptions, calib_steps: usize, steps: usize) -> Result<Comparison> {
    let model = random_model(&SPEC, 2026);
    let calib = random_walk(SPEC.input, calib_steps, 1);
    let ranges = observe(&model, &calib)?;
    let q = quantize(&model, &ranges, opts)?;
    compare(&model, &q, &random_walk(SPEC.input, steps, 2))
}
