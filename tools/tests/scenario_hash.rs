//! The demo scenario (`demo-data/scenario.toml`): every data set is
//! generated, checked (lengths, labels against events, the test set's hour
//! of normal running and its two events of every fault kind) and pinned by
//! its content hash; every fault must stand out against normal running; and
//! the shipped `demo-data/sample.csv` must be what the generator makes.
//!
//! Run in release (`cargo test --release`): the test set is 1.68 M samples.

use lapwing_tools::scenario::{self, content_hash, generate, DataSet, FaultKind, Generated, Scenario};
use std::path::{Path, PathBuf};
use std::time::Instant;

fn demo_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo-data")
}

/// Least-squares linear next-step predictor over all four features: `x[t]`
/// from `x[t-1..=t-P]` and an intercept, fitted on `train`.
struct LinearPredictor {
    /// Per output feature: `4 P + 1` coefficients (lags, then intercept).
    coef: Vec<Vec<f64>>,
}

const P: usize = 8;
const M: usize = 4 * P + 1;

impl LinearPredictor {
    fn regressors(rows: &[Vec<f32>], t: usize) -> [f64; M] {
        let mut r = [1.0; M];
        for k in 1..=P {
            for (f, &v) in rows[t - k].iter().enumerate() {
                r[4 * (k - 1) + f] = f64::from(v);
            }
        }
        r
    }

    /// Normal equations over every second step of `train` (120,000
    /// equations for 33 unknowns; halves the time in debug builds).
    fn fit(train: &Generated) -> LinearPredictor {
        let mut ata = vec![vec![0.0; M]; M];
        let mut atb = vec![vec![0.0; M]; 4];
        for t in (P..train.rows.len()).step_by(2) {
            let r = Self::regressors(&train.rows, t);
            for (i, &ri) in r.iter().enumerate() {
                for (a, &rj) in ata[i][i..].iter_mut().zip(&r[i..]) {
                    *a += ri * rj;
                }
                for (b, &y) in atb.iter_mut().zip(&train.rows[t]) {
                    b[i] += ri * f64::from(y);
                }
            }
        }
        let upper = ata.clone();
        for (i, row) in ata.iter_mut().enumerate() {
            for (j, a) in row[..i].iter_mut().enumerate() {
                *a = upper[j][i];
            }
        }
        let coef = atb.into_iter().map(|b| solve(ata.clone(), b)).collect();
        LinearPredictor { coef }
    }

    fn residuals(&self, g: &Generated) -> Vec<[f64; 4]> {
        (0..g.rows.len())
            .map(|t| {
                if t < P {
                    return [0.0; 4];
                }
                let r = Self::regressors(&g.rows, t);
                std::array::from_fn(|f| {
                    let pred: f64 = self.coef[f].iter().zip(&r).map(|(c, x)| c * x).sum();
                    f64::from(g.rows[t][f]) - pred
                })
            })
            .collect()
    }
}

/// Gaussian elimination with partial pivoting.
fn solve(mut a: Vec<Vec<f64>>, mut b: Vec<f64>) -> Vec<f64> {
    let n = b.len();
    for c in 0..n {
        let p = (c..n).max_by(|&i, &j| a[i][c].abs().total_cmp(&a[j][c].abs())).unwrap();
        a.swap(c, p);
        b.swap(c, p);
        let (top, rest) = a.split_at_mut(c + 1);
        let pivot = &top[c];
        for (r, row) in rest.iter_mut().enumerate() {
            let f = row[c] / pivot[c];
            for (x, p) in row[c..].iter_mut().zip(&pivot[c..]) {
                *x -= f * p;
            }
            b[c + 1 + r] -= f * b[c];
        }
    }
    let mut x = vec![0.0; n];
    for r in (0..n).rev() {
        let s: f64 = (r + 1..n).map(|k| a[r][k] * x[k]).sum();
        x[r] = (b[r] - s) / a[r][r];
    }
    x
}

fn rms(v: impl Iterator<Item = f64>) -> f64 {
    let (mut s, mut n) = (0.0, 0usize);
    for x in v {
        s += x * x;
        n += 1;
    }
    (s / n.max(1) as f64).sqrt()
}

