//! Writes the seeded sample signal shipped in `examples/pipeline/signal.csv`
//! (four features, a mean-reverting random walk plus a sine; invented data
//! for trying the pipeline, not a sensor recording).
//!
//! `cargo run -p lapwing-tools --example sample_signal -- examples/pipeline/signal.csv`
//! `cargo run -p lapwing-tools --example sample_signal -- examples/pipeline/signal_test.csv 20261203`
//! (the held-out stretch the report and sweep examples compare on).

use lapwing_tools::{data, synth};
use std::path::PathBuf;

fn main() -> anyhow::Result<()> {
    let out: PathBuf = std::env::args_os().nth(1).map(PathBuf::from).unwrap_or_else(|| "signal.csv".into());
    let seed = match std::env::args().nth(2) {
        Some(s) => s.parse().map_err(|_| anyhow::anyhow!("seed `{s}` is not a number"))?,
        None => 20_261_202,
    };
    let rows = synth::random_walk(4, 4_000, seed);
    let header: Vec<String> = (0..4).map(|i| format!("s{i}")).collect();
    data::write_csv(&out, &header, &rows)?;
    println!("wrote {} rows to {}", rows.len(), out.display());
    Ok(())
}
