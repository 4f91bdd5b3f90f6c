//! The Prometheus export of a recompute's boards and of the stream watch.
//! A binary dataset's board-derived series carry no `contrast` label; a
//! dataset with arms exports the same series once per contrast's board,
//! labelled `contrast=<arm>`, and its generalized propensity's effective
//! share per arm.

use std::collections::BTreeMap;

use super::alerts;
use super::recompute::NuisanceState;
use super::{Boards, Monitor};
use crate::domain::Board;
use crate::estimate::watch::{Watch, WatchState};
use crate::metrics::{
    ArmLabels, ComponentLabels, DatasetLabels, ModelLabels, ScoreLabels, WindowLabels,
};

/// The windows whose boards are exported (cohort windows are not).
const EXPORTED_WINDOWS: [&str; 2] = ["cumulative", "recent"];

/// Each arm's effective share (Kish effective sample size of the arm's
/// units under weights 1 / e_k, over the arm's units) under the
/// generalized propensity, as the top board of a window of a dataset with
/// arms carries it in its detail document (`propensity`, one entry per
/// arm, the reference first). Empty on any other board.
pub(super) fn arm_effective_shares(b: &Board) -> Vec<(String, f64)> {
    if b.contrasts.is_empty() {
        return Vec::new();
    }
    let Ok(doc) = serde_json::from_str::<serde_json::Value>(&b.detail_json) else {
        return Vec::new();
    };
    doc.get("propensity")
        .and_then(serde_json::Value::as_array)
        .map(|arms| {
            arms.iter()
                .filter_map(|a| {
                    Some((
                        a.get("arm")?.as_str()?.to_string(),
                        a.get("effective_share")?.as_f64()?,
                    ))
                })
                .collect()
        })
        .unwrap_or_default()
}

