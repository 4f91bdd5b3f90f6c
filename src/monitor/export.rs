//! The Prometheus export of a recompute's boards and of the stream watch.
//! A binary dataset's board-derived series carry no `contrast` label; a
//! dataset with arms exports the same series once per contrast's board,
//! labelled `contrast=<arm>`, its generalized propensity's effective and
//! extreme shares per arm, and its nuisance losses per arm (`arm` label).

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

/// One arm's overlap under the generalized propensity, as the top board
/// of a window of a dataset with arms carries it in its detail document
/// (`propensity`, one entry per arm, the reference first).
#[derive(Debug, Clone, PartialEq)]
pub(super) struct ArmOverlap {
    pub arm: String,
    /// Kish effective sample size of the arm's units under weights 1 / e_k,
    /// over the arm's units.
    pub effective_share: f64,
    /// Share of every unit whose e_k is below the overlap threshold.
    pub extreme_share: f64,
}

/// A board's detail document, parsed, on the top board of a dataset with
/// arms only.
fn arms_detail(b: &Board) -> Option<serde_json::Value> {
    if b.contrasts.is_empty() {
        return None;
    }
    serde_json::from_str(&b.detail_json).ok()
}

/// Each arm's [`ArmOverlap`]; empty on any board but the top board of a
/// dataset with arms.
pub(super) fn arm_overlaps(b: &Board) -> Vec<ArmOverlap> {
    let Some(doc) = arms_detail(b) else {
        return Vec::new();
    };
    doc.get("propensity")
        .and_then(serde_json::Value::as_array)
        .map(|arms| {
            arms.iter()
                .filter_map(|a| {
                    Some(ArmOverlap {
                        arm: a.get("arm")?.as_str()?.to_string(),
                        effective_share: a.get("effective_share")?.as_f64()?,
                        extreme_share: a.get("extreme_share")?.as_f64()?,
                    })
                })
                .collect()
        })
        .unwrap_or_default()
}

