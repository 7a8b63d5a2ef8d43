//! Lapwing core: integer-only LSTM inference for microcontrollers without an
//! FPU, its float reference, and the arithmetic both rest on.
//!
//! The same code runs on the laptop (where the host tool proves how far the
//! quantized model drifts from float) and on the chip, bit for bit. No heap,
//! no `alloc`, no panics: every entry point checks its inputs and returns an
//! [`Error`].
//!
//! Modules, in data-path order:
//! - [`fixed_point`]: rounding multiply-high, rounding shifts, saturation,
//!   requantization (Jacob et al. 2018).
//! - [`activation`]: lookup-table sigmoid and tanh.
//! - [`float`]: the `f32` reference LSTM (matches PyTorch `nn.LSTM`).
//! - [`quant`]: the integer-only LSTM step (schemes `w8a16`, `w8a8`,
//!   `w16a16`; cell `c16`/`c32`).
//! - [`model`]: the device blob (`.lwq`): zero-copy parse from flash with
//!   every check done up front.
//! - [`detect`]: streaming fixed-point anomaly scoring and alarms on the
//!   prediction residual.
//!
//! ```
//! use lapwing::quant::{CellWidth, QLayer, QModel, RowScales, Scheme, Weights};
//! use lapwing::activation::TableKind;
//! # fn main() -> Result<(), lapwing::Error> {
//! // A one-unit layer with all-zero weights and biases: h stays 0.
//! let (w_x, w_h, bias) = ([0i8; 4], [0i8; 4], [0i32; 4]);
//! let rq = RowScales::new(&[1 << 30; 4], &[0; 4])?;
//! let layer = QLayer::new(1, 1, Weights::I8(&w_x), Weights::I8(&w_h), &bias, rq, rq, 13)?;
//! let model = QModel::new(&[layer], None, Scheme::W8A16, CellWidth::C16, TableKind::Standard)?;
//! let mut state = [0i16; 3];
//! let mut out = [0i16; 1];
//! model.step(&mut state, &[1000], &mut out)?;
//! assert_eq!(out, [0]);
//! # Ok(()) }
//! ```
#![no_std]
#![deny(missing_docs)]
#![deny(unsafe_code)]
#![cfg_attr(
    not(test),
    deny(
        clippy::unwrap_used,
        clippy::expect_used,
        clippy::panic,
        clippy::indexing_slicing,
        clippy::unreachable,
        clippy::todo
    )
)]

#[cfg(test)]
extern crate std;

pub mod activation;
pub mod detect;
#[cfg(lapwing_dsp)]
mod dsp;
pub mod fixed_point;
pub mod float;
pub mod model;
pub mod quant;

/// Most stacked LSTM layers a model may have.
pub const MAX_LAYERS: usize = 4;

/// Stacks layers given as `(input, hidden)` by `dims` into a fixed-capacity
/// list, checking that each layer's input is the previous hidden size and
/// that the head (if any) reads the last hidden size. Shared by the float
/// and integer models.
pub(crate) fn stack_layers<L: Copy>(
    layers: &[L],
    dims: impl Fn(&L) -> (usize, usize),
    head_input: Option<usize>,
) -> Result<heapless::Vec<L, MAX_LAYERS>, Error> {
    if layers.is_empty() || layers.len() > MAX_LAYERS {
        return Err(Error::LayerCount { got: layers.len() });
    }
    let mut v = heapless::Vec::new();
    let mut prev: Option<usize> = None;
    for l in layers {
        let (input, hidden) = dims(l);
        if let Some(p) = prev {
            float::check_len("layer input (previous hidden)", input, p)?;
        }
        prev = Some(hidden);
        v.push(*l).map_err(|_| Error::LayerCount { got: layers.len() })?;
    }
    if let (Some(h), Some(p)) = (head_input, prev) {
        float::check_len("head input (last hidden)", h, p)?;
    }
    Ok(v)
}

