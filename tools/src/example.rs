//! The built-in quantize-and-compare example: a seeded random LSTM
//! (X = 4, H = 32, one layer, head Y = 4) on a seeded random-walk signal,
//! calibrated on one stretch of data and compared on another. Invented
//! data, used until the demo scenario exists.

use crate::calibrate::observe;
use crate::compare::{compare, Comparison};
use crate::metrics::ErrorStats;
use crate::quantize::{quantize, QuantOptions};
use crate::synth::{random_model, random_walk, ModelSpec};
use anyhow::Result;
use serde::Serialize;
use std::fmt::Write as _;

/// Calibration steps: long enough that the compared stretch stays inside
/// the calibrated ranges plus headroom (3,000 steps were not: inputs then
/// saturated and hidden SQNR fell from 49 to 43 dB).
pub const CALIB_STEPS: usize = 20_000;

/// The example's model shape.
pub const SPEC: ModelSpec = ModelSpec { input: 4, hidden: 32, layers: 1, output: Some(4), gain: 1.0 };

/// Runs the example: calibrate on `calib_steps`, compare over `steps`.
///
/// # Errors
/// Propagates quantizer and comparison errors.
pub fn run(opts: &QuantOptions, calib_steps: usize, steps: usize) -> Result<(Comparison, Footprint)> {
    let model = random_model(&SPEC, 2026);
    let calib = random_walk(SPEC.input, calib_steps, 1);
    let ranges = observe(&model, &calib)?;
    let q = quantize(&model, &ranges, opts)?;
    let view = q.view()?;
    let footprint = Footprint {
        weight_bytes: view.layers().iter().map(|l| l.weight_bytes()).sum::<usize>()
            + view.head().map_or(0, |h| h.weight_bytes()),
        table_bytes: opts.table.table().flash_bytes(),
        state_bytes: 2 * view.state_words(),
        macs_per_step: view.macs_per_step(),
    };
    Ok((compare(&model, &q, &random_walk(SPEC.input, steps, 2))?, footprint))
}

/// Memory and work of the quantized example model.
#[derive(Clone, Copy, Debug, Serialize)]
pub struct Footprint {
    /// Weights, biases and requantization pairs.
    pub weight_bytes: usize,
    /// Activation table.
    pub table_bytes: usize,
    /// Caller-owned state (hidden, cell, scratch).
    pub state_bytes: usize,
    /// Multiply-accumulates per step.
    pub macs_per_step: usize,
}

/// One tensor's figures in the summary.
#[derive(Clone, Debug, Serialize)]
pub struct TensorRow {
    /// `output`, `layer0.hidden`, `layer0.gate.f`, ...
    pub name: String,
    /// Largest absolute error.
    pub max_abs: f64,
    /// Root mean square error.
    pub rmse: f64,
    /// SQNR in dB.
    pub sqnr_db: f64,
    /// Cosine similarity.
    pub cosine: f64,
}

impl TensorRow {
    fn new(name: String, s: &ErrorStats) -> Self {
        TensorRow { name, max_abs: s.max_abs, rmse: s.rmse, sqnr_db: s.sqnr_db, cosine: s.cosine }
    }
}

/// What `lapwing demo` prints.
#[derive(Clone, Debug, Serialize)]
pub struct Summary {
    /// Scheme name, e.g. `w8a16-c16-standard`.
    pub scheme: String,
    /// Steps compared.
    pub steps: usize,
    /// Footprint.
    pub footprint: Footprint,
    /// Per-tensor error figures.
    pub tensors: Vec<TensorRow>,
}

/// Runs the example and gathers a printable summary.
///
/// # Errors
/// As [`run`].
pub fn summarize(opts: &QuantOptions, calib_steps: usize, steps: usize) -> Result<Summary> {
    let (cmp, footprint) = run(opts, calib_steps, steps)?;
    let mut tensors = vec![TensorRow::new("output".into(), &cmp.output)];
    for (k, h) in cmp.hidden.iter().enumerate() {
        tensors.push(TensorRow::new(format!("layer{k}.hidden"), h));
        tensors.push(TensorRow::new(format!("layer{k}.cell"), &cmp.cell[k]));
        for (g, name) in cmp.gates[k].iter().zip(["i", "f", "g", "o"]) {
            tensors.push(TensorRow::new(format!("layer{k}.gate.{name}"), g));
        }
    }
    Ok(Summary {
        scheme: format!("{}-{}-{}", opts.scheme.name(), opts.cell.name(), opts.table.name()),
        steps: cmp.steps,
        footprint,
        tensors,
    })
}

impl Summary {
    /// A terminal table.
    pub fn to_table(&self) -> String {
        let mut s = String::new();
        let f = &self.footprint;
        let _ = writeln!(
            s,
            "Built-in example (random LSTM X=4 H=32 + head Y=4), scheme {}, {} steps vs the float reference",
            self.scheme, self.steps
        );
        let _ = writeln!(
            s,
            "flash: {} B weights + {} B activation table; RAM: {} B state; {} MACs per step\n",
            f.weight_bytes, f.table_bytes, f.state_bytes, f.macs_per_step
        );
        let _ = writeln!(s, "{:<16} {:>10} {:>10} {:>10} {:>10}", "tensor", "max abs", "RMSE", "SQNR dB", "cosine");
        for t in &self.tensors {
            let _ = writeln!(
                s,
                "{:<16} {:>10.2e} {:>10.2e} {:>10.1} {:>10.6}",
                t.name, t.max_abs, t.rmse, t.sqnr_db, t.cosine
            );
        }
        s
    }
}
