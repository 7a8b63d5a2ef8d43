//! The error budget: limits a quantized model must stay within before it is
//! flashed, checked against a [`Report`].
//!
//! A budget is a small TOML file. Every limit is optional, but at least one
//! must be set; keys not listed here are refused (a typo would otherwise
//! silently disable a limit):
//!
//! ```toml
//! # Lapwing error budget
//! output_sqnr_min_db = 40.0     # head output SQNR, dB, at least
//! hidden_sqnr_min_db = 40.0     # every layer's hidden-state SQNR, dB, at least (the worst layer counts)
//! cell_sqnr_min_db = 30.0       # every layer's cell-state SQNR, at least
//! drift_max_db = 3.0            # output first-tenth SQNR minus last-tenth SQNR, dB, at most (also applied to each layer<k>.hidden drift)
//! saturation_rate_max = 0.001   # fraction of saturated values in ANY tensor (input, output, hidden, cell, gates), at most
//! flash_max_bytes = 16384       # model data in flash (blob + activation table), at most
//! ram_max_bytes = 2048          # state RAM, at most
//! alarm_agreement_min = 0.999   # fraction of samples where float and quantized alarms agree, at least (needs a detector)
//! ```
//!
//! Numeric contract:
//! - dB limits (`*_sqnr_min_db`, `drift_max_db`) are finite and `>= 0`; an
//!   integer such as `40` is read as `40.0`;
//! - fractions (`saturation_rate_max`, `alarm_agreement_min`) are in `[0, 1]`;
//! - byte limits are non-negative TOML integers (`16384`, not `16384.0`);
//! - a limit holds when the measured value equals it ("at least" / "at
//!   most" are inclusive); a `+inf` SQNR (float and quantized agree exactly)
//!   passes every minimum; a NaN measurement violates every limit;
//! - "every layer" limits and the saturation limit report one violation for
//!   the worst tensor, so each key appears at most once among the violations.
//!
//! [`Budget::check`] turns a report into a [`BudgetResult`];
//! [`assert_within`] turns it into an `Err` listing every violation, for a
//! `cargo test` in a firmware repository (see `examples/budget/`).
//!
//! # Errors
//!
//! Parsing errors start with the file name, then give the line and column
//! when known, the key and what is wrong, all on one line. Checking errors
//! (not violations) are a report without an `output` tensor while
//! `output_sqnr_min_db` is set, `alarm_agreement_min` set for a model without
//! a detector, and an invalid limit in a budget built in code.

use crate::report::{BudgetResult, Report, TensorReport, Violation};
use anyhow::{anyhow, bail, Result};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;
use toml::{Spanned, Value};

/// Limits a quantized model must stay within. `None` means "not checked".
///
/// Build it with [`Budget::from_toml_str`] or [`Budget::load`], which
/// validate every value; a budget deserialized some other way (or built in
/// code) is validated again by [`Budget::check`].
#[derive(Clone, Debug, Default, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Budget {
    /// Head output SQNR, dB, at least (`output` tensor).
    pub output_sqnr_min_db: Option<f64>,
    /// Hidden-state SQNR of every layer (`layer<k>.hidden`), dB, at least;
    /// the worst layer counts.
    pub hidden_sqnr_min_db: Option<f64>,
    /// Cell-state SQNR of every layer (`layer<k>.cell`), dB, at least; the
    /// worst layer counts.
    pub cell_sqnr_min_db: Option<f64>,
    /// Error growth `first-tenth SQNR - last-tenth SQNR`, dB, at most; applied
    /// to the `output` drift and to every `layer<k>.hidden` drift.
    pub drift_max_db: Option<f64>,
    /// Fraction of saturated values in any tensor (output, hidden, cell,
    /// gates), at most, in `[0, 1]`.
    pub saturation_rate_max: Option<f64>,
    /// Model data in flash (blob plus activation table), bytes, at most.
    pub flash_max_bytes: Option<u64>,
    /// Caller-owned state RAM, bytes, at most.
    pub ram_max_bytes: Option<u64>,
    /// Fraction of samples where the float and quantized alarms agree, at
    /// least, in `[0, 1]`. Needs a model with a detector.
    pub alarm_agreement_min: Option<f64>,
}

/// What a key holds, which decides its type and its valid range.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Kind {
    /// A number of dB, finite, `>= 0`.
    Db,
    /// A fraction in `[0, 1]`.
    Fraction,
    /// A whole number of bytes, `>= 0`.
    Bytes,
}

/// Every key a budget file accepts, in documentation order.
const KEYS: [(&str, Kind); 8] = [
    ("output_sqnr_min_db", Kind::Db),
    ("hidden_sqnr_min_db", Kind::Db),
    ("cell_sqnr_min_db", Kind::Db),
    ("drift_max_db", Kind::Db),
    ("saturation_rate_max", Kind::Fraction),
    ("flash_max_bytes", Kind::Bytes),
    ("ram_max_bytes", Kind::Bytes),
    ("alarm_agreement_min", Kind::Fraction),
];

/// A parsed value before it is stored in its field.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Limit {
    Number(f64),
    Bytes(u64),
}

