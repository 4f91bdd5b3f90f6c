//! What a look decides ([`Signal`]), by which route ([`Route`]) and on
//! what grounds ([`Evidence`]): the watch's output, which the service words
//! as alerts, kept apart from the checks that produce it.

use serde::{Deserialize, Serialize};

/// Why a decision was taken.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Route {
    /// A confidence sequence's bound crossed.
    Sequence,
    /// A change detector crossed its threshold.
    Detector,
    /// The reported front-runner no longer predicts.
    Gone,
}

/// What a decision rests on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Evidence {
    pub route: Route,
    /// The mean of the watched quantity since its sequence started, or for
    /// a detector since the change it dates (the looks since the running
    /// sum of deviations from the threshold was last at its minimum).
    pub estimate: f64,
    /// Its confidence-sequence bounds at the alpha spent on sequences
    /// (over a detector's dated stretch they describe, they do not test:
    /// the stretch was chosen by the data).
    pub lower: f64,
    pub upper: f64,
    pub units: u64,
    /// Looks since the sequence or detector started.
    pub looks: u64,
    /// ln of the detector's statistic and of its threshold (the detector
    /// fires at or above it).
    pub log_statistic: f64,
    pub log_threshold: f64,
    /// The threshold the quantity is compared with.
    pub threshold: f64,
    /// The alpha this one test spends (its share of the family's).
    pub alpha: f64,
}

/// What a look decided.
#[derive(Debug, Clone, PartialEq)]
pub enum Signal {
    /// The first front-runner: no event, the watch has just started.
    FrontRunnerAppointed {
        front_runner: String,
    },
    /// `evidence` is on the difference old minus new in squared error
    /// (positive: the new front-runner errs less).
    FrontRunnerChanged {
        old: String,
        new: String,
        evidence: Evidence,
    },
    /// The front-runner is not yet separated from these challengers.
    FrontRunnerUncertain {
        front_runner: String,
        tied: Vec<String>,
    },
    /// Every challenger is separated from the front-runner.
    FrontRunnerSettled {
        front_runner: String,
    },
    /// `evidence` is on constant-effect's error minus the model's.
    HeterogeneityDetected {
        model: String,
        evidence: Evidence,
    },
    /// The front-runner's advantage over constant-effect has gone.
    HeterogeneityLost {
        model: String,
        evidence: Evidence,
    },
    /// `evidence` is on the extreme-propensity share.
    OverlapDegraded {
        evidence: Evidence,
    },
    OverlapRecovered {
        evidence: Evidence,
    },
    /// `component` names the fit and the check that failed.
    NuisanceMisfit {
        component: String,
        evidence: Evidence,
    },
    /// `evidence` is on the standardized mean of `quantity` (a feature's
    /// name or "propensity") among arriving units, against the reference.
    PopulationDrift {
        quantity: String,
        evidence: Evidence,
    },
}
