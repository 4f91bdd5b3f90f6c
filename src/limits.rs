//! Resource limits: how much one client may ask of the server at once,
//! and how much work one nuisance refit may take (`max_fit_units`).
//!
//! Every limit has a production default, can be changed in the `[limits]`
//! section of the server's TOML file, and is reported by name and value when
//! a request runs into it. Limits that the monitor also enforces as a fixed
//! ceiling (batch rows, key and name lengths) may be lowered, never raised:
//! `check` refuses a larger value at start-up.

use std::time::Duration;

use serde::Deserialize;

use crate::domain::spec::MAX_NAME_LEN;
use crate::monitor::checks::{MAX_BATCH_ROWS, MAX_KEY_BYTES};

#[derive(Debug, Clone, PartialEq, Eq, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Limits {
    /// Largest gRPC message a client may send, in bytes (after any
    /// compression is undone). 16 MiB holds a batch of 10,000 units with
    /// 200 features; wider units must come in smaller batches.
    pub max_request_bytes: usize,
    /// Largest gRPC message the server sends, in bytes. Scoreboards with many
    /// models and long histories are the large replies; 64 MiB keeps a
    /// runaway reply from exhausting a client.
    pub max_response_bytes: usize,
    /// Most rows in one intake batch (one transaction). Bounds the time the
    /// dataset's write lock is held by one batch. At most 10,000.
    pub max_batch_rows: usize,
    /// Most features a dataset may declare. Every unit stores one double per
    /// feature and the quadratic learners grow with its square.
    pub max_features: usize,
    /// Most datasets on one server. Each keeps its columnar cache in memory
    /// and its own recompute scheduler.
    pub max_datasets: usize,
    /// Most models registered on one dataset, retired ones included (their
    /// predictions stay stored), enough for a hyperparameter sweep. Each
    /// recompute scores every active model: the ranking estimator's
    /// co-moments grow with the square of their number (a tiled matrix
    /// product), the rest with the number; the cache holds 8 bytes per
    /// unit and model (BENCHMARKS.md, "A sweep of candidates").
    pub max_models_per_dataset: usize,
    /// Longest dataset or model name, in bytes. At most 128.
    pub max_name_bytes: usize,
    /// Longest unit key, in bytes. At most 256.
    pub max_key_bytes: usize,
    /// Most concurrent RPCs (HTTP/2 streams) one connection may hold open;
    /// further calls on that connection wait for one to finish.
    pub max_concurrent_streams: u32,
    /// An intake stream that sends no message for this many seconds is ended
    /// with DEADLINE_EXCEEDED, so a stalled client cannot hold a stream (and
    /// its connection slot) forever. What it committed before stays.
    pub stream_idle_seconds: u64,
    /// The most units a nuisance refit fits its models on. Above it the
    /// fold models are fitted on a seeded sample of this many units,
    /// stratified by arm, and every unit still gets nuisance values from
    /// models that never saw it; so a refit's time and memory stop growing
    /// with the history. At least [`MIN_FIT_UNITS`]. A stored fit keeps the
    /// cap it used, so changing this does not change how it is reproduced.
    pub max_fit_units: usize,
    /// The most models a window's blend takes, the first by rank: its
    /// per-fold sums cost this squared per unit and each of its K + 1
    /// weight fits this squared per step, so a sweep of a thousand models
    /// is blended over its top-ranked models. At least 2.
    pub max_blend_models: usize,
}

/// The smallest `max_fit_units` a server accepts. The corrected estimates
/// rely on the nuisance models' errors being small; fitted on fewer units
/// than this, the learners' errors (and the product of the propensity's and
/// the outcome models' errors that the estimates' bias is made of) would
/// be far larger than the default's, for no saving worth having.
pub const MIN_FIT_UNITS: usize = 1_000;

impl Default for Limits {
    fn default() -> Self {
        Self {
            max_request_bytes: 16 * 1024 * 1024,
            max_response_bytes: 64 * 1024 * 1024,
            max_batch_rows: MAX_BATCH_ROWS,
            max_features: 256,
            max_datasets: 256,
            max_models_per_dataset: 1_000,
            max_name_bytes: MAX_NAME_LEN,
            max_key_bytes: MAX_KEY_BYTES,
            max_concurrent_streams: 64,
            stream_idle_seconds: 300,
            // Far more than the learners need to fit three nuisance
            // components on 20-odd features, and about twice the 1M-unit
            // refit of BENCHMARKS.md (some 15 s on two cores).
            max_fit_units: 2_000_000,
            max_blend_models: crate::monitor::recompute::BLEND_MODELS,
        }
    }
}

