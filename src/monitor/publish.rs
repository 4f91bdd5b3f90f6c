//! A recompute handed off and published: the job runs on the blocking
//! pool, its nuisance fit and snapshot are stored, its boards installed,
//! and the watch's events raised.

use std::collections::{BTreeMap, HashSet};
use std::sync::Arc;
use std::time::Instant;

use tracing::{info, info_span, warn, Instrument};

use super::alerts::{self, Raised};
use super::board;
use super::recompute::{NuisanceState, RecomputeOptions, RefitReason};
use super::{now_ms, Boards, DatasetHandle, Monitor, MonitorError, MonitorResult};
use crate::domain::ScoreRow;
use crate::estimate::crossfit::NuisanceReport;
use crate::metrics::{DatasetLabels, KindLabels, WindowLabels};
use crate::store::{Fence, NewSnapshot, StoreError};

/// A refit as recorded and announced.
pub(super) struct FitRecord<'a, R> {
    /// Units given values (every unit with an outcome at the fit).
    pub units: usize,
    /// Units the models were fitted on (fewer under a cap).
    pub fitted_units: usize,
    pub last_outcome_seq: i64,
    pub seed: u64,
    pub report: &'a R,
}

/// What a recompute did.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RecomputeSummary {
    pub snapshot_id: u64,
    pub refitted: bool,
    pub units: u64,
    pub millis: f64,
}

/// Hands the memory a refit freed back to the operating system. glibc
/// keeps freed heap memory for reuse, and a refit frees its whole working
/// set (fold data, per-unit vectors) at once: without this the process
/// holds its refit peak until the next one, and the recomputes in between
/// add their working sets on top of it.
fn release_freed_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: malloc_trim only returns free heap pages to the kernel.
    unsafe {
        libc::malloc_trim(0);
    }
}

/// How many units a refit's models were fitted on, in words: "N units", or
/// "a sample of M of N units" when limits.max_fit_units capped it.
fn fitted_on(fitted: usize, units: usize) -> String {
    if fitted < units {
        format!("a sample of {fitted} of {units} units")
    } else {
        format!("{units} units")
    }
}

/// A binary refit's record.
fn binary_fit(n: &NuisanceState, seed: u64) -> FitRecord<'_, NuisanceReport> {
    FitRecord {
        units: n.fit_units,
        fitted_units: n.report.fitted_units,
        last_outcome_seq: n.last_outcome_seq,
        seed,
        report: &n.report,
    }
}

impl Monitor {
    /// Raises an event of the stream watch (of `contrast`, on a dataset
    /// with arms; empty on a binary one), counting front-runner changes.
    pub(super) async fn raise_watched(
        &self,
        h: &DatasetHandle,
        fence: Fence,
        snapshot_id: u64,
        contrast: &str,
        r: Raised,
    ) {
        if r.kind == "front_runner_changed" {
            self.metrics
                .front_runner_changes
                .get_or_create(&WindowLabels {
                    dataset: h.name.clone(),
                    window: alerts::STREAM.into(),
                    contrast: contrast.into(),
                })
                .inc();
        }
        self.raise(h, Some(fence), snapshot_id, r).await;
    }

    /// Stores a refit's record (what a restart needs to draw it again: its
    /// units, last outcome sequence number, seed, and the report with its
    /// cap); the record's id.
    pub(super) async fn record_fit(
        &self,
        fence: Fence,
        now: i64,
        fit: FitRecord<'_, impl serde::Serialize>,
    ) -> MonitorResult<i64> {
        // The report carries the cap the fit used, which a restart needs
        // to draw the fit again: a record without it would be reproduced
        // without a cap.
        let report = serde_json::to_string(fit.report)
            .map_err(|e| MonitorError::Internal(format!("nuisance fit report: {e}")))?;
        Ok(self
            .store
            .insert_fit(
                fence,
                now,
                fit.units as i64,
                fit.last_outcome_seq,
                fit.seed as i64,
                &report,
            )
            .await?)
    }

    /// Raises a refit's event: why, on how many units, and the
    /// propensity's fit in `quality`'s words.
    pub(super) async fn raise_refit(
        &self,
        h: &DatasetHandle,
        fence: Fence,
        snapshot_id: u64,
        reason: RefitReason,
        fit: FitRecord<'_, impl serde::Serialize>,
        quality: String,
    ) {
        let raised = Raised {
            kind: "nuisance_refit",
            summary: format!(
                "{}: nuisance models refitted on {} ({reason}); {quality}",
                h.name,
                fitted_on(fit.fitted_units, fit.units)
            ),
            details: serde_json::json!({
                "reason": reason.code(),
                "units": fit.units,
                "report": fit.report,
            }),
        };
        self.raise(h, Some(fence), snapshot_id, raised).await;
    }

