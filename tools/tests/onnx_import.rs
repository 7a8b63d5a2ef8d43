//! ONNX import (`lapwing_tools::onnx`): float runs against ONNX Runtime,
//! refusals, and the CLI on `.onnx` files.
//!
//! Outside reference: every `tests/data/onnx/<case>.json` holds the inputs and
//! the outputs **ONNX Runtime** computed for `tests/data/onnx/<case>.onnx`
//! (hand-built graphs, and `nn.LSTM` + `nn.Linear` written by PyTorch's
//! `torch.onnx.export`), made by `tools/golden/make_onnx_golden.py`. The
//! models under `tests/data/onnx/refused/` use features Lapwing refuses.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use lapwing_tools::float_model::run_float;
use lapwing_tools::import::{import, Container, ImportOptions, Layout};
use lapwing_tools::onnx::proto::{ModelProto, ValueInfoProto};
use prost::Message;
use serde::Deserialize;

/// DESIGN.md section 9: the float model agrees with the outside reference to
/// 1e-5 absolute.
const TOLERANCE: f32 = 1e-5;

#[derive(Deserialize)]
struct Case {
    case: String,
    source: String,
    model: String,
    inputs: Vec<Vec<f32>>,
    outputs: Vec<Vec<f32>>,
}

fn onnx_dir() -> PathBuf {
    root().join("tests/data/onnx")
}

