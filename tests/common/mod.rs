//! Helpers shared by the integration tests.
#![allow(dead_code)]

pub mod pg;
pub mod service;

use std::path::PathBuf;

use ndarray::Array2;
use serde_json::Value;

pub fn repo_path(rel: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(rel)
}

pub fn fixture(name: &str) -> Value {
    let path = repo_path(&format!("tests/fixtures/{name}"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

pub fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

pub fn nums(v: &Value) -> Vec<f64> {
    v.as_array().expect("array").iter().map(num).collect()
}

pub fn matrix(v: &Value) -> Array2<f64> {
    let rows: Vec<Vec<f64>> = v.as_array().expect("rows").iter().map(nums).collect();
    let d = rows[0].len();
    Array2::from_shape_vec((rows.len(), d), rows.concat()).expect("rectangular")
}
