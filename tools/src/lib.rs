//! `lapwing-tools`: the host side of Lapwing.
//!
//! One module per job, each with typed options and results, so the CLI, the
//! tests and the demo call the same functions. In data-path order:
//! - [`import`]: float weights from safetensors / npz / `.npy` directories in
//!   three tensor layouts; [`onnx`]: LSTM graphs from `.onnx` files;
//!   [`float_model`]: the owned float model and
//!   normalization folding;
//! - [`data`]: CSV and `.npy` data, streamed;
//! - [`calibrate`]: ranges observed by running the float model over data
//!   (min/max or percentile);
//! - [`quantize`]: float model + ranges -> integer model (`w8a16`, `w8a8`,
//!   `w16a16`), with the accumulator bound check;
//!   [`rounding`]: data-aware weight rounding (error feedback, bias
//!   correction);
//! - [`blob`]: the device blob (`.lwq`) encoder and aligned loading;
//!   [`output`]: atomic output files;
//! - [`pipeline`]: the file-to-file steps the CLI runs;
//! - [`report`]: float vs device code on the same data, tensor by tensor,
//!   with drift and footprint; [`metrics`]: SQNR, RMSE, cosine;
//!   [`plot`]: its SVG figures; [`budget`]: the error budget a CI checks;
//! - [`sweep`]: every scheme x cell x table against a budget;
//! - [`inspect`]: what a blob holds; [`codegen`]: the firmware module;
//! - [`scenario`]: the invented demo scenario's data sets; [`fit`]: training
//!   a float predictor; [`export`]: writing it as safetensors;
//!   [`detector`]: calibration, float twin and evaluation of the anomaly
//!   detector; [`demo`]: the whole pipeline on the demo scenario;
//! - [`synth`], [`example`]: seeded models and signals, the built-in example.
//!
//! The quantized path always runs the core's device code
//! ([`lapwing::quant::QModel::step`]): what the host reports is what the chip
//! computes.
//!
//! No panic on user input: outside tests, clippy denies `unwrap`, `expect`,
//! `panic!`, `unreachable!`, `todo!` and the printing macros (which panic on
//! a closed pipe); files, options and data are
//! checked and refused with an error naming the file and the problem
//! (`tools/tests/bad_inputs.rs`, the fuzz targets in `fuzz/`). The modules
//! that read files also deny unchecked indexing and slicing (`get`,
//! iterators, `chunks_exact`); the numeric modules index buffers whose sizes
//! they build themselves from checked shapes.
#![cfg_attr(
    not(test),
    deny(
        clippy::unwrap_used,
        clippy::expect_used,
        clippy::panic,
        clippy::unreachable,
        clippy::todo,
        clippy::print_stdout,
        clippy::print_stderr
    )
)]

#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod blob;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod budget;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod calibrate;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod codegen;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod data;
pub mod demo;
pub mod detector;
pub mod example;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod export;
pub mod fit;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod float_model;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod import;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod inspect;
pub mod metrics;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod onnx;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod output;
#[cfg_attr(not(test), deny(clippy::indexing_slicing))]
pub mod pipeline;
pub mod plot;
pub mod quantize;
pub mod report;
pub mod rounding;
pub mod scenario;
pub mod sweep;
pub mod synth;
