//! The importer on every tensor layout and container, and its error messages.
//!
//! Outside reference: `tests/data/golden/x4_h16_l2_head.json` holds the
//! weights, inputs and outputs `y` of PyTorch `nn.LSTM` + `nn.Linear`,
//! computed by `tools/golden/make_lstm_golden.py`; the same weights were
//! exported by PyTorch to `x4_h16_l2_head.safetensors` / `.npz` (split layout)
//! and rewritten into the other layouts under `tests/data/layouts/` by
//! `tools/golden/make_layout_variants.py`.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use lapwing_tools::float_model::{run_float, FloatModelData};
use lapwing_tools::import::{import, Container, ImportOptions, Imported, Layout, MAX_TENSOR_ELEMENTS};
use safetensors::tensor::TensorView;
use safetensors::{Dtype, SafeTensors};
use serde::Deserialize;

/// DESIGN.md section 9: the float model agrees with PyTorch to 1e-5 absolute.
const TOLERANCE: f32 = 1e-5;

#[derive(Deserialize)]
struct GoldenLayer {
    input_size: usize,
    w_x: Vec<f32>,
    w_h: Vec<f32>,
    b_ih: Vec<f32>,
    b_hh: Vec<f32>,
}

#[derive(Deserialize)]
struct GoldenHead {
    w: Vec<f32>,
    b: Vec<f32>,
}

#[derive(Deserialize)]
struct Golden {
    source: String,
    hidden_size: usize,
    layers: Vec<GoldenLayer>,
    head: Option<GoldenHead>,
    inputs: Vec<Vec<f32>>,
    y: Option<Vec<Vec<f32>>>,
}

fn data_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/data")
}

fn golden() -> Golden {
    let path = data_dir().join("golden/x4_h16_l2_head.json");
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let g: Golden = serde_json::from_str(&text).unwrap();
    assert!(g.source.contains("PyTorch nn.LSTM"), "unexpected source {}", g.source);
    g
}

fn bits(v: &[f32]) -> Vec<u32> {
    v.iter().map(|x| x.to_bits()).collect()
}

/// The imported weights are exactly PyTorch's: `w_x`, `w_h` and the head
/// bit for bit, and `b = b_ih + b_hh` added in f32 (the order every importer
/// and the variants script use), so also bit for bit.
fn assert_same_weights(m: &FloatModelData, g: &Golden, what: &str) {
    assert_eq!(m.layers.len(), g.layers.len(), "{what}: layer count");
    for (k, (l, gl)) in m.layers.iter().zip(&g.layers).enumerate() {
        assert_eq!((l.input, l.hidden), (gl.input_size, g.hidden_size), "{what}: layer {k} dims");
        assert_eq!(bits(&l.w_x), bits(&gl.w_x), "{what}: layer {k} w_x");
        assert_eq!(bits(&l.w_h), bits(&gl.w_h), "{what}: layer {k} w_h");
        let b: Vec<f32> = gl.b_ih.iter().zip(&gl.b_hh).map(|(a, b)| a + b).collect();
        assert_eq!(bits(&l.b), bits(&b), "{what}: layer {k} b");
    }
    let (h, gh) = (m.head.as_ref().expect("head"), g.head.as_ref().unwrap());
    assert_eq!((h.input, h.output), (g.hidden_size, gh.b.len()), "{what}: head dims");
    assert_eq!(bits(&h.w), bits(&gh.w), "{what}: head w");
    assert_eq!(bits(&h.b), bits(&gh.b), "{what}: head b");
}

