//! Helpers for the integration tests that drive the `ngreach` binary.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

/// Path of the built binary.
pub fn bin() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_ngreach"))
}

/// The repository root.
pub fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

/// Runs the binary with arguments.
pub fn run(args: &[&str]) -> Output {
    Command::new(bin())
        .args(args)
        .current_dir(root())
        .output()
        .expect("binary runs")
}

/// Stdout as text.
pub fn stdout(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

/// Stderr as text.
pub fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// Runs and parses JSON stdout, asserting success.
pub fn run_json(args: &[&str]) -> serde_json::Value {
    let o = run(args);
    assert!(
        o.status.success(),
        "ngreach {args:?} failed: {}",
        stderr(&o)
    );
    serde_json::from_slice(&o.stdout).expect("valid JSON on stdout")
}
