//! The host quantizer: float model + calibrated ranges -> integer model.
//!
//! Schemes `w8a16`, `w8a8`, `w16a16` (DESIGN.md section 3, and the module
//! docs of [`lapwing::quant`] for the device side); described for `w8a16`,
//! with int16 weights (`[-32767, 32767]`) for `w16a16` and a Q0.7 hidden
//! state (`s = 2^-7`) for `w8a8`:
//! - input scale per feature `s_x = absmax * headroom / 32767`, folded into
//!   layer 0's weights (`W'[r][c] = W[r][c] * s_x[c]`); deeper layers see
//!   `h` in Q0.15 (`s = 2^-15`);
//! - weights int8 symmetric per row: `scale_r = max|W'[r]| / 127`,
//!   `q = round(W' / scale_r)` (ties away from zero);
//! - requantization to pre-activation units (`2^-19`):
//!   `M = scale_r * 2^19`, as a Q31 multiplier and shift;
//! - bias: `round(b * 2^19)`;
//! - cell: `c16` holds `15 - ceil(log2(absmax_c * headroom))` fractional bits,
//!   `c32` 16 more;
//! - head: int8 per row, output scale `absmax_y * headroom / 32767`, bias in
//!   output units.
//!
//! For int8 weights, every row's worst-case accumulator `sum |q| * 32768` is
//! checked against `i32::MAX` before anything is built; a row that could
//! overflow is refused with its layer and row named. int16 weights
//! accumulate in `i64` and need no such limit.

use crate::calibrate::Ranges;
use crate::float_model::FloatModelData;
use anyhow::{bail, Context, Result};
use lapwing::activation::{TableKind, PRE_FRAC};
use lapwing::fixed_point::{to_fixed_i32, Requant};
use lapwing::quant::{worst_case_accumulator, CellWidth, QHead, QLayer, QModel, RowScales, Scheme, Weights};

/// Options of the quantizer.
#[derive(Clone, Copy, Debug)]
pub struct QuantOptions {
    /// Integer scheme. Default `w8a16`.
    pub scheme: Scheme,
    /// Cell width. Default `c16`.
    pub cell: CellWidth,
    /// Activation table. Default standard.
    pub table: TableKind,
    /// Range headroom above the calibrated maximum (default 1.25, common
    /// practice to leave room for unseen data).
    pub headroom: f32,
}

impl Default for QuantOptions {
    fn default() -> Self {
        QuantOptions { scheme: Scheme::W8A16, cell: CellWidth::C16, table: TableKind::Standard, headroom: 1.25 }
    }
}

/// One quantized layer, owned.
#[derive(Clone, Debug, PartialEq)]
pub struct QuantLayerData {
    /// Input features X.
    pub input: usize,
    /// Hidden units H.
    pub hidden: usize,
    /// `[4H, X]`.
    pub w_x: OwnedWeights,
    /// `[4H, H]`.
    pub w_h: OwnedWeights,
    /// `[4H]` in pre-activation units.
    pub bias: Vec<i32>,
    /// `[4H]` row scales for `acc_x`.
    pub rq_x: OwnedScales,
    /// `[4H]` row scales for `acc_h`.
    pub rq_h: OwnedScales,
    /// Fractional bits of the cell.
    pub cell_frac: u8,
}

/// The quantized head, owned.
#[derive(Clone, Debug, PartialEq)]
pub struct QuantHeadData {
    /// Input H.
    pub input: usize,
    /// Outputs Y.
    pub output: usize,
    /// `[Y, H]`.
    pub w: OwnedWeights,
    /// `[Y]` in output units.
    pub bias: Vec<i32>,
    /// `[Y]` row scales.
    pub rq: OwnedScales,
}

/// A weight matrix, owned, in the scheme's element type.
#[derive(Clone, Debug, PartialEq)]
pub enum OwnedWeights {
    /// int8.
    I8(Vec<i8>),
    /// int16.
    I16(Vec<i16>),
}

