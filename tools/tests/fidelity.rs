//! Fidelity of the integer step against the float reference (DESIGN.md
//! section 9), on seeded random well-conditioned models and random-walk
//! inputs. Figures are printed; run with `--nocapture` to see them:
//! `cargo test -p lapwing-tools --release --test fidelity -- --nocapture`.

use lapwing::activation::TableKind;
use lapwing::quant::CellWidth;
use lapwing_tools::calibrate::observe;
use lapwing_tools::compare::compare;
use lapwing_tools::float_model::{FloatLayerData, FloatModelData};
use lapwing_tools::quantize::{quantize, QuantOptions};
use lapwing_tools::synth::{random_model, random_walk, ModelSpec};

fn check(spec: ModelSpec, cell: CellWidth, seed: u64, min_db: f64) {
    let model = random_model(&spec, seed);
    let ranges = observe(&model, &random_walk(spec.input, 3_000, seed + 100)).unwrap();
    let opts = QuantOptions { cell, ..Default::default() };
    let q = quantize(&model, &ranges, &opts).unwrap();
    let cmp = compare(&model, &q, &random_walk(spec.input, 10_000, seed + 200)).unwrap();
    let label = format!("w8a16 {} X={} H={} L={} seed {seed}", cell.name(), spec.input, spec.hidden, spec.layers);
    println!("{label}: output SQNR {:.1} dB over {} steps", cmp.output.sqnr_db, cmp.steps);
    for (k, h) in cmp.hidden.iter().enumerate() {
        println!("{label}: layer {k} hidden SQNR {:.1} dB, cell SQNR {:.1} dB", h.sqnr_db, cmp.cell[k].sqnr_db);
        for (g, name) in cmp.gates[k].iter().zip(["i", "f", "g", "o"]) {
            println!("{label}:   gate {name} SQNR {:.1} dB, max abs {:.2e}", g.sqnr_db, g.max_abs);
        }
        assert!(h.sqnr_db >= min_db, "{label}: layer {k} hidden SQNR {:.1} dB < {min_db} dB", h.sqnr_db);
    }
    assert!(cmp.output.sqnr_db >= min_db, "{label}: output SQNR {:.1} dB < {min_db} dB", cmp.output.sqnr_db);
}

// DESIGN.md section 9: w8a16 output and hidden SQNR >= 40 dB.
#[test]
fn w8a16_one_layer_head_c16() {
    check(ModelSpec { input: 4, hidden: 32, layers: 1, output: Some(4), gain: 1.0 }, CellWidth::C16, 11, 40.0);
}

#[test]
fn w8a16_one_layer_head_c32() {
    check(ModelSpec { input: 4, hidden: 32, layers: 1, output: Some(4), gain: 1.0 }, CellWidth::C32, 11, 40.0);
}

#[test]
fn w8a16_two_layers_head() {
    check(ModelSpec { input: 3, hidden: 24, layers: 2, output: Some(2), gain: 1.5 }, CellWidth::C16, 12, 40.0);
}

#[test]
fn w8a16_no_head_wide_input() {
    check(ModelSpec { input: 12, hidden: 16, layers: 1, output: None, gain: 1.0 }, CellWidth::C32, 13, 40.0);
}

/// The long-memory test of DESIGN.md section 9: forget pre-activation >= 10,
/// input gate ~0, 10,000 steps. One pulse loads the cells, then the input is
/// zero and the cells decay only through f. Unit 0 has f pre-activation 10
/// (float keeps e^-0.454 = 63.5 %), unit 1 has 11 (float keeps 84.6 %).
#[test]
fn long_memory_retention() {
    let h = 2;
    // Rows: i (2), f (2), g (2), o (2); X = 1.
    let w_x = vec![20.0, 20.0, 0.0, 0.0, 2.0, 2.0, 0.0, 0.0];
    let b = vec![-10.0, -10.0, 10.0, 11.0, 0.0, 0.0, 10.0, 10.0];
    let model = FloatModelData {
        layers: vec![FloatLayerData { input: 1, hidden: h, w_x, w_h: vec![0.0; 4 * h * h], b }],
        head: None,
    };
    let mut inputs = vec![vec![1.0f32]];
    inputs.extend(std::iter::repeat_n(vec![0.0f32], 10_000));
    let ranges = observe(&model, &inputs).unwrap();
    for cell in [CellWidth::C16, CellWidth::C32] {
        let opts = QuantOptions { cell, table: TableKind::Standard, ..Default::default() };
        let q = quantize(&model, &ranges, &opts).unwrap();
        let cmp = compare(&model, &q, &inputs).unwrap();
        for j in 0..h {
            let f = cmp.last_cell_float[0][j];
            let qv = cmp.last_cell_quant[0][j];
            let ratio = qv / f;
            println!(
                "long memory {} unit {j}: float cell {f:.5}, integer cell {qv:.5}, retention ratio {:.2} %",
                cell.name(),
                100.0 * ratio
            );
            if cell == CellWidth::C32 {
                // DESIGN.md section 9: within 2 % of the float cell.
                assert!((ratio - 1.0).abs() <= 0.02, "c32 unit {j}: {qv} vs float {f}");
            }
        }
    }
}