/// A limit a request ran into: the limit's name, its value and what the
/// request asked for, worded for the status message.
pub fn exceeded(
    limit: &str,
    value: impl std::fmt::Display,
    asked: impl std::fmt::Display,
) -> String {
    format!("{asked}, above limits.{limit} = {value}")
}

impl Limits {
    /// Refuses zero values and values above the monitor's fixed ceilings.
    pub fn check(&self) -> Result<(), String> {
        let ceilings = [
            ("max_batch_rows", self.max_batch_rows, MAX_BATCH_ROWS),
            ("max_name_bytes", self.max_name_bytes, MAX_NAME_LEN),
            ("max_key_bytes", self.max_key_bytes, MAX_KEY_BYTES),
        ];
        for (name, v, ceiling) in ceilings {
            if v > ceiling {
                return Err(format!("limits.{name}: {v} is above the ceiling {ceiling}"));
            }
        }
        let positive = [
            ("max_request_bytes", self.max_request_bytes as u64),
            ("max_response_bytes", self.max_response_bytes as u64),
            ("max_batch_rows", self.max_batch_rows as u64),
            ("max_features", self.max_features as u64),
            ("max_datasets", self.max_datasets as u64),
            ("max_models_per_dataset", self.max_models_per_dataset as u64),
            ("max_name_bytes", self.max_name_bytes as u64),
            ("max_key_bytes", self.max_key_bytes as u64),
            (
                "max_concurrent_streams",
                u64::from(self.max_concurrent_streams),
            ),
            ("stream_idle_seconds", self.stream_idle_seconds),
        ];
        for (name, v) in positive {
            if v == 0 {
                return Err(format!("limits.{name}: must be at least 1"));
            }
        }
        if self.max_blend_models < 2 {
            return Err(format!(
                "limits.max_blend_models: {} is below 2 (a blend needs two models)",
                self.max_blend_models
            ));
        }
        if self.max_fit_units < MIN_FIT_UNITS {
            return Err(format!(
                "limits.max_fit_units: {} is below the minimum {MIN_FIT_UNITS} (the nuisance models need that many units to fit well)",
                self.max_fit_units
            ));
        }
        Ok(())
    }

    pub fn stream_idle(&self) -> Duration {
        Duration::from_secs(self.stream_idle_seconds)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_pass_and_raised_ceilings_are_refused() {
        assert_eq!(Limits::default().check(), Ok(()));
        let raised = Limits {
            max_key_bytes: MAX_KEY_BYTES + 1,
            ..Limits::default()
        };
        let err = raised.check().expect_err("above the ceiling");
        assert!(
            err.contains("limits.max_key_bytes") && err.contains("257"),
            "{err}"
        );
        let zero = Limits {
            max_datasets: 0,
            ..Limits::default()
        };
        assert!(zero.check().expect_err("zero").contains("max_datasets"));
        let parsed: Limits = toml::from_str("max_datasets = 3\n").expect("toml");
        assert_eq!(parsed.max_datasets, 3);
        assert_eq!(parsed.max_batch_rows, MAX_BATCH_ROWS);
        assert!(toml::from_str::<Limits>("max_dataset = 3\n").is_err());
    }

    #[test]
    fn max_blend_models_defaults_to_fifty_and_refuses_fewer_than_two() {
        assert_eq!(Limits::default().max_blend_models, 50);
        let parsed: Limits = toml::from_str("max_blend_models = 200\n").expect("toml");
        assert_eq!(parsed.max_blend_models, 200);
        let err = Limits {
            max_blend_models: 1,
            ..Limits::default()
        }
        .check()
        .expect_err("one model cannot be blended");
        assert!(err.contains("limits.max_blend_models"), "{err}");
    }

    #[test]
    fn max_fit_units_defaults_to_two_million_and_refuses_less_than_the_minimum() {
        assert_eq!(Limits::default().max_fit_units, 2_000_000);
        let parsed: Limits = toml::from_str("max_fit_units = 250000\n").expect("toml");
        assert_eq!(parsed.max_fit_units, 250_000);
        assert_eq!(parsed.check(), Ok(()));
        let at_minimum = Limits {
            max_fit_units: MIN_FIT_UNITS,
            ..Limits::default()
        };
        assert_eq!(at_minimum.check(), Ok(()));
        let small = Limits {
            max_fit_units: MIN_FIT_UNITS - 1,
            ..Limits::default()
        };
        let err = small.check().expect_err("below the minimum");
        assert!(
            err.contains("limits.max_fit_units") && err.contains("999") && err.contains("1000"),
            "{err}"
        );
    }
}
