//! Float reference and integer model side by side on the same data.
//!
//! The integer side runs the core's device step ([`lapwing::quant::QModel`])
//! on inputs quantized with the model's input scales; every value is turned
//! back into real units with the formats the quantizer chose, then compared
//! with the float reference step by step.

use crate::float_model::FloatModelData;
use crate::metrics::{ErrorAcc, ErrorStats};
use crate::quantize::QuantModelData;
use anyhow::{anyhow, bail, Result};
use lapwing::activation::ONE_Q31;
use lapwing::Probe;

/// What one side-by-side run measured.
#[derive(Clone, Debug)]
pub struct Comparison {
    /// Steps run.
    pub steps: usize,
    /// Head output (or last hidden state) error.
    pub output: ErrorStats,
    /// Hidden-state error per layer.
    pub hidden: Vec<ErrorStats>,
    /// Cell-state error per layer.
    pub cell: Vec<ErrorStats>,
    /// Gate-output error per layer and gate (`i, f, g, o`).
    pub gates: Vec<[ErrorStats; 4]>,
    /// Float cell values of every layer after the last step.
    pub last_cell_float: Vec<Vec<f32>>,
    /// Integer cell values (in real units) after the last step.
    pub last_cell_quant: Vec<Vec<f32>>,
}

/// Collects one step's gate, cell and hidden values per layer and unit.
#[derive(Default)]
struct Collect<T> {
    gates: Vec<Vec<[T; 4]>>,
    cell: Vec<Vec<T>>,
    hidden: Vec<Vec<T>>,
}

impl<T: Copy + Default> Collect<T> {
    fn new(hidden: &[usize]) -> Self {
        Collect {
            gates: hidden.iter().map(|h| vec![[T::default(); 4]; *h]).collect(),
            cell: hidden.iter().map(|h| vec![T::default(); *h]).collect(),
            hidden: hidden.iter().map(|h| vec![T::default(); *h]).collect(),
        }
    }
}

impl<T: Copy> Probe<T> for Collect<T> {
    fn gates(&mut self, layer: usize, unit: usize, _pre: &[T; 4], act: &[T; 4]) {
        if let Some(g) = self.gates.get_mut(layer).and_then(|l| l.get_mut(unit)) {
            *g = *act;
        }
    }
    fn state(&mut self, layer: usize, unit: usize, cell: T, hidden: T) {
        if let Some(c) = self.cell.get_mut(layer).and_then(|l| l.get_mut(unit)) {
            *c = cell;
        }
        if let Some(h) = self.hidden.get_mut(layer).and_then(|l| l.get_mut(unit)) {
            *h = hidden;
        }
    }
}

/// Runs both models from zero state over `inputs` (real units) and compares.
///
/// # Errors
/// Empty data or shape mismatches between the models and the data.
pub fn compare(float: &FloatModelData, quant: &QuantModelData, inputs: &[Vec<f32>]) -> Result<Comparison> {
    if inputs.is_empty() {
        bail!("no data rows to compare on");
    }
    let fm = float.view()?;
    let qm = quant.view()?;
    let same_layers =
        fm.layers().iter().zip(qm.layers()).all(|(f, q)| f.input() == q.input() && f.hidden() == q.hidden());
    if fm.layers().len() != qm.layers().len()
        || !same_layers
        || fm.input_len() != qm.input_len()
        || fm.output_len() != qm.output_len()
    {
        bail!("the float model and the quantized model have different shapes");
    }
    let hidden: Vec<usize> = fm.layers().iter().map(|l| l.hidden()).collect();
    let hidden_unit = 1.0 / (1u64 << quant.scheme.hidden_frac()) as f64;
    let cell_unit: Vec<f64> = quant.layers.iter().map(|l| 1.0 / (1u64 << l.cell_frac) as f64).collect();
    let mut fs = vec![0.0f32; fm.state_len()];
    let mut qs = vec![0i16; qm.state_words()];
    let mut fo = vec![0.0f32; fm.output_len()];
    let mut qo = vec![0i16; qm.output_len()];
    let nl = hidden.len();
    let mut out_acc = ErrorAcc::default();
    let mut h_acc = vec![ErrorAcc::default(); nl];
    let mut c_acc = vec![ErrorAcc::default(); nl];
    let mut g_acc = vec![[ErrorAcc::default(); 4]; nl];
    let mut fc = Collect::<f32>::new(&hidden);
    let mut qc = Collect::<i32>::new(&hidden);
    for (t, x) in inputs.iter().enumerate() {
        if x.len() != fm.input_len() {
            bail!("row {t} has {} values, the model takes {}", x.len(), fm.input_len());
        }
        fm.step_probed(&mut fs, x, &mut fo, &mut fc).map_err(|e| anyhow!("float step {t}: {e}"))?;
        let xq = quant.quantize_input(x);
        qm.step_probed(&mut qs, &xq, &mut qo, &mut qc).map_err(|e| anyhow!("integer step {t}: {e}"))?;
        out_acc.add_all(&fo, &quant.dequantize_output(&qo));
        for k in 0..nl {
            for j in 0..hidden[k] {
                h_acc[k].add(fc.hidden[k][j] as f64, qc.hidden[k][j] as f64 * hidden_unit);
                c_acc[k].add(fc.cell[k][j] as f64, qc.cell[k][j] as f64 * cell_unit[k]);
                for ((acc, f), q) in g_acc[k].iter_mut().zip(fc.gates[k][j]).zip(qc.gates[k][j]) {
                    acc.add(f as f64, q as f64 / ONE_Q31);
                }
            }
        }
    }
    Ok(Comparison {
        steps: inputs.len(),
        output: out_acc.stats(),
        hidden: h_acc.iter().map(|a| a.stats()).collect(),
        cell: c_acc.iter().map(|a| a.stats()).collect(),
        gates: g_acc.iter().map(|g| [g[0].stats(), g[1].stats(), g[2].stats(), g[3].stats()]).collect(),
        last_cell_float: fc.cell.clone(),
        last_cell_quant: qc
            .cell
            .iter()
            .zip(&cell_unit)
            .map(|(l, u)| l.iter().map(|v| (*v as f64 * u) as f32).collect())
            .collect(),
    })
}