impl Monitor {
    /// A binary dataset's boards: each exported window's board series and
    /// overlap, and the nuisance components' losses. `previous` holds each
    /// window's front-runner before this recompute.
    pub(super) fn export_boards(
        &self,
        dataset: &str,
        boards: &Boards,
        previous: &BTreeMap<String, String>,
        n: &NuisanceState,
    ) {
        let m = &self.metrics;
        for window in EXPORTED_WINDOWS {
            let Some(b) = boards.get(window) else {
                continue;
            };
            self.export_board(
                dataset,
                window,
                "",
                b,
                previous.get(window).map(String::as_str),
            );
            let wl = WindowLabels {
                dataset: dataset.into(),
                window: window.into(),
                contrast: String::new(),
            };
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

    /// A dataset with arms: every contrast's board in each exported
    /// window, labelled by its arm, and each arm's effective share under
    /// the generalized propensity. `old` are the boards this recompute
    /// replaces: a contrast's series for models no longer on its board, or
    /// for a contrast no longer on the window's board (a window that lost
    /// its scores), are taken down.
    pub(super) fn export_arms_boards(&self, dataset: &str, boards: &Boards, old: &Boards) {
        let m = &self.metrics;
        for window in EXPORTED_WINDOWS {
            let old_board = old.get(window);
            let Some(b) = boards.get(window) else {
                if let Some(o) = old_board {
                    self.forget_arms_board(dataset, window, o);
                }
                continue;
            };
            let old_contrast =
                |arm: &str| old_board.and_then(|o| o.contrasts.iter().find(|c| c.arm == arm));
            for c in &b.contrasts {
                let before = old_contrast(&c.arm);
                if let Some(before) = before {
                    let gone: Vec<String> = before
                        .models
                        .iter()
                        .filter(|x| !c.models.iter().any(|y| y.name == x.name))
                        .map(|x| x.name.clone())
                        .collect();
                    self.forget_models_in(dataset, window, &c.arm, &gone);
                }
                self.export_board(
                    dataset,
                    window,
                    &c.arm,
                    c,
                    before.map(|o| o.front_runner.as_str()),
                );
            }
            if let Some(o) = old_board {
                for oc in &o.contrasts {
                    if !b.contrasts.iter().any(|c| c.arm == oc.arm) {
                        self.forget_contrast(dataset, window, oc);
                    }
                }
                for (arm, _) in arm_effective_shares(o) {
                    m.overlap_effective_share.remove(&ArmLabels {
                        dataset: dataset.into(),
                        window: window.into(),
                        arm,
                    });
                }
            }
            for (arm, share) in arm_effective_shares(b) {
                m.overlap_effective_share
                    .get_or_create(&ArmLabels {
                        dataset: dataset.into(),
                        window: window.into(),
                        arm,
                    })
                    .set(share);
            }
        }
    }

    /// One board's series in a window: its front-runner (`previous`, the
    /// one before, taken down so exactly one series is 1), whether it is
    /// uncertain, heterogeneity, and each model's rank, draw share, RMSE
    /// bound and scores. `contrast` is the arm of a contrast's board, empty
    /// on a binary dataset.
    fn export_board(
        &self,
        dataset: &str,
        window: &str,
        contrast: &str,
        b: &Board,
        previous: Option<&str>,
    ) {
        let m = &self.metrics;
        let wl = WindowLabels {
            dataset: dataset.into(),
            window: window.into(),
            contrast: contrast.into(),
        };
        let model_labels = |model: &str| ModelLabels {
            dataset: dataset.into(),
            model: model.into(),
            window: window.into(),
            contrast: contrast.into(),
        };
        if let Some(old) = previous {
            m.front_runner_info.remove(&model_labels(old));
        }
        if !b.front_runner.is_empty() {
            m.front_runner_info
                .get_or_create(&model_labels(&b.front_runner))
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
        for model in &b.models {
            let ml = model_labels(&model.name);
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
                    contrast: contrast.into(),
                };
                m.model_score.get_or_create(&sl).set(e.estimate);
                m.model_score_se.get_or_create(&sl).set(e.se);
            }
        }
    }

    /// Takes down one contrast board's series in a window.
    fn forget_contrast(&self, dataset: &str, window: &str, c: &Board) {
        let m = &self.metrics;
        let wl = WindowLabels {
            dataset: dataset.into(),
            window: window.into(),
            contrast: c.arm.clone(),
        };
        m.front_runner_uncertain.remove(&wl);
        m.no_heterogeneity.remove(&wl);
        // The front-runner is one of the ranked models.
        let models: Vec<String> = c.models.iter().map(|x| x.name.clone()).collect();
        self.forget_models_in(dataset, window, &c.arm, &models);
    }

    /// Takes down every series of a dataset with arms' board in a window:
    /// its contrasts' and its arms' effective shares.
    fn forget_arms_board(&self, dataset: &str, window: &str, b: &Board) {
        for c in &b.contrasts {
            self.forget_contrast(dataset, window, c);
        }
        for (arm, _) in arm_effective_shares(b) {
            self.metrics.overlap_effective_share.remove(&ArmLabels {
                dataset: dataset.into(),
                window: window.into(),
                arm,
            });
        }
    }

    /// The watch's states under `window="stream"`: the series the shipped
    /// alert rules fire from (the board windows' series are point
    /// estimates of one look, for dashboards).
    pub(super) fn export_watch(&self, dataset: &str, previous: Option<String>, watch: &Watch) {
        let state = watch.state();
        self.export_verdicts(dataset, "", previous, &state);
        self.export_watched(dataset, &state);
    }

    /// The watch of a dataset with arms: each contrast's states, labelled
    /// `contrast`, beside the dataset's watched units and drift.
    /// `previous` holds each contrast's watched front-runner before this
    /// recompute.
    pub(super) fn export_arms_watch(
        &self,
        dataset: &str,
        previous: &BTreeMap<String, String>,
        watch: &Watch,
    ) {
        for (arm, w) in &watch.contrasts {
            self.export_verdicts(dataset, arm, previous.get(arm).cloned(), &w.state());
        }
        self.export_watched(dataset, &watch.state());
    }

    /// One watch's verdicts under `window="stream"` (and `contrast`, on a
    /// dataset with arms).
    fn export_verdicts(
        &self,
        dataset: &str,
        contrast: &str,
        previous: Option<String>,
        state: &WatchState,
    ) {
        let m = &self.metrics;
        let wl = WindowLabels {
            dataset: dataset.into(),
            window: alerts::STREAM.into(),
            contrast: contrast.into(),
        };
        let front_runner_labels = |model: String| ModelLabels {
            dataset: dataset.into(),
            model,
            window: alerts::STREAM.into(),
            contrast: contrast.into(),
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
    }

    /// The units a dataset's watch has watched and its features' drift.
    fn export_watched(&self, dataset: &str, state: &WatchState) {
        let m = &self.metrics;
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
    /// ranks, front-runners, overlap, the watch's states, nuisance losses,
    /// and on a dataset with arms every contrast's), when this server stops
    /// owning it: left up, they would go stale beside the new owner's. Row
    /// counts stay (every server keeps them current), and so do counters.
    pub(super) fn forget_exports(&self, dataset: &str, boards: &Boards, watch: &Watch) {
        let m = &self.metrics;
        let state = watch.state();
        let mut windows: Vec<&str> = boards.keys().map(String::as_str).collect();
        windows.push(alerts::STREAM);
        for window in windows {
            let wl = WindowLabels {
                dataset: dataset.into(),
                window: window.into(),
                contrast: String::new(),
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
                self.forget_arms_board(dataset, window, b);
            }
            self.forget_models_in(dataset, window, "", &models);
        }
        for (arm, w) in &watch.contrasts {
            let wl = WindowLabels {
                dataset: dataset.into(),
                window: alerts::STREAM.into(),
                contrast: arm.clone(),
            };
            m.front_runner_uncertain.remove(&wl);
            m.no_heterogeneity.remove(&wl);
            m.overlap_degraded.remove(&wl);
            let front_runner: Vec<String> = w.state().front_runner.into_iter().collect();
            self.forget_models_in(dataset, alerts::STREAM, arm, &front_runner);
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
    /// (retired), in every window, and in each of `contrasts` (the arms
    /// other than the reference of a dataset with arms; empty on a binary
    /// dataset).
    pub(super) fn forget_models(&self, dataset: &str, contrasts: &[String], models: &[String]) {
        for window in ["cumulative", "recent", alerts::STREAM] {
            self.forget_models_in(dataset, window, "", models);
        }
        for window in EXPORTED_WINDOWS.iter().chain(&[alerts::STREAM]) {
            for contrast in contrasts {
                self.forget_models_in(dataset, window, contrast, models);
            }
        }
    }

    fn forget_models_in(&self, dataset: &str, window: &str, contrast: &str, models: &[String]) {
        let m = &self.metrics;
        for model in models {
            let ml = ModelLabels {
                dataset: dataset.into(),
                model: model.clone(),
                window: window.into(),
                contrast: contrast.into(),
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
                    contrast: contrast.into(),
                };
                m.model_score.remove(&sl);
                m.model_score_se.remove(&sl);
            }
        }
    }
}
