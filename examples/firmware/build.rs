//! Picks the memory layout of the QEMU board that emulates the target,
//! tells the firmware which board that is, and checks that the generated
//! model module and input sequence exist.

use std::path::{Path, PathBuf};
use std::{env, fs};

/// Target triple prefix, QEMU board, CPU.
const BOARDS: [(&str, &str, &str); 4] = [
    ("thumbv6m-", "microbit", "cortex-m0"),
    ("thumbv7m-", "mps2-an385", "cortex-m3"),
    ("thumbv7em-", "mps2-an386", "cortex-m4"),
    ("thumbv8m.main-", "mps2-an505", "cortex-m33"),
];

fn main() {
    let target = env::var("TARGET").unwrap_or_default();
    let dir = PathBuf::from(env::var_os("CARGO_MANIFEST_DIR").unwrap_or_default());
    let out = PathBuf::from(env::var_os("OUT_DIR").unwrap_or_default());
    println!("cargo:rerun-if-changed=build.rs");
    println!("cargo:rerun-if-changed=memory");

    let Some((_, board, cpu)) = BOARDS.iter().find(|(p, _, _)| target.starts_with(p)) else {
        panic!(
            "target `{target}` has no QEMU board here; supported: thumbv6m-none-eabi, thumbv7m-none-eabi, \
             thumbv7em-none-eabihf, thumbv8m.main-none-eabihf (add memory/<board>.x and a line in build.rs)"
        );
    };
    let layout = dir.join("memory").join(format!("{board}.x"));
    if let Err(e) = fs::copy(&layout, out.join("memory.x")) {
        panic!("cannot copy {}: {e}", layout.display());
    }
    println!("cargo:rustc-link-search={}", out.display());
    println!("cargo:rustc-env=LWFW_TARGET={target}");
    println!("cargo:rustc-env=LWFW_BOARD={board}");
    println!("cargo:rustc-env=LWFW_CPU={cpu}");

    for f in ["gen/model.rs", "gen/inputs.rs"] {
        println!("cargo:rerun-if-changed={f}");
        if !Path::new(&dir.join(f)).is_file() {
            panic!(
                "{f} is missing: it is generated. Run `bash tools/firmware/check.sh` from the repository root \
                 (or `bash tools/firmware/check.sh --gen-only --config NAME` to generate one configuration)"
            );
        }
    }
}