impl OwnedWeights {
    /// The borrowed form the core takes.
    pub fn view(&self) -> Weights<'_> {
        match self {
            OwnedWeights::I8(w) => Weights::I8(w),
            OwnedWeights::I16(w) => Weights::I16(w),
        }
    }

    /// Number of weights.
    pub fn len(&self) -> usize {
        self.view().len()
    }

    /// True when empty.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Values widened to `i32`, for the bound check and tests.
    pub fn to_i32(&self) -> Vec<i32> {
        match self {
            OwnedWeights::I8(w) => w.iter().map(|v| *v as i32).collect(),
            OwnedWeights::I16(w) => w.iter().map(|v| *v as i32).collect(),
        }
    }

    pub(crate) fn from_values(v: Vec<i32>, scheme: Scheme) -> Self {
        match scheme {
            Scheme::W16A16 => OwnedWeights::I16(v.into_iter().map(|x| x as i16).collect()),
            Scheme::W8A16 | Scheme::W8A8 => OwnedWeights::I8(v.into_iter().map(|x| x as i8).collect()),
        }
    }
}

/// Per-row requantization multipliers and shifts, owned (see
/// [`lapwing::quant::RowScales`]).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct OwnedScales {
    /// Q31 multipliers.
    pub mult: Vec<i32>,
    /// Shifts (positive: right).
    pub shift: Vec<i8>,
}

impl OwnedScales {
    /// Appends the requantization of a real scale.
    ///
    /// # Errors
    /// A scale no Q31 multiplier and shift can represent, named by `what`.
    pub fn push_real(&mut self, scale: f64, what: &str) -> Result<()> {
        let rq = Requant::from_real(scale).map_err(|e| anyhow::anyhow!("{what}: scale {scale:e}: {e}"))?;
        let shift = i8::try_from(rq.shift).map_err(|_| anyhow::anyhow!("{what}: shift {} out of range", rq.shift))?;
        self.mult.push(rq.mult);
        self.shift.push(shift);
        Ok(())
    }

    /// The borrowed form the core takes.
    ///
    /// # Errors
    /// Out-of-range values, as the core reports them.
    pub fn view(&self) -> Result<RowScales<'_>> {
        RowScales::new(&self.mult, &self.shift).map_err(|e| anyhow::anyhow!("{e}"))
    }
}

/// A quantized model, owned, with the real scales of its edges so the host
/// can feed float data and read float results.
#[derive(Clone, Debug, PartialEq)]
pub struct QuantModelData {
    /// Integer scheme.
    pub scheme: Scheme,
    /// Cell width.
    pub cell: CellWidth,
    /// Activation table.
    pub table: TableKind,
    /// Layers.
    pub layers: Vec<QuantLayerData>,
    /// Optional head.
    pub head: Option<QuantHeadData>,
    /// Real value of one input LSB, per feature.
    pub input_scale: Vec<f32>,
    /// Real value of one output LSB, per output.
    pub output_scale: Vec<f32>,
    /// Anomaly-detector parameters, when calibrated
    /// ([`crate::detector::to_fixed`]).
    pub detector: Option<crate::detector::QuantDetectorData>,
}

impl QuantModelData {
    /// A validated view the core runs.
    ///
    /// # Errors
    /// Any validation failure from the core.
    pub fn view(&self) -> Result<QModel<'_>> {
        let layers = self
            .layers
            .iter()
            .enumerate()
            .map(|(k, l)| {
                QLayer::new(
                    l.input,
                    l.hidden,
                    l.w_x.view(),
                    l.w_h.view(),
                    &l.bias,
                    l.rq_x.view()?,
                    l.rq_h.view()?,
                    l.cell_frac,
                )
                .map_err(|e| anyhow::anyhow!("layer {k}: {e}"))
            })
            .collect::<Result<Vec<_>>>()?;
        let head = match &self.head {
            Some(h) => Some(
                QHead::new(h.input, h.output, h.w.view(), &h.bias, h.rq.view()?)
                    .map_err(|e| anyhow::anyhow!("head: {e}"))?,
            ),
            None => None,
        };
        QModel::new(&layers, head, self.scheme, self.cell, self.table).map_err(|e| anyhow::anyhow!("model: {e}"))
    }

    /// Float inputs to device integers: `round(x / s_x)`, saturating.
    pub fn quantize_input(&self, x: &[f32]) -> Vec<i16> {
        input_to_int(x, &self.input_scale)
    }

    /// Device outputs to real values.
    pub fn dequantize_output(&self, y: &[i16]) -> Vec<f32> {
        y.iter().zip(&self.output_scale).map(|(v, s)| *v as f32 * s).collect()
    }
}