fn case(name: &str) -> Case {
    let path = onnx_dir().join(format!("{name}.json"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let c: Case = serde_json::from_str(&text).unwrap();
    assert!(c.source.starts_with("ONNX Runtime"), "{name}: unexpected source {}", c.source);
    assert_eq!(c.inputs.len(), c.outputs.len());
    c
}

/// (case, layers, X, H of each layer, head Y)
const CASES: [(&str, usize, usize, usize, Option<usize>); 5] = [
    ("one_layer_x3_h8", 1, 3, 8, None),
    ("two_layers_gemm_x4_h6_y2", 2, 4, 6, Some(2)),
    ("layout1_matmul_x2_h5_y3", 1, 2, 5, Some(3)),
    ("torch_script_x3_h8_l2_y2", 2, 3, 8, Some(2)),
    ("torch_dynamo_x3_h8_l2_y2", 2, 3, 8, Some(2)),
];

fn max_abs_err(got: &[Vec<f32>], want: &[Vec<f32>]) -> f32 {
    assert_eq!(got.len(), want.len());
    let mut worst = 0.0f32;
    for (t, (g, w)) in got.iter().zip(want).enumerate() {
        assert_eq!(g.len(), w.len(), "step {t}: output length");
        for (a, b) in g.iter().zip(w) {
            worst = worst.max((a - b).abs());
        }
    }
    worst
}

#[test]
fn float_runs_match_onnx_runtime() {
    for (name, layers, x, h, y) in CASES {
        let c = case(name);
        let path = onnx_dir().join(&c.model);
        let imp = import(&path, &ImportOptions::default()).unwrap_or_else(|e| panic!("{name}: {e:#}"));
        assert_eq!(imp.container, Container::Onnx);
        assert_eq!(imp.layout, Layout::Onnx);
        assert!(imp.norm.is_none());
        assert_eq!(imp.model.layers.len(), layers, "{name}");
        assert_eq!(imp.model.input_len(), x, "{name}");
        assert!(imp.model.layers.iter().all(|l| l.hidden == h), "{name}");
        assert_eq!(imp.model.head.as_ref().map(|hd| hd.output), y, "{name}");
        assert!(imp.ignored.is_empty(), "{name}: ignored {:?}", imp.ignored);
        let got = run_float(&imp.model, &c.inputs).unwrap();
        // Outside reference: ONNX Runtime's outputs for the same file and inputs.
        let err = max_abs_err(&got, &c.outputs);
        println!("{name}: {} steps, max |Lapwing float - ONNX Runtime| = {err:.3e}", c.inputs.len());
        assert!(err <= TOLERANCE, "{}: max abs error {err:e} vs ONNX Runtime", c.case);
    }
}

#[test]
fn summary_names_what_was_found() {
    let imp = import(&onnx_dir().join("torch_script_x3_h8_l2_y2.onnx"), &ImportOptions::default()).unwrap();
    let s = imp.summary();
    for needle in ["ONNX file", "layout onnx", "i,o,f,c -> i,f,g,o", "2 layers", "head Y=2", "pytorch", "proven zero"] {
        assert!(s.contains(needle), "{needle:?} not in {s}");
    }
    assert!(s.contains("[batch, time, features]"), "{s}");
    let imp = import(&onnx_dir().join("layout1_matmul_x2_h5_y3.onnx"), &ImportOptions::default()).unwrap();
    let s = imp.summary();
    assert!(s.contains("(layout 1)") && s.contains("MatMul `head_matmul` + Add `head_bias`"), "{s}");
}

fn import_err(path: &Path) -> String {
    match import(path, &ImportOptions::default()) {
        Ok(_) => panic!("{} imported", path.display()),
        Err(e) => format!("{e:#}"),
    }
}

fn assert_has(e: &str, needles: &[&str]) {
    assert_eq!(e.lines().count(), 1, "not one line: {e}");
    for n in needles {
        assert!(e.contains(n), "{e:?} does not mention {n:?}");
    }
}

#[test]
fn refused_features_are_named() {
    let cases: [(&str, &[&str]); 10] = [
        ("bidirectional", &["node `lstm` (LSTM)", "`direction`", "bidirectional"]),
        ("reverse", &["node `lstm` (LSTM)", "`direction`", "reverse"]),
        ("clip", &["node `lstm` (LSTM)", "`clip`"]),
        ("input_forget", &["node `lstm` (LSTM)", "`input_forget`"]),
        ("activations", &["node `lstm` (LSTM)", "`activations`", "Relu"]),
        ("peepholes", &["node `lstm` (LSTM)", "`P`", "peephole"]),
        ("sequence_lens", &["node `lstm` (LSTM)", "`sequence_lens`"]),
        ("nonzero_initial_h", &["node `lstm` (LSTM)", "`initial_h`", "not zero", "0.25"]),
        ("relu_after_lstm", &["node `relu` (Relu)", "not accepted on the data path"]),
        ("huge_tensor", &["node `lstm` (LSTM)", "`W`", "2^26"]),
    ];
    for (file, needles) in cases {
        let path = onnx_dir().join("refused").join(format!("{file}.onnx"));
        let e = import_err(&path);
        assert!(e.starts_with(&path.display().to_string()), "{e}");
        assert_has(&e, needles);
    }
}

/// A copy of a test model, decoded for editing.
fn decoded(name: &str) -> ModelProto {
    ModelProto::decode(std::fs::read(onnx_dir().join(name)).unwrap().as_slice()).unwrap()
}

fn write_model(dir: &Path, name: &str, m: &ModelProto) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, m.encode_to_vec()).unwrap();
    p
}

