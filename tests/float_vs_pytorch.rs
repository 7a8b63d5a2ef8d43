//! The float reference LSTM against PyTorch `nn.LSTM` golden vectors.
//!
//! Source of truth: `tests/data/golden/*.json`, computed by PyTorch
//! `nn.LSTM` (float32, CPU) with `tools/golden/make_lstm_golden.py`.
//! DESIGN.md section 9 asks for agreement within 1e-5 absolute on every
//! step's hidden state, cell state and head output.

use lapwing::float::{FloatHead, FloatLayer, FloatModel};
use serde::Deserialize;

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
    case: String,
    source: String,
    hidden_size: usize,
    output_size: Option<usize>,
    layers: Vec<GoldenLayer>,
    head: Option<GoldenHead>,
    inputs: Vec<Vec<f32>>,
    h: Vec<Vec<Vec<f32>>>,
    c: Vec<Vec<Vec<f32>>>,
    y: Option<Vec<Vec<f32>>>,
}

const TOLERANCE: f32 = 1e-5; // DESIGN.md section 9

fn check_case(name: &str) {
    let path = format!("{}/tests/data/golden/{name}.json", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    let g: Golden = serde_json::from_str(&text).unwrap_or_else(|e| panic!("{path}: {e}"));
    assert!(g.source.contains("PyTorch nn.LSTM"), "{path}: unexpected source {}", g.source);
    let hd = g.hidden_size;
    // PyTorch keeps two biases per gate row; Lapwing folds them into one.
    let biases: Vec<Vec<f32>> =
        g.layers.iter().map(|l| l.b_ih.iter().zip(&l.b_hh).map(|(a, b)| a + b).collect()).collect();
    let layers: Vec<FloatLayer> = g
        .layers
        .iter()
        .zip(&biases)
        .map(|(l, b)| FloatLayer::new(l.input_size, hd, &l.w_x, &l.w_h, b).unwrap())
        .collect();
    let head = g.head.as_ref().map(|h| FloatHead::new(hd, g.output_size.unwrap(), &h.w, &h.b).unwrap());
    let model = FloatModel::new(&layers, head).unwrap();
    let mut state = vec![0.0f32; model.state_len()];
    let mut out = vec![0.0f32; model.output_len()];
    let mut worst = 0.0f32;
    for (t, x) in g.inputs.iter().enumerate() {
        model.step(&mut state, x, &mut out).unwrap();
        let mut off = 0;
        for k in 0..g.layers.len() {
            let (h, c) = (&state[off..off + hd], &state[off + hd..off + 2 * hd]);
            off += 2 * hd;
            for j in 0..hd {
                let dh = (h[j] - g.h[t][k][j]).abs();
                let dc = (c[j] - g.c[t][k][j]).abs();
                worst = worst.max(dh).max(dc);
                assert!(dh <= TOLERANCE, "{}: step {t} layer {k} h[{j}] differs by {dh}", g.case);
                assert!(dc <= TOLERANCE, "{}: step {t} layer {k} c[{j}] differs by {dc}", g.case);
            }
        }
        if let Some(y) = &g.y {
            for (j, (a, b)) in out.iter().zip(&y[t]).enumerate() {
                let d = (a - b).abs();
                worst = worst.max(d);
                assert!(d <= TOLERANCE, "{}: step {t} y[{j}] differs by {d}", g.case);
            }
        }
    }
    println!("{}: {} steps, max |lapwing - PyTorch nn.LSTM| = {worst:.2e}", g.case, g.inputs.len());
}

#[test]
fn x3_h5_one_layer() {
    check_case("x3_h5_l1");
}

#[test]
fn x4_h8_one_layer_with_head() {
    check_case("x4_h8_l1_head");
}

#[test]
fn x4_h16_two_layers_with_head_saturating() {
    check_case("x4_h16_l2_head");
}

#[test]
fn x1_h32_three_layers() {
    check_case("x1_h32_l3");
}