/// Float inputs to device integers: `round(x / scale)` (half away from
/// zero, in f64), saturated to `int16`. The one conversion every host path
/// uses, so `run` on a blob and the report agree bit for bit.
pub fn input_to_int(x: &[f32], scale: &[f32]) -> Vec<i16> {
    let mut out = Vec::with_capacity(x.len().min(scale.len()));
    input_to_int_into(x, scale, &mut out);
    out
}

/// As [`input_to_int`], into `out` (cleared first), so a loop over rows
/// reuses one buffer.
pub fn input_to_int_into(x: &[f32], scale: &[f32], out: &mut Vec<i16>) {
    out.clear();
    out.extend(
        x.iter()
            .zip(scale)
            .map(|(v, s)| (*v as f64 / *s as f64).round().clamp(i16::MIN as f64, i16::MAX as f64) as i16),
    );
}

/// Quantizes one matrix per row after multiplying column `c` by `col_scale[c]`,
/// to symmetric integers in `[-qmax, qmax]`. Returns the integers and the
/// per-row real scales.
fn quantize_rows(w: &[f32], cols: usize, col_scale: &[f64], qmax: i32) -> (Vec<i32>, Vec<f64>) {
    let mut q = Vec::with_capacity(w.len());
    let mut scales = Vec::with_capacity(w.len() / cols.max(1));
    for row in w.chunks_exact(cols) {
        let folded: Vec<f64> = row.iter().zip(col_scale).map(|(v, s)| *v as f64 * s).collect();
        let m = folded.iter().fold(0.0f64, |a, v| a.max(v.abs()));
        let scale = m / qmax as f64;
        scales.push(scale);
        for v in folded {
            let qv = if scale == 0.0 { 0 } else { to_fixed_i32(v / scale, 0).clamp(-qmax, qmax) };
            q.push(qv);
        }
    }
    (q, scales)
}

/// For int8 weights, refuses a row whose accumulator could overflow `i32`
/// (int16 weights are pre-shifted by the core and cannot overflow).
pub(crate) fn check_bound(q: &[i32], cols: usize, scheme: Scheme, what: &str) -> Result<()> {
    if scheme.weight_bytes() != 1 {
        return Ok(());
    }
    for (r, row) in q.chunks_exact(cols).enumerate() {
        let row8: Vec<i8> = row.iter().map(|v| *v as i8).collect();
        let worst = worst_case_accumulator(&row8);
        if worst > i32::MAX as i64 {
            bail!(
                "{what}, row {r}: worst-case accumulator {worst} exceeds 2^31 - 1 ({cols} columns); \
                 int8-weight schemes support rows up to 516 columns at full scale (w16a16 has no such limit)"
            );
        }
    }
    Ok(())
}

/// Refuses ranges no format can be chosen from (NaN, infinite, negative).
fn check_ranges(r: &Ranges) -> Result<()> {
    let bad = |v: f32| !(v.is_finite() && v >= 0.0);
    if let Some(i) = r.input_absmax.iter().position(|v| bad(*v)) {
        bail!("calibration range of input feature {i} is {} (must be finite and >= 0)", r.input_absmax[i]);
    }
    if let Some(i) = r.output_absmax.iter().position(|v| bad(*v)) {
        bail!("calibration range of output {i} is {} (must be finite and >= 0)", r.output_absmax[i]);
    }
    for (k, l) in r.layers.iter().enumerate() {
        if bad(l.cell_absmax) {
            bail!("calibration range of the layer {k} cell is {} (must be finite and >= 0)", l.cell_absmax);
        }
    }
    Ok(())
}

