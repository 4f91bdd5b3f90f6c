//! The estimation core: pure functions over arrays, no I/O, no async.
//!
//! Read in this order: [`data`] (the unit table and its checks),
//! [`learner`] and [`crossfit`] (nuisance models), [`pseudo`] (the AIPW
//! pseudo-outcome), [`estimators`] (per-unit contributions, one file each),
//! [`sums`], [`compare`] and [`selection`] (mergeable aggregates, ranking,
//! best set, inference that survives choosing the top model),
//! [`policy`], [`targeting`], [`calibration`] and [`overlap`] (the other
//! reports), [`level`] (a lower bound on each model's RMSE that needs no
//! nuisance model to be right), [`blend`] (the cross-fitted convex blend of
//! the models the offline pass adds), and [`scoreboard`], which runs a whole
//! pass, with [`incremental`], its twin for a window that grows, and
//! [`arms`], the same per contrast for datasets with more than two arms; then
//! [`sequential`] and [`watch`], the statistics behind the alerts.

pub mod arms;
pub mod blend;
pub mod calibration;
pub mod compare;
pub mod crossfit;
pub mod data;
pub mod error;
pub mod estimators;
pub mod incremental;
pub mod learner;
pub mod level;
pub mod overlap;
pub mod policy;
pub mod pseudo;
pub mod scoreboard;
pub mod selection;
pub mod sequential;
pub mod stats;
pub mod sums;
pub mod targeting;
pub mod watch;

pub use data::{
    FeatureRows, ModelPredictions, OutcomeKind, UnitTable, CONSTANT_EFFECT, ZERO_EFFECT,
};
pub use error::{Degenerate, EstimateError};
pub use scoreboard::{evaluate, score, Scoreboard, Settings};

#[cfg(test)]
pub(crate) mod testing {
    //! Checks shared by the unit tests of `estimate` and the monitor.

    /// Numbers agree to `tol` relative (absolute below 1); arrays and
    /// objects agree member by member; everything else is equal.
    pub fn assert_json_close(a: &serde_json::Value, b: &serde_json::Value, tol: f64, path: &str) {
        use serde_json::Value;
        match (a, b) {
            (Value::Number(x), Value::Number(y)) => {
                let (x, y) = (x.as_f64().unwrap_or(0.0), y.as_f64().unwrap_or(0.0));
                let bound = tol * x.abs().max(y.abs()).max(1.0);
                assert!((x - y).abs() <= bound, "{path}: {x} vs {y}");
            }
            (Value::Array(x), Value::Array(y)) => {
                assert_eq!(x.len(), y.len(), "{path}");
                for (i, (p, q)) in x.iter().zip(y).enumerate() {
                    assert_json_close(p, q, tol, &format!("{path}[{i}]"));
                }
            }
            (Value::Object(x), Value::Object(y)) => {
                assert_eq!(x.len(), y.len(), "{path}");
                for (k, v) in x {
                    assert_json_close(v, &y[k], tol, &format!("{path}.{k}"));
                }
            }
            _ => assert_eq!(a, b, "{path}"),
        }
    }
}
