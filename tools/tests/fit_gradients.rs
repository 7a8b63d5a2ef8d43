//! The trainer (`lapwing_tools::fit`): analytic gradients against PyTorch
//! autograd and against central finite differences, learning on a toy
//! sequence, reproducibility, the saved model run through the core's float
//! step, and refused options.
//!
//! Throughput (prints samples/s; run by hand):
//!
//!     cargo test --release -p lapwing-tools --test fit_gradients -- --ignored --nocapture

use lapwing_tools::export::save_safetensors;
use lapwing_tools::fit::{fit, loss_and_grad, predict, FitOptions};
use lapwing_tools::float_model::{run_float, FloatHeadData, FloatLayerData, FloatModelData};
use lapwing_tools::import::import;
use lapwing_tools::synth::{random_model, random_walk, sine_mix, ModelSpec};
use serde::Deserialize;

#[derive(Deserialize)]
struct GLayer {
    input_size: usize,
    w_x: Vec<f32>,
    w_h: Vec<f32>,
    b: Vec<f32>,
}

#[derive(Deserialize)]
struct GHead {
    w: Vec<f32>,
    b: Vec<f32>,
}

#[derive(Deserialize)]
struct GGradLayer {
    w_x: Vec<f32>,
    w_h: Vec<f32>,
    b: Vec<f32>,
}

#[derive(Deserialize)]
struct GGrads {
    layers: Vec<GGradLayer>,
    head: GHead,
}

#[derive(Deserialize)]
struct Golden {
    case: String,
    source: String,
    hidden_size: usize,
    output_size: usize,
    gate_order: String,
    layers: Vec<GLayer>,
    head: GHead,
    inputs: Vec<Vec<f32>>,
    targets: Vec<Vec<f32>>,
    loss: f32,
    grads: GGrads,
}

/// Every tensor's gradients as `(name, values)`, in a fixed order.
fn tensors(m: &FloatModelData) -> Vec<(String, Vec<f32>)> {
    let mut out = Vec::new();
    for (k, l) in m.layers.iter().enumerate() {
        out.push((format!("layers.{k}.w_x"), l.w_x.clone()));
        out.push((format!("layers.{k}.w_h"), l.w_h.clone()));
        out.push((format!("layers.{k}.b"), l.b.clone()));
    }
    if let Some(h) = &m.head {
        out.push(("head.w".into(), h.w.clone()));
        out.push(("head.b".into(), h.b.clone()));
    }
    out
}

/// Analytic gradients vs PyTorch autograd.
///
/// Source: `tests/data/grad/*.json`, written by PyTorch autograd
/// (`nn.LSTM` + `nn.Linear`, `nn.MSELoss()`, `loss.backward()`, float32 on
/// the CPU) with `tools/golden/make_grad_golden.py`. Both sides compute in
/// float32 with different summation orders; the script measured PyTorch's
/// own float32 gradients within 1e-6 of its float64 ones (relative to each
/// tensor's largest magnitude). Tolerance: every gradient within `1e-5` of
/// its tensor's largest magnitude (floor 1e-3, so near-zero tensors are
/// judged in absolute terms), and the loss within `1e-6` relative.
#[test]
fn gradients_match_pytorch_autograd() {
    const TOL: f32 = 1e-5;
    let dir = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/data/grad");
    let mut cases = 0;
    for case in ["x3_h5_l2_t7", "x4_h8_l1_t12", "x2_h6_l3_t9"] {
        let path = format!("{dir}/{case}.json");
        let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
        let g: Golden = serde_json::from_str(&text).unwrap_or_else(|e| panic!("{path}: {e}"));
        assert!(g.source.starts_with("PyTorch autograd"), "{path}: unexpected source {}", g.source);
        assert_eq!(g.gate_order, "i,f,g,o");
        let hd = g.hidden_size;
        let model = FloatModelData {
            layers: g
                .layers
                .iter()
                .map(|l| FloatLayerData {
                    input: l.input_size,
                    hidden: hd,
                    w_x: l.w_x.clone(),
                    w_h: l.w_h.clone(),
                    b: l.b.clone(),
                })
                .collect(),
            head: Some(FloatHeadData { input: hd, output: g.output_size, w: g.head.w.clone(), b: g.head.b.clone() }),
        };
        let (loss, grads) = loss_and_grad(&model, &g.inputs, &g.targets).unwrap();
        assert!(((loss - g.loss) / g.loss).abs() <= 1e-6, "{}: loss {loss} vs PyTorch {}", g.case, g.loss);
        let want = FloatModelData {
            layers: g
                .layers
                .iter()
                .zip(&g.grads.layers)
                .map(|(l, gl)| FloatLayerData {
                    input: l.input_size,
                    hidden: hd,
                    w_x: gl.w_x.clone(),
                    w_h: gl.w_h.clone(),
                    b: gl.b.clone(),
                })
                .collect(),
            head: Some(FloatHeadData {
                input: hd,
                output: g.output_size,
                w: g.grads.head.w.clone(),
                b: g.grads.head.b.clone(),
            }),
        };
        let mut worst = 0.0f32;
        for ((name, got), (_, exp)) in tensors(&grads).into_iter().zip(tensors(&want)) {
            assert_eq!(got.len(), exp.len(), "{}: {name}", g.case);
            let scale = exp.iter().fold(0.0f32, |m, v| m.max(v.abs())).max(1e-3);
            for (i, (a, b)) in got.iter().zip(&exp).enumerate() {
                let d = (a - b).abs() / scale;
                worst = worst.max(d);
                assert!(d <= TOL, "{}: {name}[{i}] = {a}, PyTorch autograd {b} (scale {scale})", g.case);
            }
        }
        println!("{}: loss {loss} (PyTorch {}), worst gradient difference {worst:.2e} of tensor max", g.case, g.loss);
        cases += 1;
    }
    assert_eq!(cases, 3);
}