#[test]
fn demo_scenario_sets_are_pinned() {
    let path = demo_dir().join("scenario.toml");
    let s = Scenario::load(&path).unwrap();
    let fs = s.sample_rate_hz;
    assert_eq!(fs, 400.0);
    let mut sets = Vec::new();
    for set in DataSet::ALL {
        let t0 = Instant::now();
        let g = generate(&s, set).unwrap();
        let took = t0.elapsed();
        let hash = content_hash(&g);
        println!("{:>6}: {:>9} samples in {:>6.0?}, content hash {hash:#018x}", set.name(), g.rows.len(), took);
        let len = (s.set(set).duration_s * fs).round() as usize;
        assert_eq!(g.rows.len(), len, "{}", set.name());
        assert_eq!(g.labels.len(), len);
        assert!(g.rows.iter().all(|r| r.len() == 4 && r.iter().all(|v| v.is_finite())));
        for (t, &l) in g.labels.iter().enumerate() {
            let inside = g.events.iter().any(|e| (e.start..e.end).contains(&t));
            assert_eq!(l == 1, inside, "{} sample {t}", set.name());
        }
        sets.push((set, g, hash));
    }
    let get = |d: DataSet| &sets.iter().find(|(s, _, _)| *s == d).unwrap().1;
    assert_eq!(get(DataSet::Train).rows.len(), 960_000);
    assert!(get(DataSet::Train).events.is_empty() && get(DataSet::Calib).events.is_empty());
    let test = get(DataSet::Test);
    let normal = test.labels.iter().filter(|&&l| l == 0).count();
    assert!(normal >= 1_440_000, "only {normal} normal samples: less than an hour");
    for kind in FaultKind::ALL {
        let n = test.events.iter().filter(|e| e.kind == kind).count();
        assert!(n >= 2, "{} appears {n} times", kind.name());
    }
    // Events are apart: at least a minute of normal running between them.
    for w in test.events.windows(2) {
        assert!(w[1].start >= w[0].end + 60 * 400, "{:?} and {:?} are too close", w[0], w[1]);
    }
    assert_eq!(get(DataSet::Sample).events.len(), 1);

    // Every fault stands out: the residual of a linear next-step predictor
    // fitted on `train` (a crude stand-in for the LSTM) is at least 3 times
    // its normal RMS in some feature over the event. Also printed: the RMS
    // level and the sample-to-sample change (the persistence predictor).
    let lp = LinearPredictor::fit(get(DataSet::Train));
    let res = lp.residuals(test);
    let is_normal = |t: usize| t >= P && test.labels[t] == 0;
    let norm_level: [f64; 4] = std::array::from_fn(|f| {
        rms((0..test.rows.len()).filter(|&t| is_normal(t)).map(|t| f64::from(test.rows[t][f])))
    });
    let norm_res: [f64; 4] = std::array::from_fn(|f| rms((0..res.len()).filter(|&t| is_normal(t)).map(|t| res[t][f])));
    println!("normal RMS level {norm_level:.3?}, linear-predictor residual {norm_res:.3?}");
    println!("contrast (event / normal RMS) per feature [vib_x, vib_y, vib_z, current]:");
    for ev in &test.events {
        let level: Vec<f64> =
            (0..4).map(|f| rms((ev.start..ev.end).map(|t| f64::from(test.rows[t][f]))) / norm_level[f]).collect();
        let change = scenario::change_contrast(test, ev);
        let lin: Vec<f64> = (0..4).map(|f| rms((ev.start..ev.end).map(|t| res[t][f])) / norm_res[f]).collect();
        println!(
            "  {:>13} at {:>6.0} s: level {level:.2?}  change {change:.2?}  linear {lin:.2?}",
            ev.kind.name(),
            ev.start as f64 / fs
        );
        let best = lin.iter().copied().fold(0.0, f64::max);
        assert!(best >= 3.0, "{} at sample {}: linear-predictor residual only {best:.2}x", ev.kind.name(), ev.start);
    }

    // The shipped sample trace is what the generator makes.
    let shipped = lapwing_tools::data::read(&demo_dir().join("sample.csv"), false).unwrap();
    let sample = get(DataSet::Sample);
    assert_eq!(shipped.columns, sample.columns);
    assert!(
        shipped.rows == sample.rows && shipped.labels.as_deref() == Some(&sample.labels[..]),
        "demo-data/sample.csv is stale: cargo run --release -p lapwing-tools --example write_demo_sample"
    );

    // Pinned content hashes. A deliberate change of the generator or of
    // demo-data/scenario.toml changes them: update the values below (the
    // test prints the new ones) and regenerate demo-data/sample.csv.
    let pinned = [
        (DataSet::Train, 0xfe34_09c4_c561_441c),
        (DataSet::Calib, 0xe8dc_6d40_7618_67f1),
        (DataSet::Test, 0xc536_4b72_3687_a5cc),
        (DataSet::Sample, 0x2aca_5304_916f_cce3),
    ];
    for (set, want) in pinned {
        let got = sets.iter().find(|(s, _, _)| *s == set).unwrap().2;
        assert_eq!(got, want, "{} content hash changed: {got:#018x}", set.name());
    }
}
