//! Prometheus metrics (prefix `plumbline_`) and the HTTP listener that
//! serves them with the health probes and the status page
//! ([`crate::page`]).
//!
//! Series, all labelled by `dataset`:
//! - `plumbline_model_score` / `plumbline_model_score_se` {model, estimator, window}
//! - `plumbline_model_rank`, `plumbline_model_draw_share`,
//!   `plumbline_model_rmse_lower_bound` {model, window}
//! - `plumbline_front_runner_info` {window, model} = 1 for the current front-runner
//! - `plumbline_front_runner_changes_total` {window}
//! - `plumbline_watched_units`: units the alerts' stream watch has taken
//! - `plumbline_drift_standardized_difference` {quantity}: a feature's or
//!   the propensity's drift from the watch's reference population
//!
//! On a dataset with arms every board-derived series above and below
//! (`cumulative` and `recent` windows) comes once per contrast, with a
//! `contrast` label naming the arm compared with the reference (e.g.
//! `contrast="text"`); a binary dataset's series have no `contrast` label.
//! `plumbline_overlap_effective_share` {window, arm} then holds each arm's
//! share under the generalized (multi-arm) propensity, `arm` the arm's
//! label, and `plumbline_overlap_arm_extreme_share` {window, arm} the share
//! of every unit whose propensity of that arm is below `eps`.
//!
//! `window="stream"` series come from the stream watch behind the alerts
//! (anytime-valid: see `estimate::watch`); `cumulative` and `recent`
//! series are the boards' point estimates of the latest look.
//! - `plumbline_front_runner_uncertain`, `plumbline_no_detectable_heterogeneity`,
//!   `plumbline_overlap_degraded`, `plumbline_overlap_extreme_share` {window}
//! - `plumbline_overlap_effective_share` {window, arm}: `treated` and
//!   `control` on a binary dataset
//! - `plumbline_ingest_rows_total` {kind, result}
//! - `plumbline_ingest_conflicts_total` {kind}: batches another server
//!   numbered first (shared store), checked and numbered again
//! - `plumbline_recompute_duration_seconds` {kind} (histogram),
//!   `plumbline_recompute_failures_total`
//! - `plumbline_nuisance_oof_loss` {component}; on a dataset with arms
//!   `component="propensity"` (the generalized propensity's log-loss) and,
//!   per arm, {component="outcome", arm} (that arm's outcome model) and
//!   {component="propensity", arm} (the log-loss over that arm's units)
//! - `plumbline_units`, `plumbline_outcomes`,
//!   `plumbline_last_outcome_timestamp_seconds`
//! - `plumbline_events_total` {kind}
//! - `plumbline_build_info` {version} = 1, and the conventional `process_*`
//!   series (`process.rs`)

use std::sync::atomic::AtomicU64;
use std::sync::Arc;

use prometheus_client::encoding::{EncodeLabel, EncodeLabelSet, LabelSetEncoder};
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::histogram::{exponential_buckets, Histogram};
use prometheus_client::registry::Registry;

pub mod http;
pub mod process;

pub type FloatGaugeType = Gauge<f64, AtomicU64>;
type FloatGauge = FloatGaugeType;

/// Writes `label="value"`, as the derived encoders do.
fn label(encoder: &mut LabelSetEncoder, key: &str, value: &str) -> Result<(), std::fmt::Error> {
    (key, value).encode(encoder.encode_label())
}

/// Writes the `contrast` label only on a contrast's series: a binary
/// dataset's series keep exactly the labels they had before contrasts.
fn contrast_label(encoder: &mut LabelSetEncoder, contrast: &str) -> Result<(), std::fmt::Error> {
    if contrast.is_empty() {
        return Ok(());
    }
    label(encoder, "contrast", contrast)
}

/// A board's per-model, per-estimator series. `contrast` is the arm of a
/// contrast's board on a dataset with arms (that arm against the
/// reference), empty on a binary dataset, where it is not written.
#[derive(Clone, Debug, Hash, PartialEq, Eq)]
pub struct ScoreLabels {
    pub dataset: String,
    pub model: String,
    pub estimator: String,
    pub window: String,
    pub contrast: String,
}

impl EncodeLabelSet for ScoreLabels {
    fn encode(&self, encoder: &mut LabelSetEncoder) -> Result<(), std::fmt::Error> {
        label(encoder, "dataset", &self.dataset)?;
        label(encoder, "model", &self.model)?;
        label(encoder, "estimator", &self.estimator)?;
        label(encoder, "window", &self.window)?;
        contrast_label(encoder, &self.contrast)
    }
}

