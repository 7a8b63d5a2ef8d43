//! Property tests of the host quantizer on extreme float models and data:
//! it either refuses with an error or builds a model whose every step
//! succeeds and keeps hidden values inside (-1, 1).

use lapwing_tools::calibrate::observe;
use lapwing_tools::quantize::{quantize, QuantOptions};
use lapwing_tools::synth::{random_model, random_walk, ModelSpec};
use proptest::prelude::*;

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    #[test]
    fn extreme_models_quantize_or_refuse(
        gain_exp in -6i32..7,
        data_exp in -6i32..7,
        hidden in 1usize..12,
        layers in 1usize..4,
        c32 in any::<bool>(),
        seed in any::<u64>(),
    ) {
        let spec = ModelSpec { input: 3, hidden, layers, output: Some(2), gain: 10f32.powi(gain_exp) };
        let model = random_model(&spec, seed);
        let scale = 10f32.powi(data_exp);
        let data: Vec<Vec<f32>> =
            random_walk(3, 300, seed ^ 1).into_iter().map(|r| r.into_iter().map(|v| v * scale).collect()).collect();
        let ranges = observe(&model, &data).unwrap();
        let opts = QuantOptions {
            cell: if c32 { lapwing::quant::CellWidth::C32 } else { lapwing::quant::CellWidth::C16 },
            ..Default::default()
        };
        let Ok(q) = quantize(&model, &ranges, &opts) else { return Ok(()) };
        let view = q.view().unwrap();
        let mut state = vec![0i16; view.state_words()];
        let mut out = vec![0i16; view.output_len()];
        // Inputs 10x beyond the calibrated range saturate instead of failing.
        for row in data.iter().chain(data.iter().map(|r| r.iter().map(|v| v * 10.0).collect::<Vec<_>>()).collect::<Vec<_>>().iter()) {
            let xq = q.quantize_input(row);
            view.step(&mut state, &xq, &mut out).unwrap();
            let hd = view.layers()[0].hidden();
            prop_assert!(state[..hd].iter().all(|h| *h > i16::MIN));
        }
    }
}