/// The four LSTM gates, in Lapwing's row order.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Gate {
    /// Input gate (sigmoid).
    I = 0,
    /// Forget gate (sigmoid): 1 keeps the cell, 0 clears it.
    F = 1,
    /// Cell candidate (tanh).
    G = 2,
    /// Output gate (sigmoid).
    O = 3,
}

impl Gate {
    /// All gates in row order.
    pub const ALL: [Gate; 4] = [Gate::I, Gate::F, Gate::G, Gate::O];

    /// The one-letter name (`i`, `f`, `g`, `o`).
    pub fn name(self) -> &'static str {
        match self {
            Gate::I => "i",
            Gate::F => "f",
            Gate::G => "g",
            Gate::O => "o",
        }
    }
}

/// Observes the inside of a step: every gate, cell and hidden value.
///
/// Steps are generic over the probe, so the no-op probe `()` costs nothing.
/// The host report uses a probe to compare float and integer gate by gate.
/// For the integer step `T = i32`: pre-activations in Q.19, gate outputs in
/// Q0.31, the cell in the layer's cell format, the hidden state in Q0.15
/// (Q0.7 for `w8a8`).
pub trait Probe<T> {
    /// Gate pre-activations and outputs of unit `unit` of layer `layer`.
    fn gates(&mut self, layer: usize, unit: usize, pre: &[T; 4], act: &[T; 4]) {
        let _ = (layer, unit, pre, act);
    }
    /// New cell and hidden values of unit `unit` of layer `layer`.
    fn state(&mut self, layer: usize, unit: usize, cell: T, hidden: T) {
        let _ = (layer, unit, cell, hidden);
    }
}

impl<T> Probe<T> for () {}

/// Errors from the core. Small and `Copy`; each names what was wrong.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum Error {
    /// A weight, bias or table slice has the wrong length, or a dimension is 0.
    Shape {
        /// Which part.
        what: &'static str,
        /// Length the other dimensions require.
        expected: usize,
        /// Length given.
        got: usize,
    },
    /// Layer count outside `1..=MAX_LAYERS`.
    LayerCount {
        /// Layers given.
        got: usize,
    },
    /// The caller's state buffer has the wrong length.
    StateSize {
        /// Words the model needs.
        expected: usize,
        /// Words given.
        got: usize,
    },
    /// The input slice has the wrong length.
    InputSize {
        /// Features the model takes.
        expected: usize,
        /// Values given.
        got: usize,
    },
    /// The output slice has the wrong length.
    OutputSize {
        /// Values the model writes.
        expected: usize,
        /// Values given.
        got: usize,
    },
    /// A weight row could overflow the 32-bit accumulator for some input.
    AccumulatorBound {
        /// Which weights (`input weights`, `recurrent weights`, `head weights`).
        what: &'static str,
        /// Layer index (the head counts as the layer after the last).
        layer: usize,
        /// Row index.
        row: usize,
    },
    /// A format parameter is outside its valid range.
    Format {
        /// Which parameter.
        what: &'static str,
        /// The value found.
        value: i32,
    },
    /// A device blob was refused by [`model::Blob::parse`].
    Blob(model::BlobError),
}

impl core::fmt::Display for Error {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match *self {
            Error::Shape { what, expected, got } => {
                write!(f, "{what}: expected length {expected}, got {got}")
            }
            Error::LayerCount { got } => {
                write!(f, "layer count {got} is outside 1..={MAX_LAYERS}")
            }
            Error::StateSize { expected, got } => {
                write!(f, "state buffer has {got} words, the model needs {expected}")
            }
            Error::InputSize { expected, got } => {
                write!(f, "input has {got} values, the model takes {expected}")
            }
            Error::OutputSize { expected, got } => {
                write!(f, "output has {got} slots, the model writes {expected}")
            }
            Error::AccumulatorBound { what, layer, row } => write!(
                f,
                "{what} of layer {layer}, row {row}: sum of |w| times the largest input could overflow 32 bits"
            ),
            Error::Format { what, value } => write!(f, "{what} = {value} is out of range"),
            Error::Blob(e) => write!(f, "{e}"),
        }
    }
}

impl core::error::Error for Error {}