/// Analytic gradients vs central finite differences through the public API
/// (float32 throughout: a textbook check, common practice). Tiny model X = 2,
/// H = 3, L = 2, window 5. With step `e = 1e-2` the difference quotient's
/// rounding error is about `1e-7 * loss / e` and its truncation error
/// `O(e^2)`, so the check is relative: within 1 % of the larger of the two
/// values, plus `2e-5` absolute. (An exact f64 check of the same code is the
/// unit test `fit::tests::gradients_match_f64_finite_differences`.)
#[test]
fn gradients_match_central_differences() {
    let model = random_model(&ModelSpec { input: 2, hidden: 3, layers: 2, output: Some(2), gain: 1.5 }, 21);
    let inputs = random_walk(2, 5, 1);
    let targets = random_walk(2, 5, 2);
    let (_, grads) = loss_and_grad(&model, &inputs, &targets).unwrap();
    let eps = 1e-2f32;
    let mut checked = 0;
    let mut worst = 0.0f32;
    // Visit every weight through a mutable view of the model.
    let count = tensors(&model).iter().map(|(_, v)| v.len()).sum::<usize>();
    let grad_flat: Vec<f32> = tensors(&grads).into_iter().flat_map(|(_, v)| v).collect();
    for (idx, &a) in grad_flat.iter().enumerate().take(count) {
        let loss_at = |delta: f32| {
            let mut m = model.clone();
            *weight_mut(&mut m, idx) += delta;
            loss_and_grad(&m, &inputs, &targets).unwrap().0 as f64
        };
        let fd = ((loss_at(eps) - loss_at(-eps)) / (2.0 * eps as f64)) as f32;
        let d = (a - fd).abs();
        let scale = a.abs().max(fd.abs());
        worst = worst.max(d / scale.max(1e-3));
        assert!(d <= 1e-2 * scale + 2e-5, "weight {idx}: analytic {a} vs finite difference {fd}");
        checked += 1;
    }
    // layer 0: 12x2 + 12x3 + 12, layer 1: 12x3 + 12x3 + 12, head: 2x3 + 2.
    assert_eq!(checked, 72 + 84 + 8);
    println!("f32 finite differences: {checked} weights, worst {worst:.2e} (relative, floor 1e-3)");
}

/// The `idx`-th weight in [`tensors`] order.
fn weight_mut(m: &mut FloatModelData, mut idx: usize) -> &mut f32 {
    let mut slots: Vec<&mut Vec<f32>> = Vec::new();
    for l in &mut m.layers {
        slots.push(&mut l.w_x);
        slots.push(&mut l.w_h);
        slots.push(&mut l.b);
    }
    if let Some(h) = &mut m.head {
        slots.push(&mut h.w);
        slots.push(&mut h.b);
    }
    for s in slots {
        if idx < s.len() {
            return &mut s[idx];
        }
        idx -= s.len();
    }
    panic!("weight index out of range")
}

