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

/// The transfer-table cache shared by the tests (and by test runs): a fixed folder
/// under target/. Entries are keyed by the cosmology, the solver settings and the solver
/// version, so a table is reused only for identical inputs; tests that check the cache
/// itself use folders of their own.
pub fn test_cache_dir() -> PathBuf {
    let d = root().join("target").join("test-cache");
    let _ = std::fs::create_dir_all(&d);
    d
}

/// Runs the binary with arguments, with the shared test cache as the default cache
/// (`NGREACH_CACHE_DIR`; `--cache-dir` and `--no-cache` still win).
pub fn run(args: &[&str]) -> Output {
    Command::new(bin())
        .args(args)
        .current_dir(root())
        .env("NGREACH_CACHE_DIR", test_cache_dir())
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