/// A board's per-model series; `contrast` as in [`ScoreLabels`].
#[derive(Clone, Debug, Hash, PartialEq, Eq)]
pub struct ModelLabels {
    pub dataset: String,
    pub model: String,
    pub window: String,
    pub contrast: String,
}

impl EncodeLabelSet for ModelLabels {
    fn encode(&self, encoder: &mut LabelSetEncoder) -> Result<(), std::fmt::Error> {
        label(encoder, "dataset", &self.dataset)?;
        label(encoder, "model", &self.model)?;
        label(encoder, "window", &self.window)?;
        contrast_label(encoder, &self.contrast)
    }
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct QuantityLabels {
    pub dataset: String,
    pub quantity: String,
}

/// A window's series; `contrast` as in [`ScoreLabels`].
#[derive(Clone, Debug, Hash, PartialEq, Eq)]
pub struct WindowLabels {
    pub dataset: String,
    pub window: String,
    pub contrast: String,
}

impl EncodeLabelSet for WindowLabels {
    fn encode(&self, encoder: &mut LabelSetEncoder) -> Result<(), std::fmt::Error> {
        label(encoder, "dataset", &self.dataset)?;
        label(encoder, "window", &self.window)?;
        contrast_label(encoder, &self.contrast)
    }
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct ArmLabels {
    pub dataset: String,
    pub window: String,
    pub arm: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct IngestLabels {
    pub dataset: String,
    pub kind: String,
    pub result: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct KindLabels {
    pub dataset: String,
    pub kind: String,
}

/// A nuisance component's series. `arm` names the arm of a dataset with
/// arms that the value belongs to (`component="outcome"`: that arm's
/// outcome model; `component="propensity"`: the generalized propensity's
/// log-loss over that arm's units), empty otherwise, where it is not
/// written: a binary dataset's series keep exactly the labels they had.
#[derive(Clone, Debug, Hash, PartialEq, Eq)]
pub struct ComponentLabels {
    pub dataset: String,
    pub component: String,
    pub arm: String,
}

impl EncodeLabelSet for ComponentLabels {
    fn encode(&self, encoder: &mut LabelSetEncoder) -> Result<(), std::fmt::Error> {
        label(encoder, "dataset", &self.dataset)?;
        label(encoder, "component", &self.component)?;
        if self.arm.is_empty() {
            return Ok(());
        }
        label(encoder, "arm", &self.arm)
    }
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct BuildLabels {
    pub version: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct DatasetLabels {
    pub dataset: String,
}

/// Every series the service exports.
pub struct Metrics {
    registry: Registry,
    pub model_score: Family<ScoreLabels, FloatGauge>,
    pub model_score_se: Family<ScoreLabels, FloatGauge>,
    pub model_rank: Family<ModelLabels, FloatGauge>,
    pub model_draw_share: Family<ModelLabels, FloatGauge>,
    pub model_rmse_lower_bound: Family<ModelLabels, FloatGauge>,
    pub front_runner_info: Family<ModelLabels, FloatGauge>,
    pub front_runner_changes: Family<WindowLabels, Counter>,
    pub front_runner_uncertain: Family<WindowLabels, FloatGauge>,
    pub no_heterogeneity: Family<WindowLabels, FloatGauge>,
    pub overlap_degraded: Family<WindowLabels, FloatGauge>,
    pub overlap_extreme_share: Family<WindowLabels, FloatGauge>,
    pub overlap_effective_share: Family<ArmLabels, FloatGauge>,
    pub overlap_arm_extreme_share: Family<ArmLabels, FloatGauge>,
    pub ingest_rows: Family<IngestLabels, Counter>,
    pub ingest_conflicts: Family<KindLabels, Counter>,
    pub recompute_seconds: Family<KindLabels, Histogram>,
    pub recompute_failures: Family<DatasetLabels, Counter>,
    pub nuisance_loss: Family<ComponentLabels, FloatGauge>,
    pub units: Family<DatasetLabels, FloatGauge>,
    pub watched_units: Family<DatasetLabels, FloatGauge>,
    pub drift: Family<QuantityLabels, FloatGauge>,
    pub outcomes: Family<DatasetLabels, FloatGauge>,
    pub last_outcome_seconds: Family<DatasetLabels, FloatGauge>,
    pub events: Family<KindLabels, Counter>,
    pub dataset_owned: Family<DatasetLabels, FloatGauge>,
}

impl Metrics {
    pub fn new() -> Arc<Self> {
        let mut root = Registry::default();
        root.register_collector(Box::new(process::ProcessCollector));
        let registry = root.sub_registry_with_prefix("plumbline");
        let m = Metrics {
            model_score: Family::default(),
            model_score_se: Family::default(),
            model_rank: Family::default(),
            model_draw_share: Family::default(),
            model_rmse_lower_bound: Family::default(),
            front_runner_info: Family::default(),
            front_runner_changes: Family::default(),
            front_runner_uncertain: Family::default(),
            no_heterogeneity: Family::default(),
            overlap_degraded: Family::default(),
            overlap_extreme_share: Family::default(),
            overlap_effective_share: Family::default(),
            overlap_arm_extreme_share: Family::default(),
            ingest_rows: Family::default(),
            ingest_conflicts: Family::default(),
            recompute_seconds: Family::new_with_constructor(|| {
                Histogram::new(exponential_buckets(0.005, 2.0, 16))
            }),
            recompute_failures: Family::default(),
            nuisance_loss: Family::default(),
            units: Family::default(),
            watched_units: Family::default(),
            drift: Family::default(),
            outcomes: Family::default(),
            last_outcome_seconds: Family::default(),
            events: Family::default(),
            dataset_owned: Family::default(),
            registry: Registry::default(),
        };
        registry.register(
            "model_score",
            "Model score by estimator and window (lower error is better; corrected_pehe is a lower estimate)",
            m.model_score.clone(),
        );
        registry.register(
            "model_score_se",
            "Standard error of plumbline_model_score",
            m.model_score_se.clone(),
        );
        registry.register(
            "model_rank",
            "Rank of the model by corrected PEHE (1 = best)",
            m.model_rank.clone(),
        );
        registry.register(
            "model_draw_share",
            "Share of correlated draws around the estimates in which the model has the lowest corrected PEHE (overstates the front-runner among ties)",
            m.model_draw_share.clone(),
        );
        registry.register(
            "model_rmse_lower_bound",
            "One-sided 95% lower confidence bound on the model's RMSE, valid whatever the nuisance models' quality up to the product-of-errors term (0 says nothing)",
            m.model_rmse_lower_bound.clone(),
        );
        registry.register(
            "front_runner_info",
            "1 for the current front-runner of each window (window=\"stream\": the front-runner the alerts report)",
            m.front_runner_info.clone(),
        );
        registry.register(
            "front_runner_changes",
            "Front-runner-changed events raised (window=\"stream\")",
            m.front_runner_changes.clone(),
        );
        registry.register(
            "front_runner_uncertain",
            "1 while the front-runner is not separated from another model (stream: by the alerts' confidence sequences; a board window: its best set holds more than one model)",
            m.front_runner_uncertain.clone(),
        );
        registry.register(
            "no_detectable_heterogeneity",
            "1 while no model is shown to beat constant-effect (stream: by the alerts' confidence sequences; a board window: at one look)",
            m.no_heterogeneity.clone(),
        );
        registry.register(
            "overlap_degraded",
            "1 while overlap is degraded (stream: the alerts' detectors on the extreme share; a board window: a threshold crossed at one look)",
            m.overlap_degraded.clone(),
        );
        registry.register(
            "overlap_extreme_share",
            "Share of units with propensity outside [eps, 1 - eps]",
            m.overlap_extreme_share.clone(),
        );
        registry.register(
            "overlap_effective_share",
            "Kish effective sample size as a share of the arm",
            m.overlap_effective_share.clone(),
        );
        registry.register(
            "overlap_arm_extreme_share",
            "Share of every unit whose generalized propensity of the arm is below eps (datasets with arms)",
            m.overlap_arm_extreme_share.clone(),
        );
        registry.register(
            "ingest_rows",
            "Rows received by kind and result",
            m.ingest_rows.clone(),
        );
        registry.register(
            "ingest_conflicts",
            "Batches the store refused because another server numbered rows of the dataset first \
             (several servers on one store); each is caught up, checked and numbered again",
            m.ingest_conflicts.clone(),
        );
        registry.register(
            "recompute_duration_seconds",
            "Wall time of recomputes by kind (incremental or refit)",
            m.recompute_seconds.clone(),
        );
        registry.register(
            "recompute_failures",
            "Recomputes that failed",
            m.recompute_failures.clone(),
        );
        registry.register(
            "nuisance_oof_loss",
            "Out-of-fold loss of each nuisance component",
            m.nuisance_loss.clone(),
        );
        registry.register("units", "Units stored", m.units.clone());
        registry.register(
            "watched_units",
            "Units the alerts' stream watch has taken (window=\"stream\" series rest on them)",
            m.watched_units.clone(),
        );
        registry.register(
            "drift_standardized_difference",
            "Standardized mean difference of a feature or the propensity between arriving units and the drift reference",
            m.drift.clone(),
        );
        registry.register("outcomes", "Outcomes stored", m.outcomes.clone());
        registry.register(
            "last_outcome_timestamp_seconds",
            "Unix time of the last accepted outcome",
            m.last_outcome_seconds.clone(),
        );
        registry.register("events", "Events raised by kind", m.events.clone());
        let build_info: Family<BuildLabels, FloatGauge> = Family::default();
        build_info
            .get_or_create(&BuildLabels {
                version: env!("CARGO_PKG_VERSION").into(),
            })
            .set(1.0);
        registry.register(
            "build_info",
            "1, labelled by the version of plumbline that runs",
            build_info,
        );
        registry.register(
            "dataset_owned",
            "1 while this server owns the dataset's lease (recomputes it, stores its snapshots, \
             raises its alerts and exports its scores), else 0",
            m.dataset_owned.clone(),
        );
        let mut m = m;
        m.registry = root;
        Arc::new(m)
    }

    /// The exposition text (OpenMetrics, which Prometheus scrapes natively).
    pub fn render(&self) -> String {
        let mut out = String::new();
        if prometheus_client::encoding::text::encode(&mut out, &self.registry).is_err() {
            out.clear();
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The `contrast` label is written on a contrast's series and left out
    /// entirely (not written empty) on a binary dataset's, whose lines stay
    /// what the derived encoder wrote before the label existed.
    #[test]
    fn the_contrast_label_is_written_only_on_a_contrast() {
        let mut registry = Registry::default();
        let ranks: Family<ModelLabels, FloatGauge> = Family::default();
        let scores: Family<ScoreLabels, FloatGauge> = Family::default();
        let windows: Family<WindowLabels, FloatGauge> = Family::default();
        registry.register("rank", "r", ranks.clone());
        registry.register("score", "s", scores.clone());
        registry.register("uncertain", "u", windows.clone());
        let model = |contrast: &str| ModelLabels {
            dataset: "d".into(),
            model: "m".into(),
            window: "cumulative".into(),
            contrast: contrast.into(),
        };
        ranks.get_or_create(&model("")).set(1.0);
        ranks.get_or_create(&model("text")).set(2.0);
        scores
            .get_or_create(&ScoreLabels {
                dataset: "d".into(),
                model: "m".into(),
                estimator: "corrected_pehe".into(),
                window: "recent".into(),
                contrast: "mail".into(),
            })
            .set(0.5);
        windows
            .get_or_create(&WindowLabels {
                dataset: "d".into(),
                window: "recent".into(),
                contrast: String::new(),
            })
            .set(0.0);
        let mut text = String::new();
        prometheus_client::encoding::text::encode(&mut text, &registry).expect("encode");
        println!("{text}");
        for line in [
            "rank{dataset=\"d\",model=\"m\",window=\"cumulative\"} 1.0",
            "rank{dataset=\"d\",model=\"m\",window=\"cumulative\",contrast=\"text\"} 2.0",
            "score{dataset=\"d\",model=\"m\",estimator=\"corrected_pehe\",window=\"recent\",\
             contrast=\"mail\"} 0.5",
            "uncertain{dataset=\"d\",window=\"recent\"} 0.0",
        ] {
            assert!(text.lines().any(|l| l == line), "{line} in\n{text}");
        }
        assert!(!text.contains("contrast=\"\""), "{text}");
        // A nuisance loss: `arm` written only on a dataset with arms.
        let losses: Family<ComponentLabels, FloatGauge> = Family::default();
        registry.register("loss", "l", losses.clone());
        let component = |component: &str, arm: &str| ComponentLabels {
            dataset: "d".into(),
            component: component.into(),
            arm: arm.into(),
        };
        losses
            .get_or_create(&component("outcome_control", ""))
            .set(0.25);
        losses.get_or_create(&component("outcome", "text")).set(0.5);
        let mut text = String::new();
        prometheus_client::encoding::text::encode(&mut text, &registry).expect("encode");
        for line in [
            "loss{dataset=\"d\",component=\"outcome_control\"} 0.25",
            "loss{dataset=\"d\",component=\"outcome\",arm=\"text\"} 0.5",
        ] {
            assert!(text.lines().any(|l| l == line), "{line} in\n{text}");
        }
        assert!(!text.contains("arm=\"\""), "{text}");
        // Series differing only in their contrast are distinct.
        assert_eq!(ranks.get_or_create(&model("")).get(), 1.0);
        assert!(ranks.remove(&model("text")));
        assert_eq!(ranks.get_or_create(&model("")).get(), 1.0);
    }
}