/// Two sines and their sum with a little noise: learnable next-step data.
fn toy(steps: usize) -> Vec<Vec<f32>> {
    (0..steps)
        .map(|t| {
            let t = t as f32;
            let a = (0.13 * t).sin();
            let b = (0.031 * t + 1.0).cos();
            vec![2.0 * a + 5.0, 0.5 * b - 1.0, a + b + 0.02 * (7.7 * t).sin()]
        })
        .collect()
}

fn small_opts() -> FitOptions {
    FitOptions { hidden: 12, layers: 1, window: 32, batch: 8, epochs: 25, patience: 4, ..FitOptions::default() }
}

#[test]
fn loss_falls_on_a_sine() {
    let rows = toy(4000);
    let r = fit(&rows, &small_opts()).unwrap();
    let best = r.val_loss[r.best_epoch];
    println!(
        "toy: initial val {:.4}, best val {best:.5} (epoch {}), train {:?}, {:.0} samples/s",
        r.initial_val_loss,
        r.best_epoch,
        r.train_loss,
        r.samples_per_second()
    );
    assert!(best < 0.1 * r.initial_val_loss, "val loss {best} vs initial {}", r.initial_val_loss);
    assert!(r.train_loss.last().unwrap() < &(0.1 * r.train_loss[0].max(r.initial_val_loss)));
    assert_eq!(r.train_loss.len(), r.val_loss.len());
    // The model predicts raw next values: its error is far below the raw spread.
    let std: Vec<f32> = r.norm.std.clone();
    let mut folded = r.model.clone();
    folded.fold_normalization(&r.norm.mean, &r.norm.std).unwrap();
    let out = run_float(&folded, &rows).unwrap();
    for c in 0..3 {
        let mse: f32 = (100..rows.len() - 1).map(|t| (out[t][c] - rows[t + 1][c]).powi(2)).sum::<f32>()
            / (rows.len() - 101) as f32;
        assert!(mse.sqrt() < 0.3 * std[c], "feature {c}: raw RMSE {} vs std {}", mse.sqrt(), std[c]);
    }
}

#[test]
fn same_seed_gives_bit_identical_weights() {
    let rows = toy(1500);
    let opts = FitOptions { epochs: 3, layers: 2, hidden: 6, ..small_opts() };
    let a = fit(&rows, &opts).unwrap();
    let b = fit(&rows, &opts).unwrap();
    let bits = |m: &FloatModelData| tensors(m).into_iter().flat_map(|(_, v)| v).map(f32::to_bits).collect::<Vec<_>>();
    assert_eq!(bits(&a.model), bits(&b.model));
    assert_eq!(a.val_loss, b.val_loss);
    let c = fit(&rows, &FitOptions { seed: 1, ..opts }).unwrap();
    assert_ne!(bits(&a.model), bits(&c.model));
}

/// The saved model, imported and run through the core's float step
/// (`lapwing::float::FloatModel::step` via `run_float`), reproduces the
/// trainer's own forward pass.
#[test]
fn saved_model_runs_identically_through_the_core() {
    let rows = toy(2000);
    let r = fit(&rows, &FitOptions { epochs: 3, layers: 2, ..small_opts() }).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("fitted.safetensors");
    save_safetensors(&r.model, Some(&r.norm), &path).unwrap();
    let imported = import(&path, &Default::default()).unwrap();
    assert_eq!(imported.model, r.model);
    assert_eq!(imported.norm.as_ref(), Some(&r.norm));

    let standardized: Vec<Vec<f32>> = rows
        .iter()
        .map(|x| x.iter().zip(&r.norm.mean).zip(&r.norm.std).map(|((v, m), s)| (v - m) / s).collect())
        .collect();
    let ours = predict(&r.model, &standardized).unwrap();
    // Same model, same standardized inputs: only summation order differs.
    let core = run_float(&imported.model, &standardized).unwrap();
    // Normalization folded into layer 0: raw inputs.
    let mut folded = imported.model.clone();
    let n = imported.norm.unwrap();
    folded.fold_normalization(&n.mean, &n.std).unwrap();
    let core_raw = run_float(&folded, &rows).unwrap();
    let (mut w1, mut w2) = (0.0f32, 0.0f32);
    for t in 0..rows.len() {
        for c in 0..3 {
            let scale = 1.0f32.max(ours[t][c].abs());
            let d1 = (ours[t][c] - core[t][c]).abs() / scale;
            let d2 = (ours[t][c] - core_raw[t][c]).abs() / scale;
            w1 = w1.max(d1);
            w2 = w2.max(d2);
            assert!(d1 <= 1e-5, "step {t} output {c}: trainer {} vs core {}", ours[t][c], core[t][c]);
            assert!(
                d2 <= 1e-5,
                "step {t} output {c}: trainer {} vs core with folded norm {}",
                ours[t][c],
                core_raw[t][c]
            );
        }
    }
    println!("trainer vs core: {w1:.2e}; with the normalization folded: {w2:.2e} (relative, floor 1)");
}