/// Runs `model` over `inputs` and compares with PyTorch's `y`.
fn assert_matches_pytorch(model: &FloatModelData, inputs: &[Vec<f32>], y: &[Vec<f32>], tol: f32, what: &str) {
    let out = run_float(model, inputs).unwrap();
    assert_eq!(out.len(), y.len());
    let mut worst = 0.0f32;
    for (t, (got, want)) in out.iter().zip(y).enumerate() {
        assert_eq!(got.len(), want.len());
        for (a, b) in got.iter().zip(want) {
            let d = (a - b).abs();
            assert!(d <= tol, "{what}: step {t}: {a} vs PyTorch {b} (|diff| {d} > {tol})");
            worst = worst.max(d);
        }
    }
    println!("{what}: max |y - PyTorch y| = {worst:.2e}");
}

fn import_auto(path: &Path) -> Imported {
    import(path, &ImportOptions::default()).unwrap_or_else(|e| panic!("{e:#}"))
}

#[test]
fn every_layout_and_container_imports_to_the_pytorch_weights() {
    let g = golden();
    let d = data_dir();
    let cases: [(&str, Layout, Container, &[&str]); 7] = [
        ("golden/x4_h16_l2_head.safetensors", Layout::Split, Container::Safetensors, &[]),
        ("golden/x4_h16_l2_head.npz", Layout::Split, Container::Npz, &[]),
        ("layouts/x4_h16_l2_split_npy", Layout::Split, Container::NpyDir, &[]),
        ("layouts/x4_h16_l2_lapwing.safetensors", Layout::Lapwing, Container::Safetensors, &[]),
        ("layouts/x4_h16_l2_fused.npz", Layout::Fused, Container::Npz, &[]),
        ("layouts/x4_h16_l2_fused_compressed.npz", Layout::Fused, Container::Npz, &[]),
        ("layouts/x4_h16_l2_fused.safetensors", Layout::Fused, Container::Safetensors, &["training/step"]),
    ];
    for (file, layout, container, ignored) in cases {
        let imp = import_auto(&d.join(file));
        assert_eq!(imp.layout, layout, "{file}");
        assert_eq!(imp.container, container, "{file}");
        assert_eq!(imp.ignored, ignored, "{file}");
        assert!(imp.norm.is_none(), "{file}");
        assert_same_weights(&imp.model, &g, file);
        assert_matches_pytorch(&imp.model, &g.inputs, g.y.as_ref().unwrap(), TOLERANCE, file);
        let s = imp.summary();
        println!("{file}:\n{s}");
        for part in [layout.name(), layout.source_gate_order(), "2 layers", "X=4", "H=16,16", "head Y=2"] {
            assert!(s.contains(part), "{file}: summary lacks `{part}`:\n{s}");
        }
        assert!(s.contains("normalization: no"), "{s}");
        if !ignored.is_empty() {
            assert!(s.contains("ignored 1 tensor") && s.contains("`training/step`"), "{s}");
        }
    }
    // The prefixes and groups that were found are reported.
    let s = import_auto(&d.join("golden/x4_h16_l2_head.safetensors")).summary();
    assert!(s.contains("LSTM prefix `rnn`") && s.contains("head `proj`") && s.contains("bias_ih + bias_hh"), "{s}");
    let s = import_auto(&d.join("layouts/x4_h16_l2_fused.npz")).summary();
    assert!(s.contains("`lstm`, `lstm_1`") && s.contains("head group `dense`"), "{s}");
}

