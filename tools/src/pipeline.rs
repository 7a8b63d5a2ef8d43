//! The data path as the CLI runs it, file to file: import a float model,
//! fold input normalization, calibrate over a data file (streamed),
//! quantize, and run a float model or a blob over data.
//!
//! Each function takes paths and typed options and returns typed results,
//! so the CLI stays a thin layer and tests call the same code.

use crate::blob::LoadedBlob;
use crate::calibrate::{Calibrator, RangeMethod, Ranges};
use crate::data;
use crate::float_model::FloatModelData;
use crate::import::{import, ImportOptions, Imported, Normalization};
use crate::quantize::input_to_int_into;
use anyhow::{bail, Context, Result};
use std::path::Path;

/// Where the input normalization folded into layer 0 comes from.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum NormSource {
    /// The model file's `norm.mean`/`norm.std` when present, else none.
    #[default]
    File,
    /// Mean and standard deviation of the calibration data, per feature
    /// (for a model trained on standardized inputs).
    Data,
    /// No normalization, even if the file has one.
    None,
}

/// Per-feature mean and (population) standard deviation of a data file,
/// streamed in one pass (Welford's algorithm, in f64).
///
/// # Errors
/// Read errors, or a feature whose spread is zero (it cannot be
/// standardized).
pub fn data_normalization(path: &Path, progress: bool) -> Result<Normalization> {
    let mut n = 0f64;
    let mut mean: Vec<f64> = Vec::new();
    let mut m2: Vec<f64> = Vec::new();
    let columns = data::for_each_row(path, progress, |_, x, _| {
        if mean.is_empty() {
            mean = vec![0.0; x.len()];
            m2 = vec![0.0; x.len()];
        }
        n += 1.0;
        for ((m, s), v) in mean.iter_mut().zip(m2.iter_mut()).zip(x) {
            let d = *v as f64 - *m;
            *m += d / n;
            *s += d * (*v as f64 - *m);
        }
        Ok(())
    })?;
    if n < 2.0 {
        bail!("{}: needs at least 2 rows to estimate the input normalization", path.display());
    }
    let std: Vec<f32> = m2.iter().map(|s| (s / n).sqrt() as f32).collect();
    if let Some(i) = std.iter().position(|s| !(*s > 0.0 && s.is_finite())) {
        let name = columns.get(i).map_or("?", String::as_str);
        bail!("{}: column {} (\"{name}\") is constant, so it cannot be standardized", path.display(), i + 1);
    }
    Ok(Normalization { mean: mean.iter().map(|m| *m as f32).collect(), std })
}

/// A float model ready to calibrate: imported, normalization folded in.
#[derive(Clone, Debug)]
pub struct Prepared {
    /// What the importer found.
    pub imported: Imported,
    /// The model taking raw inputs.
    pub model: FloatModelData,
    /// The normalization that was folded in, if any.
    pub folded: Option<Normalization>,
}

/// Imports `model_path` and folds the normalization chosen by `norm`
/// (`data_path` is read when `norm` is [`NormSource::Data`]).
///
/// # Errors
/// Import errors, normalization errors, or [`NormSource::Data`] without a
/// data file.
pub fn prepare(
    model_path: &Path,
    opts: &ImportOptions,
    norm: NormSource,
    data_path: Option<&Path>,
    progress: bool,
) -> Result<Prepared> {
    let imported = import(model_path, opts)?;
    let folded = match norm {
        NormSource::None => None,
        NormSource::File => imported.norm.clone(),
        NormSource::Data => {
            let Some(p) = data_path else { bail!("normalization from data needs a data file") };
            let n = data_normalization(p, progress)?;
            let want = imported.model.input_len();
            if n.mean.len() != want {
                bail!("{}: has {} feature columns but the model takes {want} inputs", p.display(), n.mean.len());
            }
            Some(n)
        }
    };
    let mut model = imported.model.clone();
    if let Some(n) = &folded {
        model
            .fold_normalization(&n.mean, &n.std)
            .with_context(|| format!("{}: input normalization", model_path.display()))?;
    }
    Ok(Prepared { imported, model, folded })
}

/// Runs the float model over a data file (streamed, state carried across
/// rows) and returns the ranges by `method`.
///
/// # Errors
/// Data errors (named by file, line and column), a feature-count
/// mismatch, or empty data.
pub fn calibrate_file(model: &FloatModelData, path: &Path, method: RangeMethod, progress: bool) -> Result<Ranges> {
    let mut cal = Calibrator::new(model, method)?;
    let want = model.input_len();
    data::for_each_row(path, progress, |_, x, _| {
        if x.len() != want {
            bail!("has {} feature columns but the model takes {want} inputs", x.len());
        }
        cal.push(x)
    })?;
    cal.finish().with_context(|| format!("{}: calibration", path.display()))
}