#[test]
fn bad_options_and_data_are_clear_errors() {
    let rows = toy(500);
    let err = |rows: &[Vec<f32>], o: FitOptions| fit(rows, &o).unwrap_err().to_string();
    let base = small_opts();
    assert!(err(&rows, FitOptions { hidden: 0, ..base.clone() }).contains("hidden"));
    assert!(err(&rows, FitOptions { window: 0, ..base.clone() }).contains("window"));
    assert!(err(&rows, FitOptions { batch: 0, ..base.clone() }).contains("batch"));
    assert!(err(&rows, FitOptions { epochs: 0, ..base.clone() }).contains("epochs"));
    assert!(err(&rows, FitOptions { layers: 0, ..base.clone() }).contains("layers"));
    assert!(err(&rows, FitOptions { layers: 9, ..base.clone() }).contains("layers"));
    assert!(err(&rows, FitOptions { lr: f32::NAN, ..base.clone() }).contains("learning rate"));
    assert!(err(&rows, FitOptions { clip: -1.0, ..base.clone() }).contains("clip"));
    assert!(err(&rows, FitOptions { val_fraction: 0.0, ..base.clone() }).contains("validation fraction"));
    assert!(err(&rows, FitOptions { val_fraction: 1.0, ..base.clone() }).contains("validation fraction"));
    assert!(err(&rows[..10], base.clone()).contains("too few rows"));
    assert!(err(&rows[..40], FitOptions { batch: 64, ..base.clone() }).contains("too few rows"));
    assert!(err(&[], base.clone()).contains("no data rows"));
    let mut bad = rows.clone();
    bad[17][2] = f32::NAN;
    let e = err(&bad, base.clone());
    assert!(e.contains("row 17") && e.contains("column 2"), "{e}");
    let mut ragged = rows.clone();
    ragged[5].pop();
    assert!(err(&ragged, base.clone()).contains("row 5"));
    let constant: Vec<Vec<f32>> = rows.iter().map(|r| vec![r[0], 3.0]).collect();
    let e = err(&constant, base.clone());
    assert!(e.contains("column 2") && e.contains("constant"), "{e}");

    let m = random_model(&ModelSpec { input: 2, hidden: 3, layers: 1, output: Some(2), gain: 1.0 }, 1);
    let x = random_walk(2, 4, 1);
    assert!(loss_and_grad(&m, &x, &x[..3]).unwrap_err().to_string().contains("target"));
    assert!(loss_and_grad(&m, &[], &[]).is_err());
    let wide = random_walk(3, 4, 1);
    assert!(loss_and_grad(&m, &wide, &x).unwrap_err().to_string().contains("3 values"));
}

/// Training throughput on demo-sized data (X = 4, H = 32, one layer,
/// defaults otherwise). Run by hand in release mode; prints samples/s.
#[test]
#[ignore = "measurement: run with --ignored --nocapture in release mode"]
fn throughput() {
    for (layers, steps, epochs) in [(1, 200_000, 3), (2, 100_000, 2)] {
        let rows = sine_mix(4, steps, 5);
        let opts = FitOptions { layers, epochs, patience: epochs, progress: true, ..FitOptions::default() };
        let r = fit(&rows, &opts).unwrap();
        println!(
            "X=4 H=32 L={layers}: {} train steps x {} epochs in {:.2} s = {:.0} samples/s (val {:?})",
            r.train_steps,
            r.train_loss.len(),
            r.seconds,
            r.samples_per_second(),
            r.val_loss
        );
    }
}