#[test]
fn lapwing_normalization_is_returned_and_folds_to_the_same_outputs() {
    let g = golden();
    let imp = import_auto(&data_dir().join("layouts/x4_h16_l2_lapwing_norm.safetensors"));
    assert_eq!(imp.layout, Layout::Lapwing);
    // NORM_MEAN / NORM_STD in tools/golden/make_layout_variants.py.
    let (mean, std) = (vec![0.25f32, -1.5, 3.0, 0.0], vec![2.0f32, 0.5, 4.0, 1.25]);
    let norm = imp.norm.clone().expect("norm");
    assert_eq!((norm.mean.clone(), norm.std.clone()), (mean.clone(), std.clone()));
    assert!(imp.summary().contains("normalization: yes"));
    assert_same_weights(&imp.model, &g, "lapwing_norm");
    // Raw inputs x * std + mean, fed to the model with the normalization
    // folded into layer 0, give PyTorch's outputs for x. Building the raw
    // inputs and folding (W / std, the bias shift) each round in f32, so this
    // differs from the unfolded run by a few ulps (2.4e-7 measured), well
    // inside the tolerance.
    let raw: Vec<Vec<f32>> =
        g.inputs.iter().map(|x| x.iter().zip(&mean).zip(&std).map(|((v, m), s)| v * s + m).collect()).collect();
    let mut folded = imp.model.clone();
    folded.fold_normalization(&norm.mean, &norm.std).unwrap();
    assert_matches_pytorch(&folded, &raw, g.y.as_ref().unwrap(), TOLERANCE, "lapwing_norm folded");
}

// ---------------------------------------------------------------------------
// Helpers writing modified safetensors files

type Tensors = BTreeMap<String, (Dtype, Vec<usize>, Vec<u8>)>;

fn read_tensors(path: &Path) -> Tensors {
    let bytes = std::fs::read(path).unwrap();
    let st = SafeTensors::deserialize(&bytes).unwrap();
    st.tensors().into_iter().map(|(n, v)| (n, (v.dtype(), v.shape().to_vec(), v.data().to_vec()))).collect()
}

fn f32_tensor(shape: &[usize], values: &[f32]) -> (Dtype, Vec<usize>, Vec<u8>) {
    assert_eq!(shape.iter().product::<usize>(), values.len());
    (Dtype::F32, shape.to_vec(), values.iter().flat_map(|v| v.to_le_bytes()).collect())
}

fn set_f32(t: &mut Tensors, name: &str, index: usize, value: f32) {
    let (_, _, data) = t.get_mut(name).unwrap();
    data[4 * index..4 * index + 4].copy_from_slice(&value.to_le_bytes());
}