/// The nuisance losses of a dataset with arms, as (component, arm, loss):
/// the generalized propensity's log-loss (no arm), then per arm its
/// outcome model's loss (`outcome`) and the propensity's log-loss over the
/// arm's units (`propensity`), from the top board's nuisance components
/// and detail document. Empty on any other board.
pub(super) fn arm_nuisance_losses(b: &Board) -> Vec<(&'static str, String, f64)> {
    let Some(doc) = arms_detail(b) else {
        return Vec::new();
    };
    let mut out = Vec::new();
    if let Some(p) = b.nuisance.iter().find(|c| c.component == "propensity") {
        out.push(("propensity", String::new(), p.oof_loss));
    }
    let arms: Vec<&str> = doc
        .get("arms")
        .and_then(serde_json::Value::as_array)
        .map(|a| a.iter().filter_map(serde_json::Value::as_str).collect())
        .unwrap_or_default();
    let per_arm: Vec<f64> = doc
        .pointer("/nuisance/propensity/arm_oof_loss")
        .and_then(serde_json::Value::as_array)
        .map(|a| a.iter().filter_map(serde_json::Value::as_f64).collect())
        .unwrap_or_default();
    for (k, arm) in arms.iter().enumerate() {
        let outcome = format!("outcome_{arm}");
        if let Some(c) = b.nuisance.iter().find(|c| c.component == outcome) {
            out.push(("outcome", arm.to_string(), c.oof_loss));
        }
        if let Some(&loss) = per_arm.get(k) {
            out.push(("propensity", arm.to_string(), loss));
        }
    }
    out
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
                    arm: String::new(),
                })
                .set(loss);
        }
    }

    /// A dataset with arms: every contrast's board in each exported
    /// window, labelled by its arm, each arm's effective and extreme
    /// shares under the generalized propensity, and the nuisance
    /// components' losses per arm. `old` are the boards this recompute
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
                self.forget_arm_overlaps(dataset, window, o);
            }
            for a in arm_overlaps(b) {
                let al = ArmLabels {
                    dataset: dataset.into(),
                    window: window.into(),
                    arm: a.arm,
                };
                m.overlap_effective_share
                    .get_or_create(&al)
                    .set(a.effective_share);
                m.overlap_arm_extreme_share
                    .get_or_create(&al)
                    .set(a.extreme_share);
            }
        }
        // One fit serves every window; the cumulative board reports it.
        if let Some(b) = boards.get("cumulative") {
            for (component, arm, loss) in arm_nuisance_losses(b) {
                m.nuisance_loss
                    .get_or_create(&ComponentLabels {
                        dataset: dataset.into(),
                        component: component.into(),
                        arm,
                    })
                    .set(loss);
            }
        }
    }

    /// Takes down each arm's overlap series of a board in a window.
    fn forget_arm_overlaps(&self, dataset: &str, window: &str, b: &Board) {
        for a in arm_overlaps(b) {
            let al = ArmLabels {
                dataset: dataset.into(),
                window: window.into(),
                arm: a.arm,
            };
            self.metrics.overlap_effective_share.remove(&al);
            self.metrics.overlap_arm_extreme_share.remove(&al);
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
    /// its contrasts' and its arms' effective and extreme shares.
    fn forget_arms_board(&self, dataset: &str, window: &str, b: &Board) {
        for c in &b.contrasts {
            self.forget_contrast(dataset, window, c);
        }
        self.forget_arm_overlaps(dataset, window, b);
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
                for (component, arm, _) in arm_nuisance_losses(b) {
                    m.nuisance_loss.remove(&ComponentLabels {
                        dataset: dataset.into(),
                        component: component.into(),
                        arm,
                    });
                }
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
                arm: String::new(),
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::domain::{NuisanceComponent, Window};

    fn component(name: &str, oof_loss: f64) -> NuisanceComponent {
        NuisanceComponent {
            component: name.into(),
            learner: "ridge".into(),
            oof_loss,
            loss: "squared_error".into(),
        }
    }

    /// A top board of a dataset with arms gives each arm's shares and the
    /// losses per arm from its components and document; a binary board
    /// (no contrasts) gives none, so its series are the binary ones only.
    #[test]
    fn per_arm_series_come_from_the_top_board_only() {
        let mut top = crate::monitor::board::degenerate(
            crate::monitor::board::BoardParts {
                dataset: "offers",
                window: Window::Cumulative,
                snapshot_id: 1,
                computed_at_ms: 0,
                incomplete: vec![],
                max_extreme_share: 0.1,
                min_effective_share: 0.2,
            },
            10,
            String::new(),
        );
        let mut contrast = top.clone();
        contrast.arm = "text".into();
        top.contrasts = vec![contrast];
        top.nuisance = vec![
            component("propensity", 0.9),
            component("outcome_none", 0.25),
            component("outcome_text", 0.5),
        ];
        top.detail_json = r#"{"arms":["none","text"],
            "propensity":[{"arm":"none","effective_share":0.75,"extreme_share":0.0},
                          {"arm":"text","effective_share":0.5,"extreme_share":0.125}],
            "nuisance":{"propensity":{"oof_loss":0.9,"arm_oof_loss":[0.5,1.3]}}}"#
            .into();
        assert_eq!(
            arm_overlaps(&top),
            vec![
                ArmOverlap {
                    arm: "none".into(),
                    effective_share: 0.75,
                    extreme_share: 0.0
                },
                ArmOverlap {
                    arm: "text".into(),
                    effective_share: 0.5,
                    extreme_share: 0.125
                },
            ]
        );
        assert_eq!(
            arm_nuisance_losses(&top),
            vec![
                ("propensity", String::new(), 0.9),
                ("outcome", "none".into(), 0.25),
                ("propensity", "none".into(), 0.5),
                ("outcome", "text".into(), 0.5),
                ("propensity", "text".into(), 1.3),
            ]
        );
        let mut binary = top.clone();
        binary.contrasts.clear();
        assert!(arm_overlaps(&binary).is_empty());
        assert!(arm_nuisance_losses(&binary).is_empty());
    }
}
