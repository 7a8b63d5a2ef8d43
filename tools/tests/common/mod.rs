//! Helpers shared by the CLI tests: the workspace root, the shipped example
//! files, and running the `lapwing` binary.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// The workspace root.
pub fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

/// A file of the shipped example `examples/pipeline/`.
pub fn example(name: &str) -> String {
    root().join("examples/pipeline").join(name).display().to_string()
}

/// Runs `lapwing` with `args`.
pub fn lapwing(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_lapwing")).args(args).output().expect("run lapwing")
}

/// Standard error as text.
pub fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}
