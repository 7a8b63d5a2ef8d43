//! The built-in quantize-and-report example: a seeded random LSTM
//! (X = 4, H = 32, one layer, head Y = 4) on a seeded random-walk signal,
//! calibrated on one stretch of data and reported on another. Invented
//! data, used until the demo scenario exists.

use crate::calibrate::observe;
use crate::quantize::{quantize, QuantOptions};
use crate::report::{report_quantized, Report, ReportOptions};
use crate::synth::{random_model, random_walk, ModelSpec};
use anyhow::Result;

/// Calibration steps: long enough that the compared stretch stays inside
/// the calibrated ranges plus headroom (3,000 steps were not: inputs then
/// saturated and hidden SQNR fell from 49 to 43 dB).
pub const CALIB_STEPS: usize = 20_000;

/// The example's model shape.
pub const SPEC: ModelSpec = ModelSpec { input: 4, hidden: 32, layers: 1, output: Some(4), gain: 1.0 };

/// Runs the example: calibrate on `calib_steps`, report over `steps`.
///
/// # Errors
/// Propagates quantizer and report errors.
pub fn run(opts: &QuantOptions, calib_steps: usize, steps: usize) -> Result<Report> {
    let model = random_model(&SPEC, 2026);
    let calib = random_walk(SPEC.input, calib_steps, 1);
    let ranges = observe(&model, &calib)?;
    let q = quantize(&model, &ranges, opts)?;
    report_quantized(&model, &q, &random_walk(SPEC.input, steps, 2), &ReportOptions::default())
}