    /// Counts a recompute's duration under its kind: "refit" or
    /// "incremental".
    pub(super) fn observe_recompute(&self, dataset: &str, refitted: bool, seconds: f64) {
        self.metrics
            .recompute_seconds
            .get_or_create(&KindLabels {
                dataset: dataset.into(),
                kind: if refitted { "refit" } else { "incremental" }.into(),
            })
            .observe(seconds);
    }

    /// Recomputes a dataset now, with a refit or a rank refresh if
    /// `options` ask for one.
    pub async fn recompute(
        &self,
        dataset: &str,
        options: RecomputeOptions,
    ) -> MonitorResult<RecomputeSummary> {
        let h = self.handle(dataset)?;
        if self.store.shared() && h.fence().is_none() {
            // Another server owns it: ask the owner through the store.
            return self.ask_owner(&h, options).await;
        }
        self.recompute_here(&h, options).await
    }

    /// Recomputes a dataset this server owns (refused if it does not).
    pub(super) async fn recompute_here(
        &self,
        h: &Arc<DatasetHandle>,
        options: RecomputeOptions,
    ) -> MonitorResult<RecomputeSummary> {
        let dataset = h.name.as_str();
        let span = info_span!(
            "recompute",
            dataset = %dataset,
            refit_requested = options.refit,
            rank_refresh_requested = options.refresh_ranks
        );
        let result = self.recompute_handle(h, options).instrument(span).await;
        if let Err(e) = &result {
            warn!(dataset = %dataset, error = %e, "recompute failed");
            self.metrics
                .recompute_failures
                .get_or_create(&DatasetLabels {
                    dataset: dataset.into(),
                })
                .inc();
        }
        result
    }

    async fn recompute_handle(
        &self,
        h: &Arc<DatasetHandle>,
        options: RecomputeOptions,
    ) -> MonitorResult<RecomputeSummary> {
        let _one_at_a_time = h.recompute.lock().await;
        let Some(fence) = h.fence() else {
            return Err(MonitorError::FailedPrecondition(format!(
                "dataset {:?} changed owner while the recompute was asked; ask again",
                h.name
            )));
        };
        let result = self.recompute_owned(h, fence, options).await;
        if let Err(MonitorError::Store(StoreError::Fenced(why))) = &result {
            self.demote(h, why).await;
        }
        result
    }