/// A model `run` can execute.
pub enum Runnable {
    /// The float reference.
    Float(Box<Prepared>),
    /// A device blob, run by the core's device code.
    Blob(LoadedBlob),
}

/// True when the file starts with the blob magic.
pub fn is_blob(path: &Path) -> bool {
    use std::io::Read;
    let mut magic = [0u8; 4];
    std::fs::File::open(path).and_then(|mut f| f.read_exact(&mut magic)).is_ok() && magic == lapwing::model::MAGIC
}

/// How `run` reads inputs and writes outputs.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum RunValues {
    /// Real values in and out (device integers times their scale for a blob).
    #[default]
    Real,
    /// Real inputs, the device's raw `int16` outputs (blobs only).
    Int,
    /// Raw `int16` device inputs (no scaling; values must be integers in
    /// range) and raw outputs (blobs only): what firmware sees, for
    /// bit-exact checks against a device.
    RawIo,
}

/// Device integers given as numbers: each must be a whole number in the
/// `int16` range.
fn raw_ints(x: &[f32], out: &mut Vec<i16>) -> Result<()> {
    out.clear();
    for (i, v) in x.iter().enumerate() {
        if v.fract() != 0.0 || *v < i16::MIN as f32 || *v > i16::MAX as f32 {
            bail!("column {}: {v} is not an int16 device value (raw input)", i + 1);
        }
        out.push(*v as i16);
    }
    Ok(())
}

/// Output column names: `y0..` for a head, `h0..` for the last hidden state.
fn output_columns(has_head: bool, n: usize) -> Vec<String> {
    let p = if has_head { "y" } else { "h" };
    (0..n).map(|i| format!("{p}{i}")).collect()
}

/// Runs `model` over `data_path` step by step and writes one CSV row per
/// input row to `out_path` (atomically, streamed: neither the input nor the
/// output is held in memory). Returns the rows written.
///
/// # Errors
/// Data errors, a feature-count mismatch, [`RunValues::Int`] on a float
/// model, or an output error. Nothing is written on error.
pub fn run_file(
    model: &Runnable,
    data_path: &Path,
    out_path: &Path,
    values: RunValues,
    progress: bool,
) -> Result<usize> {
    let check = |got: usize, want: usize| -> Result<()> {
        if got != want {
            bail!("has {got} feature columns but the model takes {want} inputs");
        }
        Ok(())
    };
    match model {
        Runnable::Float(p) => {
            if values != RunValues::Real {
                bail!("integer inputs or outputs need a quantized blob, not a float model");
            }
            let m = p.model.view()?;
            let mut state = vec![0.0f32; m.state_len()];
            let mut out = vec![0.0f32; m.output_len()];
            let header = output_columns(p.model.head.is_some(), m.output_len());
            data::write_csv_streaming(out_path, &header, |sink| {
                data::for_each_row(data_path, progress, |_, x, _| {
                    check(x.len(), m.input_len())?;
                    m.step(&mut state, x, &mut out).map_err(|e| anyhow::anyhow!("{e}"))?;
                    sink.push(&out)
                })
                .map(|_| ())
            })
        }
        Runnable::Blob(b) => {
            let blob = b.parse()?;
            let m = blob.model();
            let mut state = vec![0i16; m.state_words()];
            let mut out = vec![0i16; m.output_len()];
            let mut row = vec![0.0f32; m.output_len()];
            let mut xi: Vec<i16> = Vec::with_capacity(m.input_len());
            let header = output_columns(blob.header().has_head, m.output_len());
            data::write_csv_streaming(out_path, &header, |sink| {
                data::for_each_row(data_path, progress, |_, x, _| {
                    check(x.len(), m.input_len())?;
                    match values {
                        RunValues::RawIo => raw_ints(x, &mut xi)?,
                        _ => input_to_int_into(x, blob.input_scale(), &mut xi),
                    }
                    m.step(&mut state, &xi, &mut out).map_err(|e| anyhow::anyhow!("{e}"))?;
                    for ((r, v), s) in row.iter_mut().zip(&out).zip(blob.output_scale()) {
                        *r = match values {
                            RunValues::Real => *v as f32 * s,
                            RunValues::Int | RunValues::RawIo => *v as f32,
                        };
                    }
                    sink.push(&row)
                })
                .map(|_| ())
            })
        }
    }
}