#[test]
fn broken_files_and_graphs_give_clear_errors() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();

    assert_has(&import_err(&d.join("absent.onnx")), &["absent.onnx", "file not found"]);
    let p = d.join("empty.onnx");
    std::fs::write(&p, b"").unwrap();
    assert_has(&import_err(&p), &["empty.onnx", "not a valid ONNX file", "empty"]);
    let bytes = std::fs::read(onnx_dir().join("one_layer_x3_h8.onnx")).unwrap();
    let p = d.join("truncated.onnx");
    std::fs::write(&p, &bytes[..bytes.len() / 2]).unwrap();
    assert_has(&import_err(&p), &["truncated.onnx", "not a valid ONNX file"]);

    // The layout options name tensors of the other formats.
    let opts = ImportOptions { layout: Some(Layout::Split), ..Default::default() };
    let e = format!("{:#}", import(&onnx_dir().join("one_layer_x3_h8.onnx"), &opts).unwrap_err());
    assert_has(&e, &["one_layer_x3_h8.onnx", "layout and prefix options"]);

    // A NaN weight is named by initializer and index.
    let mut m = decoded("one_layer_x3_h8.onnx");
    let g = m.graph.as_mut().unwrap();
    let w = g.initializer.iter_mut().find(|t| t.name.as_deref() == Some("R")).unwrap();
    w.raw_data.as_mut().unwrap()[20..24].copy_from_slice(&f32::NAN.to_le_bytes());
    assert_has(&import_err(&write_model(d, "nan.onnx", &m)), &["nan.onnx", "node `lstm` (LSTM)", "`R`[5] is NaN"]);

    // Weight data shorter than its shape.
    let mut m = decoded("one_layer_x3_h8.onnx");
    let g = m.graph.as_mut().unwrap();
    let w = g.initializer.iter_mut().find(|t| t.name.as_deref() == Some("W")).unwrap();
    w.raw_data.as_mut().unwrap().truncate(8);
    assert_has(&import_err(&write_model(d, "short.onnx", &m)), &["short.onnx", "`W`", "8 bytes", "corrupt"]);

    // The last state Y_h as a second graph output.
    let mut m = decoded("one_layer_x3_h8.onnx");
    let g = m.graph.as_mut().unwrap();
    g.node[0].output.push("y_h".into());
    g.output.push(ValueInfoProto { name: Some("y_h".into()), r#type: None });
    assert_has(&import_err(&write_model(d, "two_out.onnx", &m)), &["two_out.onnx", "2 outputs", "`y_h`"]);
    // ... and as the only one.
    m.graph.as_mut().unwrap().output.remove(0);
    assert_has(&import_err(&write_model(d, "y_h.onnx", &m)), &["y_h.onnx", "Y_h", "per-step output"]);

    // A second input (an initial state fed from outside).
    let mut m = decoded("one_layer_x3_h8.onnx");
    let g = m.graph.as_mut().unwrap();
    let mut h0 = g.input[0].clone();
    h0.name = Some("h0".into());
    g.input.push(h0);
    assert_has(&import_err(&write_model(d, "two_in.onnx", &m)), &["two_in.onnx", "2 inputs", "`h0`"]);

    // hidden_size disagreeing with the weights.
    let mut m = decoded("one_layer_x3_h8.onnx");
    let g = m.graph.as_mut().unwrap();
    g.node[0].attribute.iter_mut().find(|a| a.name.as_deref() == Some("hidden_size")).unwrap().i = Some(7);
    assert_has(&import_err(&write_model(d, "hidden.onnx", &m)), &["hidden.onnx", "node `lstm` (LSTM)", "`W`", "H = 7"]);

    // A node using a value before it is defined.
    let mut m = decoded("two_layers_gemm_x4_h6_y2.onnx");
    let g = m.graph.as_mut().unwrap();
    g.node.swap(0, 1);
    assert_has(
        &import_err(&write_model(d, "order.onnx", &m)),
        &["order.onnx", "node `squeeze_0`", "`y0`", "topological"],
    );
}

/// Every truncation and many single-byte changes of real models give a
/// result or an error, never a panic.
#[test]
fn corrupted_files_never_panic() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("m.onnx");
    let mut outcomes = [0usize; 2];
    for name in ["two_layers_gemm_x4_h6_y2.onnx", "torch_script_x3_h8_l2_y2.onnx"] {
        let bytes = std::fs::read(onnx_dir().join(name)).unwrap();
        let mut seed = 0x2545_f491_u64;
        let mut variants: Vec<Vec<u8>> = (1..bytes.len()).step_by(7).map(|n| bytes[..n].to_vec()).collect();
        for _ in 0..400 {
            seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            let mut b = bytes.clone();
            let at = (seed >> 33) as usize % b.len();
            b[at] ^= 1 << ((seed >> 29) & 7);
            variants.push(b);
        }
        for v in variants {
            std::fs::write(&p, &v).unwrap();
            let r = import(&p, &ImportOptions::default());
            outcomes[usize::from(r.is_err())] += 1;
            if let Err(e) = r {
                let e = format!("{e:#}");
                assert!(e.starts_with(&p.display().to_string()) && e.lines().count() == 1, "{e}");
            }
        }
    }
    // Most corruptions are caught; a flip inside a weight's bytes still imports.
    assert!(outcomes[1] > outcomes[0], "ok {}, refused {}", outcomes[0], outcomes[1]);
}

