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

pub mod blob;
pub mod budget;
pub mod calibrate;
pub mod codegen;
pub mod data;
pub mod demo;
pub mod detector;
pub mod example;
pub mod export;
pub mod fit;
pub mod float_model;
pub mod import;
pub mod inspect;
pub mod metrics;
pub mod onnx;
pub mod output;
pub mod pipeline;
pub mod plot;
pub mod quantize;
pub mod report;
pub mod rounding;
pub mod scenario;
pub mod sweep;
pub mod synth;
