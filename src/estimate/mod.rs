//! The estimation core: pure functions over arrays, no I/O, no async.
//!
//! Read in this order: [`data`] (the unit table and its checks),
//! [`learner`] and [`crossfit`] (nuisance models), [`pseudo`] (the AIPW
//! pseudo-outcome), [`estimators`] (per-unit contributions, one file each),
//! [`sums`] and [`compare`] (mergeable aggregates, ranking, best set),
//! [`policy`], [`targeting`], [`calibration`] and [`overlap`] (the other
//! reports), and [`scoreboard`], which runs a whole pass, with
//! [`incremental`], its twin for a window that grows; then [`sequential`]
//! and [`watch`], the statistics behind the alerts.

pub mod calibration;
pub mod compare;
pub mod crossfit;
pub mod data;
pub mod error;
pub mod estimators;
pub mod incremental;
pub mod learner;
pub mod overlap;
pub mod policy;
pub mod pseudo;
pub mod scoreboard;
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
