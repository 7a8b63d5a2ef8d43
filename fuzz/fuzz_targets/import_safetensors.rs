//! Any bytes as a `.safetensors` model file -> `import` (detected layout and
//! each forced layout); a model that imports goes on through calibration,
//! quantization (every scheme), encoding, parsing and a few steps.
#![no_main]

use lapwing_fuzz::import_chain;
use lapwing_tools::import::Layout;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    import_chain("model.safetensors", data, &[None, Some(Layout::Lapwing), Some(Layout::Split), Some(Layout::Fused)]);
});