fn write_tensors(dir: &Path, file: &str, t: &Tensors) -> PathBuf {
    let views: Vec<(String, TensorView<'_>)> = t
        .iter()
        .map(|(n, (dt, shape, data))| (n.clone(), TensorView::new(*dt, shape.clone(), data).unwrap()))
        .collect();
    let bytes = safetensors::serialize(views, &None).unwrap();
    let path = dir.join(file);
    std::fs::write(&path, bytes).unwrap();
    path
}

fn split_tensors() -> Tensors {
    read_tensors(&data_dir().join("golden/x4_h16_l2_head.safetensors"))
}

/// The error of importing `path`, checked to start with the path.
fn import_err(path: &Path, opts: &ImportOptions) -> String {
    let e = match import(path, opts) {
        Ok(imp) => panic!("{} imported but should not have:\n{}", path.display(), imp.summary()),
        Err(e) => format!("{e:#}"),
    };
    assert!(e.starts_with(&path.display().to_string()), "error does not start with the path: {e}");
    println!("{e}");
    e
}

fn assert_has(e: &str, parts: &[&str]) {
    for p in parts {
        assert!(e.contains(p), "error lacks `{p}`: {e}");
    }
}

fn forced(layout: Layout) -> ImportOptions {
    ImportOptions { layout: Some(layout), ..ImportOptions::default() }
}

#[test]
fn forcing_the_wrong_layout_says_what_the_file_looks_like() {
    let d = data_dir();
    let split = d.join("golden/x4_h16_l2_head.safetensors");
    let e = import_err(&split, &forced(Layout::Fused));
    assert_has(&e, &["x4_h16_l2_head.safetensors", "layout fused", "missing tensor", "recurrent_kernel", "split"]);
    let e = import_err(&split, &forced(Layout::Lapwing));
    assert_has(&e, &["layout lapwing", "not part of the lapwing layout", "`rnn.bias_hh_l0`", "look like the split"]);
    let fused = d.join("layouts/x4_h16_l2_fused.npz");
    let e = import_err(&fused, &forced(Layout::Split));
    assert_has(&e, &["x4_h16_l2_fused.npz", "layout split", "missing tensor", "weight_ih_l0", "fused layout"]);
    // Forcing the right layout works.
    assert_eq!(import(&fused, &forced(Layout::Fused)).unwrap().layout, Layout::Fused);
}

#[test]
fn missing_tensor_is_named_with_its_layout() {
    let dir = tempfile::tempdir().unwrap();
    let mut t = split_tensors();
    t.remove("rnn.weight_hh_l1");
    let p = write_tensors(dir.path(), "no_whh1.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["no_whh1.safetensors", "missing tensor `rnn.weight_hh_l1`", "layer 1", "split layout"]);

    let mut t = split_tensors();
    t.remove("rnn.bias_hh_l0");
    let p = write_tensors(dir.path(), "half_bias.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["missing tensor `rnn.bias_hh_l0`", "both biases or neither"]);

    // Both biases absent is fine: zero.
    let mut t = split_tensors();
    for k in 0..2 {
        t.remove(&format!("rnn.bias_ih_l{k}"));
        t.remove(&format!("rnn.bias_hh_l{k}"));
    }
    let p = write_tensors(dir.path(), "no_bias.safetensors", &t);
    let imp = import_auto(&p);
    assert!(imp.model.layers.iter().all(|l| l.b.iter().all(|b| *b == 0.0)));
    assert!(imp.summary().contains("no biases in layer 0,1 (zero)"), "{}", imp.summary());

    let mut t = read_tensors(&data_dir().join("layouts/x4_h16_l2_lapwing.safetensors"));
    t.remove("head.b");
    let p = write_tensors(dir.path(), "lap_no_head_b.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["missing tensor `head.b`", "lapwing layout"]);
}

#[test]
fn wrong_shapes_give_expected_and_found_dims() {
    let dir = tempfile::tempdir().unwrap();
    let mut t = split_tensors();
    t.insert("rnn.weight_hh_l0".into(), f32_tensor(&[64, 15], &[0.1; 64 * 15]));
    let p = write_tensors(dir.path(), "whh_64x15.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["whh_64x15.safetensors", "`rnn.weight_hh_l0`", "[64, 15]", "expected [4H=64, H=16]"]);

    let mut t = split_tensors();
    t.insert("rnn.weight_hh_l0".into(), f32_tensor(&[62, 16], &[0.1; 62 * 16]));
    let p = write_tensors(dir.path(), "whh_62.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["`rnn.weight_hh_l0`", "[62, 16]", "4H = 62 is not a positive multiple of 4"]);

    let mut t = split_tensors();
    t.insert("rnn.bias_ih_l1".into(), f32_tensor(&[66], &[0.1; 66]));
    let p = write_tensors(dir.path(), "bias_66.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["`rnn.bias_ih_l1`", "4H = 66 is not a positive multiple of 4"]);

    let mut t = split_tensors();
    t.insert("rnn.weight_ih_l0".into(), f32_tensor(&[64], &[0.1; 64]));
    let p = write_tensors(dir.path(), "wih_1d.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["`rnn.weight_ih_l0`", "[64]", "expected [4H=64, X]"]);

    // Forced head prefix with the wrong output shape.
    let mut t = split_tensors();
    t.insert("proj.bias".into(), f32_tensor(&[3], &[0.0; 3]));
    let p = write_tensors(dir.path(), "head_b3.safetensors", &t);
    let opts = ImportOptions { head_prefix: Some("proj".into()), ..ImportOptions::default() };
    let e = import_err(&p, &opts);
    assert_has(&e, &["`proj.bias`", "[3]", "expected [Y=2]"]);
    // Without the option, a weight + bias pair whose shapes do not fit is
    // refused rather than silently dropped (the model would lose its head).
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["head_b3.safetensors", "does not fit", "`proj.bias` [3]"]);
}

#[test]
fn layers_that_do_not_chain_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let mut t = read_tensors(&data_dir().join("layouts/x4_h16_l2_lapwing.safetensors"));
    t.insert("layers.1.w_x".into(), f32_tensor(&[64, 8], &[0.1; 64 * 8]));
    let p = write_tensors(dir.path(), "no_chain.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["no_chain.safetensors", "do not chain", "layer 1 takes X=8", "layer 0 has H=16"]);
}

#[test]
fn non_finite_weights_name_the_source_tensor_and_index() {
    let dir = tempfile::tempdir().unwrap();
    let mut t = split_tensors();
    set_f32(&mut t, "rnn.weight_hh_l1", 37, f32::NAN);
    let p = write_tensors(dir.path(), "nan.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["nan.safetensors", "rnn.weight_hh_l1[37] is NaN", "row 2, column 5"]);

    // Fused kernels are transposed on import; the index is still the file's.
    let mut t = read_tensors(&data_dir().join("layouts/x4_h16_l2_fused.safetensors"));
    set_f32(&mut t, "encoder/lstm_1/kernel", 70, f32::NEG_INFINITY);
    let p = write_tensors(dir.path(), "inf.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["encoder/lstm_1/kernel[70] is -inf", "row 1, column 6"]);

    // Float64 values too large for f32.
    let mut t = split_tensors();
    let mut b: Vec<f64> = vec![0.0; 2];
    b[1] = 1e300;
    t.insert("proj.bias".into(), (Dtype::F64, vec![2], b.iter().flat_map(|v| v.to_le_bytes()).collect()));
    let p = write_tensors(dir.path(), "f64_big.safetensors", &t);
    let e = import_err(&p, &ImportOptions { head_prefix: Some("proj".into()), ..ImportOptions::default() });
    assert_has(&e, &["proj.bias[1]", "does not fit in f32"]);
}

#[test]
fn dtypes_other_than_f32_and_f64_are_named() {
    let dir = tempfile::tempdir().unwrap();
    let mut t = split_tensors();
    let (_, shape, data) = t.remove("rnn.weight_ih_l0").unwrap();
    t.insert("rnn.weight_ih_l0".into(), (Dtype::F16, shape, data[..data.len() / 2].to_vec()));
    let p = write_tensors(dir.path(), "f16.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["`rnn.weight_ih_l0`", "dtype F16", "float32"]);

    // Float64 weights are read (rounded to f32; exact for these values).
    let mut t = split_tensors();
    for name in ["rnn.weight_hh_l0", "proj.weight"] {
        let (_, shape, data) = t.remove(name).unwrap();
        let f64s: Vec<u8> = data
            .chunks_exact(4)
            .flat_map(|c| f64::from(f32::from_le_bytes(c.try_into().unwrap())).to_le_bytes())
            .collect();
        t.insert(name.into(), (Dtype::F64, shape, f64s));
    }
    let p = write_tensors(dir.path(), "f64.safetensors", &t);
    assert_same_weights(&import_auto(&p).model, &golden(), "f64");
}

#[test]
fn ambiguous_prefixes_list_candidates_and_options_resolve_them() {
    let dir = tempfile::tempdir().unwrap();
    let g = golden();
    let mut t = split_tensors();
    t.insert("other.weight".into(), f32_tensor(&[2, 16], &[0.5; 32]));
    t.insert("other.bias".into(), f32_tensor(&[2], &[0.5; 2]));
    let p = write_tensors(dir.path(), "two_heads.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["two_heads.safetensors", "could be the head", "`other`", "`proj`", "head prefix option"]);
    let opts = ImportOptions { head_prefix: Some("proj".into()), ..ImportOptions::default() };
    let imp = import(&p, &opts).unwrap();
    assert_same_weights(&imp.model, &g, "head_prefix proj");
    assert_eq!(imp.ignored, ["other.bias", "other.weight"]);
    assert!(imp.summary().contains("ignored 2 tensors not used by the split layout"), "{}", imp.summary());

    // Two LSTMs: `rnn` and `enc`.
    let mut t = split_tensors();
    for (n, v) in split_tensors() {
        if let Some(rest) = n.strip_prefix("rnn.") {
            t.insert(format!("enc.{rest}"), v);
        }
    }
    let p = write_tensors(dir.path(), "two_lstms.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["several LSTM prefixes", "`enc`", "`rnn`", "prefix option"]);
    let opts = ImportOptions { prefix: Some("rnn".into()), ..ImportOptions::default() };
    let imp = import(&p, &opts).unwrap();
    assert_same_weights(&imp.model, &g, "prefix rnn");
    assert_eq!(imp.ignored.len(), 8);

    // An empty prefix: bare PyTorch nn.LSTM state_dict names, no head.
    let mut t = Tensors::new();
    for (n, v) in split_tensors() {
        if let Some(rest) = n.strip_prefix("rnn.") {
            t.insert(rest.to_string(), v);
        }
    }
    let p = write_tensors(dir.path(), "bare.safetensors", &t);
    let imp = import_auto(&p);
    assert!(imp.model.head.is_none() && imp.summary().contains("LSTM prefix `` (bare names)"), "{}", imp.summary());
}

#[test]
fn bidirectional_and_projected_lstms_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let mut t = split_tensors();
    let v = t.get("rnn.weight_ih_l0").unwrap().clone();
    t.insert("rnn.weight_ih_l0_reverse".into(), v);
    let p = write_tensors(dir.path(), "bidir.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["`rnn.weight_ih_l0_reverse`", "bidirectional"]);

    let mut t = split_tensors();
    t.insert("rnn.weight_hr_l0".into(), f32_tensor(&[8, 16], &[0.0; 128]));
    let p = write_tensors(dir.path(), "proj.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["`rnn.weight_hr_l0`", "projection"]);
}

#[test]
fn lapwing_layout_refuses_unknown_tensors_and_bad_norms() {
    let dir = tempfile::tempdir().unwrap();
    let base = read_tensors(&data_dir().join("layouts/x4_h16_l2_lapwing.safetensors"));
    let mut t = base.clone();
    t.insert("layers.0.w_y".into(), f32_tensor(&[1], &[0.0]));
    let p = write_tensors(dir.path(), "stray.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["stray.safetensors", "not part of the lapwing layout", "`layers.0.w_y`"]);

    let mut t = base.clone();
    t.insert("norm.mean".into(), f32_tensor(&[4], &[0.0; 4]));
    t.insert("norm.std".into(), f32_tensor(&[4], &[1.0, 0.0, 1.0, 1.0]));
    let p = write_tensors(dir.path(), "std0.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["norm.std[1] = 0 must be positive"]);

    let mut t = base;
    t.insert("norm.mean".into(), f32_tensor(&[3], &[0.0; 3]));
    let p = write_tensors(dir.path(), "mean_only.safetensors", &t);
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["missing tensor `norm.std`"]);
}

#[test]
fn fused_layer_groups_run_in_natural_order() {
    // Four layers named lstm_2, lstm_9, lstm_10, lstm_11 with X = 1, 2, 3, 4
    // and H = 2, 3, 4, 5: they only chain in natural order (byte order would
    // put lstm_10 and lstm_11 first).
    let dir = tempfile::tempdir().unwrap();
    let mut t = Tensors::new();
    for (k, g) in ["lstm_2", "lstm_9", "lstm_10", "lstm_11"].iter().enumerate() {
        let (x, h) = (k + 1, k + 2);
        let kernel: Vec<f32> = (0..x * 4 * h).map(|i| i as f32 * 1e-3).collect();
        t.insert(format!("{g}/kernel:0"), f32_tensor(&[x, 4 * h], &kernel));
        t.insert(format!("{g}/recurrent_kernel:0"), f32_tensor(&[h, 4 * h], &vec![0.0; 4 * h * h]));
        t.insert(format!("{g}/bias:0"), f32_tensor(&[4 * h], &vec![0.0; 4 * h]));
    }
    let p = write_tensors(dir.path(), "four.safetensors", &t);
    let imp = import_auto(&p);
    let dims: Vec<(usize, usize)> = imp.model.layers.iter().map(|l| (l.input, l.hidden)).collect();
    assert_eq!(dims, [(1, 2), (2, 3), (3, 4), (4, 5)]);
    assert!(imp.model.head.is_none());
    assert!(imp.summary().contains("`lstm_2`, `lstm_9`, `lstm_10`, `lstm_11`"), "{}", imp.summary());
    // Layer 1's kernel is [X=2, 4H=12]; w_x is its transpose [12, 2], so
    // w_x[r][c] = kernel[c][r] = kernel flat index 12 c + r.
    let l1 = &imp.model.layers[1];
    assert_eq!(l1.w_x[1], 12.0 * 1e-3); // row 0, column 1
    assert_eq!(l1.w_x[2], 1.0 * 1e-3); // row 1, column 0
}

#[test]
fn files_that_are_not_models_give_clear_errors() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let none = ImportOptions::default();

    let e = import_err(&d.join("absent.safetensors"), &none);
    assert_has(&e, &["absent.safetensors", "file not found"]);

    let p = d.join("model.pt");
    std::fs::write(&p, b"x").unwrap();
    assert_has(&import_err(&p, &none), &["model.pt", "unsupported file type `.pt`", ".safetensors", ".onnx"]);

    let p = d.join("w.npy");
    std::fs::copy(data_dir().join("layouts/x4_h16_l2_split_npy/proj.bias.npy"), &p).unwrap();
    assert_has(&import_err(&p, &none), &["w.npy", "single .npy", "directory"]);

    for file in ["empty.safetensors", "empty.npz"] {
        let p = d.join(file);
        std::fs::write(&p, b"").unwrap();
        assert_has(&import_err(&p, &none), &[file, "not a valid", "empty"]);
    }

    let p = d.join("nothing");
    std::fs::create_dir(&p).unwrap();
    assert_has(&import_err(&p, &none), &["nothing", "no .npy files"]);

    // Tensors that match no layout: the message says what was looked for.
    let mut t = Tensors::new();
    t.insert("encoder.fc1.weight".into(), f32_tensor(&[2, 2], &[0.0; 4]));
    t.insert("encoder.fc1.bias".into(), f32_tensor(&[2], &[0.0; 2]));
    let p = write_tensors(d, "mlp.safetensors", &t);
    let e = import_err(&p, &none);
    assert_has(&e, &["mlp.safetensors", "no known layout matches", "weight_ih_l0", "recurrent_kernel", "layers.0.w_x"]);
    assert_has(&e, &["`encoder.fc1.weight`"]);

    let p = write_tensors(d, "zero_tensors.safetensors", &Tensors::new());
    assert_has(&import_err(&p, &none), &["holds no tensors"]);

    // Truncated and corrupt containers.
    let bytes = std::fs::read(data_dir().join("golden/x4_h16_l2_head.safetensors")).unwrap();
    let p = d.join("cut.safetensors");
    std::fs::write(&p, &bytes[..bytes.len() - 100]).unwrap();
    assert_has(&import_err(&p, &none), &["cut.safetensors", "corrupt or truncated"]);
    let p = d.join("junk.safetensors");
    std::fs::write(&p, b"\x10\0\0\0\0\0\0\0not json at all!").unwrap();
    assert_has(&import_err(&p, &none), &["junk.safetensors", "corrupt header"]);

    let mut bytes = std::fs::read(data_dir().join("layouts/x4_h16_l2_fused.npz")).unwrap();
    let p = d.join("cut.npz");
    std::fs::write(&p, &bytes[..bytes.len() - 30]).unwrap();
    assert_has(&import_err(&p, &none), &["cut.npz", "not a valid .npz"]);
    bytes[200] ^= 0x55; // inside the first member's data
    let p = d.join("flipped.npz");
    std::fs::write(&p, &bytes).unwrap();
    assert_has(&import_err(&p, &none), &["flipped.npz", "`lstm/kernel:0.npy`", "checksum"]);
}

#[test]
fn oversized_tensors_are_refused_before_reading_them() {
    let dir = tempfile::tempdir().unwrap();
    // A header that declares 8193 x 8193 floats over a 4-byte body.
    let header = br#"{"big":{"dtype":"F32","shape":[8193,8193],"data_offsets":[0,4]}}"#;
    let mut bytes = (header.len() as u64).to_le_bytes().to_vec();
    bytes.extend_from_slice(header);
    bytes.extend_from_slice(&[0; 4]);
    let p = dir.path().join("big.safetensors");
    std::fs::write(&p, bytes).unwrap();
    let e = import_err(&p, &ImportOptions::default());
    assert_has(&e, &["big.safetensors", "tensor `big`", "[8193, 8193]", &MAX_TENSOR_ELEMENTS.to_string()]);

    // The same in a .npy header (the data is never read).
    let npy_dir = dir.path().join("npy");
    std::fs::create_dir(&npy_dir).unwrap();
    let mut h = b"{'descr': '<f4', 'fortran_order': False, 'shape': (70000, 1000), }".to_vec();
    while (10 + h.len() + 1) % 64 != 0 {
        h.push(b' ');
    }
    h.push(b'\n');
    let mut npy = b"\x93NUMPY\x01\x00".to_vec();
    npy.extend_from_slice(&(h.len() as u16).to_le_bytes());
    npy.extend_from_slice(&h);
    std::fs::write(npy_dir.join("weight_ih_l0.npy"), npy).unwrap();
    let e = import_err(&npy_dir, &ImportOptions::default());
    assert_has(&e, &["tensor `weight_ih_l0`", "[70000, 1000]", "2^26"]);
}

#[test]
fn layer_indices_beyond_the_core_limit_are_refused_before_allocating() {
    // Found in review: `layers.1000000000000.b` sized a Vec by the index and
    // aborted the process.
    let dir = tempfile::tempdir().unwrap();
    let mut t = Tensors::new();
    t.insert("layers.0.w_x".into(), f32_tensor(&[4, 1], &[0.0; 4]));
    t.insert("layers.1000000000000.b".into(), f32_tensor(&[4], &[0.0; 4]));
    let p = write_tensors(dir.path(), "huge_index.safetensors", &t);
    assert_has(&import_err(&p, &ImportOptions::default()), &["huge_index.safetensors", "layer index 1000000000000"]);
    let mut t = split_tensors();
    t.insert("rnn.weight_ih_l99999999999999999".into(), f32_tensor(&[4, 1], &[0.0; 4]));
    let p = write_tensors(dir.path(), "huge_split.safetensors", &t);
    assert_has(&import_err(&p, &ImportOptions::default()), &["huge_split.safetensors", "layer index"]);
}

#[test]
fn a_safetensors_file_longer_than_its_header_says_is_refused_unread() {
    let dir = tempfile::tempdir().unwrap();
    let p = write_tensors(dir.path(), "padded.safetensors", &split_tensors());
    let f = std::fs::OpenOptions::new().append(true).open(&p).unwrap();
    // A sparse 1 GiB tail: refused from the header alone, never read.
    f.set_len(f.metadata().unwrap().len() + (1 << 30)).unwrap();
    assert_has(&import_err(&p, &ImportOptions::default()), &["padded.safetensors", "header describes"]);
}
