//! Float model export: writes a [`FloatModelData`] (and optionally its input
//! normalization) as a safetensors file in Lapwing's own layout, the layout
//! [`crate::import`] reads back as [`crate::import::Layout::Lapwing`].
//!
//! # Format
//!
//! Every tensor is little-endian `float32`, row-major, gate order `i, f, g, o`
//! (DESIGN.md section 4):
//!
//! | name | shape |
//! |---|---|
//! | `layers.{k}.w_x` | `[4H, X_k]` (`X_0 = X`, `X_k = H` after layer 0) |
//! | `layers.{k}.w_h` | `[4H, H]` |
//! | `layers.{k}.b` | `[4H]` (one folded bias) |
//! | `head.w`, `head.b` | `[Y, H]`, `[Y]` (only if the model has a head) |
//! | `norm.mean`, `norm.std` | `[X]` (only if a normalization is given) |
//!
//! The normalization is stored as given, not folded into layer 0: the model's
//! layer 0 expects `x_n = (x - mean) / std`, and a reader folds it
//! ([`FloatModelData::fold_normalization`]) to take raw inputs.
//!
//! The bytes are deterministic: tensors are sorted by name (the safetensors
//! writer orders them by dtype, then name; all are `float32`), there is no
//! `__metadata__` entry and no timestamp, so the same weights always give the
//! same file. Values are written bit for bit, so [`crate::import::import`]
//! returns exactly the saved weights.

use std::path::Path;

use anyhow::{bail, Context, Result};
use safetensors::{Dtype, View};
use std::borrow::Cow;

use crate::float_model::FloatModelData;
use crate::import::Normalization;

/// One tensor to write: its name, shape and little-endian bytes.
struct Tensor {
    shape: Vec<usize>,
    bytes: Vec<u8>,
}

impl Tensor {
    fn new(shape: Vec<usize>, values: &[f32]) -> Tensor {
        Tensor { shape, bytes: values.iter().flat_map(|v| v.to_le_bytes()).collect() }
    }
}

impl View for &Tensor {
    fn dtype(&self) -> Dtype {
        Dtype::F32
    }
    fn shape(&self) -> &[usize] {
        &self.shape
    }
    fn data(&self) -> Cow<'_, [u8]> {
        Cow::Borrowed(&self.bytes)
    }
    fn data_len(&self) -> usize {
        self.bytes.len()
    }
}

/// The safetensors bytes [`save_safetensors`] writes (see the module docs).
///
/// # Errors
/// As [`save_safetensors`], without the I/O errors.
pub fn to_safetensors_bytes(model: &FloatModelData, norm: Option<&Normalization>) -> Result<Vec<u8>> {
    model.view().context("cannot export the model")?;
    model.check_finite().context("cannot export the model")?;
    let mut tensors: Vec<(String, Tensor)> = Vec::new();
    for (k, l) in model.layers.iter().enumerate() {
        let rows = 4 * l.hidden;
        tensors.push((format!("layers.{k}.w_x"), Tensor::new(vec![rows, l.input], &l.w_x)));
        tensors.push((format!("layers.{k}.w_h"), Tensor::new(vec![rows, l.hidden], &l.w_h)));
        tensors.push((format!("layers.{k}.b"), Tensor::new(vec![rows], &l.b)));
    }
    if let Some(h) = &model.head {
        tensors.push(("head.w".to_string(), Tensor::new(vec![h.output, h.input], &h.w)));
        tensors.push(("head.b".to_string(), Tensor::new(vec![h.output], &h.b)));
    }
    if let Some(n) = norm {
        let x = model.input_len();
        if n.mean.len() != x || n.std.len() != x {
            bail!(
                "cannot export the normalization: {} means and {} stds, the model takes {x} features",
                n.mean.len(),
                n.std.len()
            );
        }
        if let Some((i, m)) = n.mean.iter().enumerate().find(|(_, m)| !m.is_finite()) {
            bail!("cannot export the normalization: norm.mean[{i}] = {m} is not finite");
        }
        if let Some((i, s)) = n.std.iter().enumerate().find(|(_, s)| !(s.is_finite() && **s > 0.0)) {
            bail!("cannot export the normalization: norm.std[{i}] = {s} must be finite and positive");
        }
        tensors.push(("norm.mean".to_string(), Tensor::new(vec![x], &n.mean)));
        tensors.push(("norm.std".to_string(), Tensor::new(vec![x], &n.std)));
    }
    tensors.sort_by(|a, b| a.0.cmp(&b.0));
    let views = tensors.iter().map(|(name, t)| (name.as_str(), t));
    safetensors::serialize(views, &None).map_err(|e| anyhow::anyhow!("cannot serialize the model: {e}"))
}