// ---------------------------------------------------------------------------
// CLI

fn write_csv(path: &Path, rows: &[Vec<f32>]) {
    let x = rows.first().map_or(0, Vec::len);
    let mut s: String = (0..x).map(|i| format!("x{i}")).collect::<Vec<_>>().join(",");
    s.push('\n');
    for r in rows {
        s.push_str(&r.iter().map(|v| format!("{v:?}")).collect::<Vec<_>>().join(","));
        s.push('\n');
    }
    std::fs::write(path, s).unwrap();
}

fn read_csv(p: &Path) -> Vec<Vec<f32>> {
    let text = std::fs::read_to_string(p).unwrap();
    text.lines().skip(1).map(|l| l.split(',').map(|v| v.parse().unwrap()).collect()).collect()
}

fn ok(args: &[&str]) -> String {
    let o = lapwing(args);
    assert_eq!(o.status.code(), Some(0), "{args:?}: {}", stderr(&o));
    String::from_utf8_lossy(&o.stdout).into_owned()
}

#[test]
fn cli_quantize_run_report_sweep_take_onnx_models() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let c = case("torch_script_x3_h8_l2_y2");
    let model = onnx_dir().join(&c.model).display().to_string();
    let data = d.join("data.csv");
    write_csv(&data, &c.inputs);
    let data_s = data.display().to_string();

    // run: the float model over the data; ONNX Runtime is the reference.
    let out = d.join("float.csv");
    ok(&["run", &model, "--data", &data_s, "-o", &out.display().to_string()]);
    let err = max_abs_err(&read_csv(&out), &c.outputs);
    assert!(err <= TOLERANCE, "lapwing run vs ONNX Runtime: {err:e}");

    // quantize -> blob; inspect sees the model's shape.
    let blob = d.join("m.lwq");
    let blob_s = blob.display().to_string();
    let text = ok(&["quantize", &model, "--calib", &data_s, "-o", &blob_s]);
    assert!(text.contains("ONNX file") && text.contains("layout onnx") && text.contains("2 layers"), "{text}");
    let info: serde_json::Value = serde_json::from_str(&ok(&["inspect", &blob_s, "--json"])).unwrap();
    assert_eq!(info["layers"].as_array().map(Vec::len), Some(2));

    // report and sweep read the same .onnx as the float side.
    let json = d.join("report.json");
    ok(&["report", &blob_s, "--float", &model, "--data", &data_s, "--json", &json.display().to_string()]);
    let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert!(v.is_object(), "{v}");
    let sweep = d.join("sweep.json");
    ok(&["sweep", &model, "--calib", &data_s, "--data", &data_s, "--json", &sweep.display().to_string()]);
    let v: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&sweep).unwrap()).unwrap();
    assert_eq!(v["rows"].as_array().map(Vec::len), Some(24));
    // Nearest rounding builds every configuration; the 50 rows are too few
    // for compensated rounding, and those rows say so instead of aborting.
    for r in v["rows"].as_array().unwrap() {
        if r["rounding"] == "nearest" {
            assert_eq!(r["feasible"], true, "{r}");
        } else {
            assert!(r["violations"][0].as_str().unwrap().contains("at least 64 calibration rows"), "{r}");
        }
    }

    // A refused model: exit 2, one line naming file and attribute, no blob.
    let bad_blob = d.join("bad.lwq");
    let bad = onnx_dir().join("refused/clip.onnx").display().to_string();
    let data2 = d.join("data2.csv");
    write_csv(&data2, &c.inputs.iter().map(|r| r[..2].to_vec()).collect::<Vec<_>>());
    let o =
        lapwing(&["quantize", &bad, "--calib", &data2.display().to_string(), "-o", &bad_blob.display().to_string()]);
    let e = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert_eq!(e.trim_end().lines().count(), 1, "{e}");
    assert!(e.contains("clip.onnx") && e.contains("`clip`"), "{e}");
    assert!(!bad_blob.exists());
}