impl Budget {
    /// Parses a budget from TOML text; `source` names the file in errors.
    ///
    /// Integers are accepted for dB and fraction keys (`40` is `40.0`).
    ///
    /// # Errors
    /// One-line messages starting with `source`, with the line and column
    /// when known: invalid TOML (the toml crate's message), an unknown key
    /// (with the nearest known key when it looks like a typo, and the list of
    /// known keys), a value of the wrong type (expected vs found), a NaN or
    /// infinite value, a negative value, a fraction outside `[0, 1]`, and a
    /// budget that sets no limit.
    pub fn from_toml_str(text: &str, source: &str) -> Result<Budget> {
        let table: BTreeMap<Spanned<String>, Spanned<Value>> =
            toml::from_str(text).map_err(|e| anyhow!("{}", toml_error(text, source, &e)))?;
        // Report the first problem in file order, not key order.
        let mut entries: Vec<(Spanned<String>, Spanned<Value>)> = table.into_iter().collect();
        entries.sort_by_key(|(key, _)| key.span().start);

        let mut budget = Budget::default();
        for (key, value) in &entries {
            let name = key.get_ref().as_str();
            let Some(kind) = kind_of(name) else {
                let hint = match nearest_key(name) {
                    Some(near) => format!("did you mean `{near}`? "),
                    None => String::new(),
                };
                bail!("{}unknown key `{name}`; {hint}known keys: {}", at(text, source, key.span().start), key_list());
            };
            let limit = parse_value(kind, name, value.get_ref())
                .map_err(|problem| anyhow!("{}{problem}", at(text, source, value.span().start)))?;
            budget.store(name, limit);
        }
        if budget.is_empty() {
            bail!("{source}: the error budget sets no limit; set at least one of {}", key_list());
        }
        Ok(budget)
    }

    /// Reads and parses a budget file.
    ///
    /// # Errors
    /// A missing or unreadable file (the message names the path and the
    /// reason), a file over 1 MiB, or any error of
    /// [`Budget::from_toml_str`], naming the path.
    pub fn load(path: &Path) -> Result<Budget> {
        // A budget is a few lines: refuse a huge file before reading it.
        const MAX_BYTES: u64 = 1 << 20;
        let len = std::fs::metadata(path)
            .map_err(|e| anyhow!("{}: cannot read the error budget: {e}", path.display()))?
            .len();
        if len > MAX_BYTES {
            bail!(
                "{}: the error budget has {len} bytes, more than the {MAX_BYTES} a budget file may have",
                path.display()
            );
        }
        let text = std::fs::read_to_string(path)
            .map_err(|e| anyhow!("{}: cannot read the error budget: {e}", path.display()))?;
        Budget::from_toml_str(&text, &path.display().to_string())
    }

    /// Checks a report against every limit that is set.
    ///
    /// Returns a [`BudgetResult`] with `checked = true`, `passed` when no
    /// limit is violated, and one [`Violation`] per violated key (measured vs
    /// allowed and a sentence such as "output SQNR 38.2 dB is below the
    /// budget's 40.0 dB (output_sqnr_min_db)"). Limits are inclusive; a `+inf`
    /// SQNR passes every minimum; a NaN measurement is a violation. Per-layer
    /// and per-tensor limits report the worst tensor. Tensors and drifts named
    /// by a rule but missing from the report are skipped, except `output`
    /// when `output_sqnr_min_db` is set. A drift whose two windows are both
    /// `+inf` (no error at all) counts as 0 dB.
    ///
    /// # Errors
    /// An invalid limit (NaN, negative, fraction outside `[0, 1]`, for a
    /// budget built in code), `output_sqnr_min_db` set but no `output` tensor
    /// in the report, and `alarm_agreement_min` set but no alarm agreement in
    /// the report (the model has no detector, so the limit cannot be checked).
    pub fn check(&self, report: &Report) -> Result<BudgetResult> {
        self.validate()?;
        let output = match self.output_sqnr_min_db {
            Some(_) => Some(report.tensors.get("output").ok_or_else(|| {
                anyhow!("the report has no `output` tensor, so output_sqnr_min_db cannot be checked")
            })?),
            None => None,
        };
        let alarm_agreement = match self.alarm_agreement_min {
            Some(_) => Some(report.alarm_agreement.ok_or_else(|| {
                anyhow!(
                    "alarm_agreement_min is set but the model has no detector (the report has no alarm \
                     agreement), so the limit cannot be checked; remove it from the budget"
                )
            })?),
            None => None,
        };

        let mut violations = Vec::new();
        if let (Some(min), Some(t)) = (self.output_sqnr_min_db, output) {
            violations.extend(sqnr_min(("output", t.sqnr_db), 1, min, "", "output_sqnr_min_db"));
        }
        if let Some(min) = self.hidden_sqnr_min_db {
            let layers = layer_tensors(&report.tensors, "hidden");
            if let Some(worst) = worst(layers.iter().copied(), Direction::Low) {
                violations.extend(sqnr_min(worst, layers.len(), min, "layers", "hidden_sqnr_min_db"));
            }
        }
        if let Some(min) = self.cell_sqnr_min_db {
            let layers = layer_tensors(&report.tensors, "cell");
            if let Some(worst) = worst(layers.iter().copied(), Direction::Low) {
                violations.extend(sqnr_min(worst, layers.len(), min, "layers", "cell_sqnr_min_db"));
            }
        }
        if let Some(max) = self.drift_max_db {
            violations.extend(drift_violation(report, max));
        }
        if let Some(max) = self.saturation_rate_max {
            violations.extend(saturation_violation(&report.tensors, max));
        }
        if let Some(max) = self.flash_max_bytes {
            violations.extend(bytes_max("flash", report.footprint.flash_bytes, max, "flash_max_bytes"));
        }
        if let Some(max) = self.ram_max_bytes {
            violations.extend(bytes_max("RAM", report.footprint.ram_bytes, max, "ram_max_bytes"));
        }
        if let (Some(min), Some(measured)) = (self.alarm_agreement_min, alarm_agreement) {
            if measured.is_nan() || measured < min {
                let (m, a) = pair(measured * 100.0, min * 100.0, 2);
                violations.push(Violation {
                    limit: "alarm_agreement_min".into(),
                    measured,
                    allowed: min,
                    message: format!("alarm agreement {m} % is below the budget's {a} % (alarm_agreement_min)"),
                });
            }
        }
        Ok(BudgetResult { passed: violations.is_empty(), checked: true, violations })
    }

