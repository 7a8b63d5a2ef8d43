//! Property tests of the integer step on arbitrary (not quantizer-made)
//! weights, multipliers and inputs: it never panics, a valid model never
//! fails a step, every value stays in its format's range, and the same
//! inputs give the same outputs.

use lapwing::activation::TableKind;
use lapwing::quant::{CellWidth, QHead, QLayer, QModel, RowScales};
use proptest::prelude::*;

fn requant_pairs(n: usize) -> impl Strategy<Value = (Vec<i32>, Vec<i8>)> {
    prop::collection::vec((0i32..=i32::MAX, -31i8..=62), n).prop_map(|v| v.into_iter().unzip())
}

#[derive(Debug, Clone)]
struct Raw {
    x: usize,
    h: usize,
    w_x: Vec<i8>,
    w_h: Vec<i8>,
    bias: Vec<i32>,
    rq_x: (Vec<i32>, Vec<i8>),
    rq_h: (Vec<i32>, Vec<i8>),
    frac: u8,
    head_w: Vec<i8>,
    head_b: Vec<i32>,
    head_rq: (Vec<i32>, Vec<i8>),
    cell: CellWidth,
    table: TableKind,
    inputs: Vec<Vec<i16>>,
}

fn raw_model() -> impl Strategy<Value = Raw> {
    (1usize..6, 1usize..9, any::<bool>(), any::<bool>()).prop_flat_map(|(x, h, c32, compact)| {
        let cell = if c32 { CellWidth::C32 } else { CellWidth::C16 };
        let table = if compact { TableKind::Compact } else { TableKind::Standard };
        (
            prop::collection::vec(any::<i8>(), 4 * h * x),
            prop::collection::vec(any::<i8>(), 4 * h * h),
            prop::collection::vec(any::<i32>(), 4 * h),
            requant_pairs(4 * h),
            requant_pairs(4 * h),
            0u8..=cell.max_frac(),
            prop::collection::vec(any::<i8>(), 2 * h),
            prop::collection::vec(any::<i32>(), 2),
            requant_pairs(2),
            prop::collection::vec(prop::collection::vec(any::<i16>(), x), 1..40),
        )
            .prop_map(move |(w_x, w_h, bias, rq_x, rq_h, frac, head_w, head_b, head_rq, inputs)| Raw {
                x,
                h,
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
    let layer = QLayer::new(r.x, r.h, &r.w_x, &r.w_h, &r.bias, scales(&r.rq_x)?, scales(&r.rq_h)?, r.frac).ok()?;
    let head = QHead::new(r.h, 2, &r.head_w, &r.head_b, scales(&r.head_rq)?).ok()?;
    let model = QModel::new(&[layer], Some(head), r.cell, r.table).ok()?;
    let mut state = vec![0i16; model.state_words()];
    let mut out = [0i16; 2];
    let mut outs = Vec::new();
    for x in &r.inputs {
        model.step(&mut state, x, &mut out).expect("a validated model never fails a step");
        // h' = o * tanh(c') has magnitude below 1: never the Q0.15 value -1.
        for hv in &state[..r.h] {
            assert!(*hv > i16::MIN, "hidden state {hv} outside (-1, 1)");
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