/// Writes `model` (and `norm`, if given) to `path` as safetensors in
/// Lapwing's layout (see the module docs), atomically: `path` either keeps its
/// old content or gets the whole new file.
///
/// # Errors
/// Shapes that do not form a model, a NaN or infinite weight (named), a
/// normalization whose length is not the model's input count or whose `std`
/// is not finite and positive, a destination directory that does not exist,
/// or an I/O error.
pub fn save_safetensors(model: &FloatModelData, norm: Option<&Normalization>, path: &Path) -> Result<()> {
    let bytes = to_safetensors_bytes(model, norm).with_context(|| format!("{}", path.display()))?;
    crate::output::write_atomic(path, &bytes)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::import::{import, Layout};
    use crate::synth::{random_model, ModelSpec};

    fn bits(v: &[f32]) -> Vec<u32> {
        v.iter().map(|x| x.to_bits()).collect()
    }

    fn assert_same(a: &FloatModelData, b: &FloatModelData) {
        assert_eq!(a.layers.len(), b.layers.len());
        for (la, lb) in a.layers.iter().zip(&b.layers) {
            assert_eq!((la.input, la.hidden), (lb.input, lb.hidden));
            assert_eq!(bits(&la.w_x), bits(&lb.w_x));
            assert_eq!(bits(&la.w_h), bits(&lb.w_h));
            assert_eq!(bits(&la.b), bits(&lb.b));
        }
        match (&a.head, &b.head) {
            (Some(ha), Some(hb)) => {
                assert_eq!((ha.input, ha.output), (hb.input, hb.output));
                assert_eq!(bits(&ha.w), bits(&hb.w));
                assert_eq!(bits(&ha.b), bits(&hb.b));
            }
            (None, None) => {}
            _ => panic!("head present on one side only"),
        }
    }

    #[test]
    fn save_then_import_is_bit_identical() {
        let dir = tempfile::tempdir().unwrap();
        let model = random_model(&ModelSpec { input: 4, hidden: 6, layers: 2, output: Some(4), gain: 1.7 }, 3);
        let norm = Normalization { mean: vec![0.1, -3.5, 1e-7, 250.0], std: vec![1.0, 0.003, 7.25, 1e4] };
        let p = dir.path().join("m.safetensors");
        save_safetensors(&model, Some(&norm), &p).unwrap();
        let got = import(&p, &Default::default()).unwrap();
        assert_eq!(got.layout, Layout::Lapwing);
        assert!(got.ignored.is_empty());
        assert_same(&model, &got.model);
        let gn = got.norm.unwrap();
        assert_eq!(bits(&gn.mean), bits(&norm.mean));
        assert_eq!(bits(&gn.std), bits(&norm.std));

        // Without head and normalization.
        let bare = random_model(&ModelSpec { input: 1, hidden: 3, layers: 1, output: None, gain: 1.0 }, 9);
        let p2 = dir.path().join("bare.safetensors");
        save_safetensors(&bare, None, &p2).unwrap();
        let got = import(&p2, &Default::default()).unwrap();
        assert_same(&bare, &got.model);
        assert!(got.norm.is_none());
    }

    #[test]
    fn bytes_are_deterministic() {
        let model = random_model(&ModelSpec { input: 3, hidden: 4, layers: 3, output: Some(2), gain: 1.0 }, 5);
        let norm = Normalization { mean: vec![0.0; 3], std: vec![1.0; 3] };
        let a = to_safetensors_bytes(&model, Some(&norm)).unwrap();
        let b = to_safetensors_bytes(&model.clone(), Some(&norm.clone())).unwrap();
        assert_eq!(a, b);
        let header_len = u64::from_le_bytes(a[..8].try_into().unwrap()) as usize;
        let header = std::str::from_utf8(&a[8..8 + header_len]).unwrap();
        assert!(!header.contains("__metadata__"), "{header}");
        let order: Vec<usize> =
            ["head.b", "head.w", "layers.0.b", "layers.0.w_h", "layers.0.w_x", "layers.2.w_x", "norm.std"]
                .iter()
                .map(|n| header.find(&format!("\"{n}\"")).unwrap())
                .collect();
        assert!(order.windows(2).all(|w| w[0] < w[1]), "tensors not sorted by name: {header}");
    }

    #[test]
    fn bad_inputs_are_refused_and_nothing_is_written() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("m.safetensors");
        let mut model = random_model(&ModelSpec { input: 2, hidden: 2, layers: 1, output: Some(2), gain: 1.0 }, 1);
        let short = Normalization { mean: vec![0.0], std: vec![1.0] };
        let e = save_safetensors(&model, Some(&short), &p).unwrap_err();
        assert!(format!("{e:#}").contains("1 means"), "{e:#}");
        let zero = Normalization { mean: vec![0.0; 2], std: vec![1.0, 0.0] };
        let e = save_safetensors(&model, Some(&zero), &p).unwrap_err();
        assert!(format!("{e:#}").contains("norm.std[1]"), "{e:#}");
        let e = save_safetensors(&model, None, &dir.path().join("no/such/dir.safetensors")).unwrap_err();
        assert!(format!("{e:#}").contains("does not exist"), "{e:#}");
        model.layers[0].w_h[2] = f32::INFINITY;
        let e = save_safetensors(&model, None, &p).unwrap_err();
        assert!(format!("{e:#}").contains("layers.0.w_h[2]"), "{e:#}");
        assert!(!p.exists());
    }
}