    /// True when no limit is set.
    fn is_empty(&self) -> bool {
        *self == Budget::default()
    }

    /// Stores a parsed value under its key (keys and kinds come from [`KEYS`]).
    fn store(&mut self, key: &str, limit: Limit) {
        let number = match limit {
            Limit::Number(v) => Some(v),
            Limit::Bytes(_) => None,
        };
        let bytes = match limit {
            Limit::Bytes(v) => Some(v),
            Limit::Number(_) => None,
        };
        match key {
            "output_sqnr_min_db" => self.output_sqnr_min_db = number,
            "hidden_sqnr_min_db" => self.hidden_sqnr_min_db = number,
            "cell_sqnr_min_db" => self.cell_sqnr_min_db = number,
            "drift_max_db" => self.drift_max_db = number,
            "saturation_rate_max" => self.saturation_rate_max = number,
            "flash_max_bytes" => self.flash_max_bytes = bytes,
            "ram_max_bytes" => self.ram_max_bytes = bytes,
            "alarm_agreement_min" => self.alarm_agreement_min = number,
            _ => {}
        }
    }

    /// Checks the float limits of a budget that may not come from a file.
    fn validate(&self) -> Result<()> {
        let numbers = [
            ("output_sqnr_min_db", Kind::Db, self.output_sqnr_min_db),
            ("hidden_sqnr_min_db", Kind::Db, self.hidden_sqnr_min_db),
            ("cell_sqnr_min_db", Kind::Db, self.cell_sqnr_min_db),
            ("drift_max_db", Kind::Db, self.drift_max_db),
            ("saturation_rate_max", Kind::Fraction, self.saturation_rate_max),
            ("alarm_agreement_min", Kind::Fraction, self.alarm_agreement_min),
        ];
        for (key, kind, value) in numbers {
            if let Some(v) = value {
                check_range(kind, key, v).map_err(|problem| anyhow!("invalid error budget: {problem}"))?;
            }
        }
        Ok(())
    }
}

/// Checks a report against a budget and turns violations into an error, for
/// a `cargo test` in a firmware repository:
///
/// ```no_run
/// # fn report_for_test() -> lapwing_tools::report::Report { Default::default() }
/// use lapwing_tools::budget::{assert_within, Budget};
/// let budget = Budget::load("budget.toml".as_ref())?;
/// assert_within(&report_for_test(), &budget)?;
/// # Ok::<(), anyhow::Error>(())
/// ```
///
/// # Errors
/// Every error of [`Budget::check`], and, when a limit is violated, an error
/// whose first line counts the violations and whose following lines give one
/// violation each (measured vs allowed, and the budget key).
pub fn assert_within(report: &Report, budget: &Budget) -> Result<()> {
    let result = budget.check(report)?;
    if result.passed {
        return Ok(());
    }
    let n = result.violations.len();
    let mut message = format!("error budget violated ({n} limit{}):", if n == 1 { "" } else { "s" });
    for v in &result.violations {
        message.push_str("\n  - ");
        message.push_str(&v.message);
    }
    Err(anyhow!(message))
}

// ---------------------------------------------------------------------------
// Parsing helpers.

/// The kind of a known key.
fn kind_of(key: &str) -> Option<Kind> {
    KEYS.iter().find(|(k, _)| *k == key).map(|(_, kind)| *kind)
}

/// The known keys, comma-separated.
fn key_list() -> String {
    KEYS.iter().map(|(k, _)| *k).collect::<Vec<_>>().join(", ")
}

/// The known key closest to `key` when it is close enough to be a typo.
fn nearest_key(key: &str) -> Option<&'static str> {
    KEYS.iter()
        .map(|(k, _)| (*k, edit_distance(key, k)))
        .filter(|(_, d)| *d <= 3)
        .min_by_key(|(_, d)| *d)
        .map(|(k, _)| k)
}

/// Levenshtein distance over chars.
fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut row = Vec::with_capacity(b.len() + 1);
        row.push(i + 1);
        for (j, cb) in b.iter().enumerate() {
            let substitute = prev.get(j).copied().unwrap_or(usize::MAX).saturating_add(usize::from(ca != *cb));
            let delete = prev.get(j + 1).copied().unwrap_or(usize::MAX).saturating_add(1);
            let insert = row.last().copied().unwrap_or(usize::MAX).saturating_add(1);
            row.push(substitute.min(delete).min(insert));
        }
        prev = row;
    }
    prev.last().copied().unwrap_or(0)
}

/// `"source:line:column: "` for a byte offset into `text` (`"source: "` when
/// the offset is not on a char boundary).
fn at(text: &str, source: &str, offset: usize) -> String {
    match text.get(..offset) {
        Some(before) => {
            let line = before.matches('\n').count() + 1;
            let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
            format!("{source}:{line}:{column}: ")
        }
        None => format!("{source}: "),
    }
}

