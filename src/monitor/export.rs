//! The Prometheus export of a recompute's boards and of the stream watch.

use std::collections::BTreeMap;

use super::alerts;
use super::recompute::NuisanceState;
use super::{Boards, Monitor};
use crate::estimate::watch::Watch;
use crate::metrics::{
    ArmLabels, ComponentLabels, DatasetLabels, ModelLabels, ScoreLabels, WindowLabels,
};

impl Monitor {
    pub(super) fn export_boards(
        &self,
        dataset: &str,
        boards: &Boards,
        previous: &BTreeMap<String, String>,
        n: &NuisanceState,
    ) {
        let m = &self.metrics;
        for window in ["cumulative", "recent"] {
            let Some(b) = boards.get(window) else {
                continue;
            };
            let wl = WindowLabels {
                dataset: dataset.into(),
                window: window.into(),
            };
            // Forget the previous front-runner's label so exactly one series is 1.
            if let Some(old) = previous.get(window) {
                m.front_runner_info.remove(&ModelLabels {
                    dataset: dataset.into(),
                    model: old.clone(),
                    window: window.into(),
                });
            }
            if !b.front_runner.is_empty() {
                m.front_runner_info
                    .get_or_create(&ModelLabels {
                        dataset: dataset.into(),
                        model: b.front_runner.clone(),
                        window: window.into(),
                    })
                    .set(1.0);
            }
            m.front_runner_uncertain
                .get_or_create(&wl)
                // Only candidates can be uncertain; two tied baselines are not.
                .set(
                    if b.best_set.len() > 1 && b.models.iter().any(|m| !m.baseline) {
                        1.0
                    } else {
                        0.0
                    },
                );
            m.no_heterogeneity
                .get_or_create(&wl)
                .set(if b.no_detectable_heterogeneity {
                    1.0
                } else {
                    0.0
                });
            if let Some(o) = &b.overlap {
                m.overlap_degraded
                    .get_or_create(&wl)
                    .set(if o.degraded { 1.0 } else { 0.0 });
                m.overlap_extreme_share
                    .get_or_create(&wl)
                    .set(o.extreme_share);
                for (arm, v) in [
                    ("treated", o.treated_effective_share),
                    ("control", o.control_effective_share),
                ] {
                    m.overlap_effective_share
                        .get_or_create(&ArmLabels {
                            dataset: dataset.into(),
                            window: window.into(),
                            arm: arm.into(),
                        })
                        .set(v);
                }
            }
            for model in &b.models {
                let ml = ModelLabels {
                    dataset: dataset.into(),
                    model: model.name.clone(),
                    window: window.into(),
                };
                m.model_rank.get_or_create(&ml).set(f64::from(model.rank));
                m.model_draw_share.get_or_create(&ml).set(model.draw_share);
                if let Some(bound) = model.rmse_lower_bound {
                    m.model_rmse_lower_bound.get_or_create(&ml).set(bound);
                }
                for (estimator, e) in model.history_values() {
                    let sl = ScoreLabels {
                        dataset: dataset.into(),
                        model: model.name.clone(),
                        estimator,
                        window: window.into(),
                    };
                    m.model_score.get_or_create(&sl).set(e.estimate);
                    m.model_score_se.get_or_create(&sl).set(e.se);
                }
            }
        }
        let r = &n.report;
        let mut losses = vec![
            ("outcome_control", r.outcome_control.oof_loss),
            ("outcome_treated", r.outcome_treated.oof_loss),
        ];
        if let Some(p) = &r.propensity.fit {
            losses.push(("propensity", p.oof_loss));
        }
        for (component, loss) in losses {
            m.nuisance_loss
                .get_or_create(&ComponentLabels {
                    dataset: dataset.into(),
                    component: component.into(),
                })
                .set(loss);
        }
    }

