//! Host throughput of one step: the `f32` reference and every integer
//! scheme at H = 16, 32, 64, 128 (X = 4, one layer, head Y = 4, the demo's
//! shape at H = 32), calibration and the report at H = 32.
//!
//! `cargo bench -p lapwing-tools --bench step` runs divan's timings, then
//! prints the quantized/float throughput ratio per size and scheme, both
//! measured in the same run (DESIGN.md section 9: `w8a16` >= 1.5x the
//! float step at H = 32). Speed is proven here, never by timed unit tests.

use std::hint::black_box;
use std::time::Instant;

use lapwing::quant::Scheme;
use lapwing_tools::calibrate::{self, Calibrator};
use lapwing_tools::float_model::FloatModelData;
use lapwing_tools::quantize::{quantize, QuantModelData, QuantOptions};
use lapwing_tools::report::{report_quantized, ReportOptions};
use lapwing_tools::synth::{random_model, sine_mix, ModelSpec};

const SIZES: [usize; 4] = [16, 32, 64, 128];
const X: usize = 4;
const Y: usize = 4;

fn model(h: usize) -> FloatModelData {
    random_model(&ModelSpec { input: X, hidden: h, layers: 1, output: Some(Y), gain: 1.0 }, 7)
}

fn signal(steps: usize) -> Vec<Vec<f32>> {
    sine_mix(X, steps, 11)
}

fn quantized(h: usize, scheme: Scheme) -> QuantModelData {
    let m = model(h);
    let ranges = calibrate::observe(&m, &signal(2_000)).expect("calibration");
    quantize(&m, &ranges, &QuantOptions { scheme, ..QuantOptions::default() }).expect("quantize")
}

/// One float step per call, state carried over (streaming).
fn float_steps(h: usize) -> impl FnMut(&[f32]) {
    let m = model(h);
    let mut state = vec![0f32; m.view().expect("view").state_len()];
    let mut out = vec![0f32; Y];
    move |x| {
        let v = m.view().expect("view");
        v.step(&mut state, black_box(x), &mut out).expect("step");
        black_box(&out);
    }
}

#[divan::bench(args = SIZES)]
fn float_step(bencher: divan::Bencher, h: usize) {
    let m = model(h);
    let v = m.view().expect("view");
    let mut state = vec![0f32; v.state_len()];
    let mut out = vec![0f32; Y];
    let xs = signal(1_000);
    let mut t = 0;
    bencher.bench_local(|| {
        t = (t + 1) % xs.len();
        v.step(&mut state, black_box(&xs[t]), &mut out).expect("step");
        black_box(&out);
    });
}

fn q_bench(bencher: divan::Bencher, h: usize, scheme: Scheme) {
    let q = quantized(h, scheme);
    let v = q.view().expect("view");
    let mut state = vec![0i16; v.state_words()];
    let mut out = vec![0i16; Y];
    let xs: Vec<Vec<i16>> = signal(1_000).iter().map(|x| q.quantize_input(x)).collect();
    let mut t = 0;
    bencher.bench_local(|| {
        t = (t + 1) % xs.len();
        v.step(&mut state, black_box(&xs[t]), &mut out).expect("step");
        black_box(&out);
    });
}

#[divan::bench(args = SIZES)]
fn w8a16_step(bencher: divan::Bencher, h: usize) {
    q_bench(bencher, h, Scheme::W8A16);
}

#[divan::bench(args = SIZES)]
fn w8a8_step(bencher: divan::Bencher, h: usize) {
    q_bench(bencher, h, Scheme::W8A8);
}

#[divan::bench(args = SIZES)]
fn w16a16_step(bencher: divan::Bencher, h: usize) {
    q_bench(bencher, h, Scheme::W16A16);
}

/// Calibration throughput at H = 32: 1,000 steps per iteration.
#[divan::bench(sample_count = 20)]
fn calibrate_1000_steps_h32(bencher: divan::Bencher) {
    let m = model(32);
    let xs = signal(1_000);
    bencher.bench_local(|| {
        let mut c = Calibrator::new(&m, Default::default()).expect("calibrator");
        for x in &xs {
            c.push(x).expect("push");
        }
        black_box(c.finish().expect("finish"));
    });
}

/// Report throughput at H = 32 (float and w8a16 side by side, every
/// statistic): 1,000 steps per iteration.
#[divan::bench(sample_count = 20)]
fn report_1000_steps_h32(bencher: divan::Bencher) {
    let m = model(32);
    let q = quantized(32, Scheme::W8A16);
    let xs = signal(1_000);
    bencher.bench_local(|| black_box(report_quantized(&m, &q, &xs, &ReportOptions::default()).expect("report")));
}

/// Steps per second of `f` over the inputs, best of five rounds.
fn rate<T>(xs: &[T], mut f: impl FnMut(&T)) -> f64 {
    let mut best = 0f64;
    for _ in 0..5 {
        let t0 = Instant::now();
        for x in xs {
            f(x);
        }
        best = best.max(xs.len() as f64 / t0.elapsed().as_secs_f64());
    }
    best
}

/// The ratios, measured in this run: quantized steps per second over float
/// steps per second, same model, same inputs.
fn ratios() {
    println!("\nthroughput ratio, quantized / float step (same run, best of 5 x 20,000 steps):");
    println!("| H | float steps/s | w8a16 | w8a8 | w16a16 |");
    println!("|---:|---:|---:|---:|---:|");
    let xs = signal(20_000);
    for h in SIZES {
        let mut f = float_steps(h);
        let fr = rate(&xs, |x| f(x));
        let mut cells = Vec::new();
        for scheme in [Scheme::W8A16, Scheme::W8A8, Scheme::W16A16] {
            let q = quantized(h, scheme);
            let v = q.view().expect("view");
            let mut state = vec![0i16; v.state_words()];
            let mut out = vec![0i16; Y];
            let qx: Vec<Vec<i16>> = xs.iter().map(|x| q.quantize_input(x)).collect();
            let qr = rate(&qx, |x| {
                v.step(&mut state, black_box(x), &mut out).expect("step");
                black_box(&out);
            });
            cells.push(format!("{:.2}x", qr / fr));
        }
        println!("| {h} | {:.0} | {} |", fr, cells.join(" | "));
    }
}

fn main() {
    divan::main();
    ratios();
}