/// A toml crate error on one line, with its position.
fn toml_error(text: &str, source: &str, e: &toml::de::Error) -> String {
    let lines: Vec<&str> = e.message().lines().map(str::trim).filter(|l| !l.is_empty()).collect();
    // The toml crate leaves the message empty for some syntax errors (e.g. a
    // key with no value); its position still says where.
    let message = if lines.is_empty() { "syntax error".to_string() } else { lines.join("; ") };
    let location = match e.span() {
        Some(span) => at(text, source, span.start),
        None => format!("{source}: "),
    };
    format!("{location}invalid TOML: {message}")
}

/// Reads one value of a known key, checking its type and range.
fn parse_value(kind: Kind, key: &str, value: &Value) -> std::result::Result<Limit, String> {
    match kind {
        Kind::Db | Kind::Fraction => {
            let v = match value {
                Value::Float(f) => *f,
                Value::Integer(i) => *i as f64,
                other => {
                    let expected = if kind == Kind::Db { "a number of dB" } else { "a fraction between 0 and 1" };
                    return Err(format!("`{key}` must be {expected}, found {} {other}", other.type_str()));
                }
            };
            check_range(kind, key, v)?;
            Ok(Limit::Number(v))
        }
        Kind::Bytes => match value {
            Value::Integer(i) => {
                u64::try_from(*i).map(Limit::Bytes).map_err(|_| format!("`{key}` must not be negative, found {i}"))
            }
            other => Err(format!(
                "`{key}` must be a whole number of bytes (an integer such as 16384), found {} {other}",
                other.type_str()
            )),
        },
    }
}

/// Range of a float limit: finite, `>= 0`, and `<= 1` for fractions.
fn check_range(kind: Kind, key: &str, v: f64) -> std::result::Result<(), String> {
    if !v.is_finite() {
        return Err(format!("`{key}` must be a finite number, found {v}"));
    }
    if v < 0.0 {
        return Err(format!("`{key}` must not be negative, found {v}"));
    }
    if kind == Kind::Fraction && v > 1.0 {
        return Err(format!("`{key}` is a fraction and must be between 0 and 1, found {v}"));
    }
    Ok(())
}

// ---------------------------------------------------------------------------
// Checking helpers.

/// Which end of a measurement is bad.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Direction {
    /// Lower is worse (SQNR).
    Low,
    /// Higher is worse (drift, saturation).
    High,
}

/// The worst `(name, value)` of a set; NaN is worst of all; ties keep the
/// first.
fn worst<'a>(items: impl Iterator<Item = (&'a str, f64)>, direction: Direction) -> Option<(&'a str, f64)> {
    items.fold(None, |acc, item| match acc {
        None => Some(item),
        Some(cur) => {
            let worse = if item.1.is_nan() {
                !cur.1.is_nan()
            } else {
                match direction {
                    Direction::Low => item.1 < cur.1,
                    Direction::High => item.1 > cur.1,
                }
            };
            Some(if worse { item } else { cur })
        }
    })
}

/// `Some(part)` for a tensor named `layer<k>.<part>` (`k` decimal digits).
fn layer_part(name: &str) -> Option<&str> {
    let (k, part) = name.strip_prefix("layer")?.split_once('.')?;
    (!k.is_empty() && k.bytes().all(|b| b.is_ascii_digit())).then_some(part)
}

/// `(name, SQNR)` of every `layer<k>.<part>` tensor.
fn layer_tensors<'a>(tensors: &'a BTreeMap<String, TensorReport>, part: &str) -> Vec<(&'a str, f64)> {
    tensors
        .iter()
        .filter(|(name, _)| layer_part(name) == Some(part))
        .map(|(name, t)| (name.as_str(), t.sqnr_db))
        .collect()
}

/// Formats two values with `decimals` decimals, adding decimals (up to six
/// more) until they read differently, so a violation never reads "40.0 is
/// below 40.0".
fn pair(measured: f64, allowed: f64, decimals: usize) -> (String, String) {
    let mut out = (format!("{measured:.decimals$}"), format!("{allowed:.decimals$}"));
    for d in decimals + 1..=decimals + 6 {
        if out.0 != out.1 {
            break;
        }
        out = (format!("{measured:.d$}"), format!("{allowed:.d$}"));
    }
    out
}

/// ", worst of N <what>" when more than one was compared.
fn worst_of(n: usize, what: &str) -> String {
    if n > 1 {
        format!(", worst of {n} {what}")
    } else {
        String::new()
    }
}

/// A violation of an SQNR minimum, or `None` when `sqnr >= min` (`+inf`
/// always holds, NaN never does).
fn sqnr_min((name, sqnr): (&str, f64), n: usize, min: f64, what: &str, key: &str) -> Option<Violation> {
    if sqnr >= min {
        return None;
    }
    let (m, a) = pair(sqnr, min, 1);
    Some(Violation {
        limit: key.into(),
        measured: sqnr,
        allowed: min,
        message: format!("{name} SQNR {m} dB is below the budget's {a} dB ({key}{})", worst_of(n, what)),
    })
}

