//! Helpers shared by the integration tests: fixture loading, tolerant comparison, (in `broker`) test brokers
//! and an MQTT client, and (in `daemon`) the `gaugewise run` process.
#![allow(dead_code)]

pub mod broker;
pub mod daemon;

use serde_json::Value;
use std::path::PathBuf;

pub fn reference_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("reference")
}

pub fn fixture(name: &str) -> Value {
    let path = reference_dir().join(name);
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

/// A JSON array of numbers, null read as NaN (a missing value).
pub fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap_or_else(|| panic!("expected an array, got {v}"))
        .iter()
        .map(|x| x.as_f64().unwrap_or(f64::NAN))
        .collect()
}

/// |a - b| <= rel * max(|b|, 1e-300), or both NaN; a small absolute floor for values near zero.
pub fn assert_close(a: f64, b: f64, rel: f64, what: &str) {
    if a.is_nan() && b.is_nan() {
        return;
    }
    let tol = rel * b.abs().max(1e-12);
    assert!(
        (a - b).abs() <= tol,
        "{what}: got {a}, expected {b} (relative tolerance {rel}, off by {:.3e} relative)",
        (a - b).abs() / b.abs().max(1e-300)
    );
}
