//! The device-side API on the host: a quantized layer in constant arrays (as
//! it would sit in flash), caller-owned state in a fixed-capacity buffer,
//! one step per sample. Run: `cargo run --example device_step`.
//!
//! The weights here are written by hand for illustration (one unit that
//! integrates its input); real models come from the `lapwing` host tool.

use lapwing::activation::{TableKind, PRE_FRAC};
use lapwing::quant::{CellWidth, QLayer, QModel, RowScales, Scheme, StateBuf, Weights};

// One input, one unit. Rows: i, f, g, o. Weights int8 per row.
static W_X: [i8; 4] = [0, 0, 127, 0];
static W_H: [i8; 4] = [0; 4];
// Biases in pre-activation units (2^-19): i = +4, f = +3, g = 0, o = +4.
static BIAS: [i32; 4] = [4 << PRE_FRAC, 3 << PRE_FRAC, 0, 4 << PRE_FRAC];
// Multiplier and shift per row: acc_x * 2^-7 (so 127 * x reads as ~x) in
// pre-activation units, i.e. the real scale 2^(19 - 7 - 15) for Q0.15 inputs.
static RQ_X_MULT: [i32; 4] = [1 << 30; 4];
static RQ_X_SHIFT: [i8; 4] = [2; 4];
static RQ_H_MULT: [i32; 4] = [0; 4];
static RQ_H_SHIFT: [i8; 4] = [0; 4];

fn main() -> Result<(), lapwing::Error> {
    let rq_x = RowScales::new(&RQ_X_MULT, &RQ_X_SHIFT)?;
    let rq_h = RowScales::new(&RQ_H_MULT, &RQ_H_SHIFT)?;
    let layer = QLayer::new(1, 1, Weights::I8(&W_X), Weights::I8(&W_H), &BIAS, rq_x, rq_h, 13)?;
    let model = QModel::new(&[layer], None, Scheme::W8A16, CellWidth::C16, TableKind::Standard)?;
    let mut state: StateBuf<8> = StateBuf::new();
    let words = model.state_words();
    let state = state.words_mut(words).ok_or(lapwing::Error::StateSize { expected: words, got: 8 })?;
    let mut h = [0i16; 1];
    println!("state: {} bytes, {} MACs per step", 2 * words, model.macs_per_step());
    for (t, x) in [16_000i16, 16_000, 16_000, -16_000, -16_000, 0, 0, 0].iter().enumerate() {
        model.step(state, &[*x], &mut h)?;
        println!("step {t}: x = {x:6}  h = {:6} ({:+.4})", h[0], h[0] as f32 / 32_768.0);
    }
    Ok(())
}