/// The drift limit over `output` and every `layer<k>.hidden` drift present.
fn drift_violation(report: &Report, max: f64) -> Option<Violation> {
    let drifts: Vec<(&str, f64)> = report
        .drift
        .iter()
        .filter(|(name, _)| name.as_str() == "output" || layer_part(name) == Some("hidden"))
        .map(|(name, d)| {
            let both_exact = d.first_tenth_sqnr_db == f64::INFINITY && d.last_tenth_sqnr_db == f64::INFINITY;
            (name.as_str(), if both_exact { 0.0 } else { d.drift_db })
        })
        .collect();
    let (name, drift) = worst(drifts.iter().copied(), Direction::High)?;
    if drift <= max {
        return None;
    }
    let windows = report
        .drift
        .get(name)
        .map(|d| format!(" (first tenth {:.1} dB, last tenth {:.1} dB)", d.first_tenth_sqnr_db, d.last_tenth_sqnr_db))
        .unwrap_or_default();
    let (m, a) = pair(drift, max, 1);
    Some(Violation {
        limit: "drift_max_db".into(),
        measured: drift,
        allowed: max,
        message: format!(
            "{name} SQNR drift {m} dB{windows} is above the budget's {a} dB (drift_max_db{})",
            worst_of(drifts.len(), "tensors")
        ),
    })
}

/// The saturation limit over every tensor.
fn saturation_violation(tensors: &BTreeMap<String, TensorReport>, max: f64) -> Option<Violation> {
    let rates = tensors.iter().map(|(name, t)| (name.as_str(), t.saturation_rate));
    let (name, rate) = worst(rates, Direction::High)?;
    if rate <= max {
        return None;
    }
    let counts = tensors.get(name).map(|t| format!(" ({} of {} values)", t.saturated, t.count)).unwrap_or_default();
    let (m, a) = pair(rate * 100.0, max * 100.0, 2);
    Some(Violation {
        limit: "saturation_rate_max".into(),
        measured: rate,
        allowed: max,
        message: format!(
            "{name} saturation rate {m} %{counts} is above the budget's {a} % (saturation_rate_max{})",
            worst_of(tensors.len(), "tensors")
        ),
    })
}

