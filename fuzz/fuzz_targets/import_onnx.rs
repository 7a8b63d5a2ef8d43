//! Any bytes as an `.onnx` model file -> `import`; a model that imports goes
//! on through calibration, quantization (every scheme), encoding, parsing
//! and a few steps. Seeds: the ONNX Runtime reference models of
//! `tests/data/onnx/` (hand-built, exported and refused ones).
#![no_main]

use lapwing_fuzz::{quantize_chain, scratch_file, Rng};
use lapwing_tools::import::{import, ImportOptions};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let path = scratch_file("model.onnx", data);
    let mut rng = Rng::from_bytes(data);
    match import(&path, &ImportOptions::default()) {
        Ok(imp) => {
            let _ = imp.summary();
            quantize_chain(&imp.model, &mut rng, 1 << 14);
        }
        Err(e) => {
            // One line, naming the file.
            let msg = format!("{e:#}");
            assert!(msg.starts_with(&path.display().to_string()), "{msg}");
            assert!(!msg.contains('\n'), "{msg}");
        }
    }
});
