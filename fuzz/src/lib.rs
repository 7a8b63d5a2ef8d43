//! Helpers shared by the fuzz targets: a scratch file per process (the
//! importers and data readers take paths, as the CLI does), aligned blob
//! storage, inputs derived from the fuzz bytes, and the chain a user's file
//! goes through after import (calibrate, quantize, encode, parse, step).

use lapwing::model::Blob;
use lapwing_tools::blob::AlignedBytes;
use lapwing_tools::calibrate::observe;
use lapwing_tools::float_model::FloatModelData;
use lapwing_tools::quantize::{quantize, QuantOptions};
use std::path::PathBuf;

/// A scratch path `fuzz-<pid>/<name>` in a RAM-backed directory when there
/// is one (`/dev/shm`), else the system temporary directory. The directory
/// is created once; each run overwrites the file.
pub fn scratch(name: &str) -> PathBuf {
    let base = if std::path::Path::new("/dev/shm").is_dir() { PathBuf::from("/dev/shm") } else { std::env::temp_dir() };
    let dir = base.join(format!("lapwing-fuzz-{}", std::process::id()));
    let _ = std::fs::create_dir_all(&dir);
    dir.join(name)
}

/// Writes `data` to the scratch file `name` and returns its path.
pub fn scratch_file(name: &str, data: &[u8]) -> PathBuf {
    let p = scratch(name);
    std::fs::write(&p, data).expect("write the scratch file");
    p
}

/// A small deterministic generator seeded from the fuzz bytes (xorshift64*).
pub struct Rng(u64);

impl Rng {
    /// Seeded from every byte of `data` (FNV-1a).
    pub fn from_bytes(data: &[u8]) -> Rng {
        let mut h: u64 = 0xcbf2_9ce4_8422_2325;
        for b in data {
            h = (h ^ u64::from(*b)).wrapping_mul(0x0100_0000_01b3);
        }
        Rng(h | 1)
    }

    /// Next 64 random bits.
    pub fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }

    /// An `i16`, with the extremes and zero over-represented.
    pub fn i16(&mut self) -> i16 {
        match self.next() % 8 {
            0 => i16::MIN,
            1 => i16::MAX,
            2 => 0,
            _ => self.next() as i16,
        }
    }

    /// A finite `f32` of any magnitude up to about `1e6`, sometimes large.
    pub fn f32(&mut self) -> f32 {
        let m = (self.next() % 2_000_001) as f32 / 1_000_000.0 - 1.0;
        match self.next() % 8 {
            0 => m * 1e6,
            1 => 0.0,
            _ => m * 4.0,
        }
    }
}

/// Steps a parsed blob `steps` times on inputs from `rng` (and its detector
/// on the same inputs when it has one), checking the state invariants the
/// core promises: every call succeeds (the buffers are the right size) and
/// every hidden value stays inside the symmetric clamp of its format.
pub fn step_blob(blob: &Blob<'_>, rng: &mut Rng, steps: usize) {
    let m = blob.model();
    let mut state = vec![0i16; m.state_words()];
    let mut x = vec![0i16; m.input_len()];
    let mut y = vec![0i16; m.output_len()];
    let mut y_prev = y.clone();
    let mut det = lapwing::detect::DetectorState::new();
    for _ in 0..steps {
        for v in &mut x {
            *v = rng.i16();
        }
        m.step(&mut state, &x, &mut y).expect("a parsed blob steps with correctly sized buffers");
        check_hidden(blob, &state);
        if let Some(d) = blob.detector() {
            d.update(&mut det, &x, &y_prev).expect("the detector takes the model's own sizes");
        }
        y_prev.copy_from_slice(&y);
    }
    // Wrong sizes are errors, never panics.
    let short = state.len().saturating_sub(1);
    assert!(m.step(&mut state[..short], &x, &mut y).is_err());
    if !x.is_empty() {
        assert!(m.step(&mut state, &x[1..], &mut y).is_err());
    }
}

