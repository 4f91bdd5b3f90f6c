//! A dataset restored from the store at start-up: its cache, its latest
//! nuisance fit (reproduced, binary or arms), boards and stream watch.

use tracing::{info, info_span, Instrument};

use super::recompute::{recorded_max_fit_units, NuisanceState};
use super::{now_ms, Boards, DatasetState, Monitor, MonitorError, MonitorResult};
use crate::domain::{StoredDataset, Window};
use crate::metrics::DatasetLabels;
use crate::store::StoreError;

impl Monitor {
    /// A dataset's state and its latest boards, from the store. An owner's
    /// state also has the latest nuisance fit (reproduced) and the stream
    /// watch; a follower's only the rows, which intake checks against.
    pub(super) async fn rebuild(
        &self,
        stored: StoredDataset,
        owner: bool,
    ) -> MonitorResult<(DatasetState, Boards)> {
        let span = info_span!("rebuild", dataset = %stored.spec.name);
        async {
            let mut state = DatasetState::empty(stored.clone());
            self.catch_up(&mut state).await?;
            state.pending_outcomes = 0;
            let mut latest = Boards::new();
            for board in self.store.latest_boards(stored.id).await? {
                latest.insert(board.window.key(), board);
            }
            // A window of the units sent without a cohort, which no request
            // can name, was scored and stored before they were left out of
            // cohort windows: it is not served.
            latest.remove(&Window::Cohort(String::new()).key());
            if !owner {
                info!(
                    units = state.cache.units(),
                    outcomes = state.cache.outcomes(),
                    "dataset read (another server owns it)"
                );
                self.update_counts(&state);
                return Ok((state, latest));
            }
            if let Some(fit) = self.store.latest_fit(stored.id).await? {
                // The fit is drawn again with the cap it was fitted under,
                // whatever limits.max_fit_units says now.
                let cap = recorded_max_fit_units(&fit.report_json).map_err(|e| {
                    StoreError::Corrupt(format!(
                        "dataset {:?}, fit {}: {e}",
                        stored.spec.name, fit.id
                    ))
                })?;
                let input = state.recompute_input(now_ms(), self.max_fit_units, self.blend_models);
                let limit = fit.last_outcome_seq;
                if stored.spec.has_arms() {
                    let mut reproduced =
                        tokio::task::spawn_blocking(move || input.reproduce_arm_fit(limit, cap))
                            .await
                            .map_err(|e| MonitorError::Internal(e.to_string()))??;
                    reproduced.fit_id = fit.id;
                    reproduced.fitted_at_ms = fit.fitted_at_ms;
                    state.arm_nuisance = Some(reproduced);
                } else {
                    let reproduced =
                        tokio::task::spawn_blocking(move || input.reproduce_fit(limit, cap))
                            .await
                            .map_err(|e| MonitorError::Internal(e.to_string()))??;
                    state.nuisance = Some(NuisanceState {
                        fit_id: fit.id,
                        fitted_at_ms: fit.fitted_at_ms,
                        ..reproduced
                    });
                }
            }
            match self.store.latest_watch(stored.id).await? {
                Some(json) => {
                    state.watch = serde_json::from_str(&json)
                        .map_err(|e| StoreError::Corrupt(format!("stream watch: {e}")))?;
                }
                // A dataset scored without a stored watch (a store older
                // than migrations/sqlite/0004): the watch starts after the units
                // already scored.
                None if state.fit_units().is_some() || !latest.is_empty() => {
                    state.watch.skip_baseline(state.cache.outcomes() as u64);
                }
                None => {}
            }
            state.pending_outcomes = state
                .cache
                .outcomes()
                .saturating_sub(state.fit_units().unwrap_or(0))
                as u64;
            // Outcomes but no boards (migrations/sqlite/0005 drops boards stored
            // in another format): the scheduler recomputes them at start.
            if latest.is_empty() && state.cache.outcomes() > 0 {
                state.pending_outcomes = state.pending_outcomes.max(1);
            }
            info!(
                units = state.cache.units(),
                outcomes = state.cache.outcomes(),
                models = state.cache.models.len(),
                "dataset restored"
            );
            self.update_counts(&state);
            if let Some(ms) = self.store.last_outcome_received_ms(stored.id).await? {
                self.metrics
                    .last_outcome_seconds
                    .get_or_create(&DatasetLabels {
                        dataset: stored.spec.name.clone(),
                    })
                    .set(ms as f64 / 1000.0);
            }
            Ok((state, latest))
        }
        .instrument(span)
        .await
    }
}
