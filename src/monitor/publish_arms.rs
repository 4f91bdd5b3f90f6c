//! A recompute of a dataset with arms, published: the job (the nuisance
//! values, refitted when due, and every window's boards, see
//! `recompute/arms.rs`) runs on the blocking pool, its fit (when it
//! refitted) and snapshot are stored and its boards installed. Every
//! contrast's models get history rows
//! (labelled by the contrast's arm, which `GetHistory` reads with `arm`)
//! and every contrast's board its series (`monitor/export.rs`, labelled
//! `contrast`). The stream watch looked first (one watch per contrast,
//! `estimate/watch/arms.rs`): its decisions become events naming the
//! contrast, and its states series under `window="stream"` with the
//! `contrast` label.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::Instant;

use tracing::info;

use super::alerts::{self, Raised};
use super::board;
use super::publish::{FitRecord, RecomputeSummary};
use super::recompute::{ArmNuisanceState, RecomputeInput, RecomputeOptions};
use super::{DatasetHandle, Monitor, MonitorError, MonitorResult};
use crate::domain::{Board, ScoreRow};
use crate::estimate::crossfit::{ArmNuisanceReport, ArmRecalibration};
use crate::store::{Fence, NewSnapshot};

impl Monitor {
    pub(super) async fn publish_arms(
        &self,
        h: &Arc<DatasetHandle>,
        fence: Fence,
        input: RecomputeInput,
        options: RecomputeOptions,
        started: Instant,
        now: i64,
    ) -> MonitorResult<RecomputeSummary> {
        let spec = input.spec.clone();
        let mut computed = tokio::task::spawn_blocking(move || input.compute_arms(options))
            .await
            .map_err(|e| MonitorError::Internal(e.to_string()))??;
        let refit = computed.refit;
        if let (Some(_), Some(n)) = (refit, computed.nuisance.as_mut()) {
            n.fit_id = self.record_fit(fence, now, arms_fit(n, spec.seed)).await?;
            n.fitted_at_ms = now;
        }
        let watch_json = serde_json::to_string(&computed.watch)
            .map_err(|e| MonitorError::Internal(format!("stream watch: {e}")))?;
        let snapshot_id = self.store.next_snapshot_id().await?;
        let mut boards = BTreeMap::new();
        let mut changed = Vec::new();
        let mut scores = Vec::new();
        // A window the recompute did not change keeps its published board
        // (and snapshot id) and is not stored again, as on a binary dataset.
        let published = h.boards();
        for w in computed.windows {
            if let Some(kept) = w.reused.then(|| published.get(&w.key)).flatten() {
                boards.insert(w.key, kept.clone());
                continue;
            }
            let parts = board::BoardParts {
                dataset: &h.name,
                window: w.window.clone(),
                snapshot_id: snapshot_id as u64,
                computed_at_ms: now,
                incomplete: w.incomplete,
                max_extreme_share: spec.overlap_max_extreme_share,
                min_effective_share: spec.overlap_min_effective_share,
            };
            let mut b = match &w.board {
                Ok(b) => board::arms_board(parts, b),
                Err(state) => board::degenerate(parts, w.units as u64, state.clone()),
            };
            b.alerts = Some(board::alert_view(&computed.watch));
            for c in &mut b.contrasts {
                c.alerts = computed.watch.contrasts.get(&c.arm).map(board::alert_view);
                scores.extend(contrast_score_rows(&w.key, c));
            }
            changed.push(b.clone());
            boards.insert(w.key, b);
        }
        let millis = started.elapsed().as_secs_f64() * 1000.0;
        self.store
            .insert_snapshot(&NewSnapshot {
                id: snapshot_id,
                fence,
                computed_at_ms: now,
                fit_id: computed.nuisance.as_ref().map(|n| n.fit_id),
                refitted: refit.is_some(),
                millis,
                boards: &changed,
                scores: &scores,
                watch: &watch_json,
            })
            .await?;
        let units = boards.get("cumulative").map(|b| b.units).unwrap_or(0);
        // One recompute of a dataset at a time (the caller holds its
        // recompute lock), so the boards read here are the ones replaced.
        let (old, previous) = {
            let mut st = h.state.lock().await;
            let previous: BTreeMap<String, String> = st
                .watch
                .contrasts
                .iter()
                .filter_map(|(arm, w)| w.state().front_runner.map(|f| (arm.clone(), f)))
                .collect();
            st.watch = computed.watch.clone();
            st.arm_nuisance = computed.nuisance.clone();
            let old = h.boards();
            h.publish(boards.clone());
            (old, previous)
        };
        let reference = spec.arms.first().cloned().unwrap_or_default();
        let raised: Vec<(String, Raised)> = computed
            .signals
            .iter()
            .filter_map(|s| alerts::arm_event(&h.name, &reference, s).map(|r| (s.arm.clone(), r)))
            .collect();
        for (arm, r) in raised {
            self.raise_watched(h, fence, snapshot_id as u64, &arm, r)
                .await;
        }
        if let (Some(reason), Some(n)) = (refit, &computed.nuisance) {
            let quality = fit_quality(&n.report);
            let fit = arms_fit(n, spec.seed);
            self.raise_refit(h, fence, snapshot_id as u64, reason, fit, quality)
                .await;
        }
        self.export_arms_boards(&h.name, &boards, &old);
        self.export_arms_watch(&h.name, &previous, &computed.watch);
        self.observe_recompute(&h.name, refit.is_some(), millis / 1000.0);
        info!(
            snapshot = snapshot_id,
            refitted = refit.is_some(),
            millis,
            "recompute of a dataset with arms done"
        );
        Ok(RecomputeSummary {
            snapshot_id: snapshot_id as u64,
            refitted: refit.is_some(),
            units,
            millis,
        })
    }
}

