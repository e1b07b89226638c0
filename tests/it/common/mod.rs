//! Shared helpers of the integration tests.
#![allow(dead_code)]

pub mod sampling;

use std::path::PathBuf;
use std::process::{Command, Output};

/// The varpost binary built for the tests.
pub fn varpost() -> Command {
    Command::new(env!("CARGO_BIN_EXE_varpost"))
}

/// Runs varpost with arguments; returns the output.
pub fn run(args: &[&str]) -> Output {
    varpost()
        .args(args)
        .output()
        .expect("the varpost binary runs")
}

/// A fresh temporary folder for one test.
pub fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("varpost-test-{}-{name}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("temp dir");
    d
}

/// The Python interpreter with the reference packages (set by scripts/test.sh).
pub fn python() -> String {
    if let Ok(p) = std::env::var("VARPOST_PYTHON") {
        return p;
    }
    let venv = root().join("target/test-venv/bin/python");
    if venv.exists() {
        return venv.to_string_lossy().into_owned();
    }
    "python3".into()
}

/// The project folder.
pub fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Reads a JSON file.
pub fn read_json(p: &std::path::Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(p).expect("file exists")).expect("valid JSON")
}

/// Largest |a − b| / max|b|.
pub fn max_rel_err(a: &[f64], b: &[f64]) -> f64 {
    assert_eq!(a.len(), b.len());
    let scale = b.iter().map(|v| v.abs()).fold(0.0, f64::max);
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs() / scale)
        .fold(0.0, f64::max)
}

/// Componentwise largest |a_i − b_i| / |b_i|.
pub fn max_rel_err_each(a: &[f64], b: &[f64]) -> f64 {
    assert_eq!(a.len(), b.len());
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs() / y.abs())
        .fold(0.0, f64::max)
}

/// A JSON array of numbers as a vector.
pub fn vecf(v: &serde_json::Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}
