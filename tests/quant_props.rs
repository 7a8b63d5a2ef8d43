//! Property tests of the integer step on arbitrary (not quantizer-made)
//! weights, multipliers and inputs, for every scheme: it never panics, a
//! valid model never fails a step, every value stays in its format's range,
//! and the same inputs give the same outputs.

use lapwing::activation::TableKind;
use lapwing::quant::{CellWidth, QHead, QLayer, QModel, RowScales, Scheme, Weights};
use proptest::prelude::*;

/// Multipliers and shifts; int16 weights need shifts that stay valid after
/// the pre-shift (at most 4 here: rows of at most 13 int16 weights).
fn requant_pairs(n: usize, wide: bool) -> impl Strategy<Value = (Vec<i32>, Vec<i8>)> {
    let lo = if wide { -27i8 } else { -31 };
    prop::collection::vec((0i32..=i32::MAX, lo..=62), n).prop_map(|v| v.into_iter().unzip())
}

/// Weights of the scheme's width, stored as i16 (narrowed for int8 schemes).
fn weights(n: usize, wide: bool) -> impl Strategy<Value = Vec<i16>> {
    let range = if wide { i16::MIN..=i16::MAX } else { -128i16..=127 };
    prop::collection::vec(range, n)
}

#[derive(Debug, Clone)]
struct Raw {
    x: usize,
    h: usize,
    scheme: Scheme,
    w_x: Vec<i16>,
    w_h: Vec<i16>,
    bias: Vec<i32>,
    rq_x: (Vec<i32>, Vec<i8>),
    rq_h: (Vec<i32>, Vec<i8>),
    frac: u8,
    head_w: Vec<i16>,
    head_b: Vec<i32>,
    head_rq: (Vec<i32>, Vec<i8>),
    cell: CellWidth,
    table: TableKind,
    inputs: Vec<Vec<i16>>,
}

fn raw_model() -> impl Strategy<Value = Raw> {
    let schemes = prop::sample::select(Scheme::ALL.to_vec());
    (1usize..6, 1usize..9, any::<bool>(), any::<bool>(), schemes).prop_flat_map(|(x, h, c32, compact, scheme)| {
        let cell = if c32 { CellWidth::C32 } else { CellWidth::C16 };
        let table = if compact { TableKind::Compact } else { TableKind::Standard };
        let wide = scheme == Scheme::W16A16;
        (
            weights(4 * h * x, wide),
            weights(4 * h * h, wide),
            prop::collection::vec(any::<i32>(), 4 * h),
            requant_pairs(4 * h, wide),
            requant_pairs(4 * h, wide),
            0u8..=cell.max_frac(),
            weights(2 * h, wide),
            prop::collection::vec(any::<i32>(), 2),
            requant_pairs(2, wide),
            prop::collection::vec(prop::collection::vec(any::<i16>(), x), 1..40),
        )
            .prop_map(move |(w_x, w_h, bias, rq_x, rq_h, frac, head_w, head_b, head_rq, inputs)| Raw {
                x,
                h,
                scheme,
                w_x,
                w_h,
                bias,
                rq_x,
                rq_h,
                frac,
                head_w,
                head_b,
                head_rq,
                cell,
                table,
                inputs,
            })
    })
}

fn run(r: &Raw) -> Option<Vec<Vec<i16>>> {
    fn scales(p: &(Vec<i32>, Vec<i8>)) -> Option<RowScales<'_>> {
        RowScales::new(&p.0, &p.1).ok()
    }
    let narrow = |v: &[i16]| v.iter().map(|w| *w as i8).collect::<Vec<i8>>();
    let (wx8, wh8, hw8) = (narrow(&r.w_x), narrow(&r.w_h), narrow(&r.head_w));
    fn pick<'a>(scheme: Scheme, w16: &'a [i16], w8: &'a [i8]) -> Weights<'a> {
        if scheme == Scheme::W16A16 {
            Weights::I16(w16)
        } else {
            Weights::I8(w8)
        }
    }
    let pick = |a, b| pick(r.scheme, a, b);
    let layer = QLayer::new(
        r.x,
        r.h,
        pick(&r.w_x, &wx8),
        pick(&r.w_h, &wh8),
        &r.bias,
        scales(&r.rq_x)?,
        scales(&r.rq_h)?,
        r.frac,
    )
    .ok()?;
    let head = QHead::new(r.h, 2, pick(&r.head_w, &hw8), &r.head_b, scales(&r.head_rq)?).ok()?;
    let model = QModel::new(&[layer], Some(head), r.scheme, r.cell, r.table).ok()?;
    let mut state = vec![0i16; model.state_words()];
    let mut out = [0i16; 2];
    let mut outs = Vec::new();
    for x in &r.inputs {
        model.step(&mut state, x, &mut out).expect("a validated model never fails a step");
        // h' = o * tanh(c') has magnitude below 1: never the value -1 of
        // its format (Q0.15, or Q0.7 packed two per word for w8a8).
        if r.scheme == Scheme::W8A8 {
            let bytes: Vec<i8> = state.iter().flat_map(|w| w.to_ne_bytes()).map(|b| b as i8).collect();
            for hv in &bytes[..r.h] {
                assert!(*hv > i8::MIN, "hidden state {hv} outside (-1, 1)");
            }
        } else {
            for hv in &state[..r.h] {
                assert!(*hv > i16::MIN, "hidden state {hv} outside (-1, 1)");
            }
        }
        outs.push(out.to_vec());
    }
    Some(outs)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    #[test]
    fn arbitrary_models_never_panic_and_are_deterministic(r in raw_model()) {
        let a = run(&r);
        let b = run(&r);
        // Every generated model is within the core's validation rules.
        prop_assert!(a.is_some(), "model refused by validation");
        prop_assert_eq!(a, b);
    }

    #[test]
    fn extreme_inputs_saturate_cleanly(r in raw_model(), v in prop::sample::select(vec![i16::MIN, i16::MAX, 0, -1])) {
        let mut r = r;
        for x in &mut r.inputs {
            for e in x.iter_mut() {
                *e = v;
            }
        }
        let _ = run(&r);
    }
}
