//! A dataset restored from the store at start-up: its cache, its latest
//! nuisance fit (reproduced), boards and stream watch.

use tokio_stream::StreamExt;
use tracing::{info, info_span, Instrument};

use super::cache::DatasetCache;
use super::recompute::{recorded_max_fit_units, NuisanceState};
use super::{now_ms, Boards, DatasetState, Monitor, MonitorError, MonitorResult};
use crate::domain::StoredDataset;
use crate::estimate::watch::Watch;
use crate::metrics::DatasetLabels;
use crate::store::StoreError;

impl Monitor {
    /// A dataset's state and its latest boards, from the store.
    pub(super) async fn rebuild(
        &self,
        stored: StoredDataset,
    ) -> MonitorResult<(DatasetState, Boards)> {
        let span = info_span!("rebuild", dataset = %stored.spec.name);
        async {
            let mut cache = DatasetCache::new(stored.spec.feature_names.len());
            // Keys are unique by intake's check, not by an index (see
            // migrations/sqlite/0003): a store that holds one twice was
            // written by something else, and is refused rather than served.
            let mut units = self.store.units(stored.id);
            while let Some(u) = units.next().await {
                let u = u?;
                if let Some(first) = cache.unit_of(&u.key) {
                    return Err(StoreError::Corrupt(format!(
                        "dataset {:?}: unit key {:?} is stored twice (units {first} and {})",
                        stored.spec.name, u.key, u.seq
                    ))
                    .into());
                }
                cache.add_unit(&u);
            }
            drop(units);
            let mut outcomes = self.store.outcomes(stored.id);
            while let Some(o) = outcomes.next().await {
                cache.add_outcome(&o?);
            }
            drop(outcomes);
            for m in self.store.models(stored.id).await? {
                cache.add_model(m);
            }
            let mut predictions = self.store.predictions(stored.id);
            while let Some(p) = predictions.next().await {
                let p = p?;
                if let Some(m) = cache.model_by_id(p.model_id) {
                    cache.add_prediction(m, &p);
                }
            }
            drop(predictions);
            let mut state = DatasetState {
                stored: stored.clone(),
                cache,
                nuisance: None,
                watch: Watch::default(),
                pending_outcomes: 0,
            };
            if let Some(fit) = self.store.latest_fit(stored.id).await? {
                // The fit is drawn again with the cap it was fitted under,
                // whatever limits.max_fit_units says now.
                let cap = recorded_max_fit_units(&fit.report_json).map_err(|e| {
                    StoreError::Corrupt(format!(
                        "dataset {:?}, fit {}: {e}",
                        stored.spec.name, fit.id
                    ))
                })?;
                let input = state.recompute_input(now_ms(), self.max_fit_units);
                let limit = fit.last_outcome_seq;
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
            let mut latest = Boards::new();
            for board in self.store.latest_boards(stored.id).await? {
                latest.insert(board.window.key(), board);
            }
            match self.store.latest_watch(stored.id).await? {
                Some(json) => {
                    state.watch = serde_json::from_str(&json)
                        .map_err(|e| StoreError::Corrupt(format!("stream watch: {e}")))?;
                }
                // A dataset scored without a stored watch (a store older
                // than migrations/sqlite/0004): the watch starts after the units
                // already scored.
                None if state.nuisance.is_some() || !latest.is_empty() => {
                    state.watch.skip_baseline(state.cache.outcomes() as u64);
                }
                None => {}
            }
            state.pending_outcomes = state
                .cache
                .outcomes()
                .saturating_sub(state.nuisance.as_ref().map(|n| n.fit_units).unwrap_or(0))
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
