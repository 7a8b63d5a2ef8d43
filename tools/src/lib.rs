//! `lapwing-tools`: the host side of Lapwing.
//!
//! One module per job, each with typed options and results, so the CLI, the
//! tests and the demo call the same functions:
//! - [`float_model`]: owned float weights (what importers produce), input
//!   normalization folding, views for the core's float reference;
//! - [`calibrate`]: ranges observed by running the float model over data;
//! - [`quantize`]: float model + ranges -> integer model (scheme `w8a16`),
//!   with the accumulator bound check;
//! - [`metrics`]: SQNR, RMSE, cosine similarity;
//! - [`synth`]: seeded random models and signals for tests and the built-in
//!   example;
//! - [`compare`]: runs float and integer side by side on the same data;
//! - [`example`]: the built-in quantize-and-compare example.
//!
//! The quantized path always runs the core's device code
//! ([`lapwing::quant::QModel::step`]): what the host reports is what the chip
//! computes.

pub mod blob;
pub mod budget;
pub mod calibrate;
pub mod codegen;
pub mod data;
pub mod example;
pub mod float_model;
pub mod import;
pub mod inspect;
pub mod metrics;
pub mod output;
pub mod pipeline;
pub mod plot;
pub mod quantize;
pub mod report;
pub mod sweep;
pub mod synth;
