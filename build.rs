//! Sets `cfg(lapwing_dsp)` when the target core has the Arm DSP extension,
//! which selects the `sxtb16`/`smlad` dot products in `src/dsp.rs`. The
//! numerics never depend on it: both paths give the same integers.
//!
//! - `thumbv7em-*` (Cortex-M4, M7): always.
//! - `thumbv8m.main-*` (Cortex-M33, M35P, M55, M85): the extension is
//!   optional there, so only when the build names a CPU that has it
//!   (`-C target-cpu=cortex-m33` and the others below), enables
//!   `+dsp` with `-C target-feature`, or turns on this crate's `arm-dsp`
//!   feature. A wrong claim fails to assemble instead of running.
//!
//! Stable Rust does not expose Arm target features to `cfg`, hence the
//! script.
use std::env;

/// Armv8-M Mainline CPUs that LLVM models with the DSP extension.
const DSP_CPUS: [&str; 4] = ["cortex-m33", "cortex-m35p", "cortex-m55", "cortex-m85"];

fn main() {
    println!("cargo::rustc-check-cfg=cfg(lapwing_dsp)");
    println!("cargo::rerun-if-changed=build.rs");
    println!("cargo::rerun-if-env-changed=CARGO_ENCODED_RUSTFLAGS");
    let target = env::var("TARGET").unwrap_or_default();
    let flags = env::var("CARGO_ENCODED_RUSTFLAGS").unwrap_or_default();
    let named = |what: &str, ok: &dyn Fn(&str) -> bool| {
        flags.split('\x1f').filter_map(|f| f.split_once(what).map(|(_, v)| v)).any(ok)
    };
    let cpu = named("target-cpu=", &|v| DSP_CPUS.contains(&v));
    let feature = named("target-feature=", &|v| v.split(',').any(|f| f == "+dsp"));
    let dsp = target.starts_with("thumbv7em")
        || (target.starts_with("thumbv8m.main") && (cpu || feature || env::var_os("CARGO_FEATURE_ARM_DSP").is_some()));
    if dsp {
        println!("cargo::rustc-cfg=lapwing_dsp");
    }
}