/// A byte limit.
fn bytes_max(what: &str, measured: usize, max: u64, key: &str) -> Option<Violation> {
    let over = u64::try_from(measured).map_or(true, |m| m > max);
    over.then(|| Violation {
        limit: key.into(),
        measured: measured as f64,
        allowed: max as f64,
        message: format!("{what} {measured} B is above the budget's {max} B ({key})"),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::report::{Drift, ReportFootprint};

    const FULL: &str = "\
# Lapwing error budget
output_sqnr_min_db = 40.0
hidden_sqnr_min_db = 41.5
cell_sqnr_min_db = 30
drift_max_db = 3.0
saturation_rate_max = 0.001
flash_max_bytes = 16384
ram_max_bytes = 2048
alarm_agreement_min = 0.999
";

    fn tensor(sqnr_db: f64, saturated: u64, count: u64) -> TensorReport {
        TensorReport {
            max_abs: 1e-3,
            rmse: 1e-4,
            sqnr_db,
            cosine: 0.9999,
            saturated,
            saturation_rate: saturated as f64 / count as f64,
            count,
        }
    }

    fn drift(first: f64, last: f64) -> Drift {
        Drift {
            first_tenth_sqnr_db: first,
            last_tenth_sqnr_db: last,
            drift_db: first - last,
            window_steps: 100,
            worst_window_sqnr_db: last,
            worst_window_step: 900,
            windows_sqnr_db: vec![first, last],
        }
    }

    /// A two-layer report within every limit of `FULL`.
    fn good_report() -> Report {
        let mut tensors = BTreeMap::new();
        tensors.insert("output".to_string(), tensor(45.0, 0, 4000));
        for k in 0..2 {
            tensors.insert(format!("layer{k}.hidden"), tensor(47.0 - k as f64, 0, 32000));
            tensors.insert(format!("layer{k}.cell"), tensor(38.0, 0, 32000));
            for g in ["i", "f", "g", "o"] {
                tensors.insert(format!("layer{k}.gate.{g}"), tensor(50.0, 3, 32000));
            }
        }
        let mut drifts = BTreeMap::new();
        drifts.insert("output".to_string(), drift(45.5, 44.8));
        drifts.insert("layer0.hidden".to_string(), drift(47.2, 46.9));
        drifts.insert("layer1.hidden".to_string(), drift(46.1, 45.9));
        Report {
            scheme: "w8a16-c16-standard".into(),
            steps: 1000,
            tensors,
            drift: drifts,
            footprint: ReportFootprint {
                flash_bytes: 6776,
                blob_bytes: 5704,
                table_bytes: 1072,
                ram_bytes: 160,
                macs_per_step: 3360,
            },
            alarm_agreement: Some(0.9995),
            ..Report::default()
        }
    }

    fn full() -> Budget {
        Budget::from_toml_str(FULL, "full.toml").unwrap()
    }

    fn only(key: &str, value: &str) -> Budget {
        Budget::from_toml_str(&format!("{key} = {value}\n"), "one.toml").unwrap()
    }

    fn err(text: &str) -> String {
        format!("{:#}", Budget::from_toml_str(text, "bad.toml").unwrap_err())
    }

    fn violations(budget: &Budget, report: &Report) -> Vec<Violation> {
        let result = budget.check(report).unwrap();
        assert!(result.checked);
        assert_eq!(result.passed, result.violations.is_empty());
        result.violations
    }

    fn single(budget: &Budget, report: &Report, key: &str) -> Violation {
        let v = violations(budget, report);
        assert_eq!(v.len(), 1, "{v:?}");
        assert_eq!(v[0].limit, key);
        v[0].clone()
    }

    // ---- parsing

    #[test]
    fn parses_every_key() {
        let b = full();
        assert_eq!(
            b,
            Budget {
                output_sqnr_min_db: Some(40.0),
                hidden_sqnr_min_db: Some(41.5),
                cell_sqnr_min_db: Some(30.0),
                drift_max_db: Some(3.0),
                saturation_rate_max: Some(0.001),
                flash_max_bytes: Some(16384),
                ram_max_bytes: Some(2048),
                alarm_agreement_min: Some(0.999),
            }
        );
        // The derived serde impls agree with the hand-written parser.
        assert_eq!(toml::from_str::<Budget>(FULL).unwrap(), b);
        assert_eq!(Budget::from_toml_str(&toml::to_string(&b).unwrap(), "round.toml").unwrap(), b);
    }

    #[test]
    fn each_key_alone_is_a_budget() {
        for (key, kind) in KEYS {
            let value = if kind == Kind::Bytes { "100" } else { "0.5" };
            let b = only(key, value);
            // Serialization skips unset limits: exactly this key is set, with this value.
            assert_eq!(toml::to_string(&b).unwrap(), format!("{key} = {value}\n"));
        }
        // Integers are read as dB.
        assert_eq!(only("cell_sqnr_min_db", "30").cell_sqnr_min_db, Some(30.0));
    }

    #[test]
    fn unknown_key_names_key_file_and_line() {
        let e = err("output_sqnr_min_db = 40.0\noutput_snr_min_db = 40.0\n");
        assert!(e.starts_with("bad.toml:2:1: unknown key `output_snr_min_db`"), "{e}");
        assert!(e.contains("did you mean `output_sqnr_min_db`?"), "{e}");
        assert!(e.contains("known keys: output_sqnr_min_db, hidden_sqnr_min_db"), "{e}");
        assert!(!e.contains('\n'), "{e}");
        let e = err("[limits]\nram_max_bytes = 2\n");
        assert!(e.contains("unknown key `limits`") && !e.contains("did you mean"), "{e}");
    }

    #[test]
    fn wrong_type_names_key_and_types() {
        let e = err("drift_max_db = 3.0\noutput_sqnr_min_db = \"40 dB\"\n");
        assert!(e.starts_with("bad.toml:2:22: "), "{e}");
        assert!(e.contains("`output_sqnr_min_db` must be a number of dB, found string \"40 dB\""), "{e}");
        let e = err("ram_max_bytes = 2048.0\n");
        assert!(e.contains("`ram_max_bytes` must be a whole number of bytes"), "{e}");
        assert!(e.contains("found float 2048.0"), "{e}");
        let e = err("saturation_rate_max = true\n");
        assert!(e.contains("`saturation_rate_max` must be a fraction between 0 and 1, found boolean true"), "{e}");
        assert!(!e.contains('\n'), "{e}");
    }

    #[test]
    fn bad_values_are_refused() {
        let cases = [
            ("output_sqnr_min_db = nan", "`output_sqnr_min_db` must be a finite number, found NaN"),
            ("hidden_sqnr_min_db = inf", "`hidden_sqnr_min_db` must be a finite number, found inf"),
            ("cell_sqnr_min_db = -1.0", "`cell_sqnr_min_db` must not be negative, found -1"),
            ("drift_max_db = -3", "`drift_max_db` must not be negative, found -3"),
            ("saturation_rate_max = 1.5", "`saturation_rate_max` is a fraction and must be between 0 and 1, found 1.5"),
            ("alarm_agreement_min = 99.9", "`alarm_agreement_min` is a fraction and must be between 0 and 1"),
            ("flash_max_bytes = -1", "`flash_max_bytes` must not be negative, found -1"),
        ];
        for (text, expected) in cases {
            let e = err(text);
            assert!(e.starts_with("bad.toml:1:"), "{e}");
            assert!(e.contains(expected), "{text}: {e}");
        }
        // Boundaries are valid.
        assert_eq!(only("saturation_rate_max", "0").saturation_rate_max, Some(0.0));
        assert_eq!(only("alarm_agreement_min", "1.0").alarm_agreement_min, Some(1.0));
        assert_eq!(only("ram_max_bytes", "0").ram_max_bytes, Some(0));
    }

    #[test]
    fn empty_budget_is_refused() {
        for text in ["", "# only a comment\n"] {
            let e = err(text);
            assert!(e.starts_with("bad.toml: the error budget sets no limit"), "{e}");
            assert!(e.contains("alarm_agreement_min"), "{e}");
        }
    }

    #[test]
    fn invalid_toml_is_one_line_with_position() {
        let e = err("drift_max_db = 3.0\nram_max_bytes = \n");
        assert!(e.starts_with("bad.toml:2:"), "{e}");
        assert!(e.contains("invalid TOML"), "{e}");
        assert!(!e.contains('\n'), "{e}");
        let e = err("drift_max_db = 3.0\nram_max_bytes = ");
        assert!(e.starts_with("bad.toml:2:17: invalid TOML: "), "{e}");
        assert!(!e.trim_end().ends_with(':'), "never an empty message: {e}");
        let e = err("drift_max_db = [1,\n");
        assert!(e.contains("invalid TOML: invalid array; expected `]`"), "{e}");
        let e = err("ram_max_bytes = 1\nram_max_bytes = 2\n");
        assert!(e.starts_with("bad.toml:2:") && e.contains("duplicate key"), "{e}");
    }

    #[test]
    fn load_names_missing_file() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("nope.toml");
        let e = format!("{:#}", Budget::load(&path).unwrap_err());
        assert!(e.starts_with(&format!("{}: cannot read the error budget", path.display())), "{e}");
        let path = dir.path().join("b.toml");
        std::fs::write(&path, "ram_max_bytes = 1\nbogus = 2\n").unwrap();
        let e = format!("{:#}", Budget::load(&path).unwrap_err());
        assert!(e.starts_with(&format!("{}:2:1: unknown key `bogus`", path.display())), "{e}");
        std::fs::write(&path, FULL).unwrap();
        assert_eq!(Budget::load(&path).unwrap(), full());
    }

    // ---- checking

    #[test]
    fn good_report_passes_every_limit() {
        let r = full().check(&good_report()).unwrap();
        assert_eq!(r, BudgetResult { passed: true, checked: true, violations: vec![] });
        assert!(assert_within(&good_report(), &full()).is_ok());
    }

    #[test]
    fn output_sqnr() {
        let b = only("output_sqnr_min_db", "40.0");
        let mut r = good_report();
        r.tensors.get_mut("output").unwrap().sqnr_db = 40.0;
        assert!(violations(&b, &r).is_empty(), "equal holds");
        r.tensors.get_mut("output").unwrap().sqnr_db = 38.2;
        let v = single(&b, &r, "output_sqnr_min_db");
        assert_eq!((v.measured, v.allowed), (38.2, 40.0));
        assert_eq!(v.message, "output SQNR 38.2 dB is below the budget's 40.0 dB (output_sqnr_min_db)");
        r.tensors.get_mut("output").unwrap().sqnr_db = 39.96;
        let v = single(&b, &r, "output_sqnr_min_db");
        assert_eq!(v.message, "output SQNR 39.96 dB is below the budget's 40.00 dB (output_sqnr_min_db)");
        r.tensors.get_mut("output").unwrap().sqnr_db = f64::NAN;
        single(&b, &r, "output_sqnr_min_db");
    }

    #[test]
    fn infinite_sqnr_passes() {
        let b = full();
        let mut r = good_report();
        for t in r.tensors.values_mut() {
            t.sqnr_db = f64::INFINITY;
        }
        for d in r.drift.values_mut() {
            *d = drift(f64::INFINITY, f64::INFINITY);
            d.drift_db = f64::NAN; // inf - inf
        }
        assert!(violations(&b, &r).is_empty());
        // Exact at first, then an error appears: infinite growth.
        r.drift.insert("output".into(), drift(f64::INFINITY, 50.0));
        let v = single(&b, &r, "drift_max_db");
        assert_eq!(v.measured, f64::INFINITY);
    }

    #[test]
    fn missing_output_is_an_error_other_tensors_are_skipped() {
        let mut r = good_report();
        r.tensors.remove("output");
        let e = format!("{:#}", only("output_sqnr_min_db", "40").check(&r).unwrap_err());
        assert!(e.contains("no `output` tensor") && e.contains("output_sqnr_min_db"), "{e}");
        // No head: hidden, cell, drift and saturation rules still run on what is there.
        let mut b = full();
        b.output_sqnr_min_db = None;
        assert!(violations(&b, &r).is_empty());
        let empty = Report { alarm_agreement: Some(1.0), ..Report::default() };
        assert!(violations(&b, &empty).is_empty(), "no layers, no drifts: nothing to violate");
    }

    #[test]
    fn hidden_sqnr_worst_layer() {
        let b = only("hidden_sqnr_min_db", "40");
        let mut r = good_report();
        assert!(violations(&b, &r).is_empty());
        r.tensors.get_mut("layer0.hidden").unwrap().sqnr_db = 39.0;
        r.tensors.get_mut("layer1.hidden").unwrap().sqnr_db = 35.25;
        // Not a hidden tensor: ignored by this rule.
        r.tensors.get_mut("layer0.cell").unwrap().sqnr_db = 1.0;
        let v = single(&b, &r, "hidden_sqnr_min_db");
        assert_eq!((v.measured, v.allowed), (35.25, 40.0));
        assert_eq!(
            v.message,
            "layer1.hidden SQNR 35.2 dB is below the budget's 40.0 dB (hidden_sqnr_min_db, worst of 2 layers)"
        );
    }

    #[test]
    fn cell_sqnr_worst_layer() {
        let b = only("cell_sqnr_min_db", "30");
        let mut r = good_report();
        assert!(violations(&b, &r).is_empty());
        r.tensors.get_mut("layer1.cell").unwrap().sqnr_db = 29.0;
        let v = single(&b, &r, "cell_sqnr_min_db");
        assert_eq!((v.measured, v.allowed), (29.0, 30.0));
        assert!(v.message.starts_with("layer1.cell SQNR 29.0 dB is below the budget's 30.0 dB"), "{}", v.message);
    }

    #[test]
    fn drift_output_and_hidden() {
        let b = only("drift_max_db", "3.0");
        let mut r = good_report();
        assert!(violations(&b, &r).is_empty());
        r.drift.insert("output".into(), drift(45.0, 42.0));
        assert!(violations(&b, &r).is_empty(), "exactly 3 dB holds");
        r.drift.insert("output".into(), drift(45.0, 40.9));
        let v = single(&b, &r, "drift_max_db");
        assert!((v.measured - 4.1).abs() < 1e-9 && v.allowed == 3.0);
        assert!(
            v.message.starts_with(
                "output SQNR drift 4.1 dB (first tenth 45.0 dB, last tenth 40.9 dB) is above the budget's 3.0 dB"
            ),
            "{}",
            v.message
        );
        r.drift.insert("output".into(), drift(45.0, 44.0));
        r.drift.insert("layer1.hidden".into(), drift(46.0, 40.0));
        let v = single(&b, &r, "drift_max_db");
        assert!(v.message.starts_with("layer1.hidden SQNR drift 6.0 dB"), "{}", v.message);
        assert!(v.message.ends_with("(drift_max_db, worst of 3 tensors)"), "{}", v.message);
        // Drift that shrinks (negative) holds.
        r.drift.insert("layer1.hidden".into(), drift(40.0, 46.0));
        assert!(violations(&b, &r).is_empty());
    }

    #[test]
    fn saturation_any_tensor() {
        let b = only("saturation_rate_max", "0.001");
        let mut r = good_report();
        assert!(violations(&b, &r).is_empty());
        r.tensors.insert("layer0.gate.f".into(), tensor(50.0, 80, 32000));
        let v = single(&b, &r, "saturation_rate_max");
        assert_eq!((v.measured, v.allowed), (0.0025, 0.001));
        assert!(
            v.message.starts_with(
                "layer0.gate.f saturation rate 0.25 % (80 of 32000 values) is above the budget's 0.10 % \
                 (saturation_rate_max, worst of"
            ),
            "{}",
            v.message
        );
        // Output and state tensors count too.
        let mut r = good_report();
        r.tensors.insert("output".into(), tensor(45.0, 5, 4000));
        assert_eq!(single(&b, &r, "saturation_rate_max").measured, 5.0 / 4000.0);
    }

    #[test]
    fn flash_and_ram() {
        let b = Budget { flash_max_bytes: Some(16384), ram_max_bytes: Some(2048), ..Budget::default() };
        let mut r = good_report();
        r.footprint.flash_bytes = 16384;
        r.footprint.ram_bytes = 2048;
        assert!(violations(&b, &r).is_empty(), "equal holds");
        r.footprint.flash_bytes = 20000;
        let v = single(&b, &r, "flash_max_bytes");
        assert_eq!(v.message, "flash 20000 B is above the budget's 16384 B (flash_max_bytes)");
        r.footprint.flash_bytes = 100;
        r.footprint.ram_bytes = 4096;
        let v = single(&b, &r, "ram_max_bytes");
        assert_eq!((v.measured, v.allowed), (4096.0, 2048.0));
        assert_eq!(v.message, "RAM 4096 B is above the budget's 2048 B (ram_max_bytes)");
    }

    #[test]
    fn alarm_agreement() {
        let b = only("alarm_agreement_min", "0.999");
        let mut r = good_report();
        assert!(violations(&b, &r).is_empty());
        r.alarm_agreement = Some(0.995);
        let v = single(&b, &r, "alarm_agreement_min");
        assert_eq!(v.message, "alarm agreement 99.50 % is below the budget's 99.90 % (alarm_agreement_min)");
    }

    #[test]
    fn alarm_limit_without_detector_is_an_error() {
        let mut r = good_report();
        r.alarm_agreement = None;
        let e = format!("{:#}", full().check(&r).unwrap_err());
        assert!(
            e.contains("alarm_agreement_min") && e.contains("no detector") && e.contains("cannot be checked"),
            "{e}"
        );
        assert!(assert_within(&r, &full()).is_err());
        let mut b = full();
        b.alarm_agreement_min = None;
        assert!(violations(&b, &r).is_empty());
    }

    #[test]
    fn invalid_budget_in_code_is_an_error() {
        let b = Budget { drift_max_db: Some(f64::NAN), ..Budget::default() };
        let e = format!("{:#}", b.check(&good_report()).unwrap_err());
        assert!(e.contains("`drift_max_db` must be a finite number"), "{e}");
    }

    #[test]
    fn assert_within_lists_every_violation() {
        let mut r = good_report();
        r.tensors.get_mut("output").unwrap().sqnr_db = 30.0;
        r.footprint.ram_bytes = 4096;
        let e = assert_within(&r, &full()).unwrap_err().to_string();
        let lines: Vec<&str> = e.lines().collect();
        assert_eq!(lines.len(), 3, "{e}");
        assert_eq!(lines[0], "error budget violated (2 limits):");
        assert!(lines[1].contains("output SQNR 30.0 dB is below the budget's 40.0 dB (output_sqnr_min_db)"), "{e}");
        assert!(lines[2].contains("RAM 4096 B is above the budget's 2048 B (ram_max_bytes)"), "{e}");
    }

    #[test]
    fn helpers() {
        assert_eq!(layer_part("layer12.gate.f"), Some("gate.f"));
        assert_eq!(layer_part("layer.hidden"), None);
        assert_eq!(layer_part("layerx.hidden"), None);
        assert_eq!(layer_part("output"), None);
        assert_eq!(edit_distance("ram_max_byte", "ram_max_bytes"), 1);
        assert_eq!(edit_distance("", "abc"), 3);
        assert_eq!(pair(38.24, 40.0, 1), ("38.2".to_string(), "40.0".to_string()));
        assert_eq!(at("a\nbc", "f", 3), "f:2:2: ");
        assert_eq!(at("é", "f", 1), "f: ");
    }
}
