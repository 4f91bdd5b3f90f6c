//! Events from the stream watch's decisions ([`crate::estimate::watch`]).
//!
//! The watch decides on per-unit values fixed when each unit was first
//! scored, with confidence sequences and change detectors whose error
//! rates hold however often the service looks; this file only words its
//! decisions and attaches their evidence. Every event's details carry
//! `window: "stream"` (the watched units, not a scoreboard window) and an
//! `evidence` object: the estimate with its confidence-sequence bounds, the
//! units and looks it rests on, the detector's log statistic against its
//! log threshold, the threshold compared with, and the alpha spent.

use serde_json::json;

use crate::estimate::watch::{ArmSignal, Evidence, Route, Signal};

/// An event to store and broadcast.
#[derive(Debug, Clone, PartialEq)]
pub struct Raised {
    pub kind: &'static str,
    pub summary: String,
    pub details: serde_json::Value,
}

/// The window label of the watch's events and metrics.
pub const STREAM: &str = "stream";

fn how(e: &Evidence) -> String {
    match e.route {
        Route::Sequence => format!(
            "confidence sequence {:.4} to {:.4} over {} units",
            e.lower, e.upper, e.units
        ),
        Route::Detector => format!(
            "change detector at {:.1} against its threshold {:.1} (log scale) after {} look{}",
            e.log_statistic,
            e.log_threshold,
            e.looks,
            if e.looks == 1 { "" } else { "s" }
        ),
        Route::Gone => "the previous front-runner no longer predicts".into(),
    }
}

/// The event for a decision, if it makes one.
pub fn event(dataset: &str, signal: &Signal) -> Option<Raised> {
    let raised = |kind, summary: String, details: serde_json::Value| {
        let mut details = details;
        details["window"] = json!(STREAM);
        Some(Raised {
            kind,
            summary,
            details,
        })
    };
    match signal {
        Signal::FrontRunnerAppointed { .. } => None,
        Signal::FrontRunnerChanged { old, new, evidence } => raised(
            "front_runner_changed",
            format!(
                "{dataset}: front-runner changed from {old} to {new}: lower error by {:.4} ({})",
                evidence.estimate,
                how(evidence)
            ),
            json!({ "old": old, "new": new, "margin": evidence.estimate, "evidence": evidence }),
        ),
        Signal::FrontRunnerUncertain { front_runner, tied } => raised(
            "front_runner_uncertain",
            format!(
                "{dataset}: front-runner {front_runner} is not yet separated from {}",
                tied.join(", ")
            ),
            json!({ "front_runner": front_runner, "tied": tied }),
        ),
        Signal::FrontRunnerSettled { front_runner } => raised(
            "front_runner_settled",
            format!("{dataset}: front-runner {front_runner} now errs less than every other model"),
            json!({ "front_runner": front_runner }),
        ),
        Signal::HeterogeneityDetected { model, evidence } => raised(
            "heterogeneity_detected",
            format!(
                "{dataset}: {model} estimates effects better than constant-effect by {:.4} ({})",
                evidence.estimate,
                how(evidence)
            ),
            json!({ "model": model, "evidence": evidence }),
        ),
        Signal::HeterogeneityLost { model, evidence } => raised(
            "no_detectable_heterogeneity",
            format!(
                "{dataset}: {model} no longer beats constant-effect ({}); targeting on the \
                 models adds nothing measurable now",
                how(evidence)
            ),
            json!({ "model": model, "evidence": evidence }),
        ),
        Signal::OverlapDegraded { evidence } | Signal::OverlapRecovered { evidence } => {
            let degraded = matches!(signal, Signal::OverlapDegraded { .. });
            raised(
                if degraded {
                    "overlap_degraded"
                } else {
                    "overlap_recovered"
                },
                format!(
                    "{dataset}: overlap {}: {:.1}% of arriving units have an extreme propensity \
                     (limit {:.1}%; {})",
                    if degraded { "degraded" } else { "recovered" },
                    100.0 * evidence.estimate,
                    100.0 * evidence.threshold,
                    how(evidence)
                ),
                json!({ "extreme_share": evidence.estimate, "evidence": evidence }),
            )
        }
        Signal::NuisanceMisfit {
            component,
            evidence,
        } => raised(
            "nuisance_misfit",
            format!(
                "{dataset}: arriving units no longer fit the nuisance models ({component}: \
                 {:.4} against a tolerance of {:.4}; {}); refitting",
                evidence.estimate,
                evidence.threshold,
                how(evidence)
            ),
            json!({ "component": component, "evidence": evidence }),
        ),
        Signal::PopulationDrift { quantity, evidence } => raised(
            "population_drift",
            format!(
                "{dataset}: arriving units have drifted: the mean of {quantity} moved by {:+.2} \
                 standard deviations from the reference population (tolerance {:.2}; {})",
                evidence.estimate,
                evidence.threshold.abs(),
                how(evidence)
            ),
            json!({ "quantity": quantity, "evidence": evidence }),
        ),
    }
}

/// The event for a decision of a dataset with arms: a contrast's says
/// which arm against which reference, in its summary and as `arm` in its
/// details.
pub fn arm_event(dataset: &str, reference: &str, s: &ArmSignal) -> Option<Raised> {
    if s.arm.is_empty() {
        return event(dataset, &s.signal);
    }
    let mut raised = event(
        &format!("{dataset} ({} against {reference})", s.arm),
        &s.signal,
    )?;
    raised.details["arm"] = json!(s.arm);
    Some(raised)
}
