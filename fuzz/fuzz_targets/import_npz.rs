//! Any bytes as a NumPy `.npz` archive -> `import` (detected layout and
//! each forced layout); a model that imports goes on through calibration,
//! quantization (every scheme), encoding, parsing and a few steps.
#![no_main]

use lapwing_fuzz::{quantize_chain, scratch_file, Rng};
use lapwing_tools::import::{import, ImportOptions, Layout};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let path = scratch_file("model.npz", data);
    let mut rng = Rng::from_bytes(data);
    let layouts = [None, Some(Layout::Lapwing), Some(Layout::Split), Some(Layout::Fused)];
    for layout in layouts {
        let opts = ImportOptions { layout, ..ImportOptions::default() };
        match import(&path, &opts) {
            Ok(imp) => {
                let _ = imp.summary();
                let mut model = imp.model.clone();
                if let Some(n) = &imp.norm {
                    let _ = model.fold_normalization(&n.mean, &n.std);
                }
                quantize_chain(&model, &mut rng, 1 << 14);
            }
            Err(e) => {
                // One line, naming the file.
                let msg = format!("{e:#}");
                assert!(msg.starts_with(&path.display().to_string()), "{msg}");
            }
        }
    }
});