    /// The watch's states under `window="stream"`: the series the shipped
    /// alert rules fire from (the board windows' series are point
    /// estimates of one look, for dashboards).
    pub(super) fn export_watch(&self, dataset: &str, previous: Option<String>, watch: &Watch) {
        let m = &self.metrics;
        let state = watch.state();
        let wl = WindowLabels {
            dataset: dataset.into(),
            window: alerts::STREAM.into(),
        };
        let front_runner_labels = |model: String| ModelLabels {
            dataset: dataset.into(),
            model,
            window: alerts::STREAM.into(),
        };
        if let Some(old) = previous.filter(|old| state.front_runner.as_ref() != Some(old)) {
            m.front_runner_info.remove(&front_runner_labels(old));
        }
        if let Some(front_runner) = &state.front_runner {
            m.front_runner_info
                .get_or_create(&front_runner_labels(front_runner.clone()))
                .set(1.0);
        }
        let _ = m.front_runner_changes.get_or_create(&wl);
        let flag = |b: bool| if b { 1.0 } else { 0.0 };
        m.front_runner_uncertain.get_or_create(&wl).set(flag(
            state.front_runner.is_some() && !state.front_runner_settled,
        ));
        // No verdict before a model predicts: the watch appoints a
        // front-runner at the first look with a candidate's predictions.
        m.no_heterogeneity.get_or_create(&wl).set(flag(
            state.front_runner.is_some()
                && state.heterogeneity != crate::estimate::watch::Heterogeneity::Detected,
        ));
        m.overlap_degraded
            .get_or_create(&wl)
            .set(flag(state.overlap_degraded));
        m.watched_units
            .get_or_create(&DatasetLabels {
                dataset: dataset.into(),
            })
            .set(state.units as f64);
        for (quantity, smd) in &state.drift {
            m.drift
                .get_or_create(&crate::metrics::QuantityLabels {
                    dataset: dataset.into(),
                    quantity: quantity.clone(),
                })
                .set(*smd);
        }
    }

    /// Takes down the series only a dataset's owner keeps current (scores,
    /// ranks, front-runners, overlap, the watch's states, nuisance losses), when
    /// this server stops owning it: left up, they would go stale beside the
    /// new owner's. Row counts stay (every server keeps them current), and
    /// so do counters.
    pub(super) fn forget_exports(&self, dataset: &str, boards: &Boards, watch: &Watch) {
        let m = &self.metrics;
        let state = watch.state();
        let mut windows: Vec<&str> = boards.keys().map(String::as_str).collect();
        windows.push(alerts::STREAM);
        for window in windows {
            let wl = WindowLabels {
                dataset: dataset.into(),
                window: window.into(),
            };
            m.front_runner_uncertain.remove(&wl);
            m.no_heterogeneity.remove(&wl);
            m.overlap_degraded.remove(&wl);
            m.overlap_extreme_share.remove(&wl);
            for arm in ["treated", "control"] {
                m.overlap_effective_share.remove(&ArmLabels {
                    dataset: dataset.into(),
                    window: window.into(),
                    arm: arm.into(),
                });
            }
            let mut models: Vec<String> = state.front_runner.iter().cloned().collect();
            if let Some(b) = boards.get(window) {
                models.extend(b.models.iter().map(|model| model.name.clone()));
            }
            self.forget_models_in(dataset, window, &models);
        }
        for component in ["outcome_control", "outcome_treated", "propensity"] {
            m.nuisance_loss.remove(&ComponentLabels {
                dataset: dataset.into(),
                component: component.into(),
            });
        }
        m.watched_units.remove(&DatasetLabels {
            dataset: dataset.into(),
        });
        for (quantity, _) in &state.drift {
            m.drift.remove(&crate::metrics::QuantityLabels {
                dataset: dataset.into(),
                quantity: quantity.clone(),
            });
        }
    }

    /// Takes down the per-model series of models no longer on the boards
    /// (retired), in every window.
    pub(super) fn forget_models(&self, dataset: &str, models: &[String]) {
        for window in ["cumulative", "recent", alerts::STREAM] {
            self.forget_models_in(dataset, window, models);
        }
    }

    fn forget_models_in(&self, dataset: &str, window: &str, models: &[String]) {
        let m = &self.metrics;
        for model in models {
            let ml = ModelLabels {
                dataset: dataset.into(),
                model: model.clone(),
                window: window.into(),
            };
            m.front_runner_info.remove(&ml);
            m.model_rank.remove(&ml);
            m.model_draw_share.remove(&ml);
            m.model_rmse_lower_bound.remove(&ml);
            for estimator in crate::domain::board::history_keys() {
                let sl = ScoreLabels {
                    dataset: dataset.into(),
                    model: model.clone(),
                    estimator: estimator.into(),
                    window: window.into(),
                };
                m.model_score.remove(&sl);
                m.model_score_se.remove(&sl);
            }
        }
    }
}
