//! Helpers shared by the integration tests.
#![allow(dead_code)]

pub mod pg;
pub mod service;

use std::path::PathBuf;

use ndarray::Array2;
use serde_json::Value;

/// One unit of the three-arm design tests/cli_arms.rs and
/// tests/service_arms.rs share: x1, x2 ~ U(-1, 1); arm 0, 1 or 2 (none,
/// text, mail) drawn with probabilities softmax(0, 0.5 x1, -0.5 x1);
/// effects 1 + x1 (text) and 0.5 - x2 (mail);
/// y = x1 + x2 + effect + U(-1, 1). Returns (x1, x2, arm, y, every arm's
/// effect).
pub fn three_arm_unit(rng: &mut impl rand::Rng) -> (f64, f64, usize, f64, [f64; 3]) {
    let (x1, x2): (f64, f64) = (rng.gen_range(-1.0..1.0), rng.gen_range(-1.0..1.0));
    let eta = [0.0, 0.5 * x1, -0.5 * x1];
    let total: f64 = eta.iter().map(|v: &f64| v.exp()).sum();
    let u: f64 = rng.gen::<f64>() * total;
    let arm = if u < eta[0].exp() {
        0
    } else if u < eta[0].exp() + eta[1].exp() {
        1
    } else {
        2
    };
    let tau = [0.0, 1.0 + x1, 0.5 - x2];
    let y = x1 + x2 + tau[arm] + rng.gen_range(-1.0..1.0);
    (x1, x2, arm, y, tau)
}

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