    async fn recompute_owned(
        &self,
        h: &Arc<DatasetHandle>,
        fence: Fence,
        options: RecomputeOptions,
    ) -> MonitorResult<RecomputeSummary> {
        let started = Instant::now();
        let now = now_ms();
        let (input, outcomes_in_input, registered_blends) = {
            let mut st = h.state.lock().await;
            // Rows acknowledged by another server before this was asked
            // are in the recompute (a shared store's follow round may not
            // have read them yet).
            self.fresh(&mut st).await?;
            st.pending_outcomes = 0;
            let outcomes = st.cache.outcomes();
            let blends: HashSet<String> = st
                .cache
                .models
                .iter()
                .filter(|m| m.model.blend.is_some())
                .map(|m| m.model.name.clone())
                .collect();
            (
                st.recompute_input(now, self.max_fit_units, self.blend_models),
                outcomes,
                blends,
            )
        };
        if outcomes_in_input == 0 {
            return Err(MonitorError::FailedPrecondition(format!(
                "dataset {:?} has no outcomes yet",
                h.name
            )));
        }
        if input.spec.has_arms() {
            return self
                .publish_arms(h, fence, input, options, started, now)
                .await;
        }
        let spec = input.spec.clone();
        let computed = tokio::task::spawn_blocking(move || {
            let computed = input.compute(options);
            if computed.as_ref().is_ok_and(|c| c.refit.is_some()) {
                release_freed_memory();
            }
            computed
        })
        .await
        .map_err(|e| MonitorError::Internal(e.to_string()))??;
        let mut nuisance = computed.nuisance;
        if computed.refit.is_some() {
            nuisance.fit_id = self
                .record_fit(fence, now, binary_fit(&nuisance, spec.seed))
                .await?;
            nuisance.fitted_at_ms = now;
        }
        let snapshot_id = self.store.next_snapshot_id().await?;
        let mut boards = BTreeMap::new();
        let mut changed = Vec::new();
        let mut scores = Vec::new();
        // A window the recompute did not change keeps its published board
        // (and snapshot id), and the snapshot does not store it again:
        // with a cohort window per week or month, storing every one would
        // make each recompute cost what the history's cohorts cost.
        let published = h.boards();
        for w in &computed.windows {
            if let Some(kept) = w.reused.then(|| published.get(&w.key)).flatten() {
                boards.insert(w.key.clone(), kept.clone());
                continue;
            }
            let parts = board::BoardParts {
                dataset: &h.name,
                window: w.window.clone(),
                snapshot_id: snapshot_id as u64,
                computed_at_ms: now,
                incomplete: w.incomplete.clone(),
                max_extreme_share: spec.overlap_max_extreme_share,
                min_effective_share: spec.overlap_min_effective_share,
            };
            let mut b = match &w.board {
                Ok(b) => board::scoreboard(parts, b),
                Err(state) => board::degenerate(parts, w.units as u64, state.clone()),
            };
            b.alerts = Some(board::alert_view(&computed.watch));
            board::mark_registered_blends(&mut b, &registered_blends);
            for m in &b.models {
                for (estimator, e) in m.history_values() {
                    scores.push(ScoreRow {
                        model: m.name.clone(),
                        window: w.key.clone(),
                        arm: String::new(),
                        estimate: e.estimate,
                        se: e.se,
                        rank: i64::from(m.rank),
                        units: if matches!(estimator.as_str(), "autoc" | "qini") {
                            b.rank_metrics_units as i64
                        } else {
                            b.units as i64
                        },
                        estimator,
                    });
                }
            }
            changed.push(b.clone());
            boards.insert(w.key.clone(), b);
        }
        let millis = started.elapsed().as_secs_f64() * 1000.0;
        let watch_json = serde_json::to_string(&computed.watch)
            .map_err(|e| MonitorError::Internal(format!("stream watch: {e}")))?;
        self.store
            .insert_snapshot(&NewSnapshot {
                id: snapshot_id,
                fence,
                computed_at_ms: now,
                fit_id: Some(nuisance.fit_id),
                refitted: computed.refit.is_some(),
                millis,
                boards: &changed,
                scores: &scores,
                watch: &watch_json,
            })
            .await?;

        // Install, then alert.
        let cumulative_units = boards.get("cumulative").map(|b| b.units).unwrap_or(0);
        let (raised, previous, watched_front_runner, gone) = {
            let mut st = h.state.lock().await;
            let watched_front_runner = st.watch.state().front_runner;
            let old_boards = h.boards();
            let previous: BTreeMap<String, String> = old_boards
                .iter()
                .map(|(k, b)| (k.clone(), b.front_runner.clone()))
                .collect();
            // Models on the last boards and on none of these: retired.
            let on = |bs: &Boards| -> std::collections::BTreeSet<String> {
                bs.values()
                    .flat_map(|b| b.models.iter().map(|m| m.name.clone()))
                    .collect()
            };
            let gone: Vec<String> = on(&old_boards).difference(&on(&boards)).cloned().collect();
            st.nuisance = Some(nuisance.clone());
            st.watch = computed.watch.clone();
            let raised: Vec<Raised> = computed
                .signals
                .iter()
                .filter_map(|s| alerts::event(&h.name, s))
                .collect();
            h.publish(boards.clone());
            (raised, previous, watched_front_runner, gone)
        };
        // The watch looked before any refit: its events come first.
        for r in raised {
            self.raise_watched(h, fence, snapshot_id as u64, "", r)
                .await;
        }
        if let Some(reason) = computed.refit {
            let quality = format!("propensity AUC {:.3}", nuisance.report.propensity.auc);
            let fit = binary_fit(&nuisance, spec.seed);
            self.raise_refit(h, fence, snapshot_id as u64, reason, fit, quality)
                .await;
        }
        let seconds = started.elapsed().as_secs_f64();
        self.observe_recompute(&h.name, computed.refit.is_some(), seconds);
        self.forget_models(&h.name, &[], &gone);
        self.export_boards(&h.name, &boards, &previous, &nuisance);
        self.export_watch(&h.name, watched_front_runner, &computed.watch);
        info!(
            snapshot = snapshot_id,
            refitted = computed.refit.is_some(),
            newly_scored = computed.newly_scored,
            millis = seconds * 1000.0,
            "recompute done"
        );
        Ok(RecomputeSummary {
            snapshot_id: snapshot_id as u64,
            refitted: computed.refit.is_some(),
            units: cumulative_units,
            millis: seconds * 1000.0,
        })
    }
}