/// What a refit event says of the generalized propensity's fit: its
/// out-of-fold log-loss, and the raw learner's beside it when a last stage
/// other than the raw one was kept.
fn fit_quality(report: &ArmNuisanceReport) -> String {
    let p = &report.propensity;
    let stage = p
        .recalibration
        .as_ref()
        .filter(|r| r.chosen != ArmRecalibration::Raw)
        .and_then(|r| r.candidates.iter().find(|c| c.stage == r.chosen));
    match stage {
        Some(c) => format!(
            "propensity log-loss {:.3} after {} (raw {:.3})",
            c.oof_loss,
            c.stage.name().replace('_', " "),
            p.oof_loss
        ),
        None => format!("propensity log-loss {:.3}", p.oof_loss),
    }
}

/// An arms refit's record.
fn arms_fit(n: &ArmNuisanceState, seed: u64) -> FitRecord<'_, ArmNuisanceReport> {
    FitRecord {
        units: n.fit_units,
        fitted_units: n.report.fitted_units,
        last_outcome_seq: n.last_outcome_seq,
        seed,
        report: &n.report,
    }
}

/// The history rows of one contrast's board in a window: every model's
/// history values, labelled by the contrast's arm.
fn contrast_score_rows(window: &str, c: &Board) -> Vec<ScoreRow> {
    let mut rows = Vec::new();
    for m in &c.models {
        for (estimator, e) in m.history_values() {
            rows.push(ScoreRow {
                model: m.name.clone(),
                window: window.into(),
                arm: c.arm.clone(),
                estimate: e.estimate,
                se: e.se,
                rank: i64::from(m.rank),
                units: if matches!(estimator.as_str(), "autoc" | "qini") {
                    c.rank_metrics_units as i64
                } else {
                    c.units as i64
                },
                estimator,
            });
        }
    }
    rows
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::crossfit::{ArmPropensityReport, ArmRecalibrationReport, ArmStageLoss};

    fn report(chosen: ArmRecalibration) -> ArmNuisanceReport {
        ArmNuisanceReport {
            folds: 5,
            seed: 0,
            max_fit_units: None,
            fold_repeats: 1,
            fitted_units: 100,
            units: 100,
            propensity: ArmPropensityReport {
                learner: "multinomial_logistic".into(),
                loss: "log_loss",
                oof_loss: 1.0474,
                arm_oof_loss: Vec::new(),
                candidates: Vec::new(),
                recalibration: Some(ArmRecalibrationReport {
                    chosen,
                    how: "chosen by loss",
                    candidates: vec![
                        ArmStageLoss {
                            stage: ArmRecalibration::Raw,
                            oof_loss: 1.0474,
                        },
                        ArmStageLoss {
                            stage: ArmRecalibration::MatrixScaling,
                            oof_loss: 1.0312,
                        },
                    ],
                }),
            },
            outcome: Vec::new(),
        }
    }

    /// The event names the last stage only when it is not the raw one,
    /// with the loss of the values the scores use first.
    #[test]
    fn a_refit_event_names_a_last_stage_that_is_not_raw() {
        assert_eq!(
            fit_quality(&report(ArmRecalibration::Raw)),
            "propensity log-loss 1.047"
        );
        assert_eq!(
            fit_quality(&report(ArmRecalibration::MatrixScaling)),
            "propensity log-loss 1.031 after matrix scaling (raw 1.047)"
        );
    }
}
