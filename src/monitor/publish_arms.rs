//! A recompute of a dataset with arms, published: the job (a full
//! cross-fitted fit and every window's boards, see
//! `recompute/arms.rs`) runs on the blocking pool, its snapshot is stored
//! and its boards installed. Every contrast's models get history rows
//! (labelled by the contrast's arm, which `GetHistory` reads with `arm`)
//! and every contrast's board its series (`monitor/export.rs`, labelled
//! `contrast`). Alerts are not produced for such a dataset yet.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::Instant;

use tracing::info;

use super::board;
use super::publish::RecomputeSummary;
use super::recompute::RecomputeInput;
use super::{DatasetHandle, Monitor, MonitorError, MonitorResult};
use crate::domain::{Board, ScoreRow};
use crate::metrics::KindLabels;
use crate::store::{Fence, NewSnapshot};

impl Monitor {
    pub(super) async fn publish_arms(
        &self,
        h: &Arc<DatasetHandle>,
        fence: Fence,
        input: RecomputeInput,
        started: Instant,
        now: i64,
    ) -> MonitorResult<RecomputeSummary> {
        let spec = input.spec.clone();
        // The stream watch does not look at a dataset with arms: the
        // snapshot keeps it as it was.
        let watch_json = serde_json::to_string(&input.watch)
            .map_err(|e| MonitorError::Internal(format!("stream watch: {e}")))?;
        let windows = tokio::task::spawn_blocking(move || input.compute_arms())
            .await
            .map_err(|e| MonitorError::Internal(e.to_string()))??;
        let snapshot_id = self.store.next_snapshot_id().await?;
        let mut boards = BTreeMap::new();
        let mut scores = Vec::new();
        for w in windows {
            let parts = board::BoardParts {
                dataset: &h.name,
                window: w.window.clone(),
                snapshot_id: snapshot_id as u64,
                computed_at_ms: now,
                incomplete: w.incomplete,
                max_extreme_share: spec.overlap_max_extreme_share,
                min_effective_share: spec.overlap_min_effective_share,
            };
            let b = match &w.board {
                Ok(b) => board::arms_board(parts, b),
                Err(state) => board::degenerate(parts, w.units as u64, state.clone()),
            };
            for c in &b.contrasts {
                scores.extend(contrast_score_rows(&w.key, c));
            }
            boards.insert(w.key, b);
        }
        let changed: Vec<_> = boards.values().cloned().collect();
        let millis = started.elapsed().as_secs_f64() * 1000.0;
        self.store
            .insert_snapshot(&NewSnapshot {
                id: snapshot_id,
                fence,
                computed_at_ms: now,
                fit_id: None,
                refitted: true,
                millis,
                boards: &changed,
                scores: &scores,
                watch: &watch_json,
            })
            .await?;
        let units = boards.get("cumulative").map(|b| b.units).unwrap_or(0);
        // One recompute of a dataset at a time (the caller holds its
        // recompute lock), so the boards read here are the ones replaced.
        let old = h.boards();
        h.publish(boards.clone());
        self.export_arms_boards(&h.name, &boards, &old);
        self.metrics
            .recompute_seconds
            .get_or_create(&KindLabels {
                dataset: h.name.clone(),
                kind: "refit".into(),
            })
            .observe(millis / 1000.0);
        info!(
            snapshot = snapshot_id,
            millis, "recompute of a dataset with arms done"
        );
        Ok(RecomputeSummary {
            snapshot_id: snapshot_id as u64,
            refitted: true,
            units,
            millis,
        })
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
