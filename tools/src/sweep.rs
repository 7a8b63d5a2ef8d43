//! Precision sweep: quantize one float model with every scheme, cell width,
//! activation table and weight rounding, report each on the same data, and
//! recommend the smallest configuration (flash + RAM) that meets the budget.

use crate::budget::Budget;
use crate::calibrate::Ranges;
use crate::float_model::FloatModelData;
use crate::quantize::QuantOptions;
use crate::report::{report_quantized, Report, ReportOptions};
use crate::rounding::{quantize_data_aware, Rounding, RoundingOptions};
use anyhow::{Context, Result};
use lapwing::activation::TableKind;
use lapwing::quant::{CellWidth, Scheme};
use serde::Serialize;
use std::fmt::Write as _;

/// Every configuration the sweep tries, in order.
pub fn configurations(headroom: f32) -> Vec<QuantOptions> {
    let mut v = Vec::new();
    for scheme in Scheme::ALL {
        for cell in [CellWidth::C16, CellWidth::C32] {
            for table in [TableKind::Compact, TableKind::Standard] {
                v.push(QuantOptions { scheme, cell, table, headroom });
            }
        }
    }
    v
}

/// Instructions per step, estimated without running the firmware: two per
/// multiply-accumulate, 40 per gate row (two requantizations, bias,
/// saturation) and 80 per unit (four table lookups, the cell and hidden
/// update). A rough model for ranking only; emulated measurements replace
/// it once the firmware measurement exists.
pub fn estimated_instructions(macs: usize, gate_rows: usize, units: usize) -> usize {
    2 * macs + 40 * gate_rows + 80 * units
}

/// One configuration's figures.
#[derive(Clone, Debug, Serialize)]
pub struct SweepRow {
    /// Weight rounding (`nearest` or `compensated`).
    pub rounding: String,
    /// `w8a16-c16-standard`, ...
    pub scheme: String,
    /// Model data in flash (blob + activation table).
    pub flash_bytes: usize,
    /// State RAM.
    pub ram_bytes: usize,
    /// Multiply-accumulates per step.
    pub macs_per_step: usize,
    /// Instructions per step: an estimate (see [`estimated_instructions`]).
    pub instructions_per_step_estimate: usize,
    /// Head output SQNR, dB.
    pub output_sqnr_db: f64,
    /// Worst layer's hidden-state SQNR, dB.
    pub hidden_sqnr_db: f64,
    /// Output drift (first tenth minus last tenth SQNR), dB.
    pub drift_db: f64,
    /// Largest saturation rate over all tensors.
    pub saturation_rate: f64,
    /// Whether it meets the budget (true when there is no budget).
    pub within_budget: bool,
    /// Budget violations, one message each; or why the configuration
    /// could not be built.
    pub violations: Vec<String>,
    /// False when the configuration cannot be built (e.g. an int8 row that
    /// could overflow); its figures are then zero.
    pub feasible: bool,
}

/// The sweep's result.
#[derive(Clone, Debug, Serialize)]
pub struct Sweep {
    /// Steps each configuration was reported on.
    pub steps: usize,
    /// Whether a budget was checked.
    pub budget_checked: bool,
    /// One row per configuration.
    pub rows: Vec<SweepRow>,
    /// Index into `rows` of the recommendation: the smallest flash + RAM
    /// within budget (ties: higher output SQNR); `None` when none passes.
    pub recommended: Option<usize>,
}

fn row_of(r: &Report, budget: Option<&Budget>) -> Result<SweepRow> {
    let hidden =
        r.tensors.iter().filter(|(n, _)| n.ends_with(".hidden")).map(|(_, t)| t.sqnr_db).fold(f64::INFINITY, f64::min);
    let saturation = r.tensors.values().map(|t| t.saturation_rate).fold(0.0, f64::max);
    let (within, violations) = match budget {
        Some(b) => {
            let res = b.check(r)?;
            (res.passed, res.violations.into_iter().map(|v| v.message).collect())
        }
        None => (true, Vec::new()),
    };
    Ok(SweepRow {
        rounding: String::new(),
        scheme: r.scheme.clone(),
        flash_bytes: r.footprint.flash_bytes,
        ram_bytes: r.footprint.ram_bytes,
        macs_per_step: r.footprint.macs_per_step,
        instructions_per_step_estimate: 0,
        output_sqnr_db: r.tensors.get("output").map_or(f64::NAN, |t| t.sqnr_db),
        hidden_sqnr_db: hidden,
        drift_db: r.drift.get("output").map_or(f64::NAN, |d| d.drift_db),
        saturation_rate: saturation,
        within_budget: within,
        violations,
        feasible: true,
    })
}

/// What the sweep is given besides the model.
pub struct SweepInput<'a> {
    /// One calibration of the model.
    pub ranges: &'a Ranges,
    /// The calibration rows (needed by data-aware rounding; may be empty
    /// when `roundings` is only [`Rounding::Nearest`]).
    pub calib_rows: &'a [Vec<f32>],
    /// Every configuration is reported on these rows.
    pub rows: &'a [Vec<f32>],
    /// Headroom factor above the calibrated ranges.
    pub headroom: f32,
    /// The weight roundings to try (each with every scheme, cell, table).
    pub roundings: &'a [Rounding],
    /// Rows within it are marked, the smallest recommended.
    pub budget: Option<&'a Budget>,
}

