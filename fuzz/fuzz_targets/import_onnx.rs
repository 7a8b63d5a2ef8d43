//! Any bytes as an `.onnx` model file -> `import`; a model that imports goes
//! on through calibration, quantization (every scheme), encoding, parsing
//! and a few steps. Seeds: the ONNX Runtime reference models of
//! `tests/data/onnx/` (hand-built, exported and refused ones).
#![no_main]

use lapwing_fuzz::import_chain;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    import_chain("model.onnx", data, &[None]);
});