/// Real value of one int16 LSB for a calibrated |x| maximum. A quantity that
/// was exactly 0 over the whole calibration set gets the range +-1.
pub(crate) fn scale_for(absmax: f32, headroom: f32) -> f64 {
    let m = absmax as f64 * headroom as f64;
    if m > 0.0 && m.is_finite() {
        m / 32_767.0
    } else {
        1.0 / 32_767.0
    }
}

/// Fractional bits of a 16-bit cell for a calibrated |c| maximum.
pub fn cell_frac16(absmax: f32, headroom: f32) -> u8 {
    let m = (absmax * headroom).max(1e-6) as f64;
    let int_bits = m.log2().ceil().clamp(0.0, 15.0) as i32;
    (15 - int_bits) as u8
}

/// Quantizes `model` with the observed `ranges`.
///
/// # Errors
/// Non-finite weights, ranges that do not match the model, a scale no Q31
/// multiplier can hold, or a row whose accumulator could overflow.
pub fn quantize(model: &FloatModelData, ranges: &Ranges, opts: &QuantOptions) -> Result<QuantModelData> {
    model.view().context("the float model is inconsistent")?;
    model.check_finite()?;
    check_ranges(ranges)?;
    if ranges.layers.len() != model.layers.len() || ranges.input_absmax.len() != model.input_len() {
        bail!(
            "calibration ranges are for {} layers and {} inputs, the model has {} and {}",
            ranges.layers.len(),
            ranges.input_absmax.len(),
            model.layers.len(),
            model.input_len()
        );
    }
    if !(opts.headroom.is_finite() && opts.headroom >= 1.0) {
        bail!("headroom {} must be at least 1", opts.headroom);
    }
    let pre_unit = (1u64 << PRE_FRAC) as f64;
    let input_scale: Vec<f64> = ranges.input_absmax.iter().map(|m| scale_for(*m, opts.headroom)).collect();
    let scheme = opts.scheme;
    let qmax = scheme.weight_max();
    let hidden_scale = 1.0 / (1u64 << scheme.hidden_frac()) as f64;
    let mut layers = Vec::new();
    for (k, (l, r)) in model.layers.iter().zip(&ranges.layers).enumerate() {
        let col_x: Vec<f64> = if k == 0 { input_scale.clone() } else { vec![hidden_scale; l.input] };
        let col_h = vec![hidden_scale; l.hidden];
        let (w_x, sx) = quantize_rows(&l.w_x, l.input, &col_x, qmax);
        let (w_h, sh) = quantize_rows(&l.w_h, l.hidden, &col_h, qmax);
        check_bound(&w_x, l.input, scheme, &format!("layer {k} input weights"))?;
        check_bound(&w_h, l.hidden, scheme, &format!("layer {k} recurrent weights"))?;
        let (w_x, w_h) = (OwnedWeights::from_values(w_x, scheme), OwnedWeights::from_values(w_h, scheme));
        let mut rq_x = OwnedScales::default();
        let mut rq_h = OwnedScales::default();
        for (row, (a, b)) in sx.iter().zip(&sh).enumerate() {
            rq_x.push_real(a * pre_unit, &format!("layer {k} input row {row}"))?;
            rq_h.push_real(b * pre_unit, &format!("layer {k} recurrent row {row}"))?;
        }
        let bias = l.b.iter().map(|b| to_fixed_i32(*b as f64, PRE_FRAC as i32)).collect();
        let frac16 = cell_frac16(r.cell_absmax, opts.headroom);
        let cell_frac = match opts.cell {
            CellWidth::C16 => frac16,
            CellWidth::C32 => frac16 + 16,
        };
        layers.push(QuantLayerData { input: l.input, hidden: l.hidden, w_x, w_h, bias, rq_x, rq_h, cell_frac });
    }
    let (head, output_scale) = match &model.head {
        Some(h) => {
            let (w, sw) = quantize_rows(&h.w, h.input, &vec![hidden_scale; h.input], qmax);
            check_bound(&w, h.input, scheme, "head weights")?;
            let w = OwnedWeights::from_values(w, scheme);
            let out_scale: Vec<f64> = ranges.output_absmax.iter().map(|m| scale_for(*m, opts.headroom)).collect();
            if out_scale.len() != h.output {
                bail!("calibration has {} outputs, the head has {}", out_scale.len(), h.output);
            }
            let mut rq = OwnedScales::default();
            for (row, (s, so)) in sw.iter().zip(&out_scale).enumerate() {
                rq.push_real(s / so, &format!("head row {row}"))?;
            }
            let bias = h.b.iter().zip(&out_scale).map(|(b, so)| to_fixed_i32(*b as f64 / so, 0)).collect();
            let head = QuantHeadData { input: h.input, output: h.output, w, bias, rq };
            (Some(head), out_scale.iter().map(|s| *s as f32).collect())
        }
        None => {
            let hd = model.layers.last().map_or(0, |l| l.hidden);
            (None, vec![hidden_scale as f32; hd])
        }
    };
    let q = QuantModelData {
        scheme,
        cell: opts.cell,
        table: opts.table,
        layers,
        head,
        input_scale: input_scale.iter().map(|s| *s as f32).collect(),
        output_scale,
        detector: None,
    };
    q.view().context("the quantized model failed the core's validation")?;
    Ok(q)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::synth::{random_model, ModelSpec};

    #[test]
    fn overflowing_rows_are_refused_with_a_name() {
        // 600 inputs at full scale: 127 * 600 * 32768 > 2^31.
        let spec = ModelSpec { input: 600, hidden: 2, layers: 1, output: None, gain: 1.0 };
        let mut m = random_model(&spec, 3);
        for v in &mut m.layers[0].w_x {
            *v = 0.5;
        }
        let ranges = Ranges {
            input_absmax: vec![1.0; 600],
            layers: vec![Default::default()],
            output_absmax: vec![1.0; 2],
            steps: 1,
        };
        let e = quantize(&m, &ranges, &QuantOptions::default()).unwrap_err().to_string();
        assert!(e.contains("layer 0 input weights, row 0") && e.contains("exceeds"), "{e}");
    }

    #[test]
    fn inconsistent_models_and_ranges_are_errors() {
        // Found in review: a zero hidden size panicked in chunks_exact.
        let spec = ModelSpec { input: 1, hidden: 1, layers: 1, output: None, gain: 1.0 };
        let mut m = random_model(&spec, 3);
        m.layers[0].hidden = 0;
        let ranges =
            Ranges { input_absmax: vec![1.0], layers: vec![Default::default()], output_absmax: vec![], steps: 1 };
        assert!(quantize(&m, &ranges, &QuantOptions::default()).is_err());
        let m = random_model(&spec, 3);
        let mut ranges = Ranges {
            input_absmax: vec![f32::NAN],
            layers: vec![Default::default()],
            output_absmax: vec![1.0],
            steps: 1,
        };
        let e = quantize(&m, &ranges, &QuantOptions::default()).unwrap_err().to_string();
        assert!(e.contains("input feature 0"), "{e}");
        ranges.input_absmax[0] = 1.0;
        ranges.layers[0].cell_absmax = f32::INFINITY;
        let e = quantize(&m, &ranges, &QuantOptions::default()).unwrap_err().to_string();
        assert!(e.contains("layer 0 cell"), "{e}");
    }

    #[test]
    fn cell_formats_follow_the_range() {
        assert_eq!(cell_frac16(0.7, 1.25), 15);
        assert_eq!(cell_frac16(1.0, 1.25), 14);
        assert_eq!(cell_frac16(3.0, 1.25), 13);
        assert_eq!(cell_frac16(1e9, 1.25), 0);
    }
}