/// How many configurations [`sweep`] tries for `roundings`.
pub fn count(headroom: f32, roundings: &[Rounding]) -> usize {
    configurations(headroom).len() * roundings.len()
}

/// Runs the sweep. `progress` is called after each configuration with
/// (done, total).
///
/// # Errors
/// A configuration that cannot be reported, or a budget that cannot be
/// checked. A configuration that cannot be quantized is a row saying why.
pub fn sweep(model: &FloatModelData, input: &SweepInput<'_>, mut progress: impl FnMut(usize, usize)) -> Result<Sweep> {
    let configs = configurations(input.headroom);
    let total = configs.len() * input.roundings.len();
    let units: usize = model.layers.iter().map(|l| l.hidden).sum();
    let mut out = Vec::with_capacity(total);
    for rounding in input.roundings {
        let ropts = RoundingOptions { rounding: *rounding, ..Default::default() };
        for opts in &configs {
            let name = format!("{}-{}-{}", opts.scheme.name(), opts.cell.name(), opts.table.name());
            let q = match quantize_data_aware(model, input.ranges, opts, &ropts, input.calib_rows) {
                Ok(q) => q,
                Err(e) => {
                    // Not buildable in this scheme: a row saying why, not an abort.
                    out.push(SweepRow {
                        rounding: rounding.name().to_string(),
                        scheme: name,
                        flash_bytes: 0,
                        ram_bytes: 0,
                        macs_per_step: 0,
                        instructions_per_step_estimate: 0,
                        output_sqnr_db: f64::NAN,
                        hidden_sqnr_db: f64::NAN,
                        drift_db: f64::NAN,
                        saturation_rate: f64::NAN,
                        within_budget: false,
                        violations: vec![format!("cannot be built: {e:#}")],
                        feasible: false,
                    });
                    progress(out.len(), total);
                    continue;
                }
            };
            let r = report_quantized(model, &q, input.rows, &ReportOptions::default())
                .with_context(|| format!("configuration {name}, {} rounding", rounding.name()))?;
            let mut row = row_of(&r, input.budget)?;
            row.rounding = rounding.name().to_string();
            row.instructions_per_step_estimate = estimated_instructions(r.footprint.macs_per_step, 4 * units, units);
            out.push(row);
            progress(out.len(), total);
        }
    }
    let recommended = out
        .iter()
        .enumerate()
        .filter(|(_, r)| r.within_budget)
        .min_by(|(_, a), (_, b)| {
            (a.flash_bytes + a.ram_bytes)
                .cmp(&(b.flash_bytes + b.ram_bytes))
                .then(b.output_sqnr_db.total_cmp(&a.output_sqnr_db))
        })
        .map(|(i, _)| i);
    Ok(Sweep { steps: input.rows.len(), budget_checked: input.budget.is_some(), rows: out, recommended })
}

impl Sweep {
    /// A readable table.
    pub fn to_text(&self) -> String {
        let mut s = String::new();
        let _ = writeln!(
            s,
            "{:<22} {:<11} {:>7} {:>6} {:>6} {:>12} {:>8} {:>8} {:>7} {:>9}  {}",
            "configuration",
            "rounding",
            "flash B",
            "RAM B",
            "MACs",
            "instr (est)",
            "out dB",
            "hid dB",
            "drift",
            "sat %",
            if self.budget_checked { "budget" } else { "" }
        );
        for (i, r) in self.rows.iter().enumerate() {
            let mark = if Some(i) == self.recommended { " <- recommended" } else { "" };
            let budget = match (self.budget_checked, r.within_budget) {
                (false, _) => "",
                (true, true) => "pass",
                (true, false) => "FAIL",
            };
            if !r.feasible {
                let why = r.violations.first().map_or("", String::as_str);
                let _ = writeln!(s, "{:<22} {:<11} {why}", r.scheme, r.rounding);
                continue;
            }
            let _ = writeln!(
                s,
                "{:<22} {:<11} {:>7} {:>6} {:>6} {:>12} {:>8.1} {:>8.1} {:>+7.2} {:>9.4}  {budget}{mark}",
                r.scheme,
                r.rounding,
                r.flash_bytes,
                r.ram_bytes,
                r.macs_per_step,
                r.instructions_per_step_estimate,
                r.output_sqnr_db,
                r.hidden_sqnr_db,
                r.drift_db,
                100.0 * r.saturation_rate
            );
        }
        let _ = writeln!(
            s,
            "\n{} steps per configuration. \"instr (est)\" is an estimate (2 per MAC + 40 per gate row + 80 per \
             unit), not a measurement.",
            self.steps
        );
        match (self.recommended, self.budget_checked) {
            (Some(i), true) => {
                let r = &self.rows[i];
                let _ = writeln!(
                    s,
                    "recommended: {}, {} rounding (smallest flash + RAM within budget)",
                    r.scheme, r.rounding
                );
            }
            (Some(i), false) => {
                let r = &self.rows[i];
                let _ = writeln!(s, "smallest flash + RAM: {}, {} rounding (no budget given)", r.scheme, r.rounding);
            }
            (None, _) => {
                let _ = writeln!(s, "no configuration meets the budget");
            }
        }
        s
    }
}
