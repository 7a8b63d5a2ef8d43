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

/// Instructions per MAC measured by the firmware check
/// (`tools/firmware/check.sh`, `target/firmware/measurements.json`) on one
/// target, per configuration name (`w8a16-c16-standard`), from the
/// demo-shaped model's runs (X=4, H=32, head Y=4).
#[derive(Clone, Debug, Default)]
pub struct MeasuredCost {
    /// The target the figures are from (`thumbv7em-none-eabihf`).
    pub target: String,
    /// Configuration name -> (instructions per MAC, MACs per step of the measured model).
    pub per_mac: std::collections::BTreeMap<String, (f64, usize)>,
}

impl MeasuredCost {
    /// Reads the firmware check's JSON and keeps `target`'s runs.
    ///
    /// # Errors
    /// A file that cannot be read or is not the check's JSON (each problem
    /// names the file and the field), or no run on `target` (the error lists
    /// the targets the file has).
    pub fn load(path: &std::path::Path, target: &str) -> Result<Self> {
        let text = std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display()))?;
        let v: serde_json::Value = serde_json::from_str(&text).with_context(|| {
            format!("{}: not JSON (expected the firmware check's measurements.json)", path.display())
        })?;
        let runs = v.get("runs").and_then(serde_json::Value::as_array).with_context(|| {
            format!("{}: no `runs` array (expected the firmware check's measurements.json)", path.display())
        })?;
        let mut targets = std::collections::BTreeSet::new();
        let mut per_mac = std::collections::BTreeMap::new();
        for (i, r) in runs.iter().enumerate() {
            let field = |k: &str| r.get(k).with_context(|| format!("{}: runs[{i}] has no `{k}`", path.display()));
            let t = field("target")?.as_str().unwrap_or_default();
            targets.insert(t.to_string());
            if t != target || r.get("kind").and_then(serde_json::Value::as_str) != Some("run") {
                continue;
            }
            let num = |k: &str| -> Result<f64> {
                field(k)?
                    .as_f64()
                    .filter(|x| x.is_finite() && *x > 0.0)
                    .with_context(|| format!("{}: runs[{i}].{k} is not a positive number", path.display()))
            };
            let (ipm, macs) = (num("instructions_per_mac")?, num("macs_per_step")? as usize);
            let name = format!(
                "{}-{}-{}",
                field("scheme")?.as_str().unwrap_or_default(),
                field("cell")?.as_str().unwrap_or_default(),
                r.get("table").and_then(serde_json::Value::as_str).unwrap_or("standard")
            );
            // Only the demo-shaped model (X=4, H=32, head Y=4): per-MAC costs
            // of much smaller models are dominated by per-unit work.
            if r.get("model").and_then(serde_json::Value::as_str).is_some_and(|m| m.starts_with("demo")) {
                per_mac.insert(name, (ipm, macs));
            }
        }
        if per_mac.is_empty() {
            anyhow::bail!(
                "{}: no measured run of the demo-shaped model on target `{target}` (the file has targets: {})",
                path.display(),
                targets.into_iter().collect::<Vec<_>>().join(", ")
            );
        }
        Ok(MeasuredCost { target: target.to_string(), per_mac })
    }
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
    /// With measured costs ([`MeasuredCost`]): the emulated instructions per
    /// MAC of the same configuration on the measured target, times this
    /// model's MACs per step; `None` when that configuration was not
    /// measured.
    pub instructions_per_step_scaled: Option<usize>,
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
    /// The target of the measured instruction costs, when given.
    pub measured_target: Option<String>,
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
        instructions_per_step_scaled: None,
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
    /// Measured instruction costs of one target (else the formula).
    pub measured: Option<&'a MeasuredCost>,
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
                        instructions_per_step_scaled: None,
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
            let macs = r.footprint.macs_per_step;
            row.instructions_per_step_estimate = estimated_instructions(macs, 4 * units, units);
            row.instructions_per_step_scaled =
                input.measured.and_then(|m| m.per_mac.get(&name)).map(|&(ipm, _)| (ipm * macs as f64).round() as usize);
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
    Ok(Sweep {
        measured_target: input.measured.map(|m| m.target.clone()),
        steps: input.rows.len(),
        budget_checked: input.budget.is_some(),
        rows: out,
        recommended,
    })
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
            if self.measured_target.is_some() { "instr (meas)" } else { "instr (est)" },
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
            let instr = match (&self.measured_target, r.instructions_per_step_scaled) {
                (None, _) => r.instructions_per_step_estimate.to_string(),
                (Some(_), Some(n)) => n.to_string(),
                (Some(_), None) => "-".to_string(),
            };
            let _ = writeln!(
                s,
                "{:<22} {:<11} {:>7} {:>6} {:>6} {:>12} {:>8.1} {:>8.1} {:>+7.2} {:>9.4}  {budget}{mark}",
                r.scheme,
                r.rounding,
                r.flash_bytes,
                r.ram_bytes,
                r.macs_per_step,
                instr,
                r.output_sqnr_db,
                r.hidden_sqnr_db,
                r.drift_db,
                100.0 * r.saturation_rate
            );
        }
        let _ = writeln!(s, "\n{} steps per configuration.", self.steps);
        match &self.measured_target {
            Some(t) => {
                let _ = writeln!(
                    s,
                    "\"instr (meas)\": the emulated instructions per MAC of each configuration on {t} \
                     (tools/firmware/check.sh, demo-shaped model X4 H32 Y4) times this model's MACs: a scaling, exact only \
                     for that shape (per-unit work weighs more in smaller models); \"-\" where not measured."
                );
            }
            None => {
                let _ = writeln!(
                    s,
                    "\"instr (est)\" is an estimate (2 per MAC + 40 per gate row + 80 per unit), not a \
                     measurement; --firmware target/firmware/measurements.json --target T scales the emulated \
                     measurements of tools/firmware/check.sh instead."
                );
            }
        }
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