/// Every layer's hidden state within `[-MAX, MAX]` of its element type
/// (Q0.15 `i16`, or Q0.7 `i8` two per word for `w8a8`).
fn check_hidden(blob: &Blob<'_>, state: &[i16]) {
    use lapwing::quant::Scheme;
    let m = blob.model();
    let scheme = m.scheme();
    let cw = m.cell().words();
    let mut at = 0usize;
    for (k, l) in m.layers().iter().enumerate() {
        let hw = scheme.hidden_words(l.hidden());
        let words = &state[at..at + hw];
        match scheme {
            Scheme::W8A8 => {
                // Two i8 values per word, in memory order (as the core casts).
                let bytes = words.iter().flat_map(|w| w.to_ne_bytes()).map(|b| b as i8);
                for (j, v) in bytes.take(l.hidden()).enumerate() {
                    assert!(v != i8::MIN, "layer {k} hidden[{j}] = {v} is outside the Q0.7 clamp");
                }
            }
            _ => {
                for (j, v) in words.iter().enumerate() {
                    assert!(*v != i16::MIN, "layer {k} hidden[{j}] = {v} is outside the Q0.15 clamp");
                }
            }
        }
        at += hw + l.hidden() * cw;
    }
}

/// What the CLI does with an imported model, on a few rows from `rng`:
/// calibrate, quantize (every scheme), encode, parse the bytes back and
/// step them. Errors are fine (a user's model may be unquantizable); a panic
/// is a bug. Models with more than `max_weights` weights are skipped to keep
/// the fuzzer fast.
pub fn quantize_chain(model: &FloatModelData, rng: &mut Rng, max_weights: usize) {
    let weights: usize = model.layers.iter().map(|l| l.w_x.len() + l.w_h.len()).sum();
    if weights > max_weights || model.input_len() == 0 {
        return;
    }
    let rows: Vec<Vec<f32>> = (0..8).map(|_| (0..model.input_len()).map(|_| rng.f32()).collect()).collect();
    let Ok(ranges) = observe(model, &rows) else { return };
    for scheme in lapwing::quant::Scheme::ALL {
        let opts = QuantOptions { scheme, ..QuantOptions::default() };
        let Ok(q) = quantize(model, &ranges, &opts) else { continue };
        let Ok(bytes) = lapwing_tools::blob::encode(&q) else { continue };
        let aligned = AlignedBytes::from_bytes(&bytes);
        let blob = Blob::parse(aligned.bytes()).expect("an encoded blob parses");
        step_blob(&blob, rng, 4);
    }
}

/// Any bytes written to `name` -> `import` with each of `layouts` (`None`:
/// detected); a model that imports goes on through [`quantize_chain`]; an
/// error must be one line starting with the file name.
pub fn import_chain(name: &str, data: &[u8], layouts: &[Option<lapwing_tools::import::Layout>]) {
    use lapwing_tools::import::{import, ImportOptions};
    let path = scratch_file(name, data);
    let mut rng = Rng::from_bytes(data);
    for layout in layouts {
        let opts = ImportOptions { layout: *layout, ..ImportOptions::default() };
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
                let msg = format!("{e:#}");
                assert!(msg.starts_with(&path.display().to_string()), "{msg}");
                assert!(!msg.contains('\n'), "{msg}");
            }
        }
    }
}

/// Reads `path` as data; on success checks what [`lapwing_tools::data::read`]
/// promises (rows of `columns.len()` finite values, at least one row and one
/// column, a 0/1 label per row or none); on failure checks the message
/// names the file. Also streams it once more with the row callback.
pub fn check_dataset(path: &std::path::Path) {
    match lapwing_tools::data::read(path, false) {
        Ok(d) => {
            assert!(!d.rows.is_empty() && !d.columns.is_empty());
            for r in &d.rows {
                assert_eq!(r.len(), d.columns.len());
                assert!(r.iter().all(|v| v.is_finite()));
            }
            if let Some(l) = &d.labels {
                assert_eq!(l.len(), d.rows.len());
                assert!(l.iter().all(|v| *v <= 1));
            }
            let _ = d.expect_features(d.columns.len() + 1);
        }
        Err(e) => {
            let msg = format!("{e:#}");
            let name = path.display().to_string();
            assert!(msg.contains(&name), "{msg}");
        }
    }
}
