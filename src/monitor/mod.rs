//! Per-dataset state and everything that changes it: the registry, intake,
//! the recompute scheduler and the alerts' events. Data flows one way:
//! api -> monitor -> (store, estimate) -> snapshot -> metrics and events.
//!
//! Each dataset has a cache guarded by an async mutex. Intake validates a
//! batch against the cache, commits it to the store, and only then appends it
//! to the cache and replies. A recompute copies what it needs out of the
//! cache, runs on the blocking pool (never on the RPC threads), where the
//! stream watch folds in the new units, stores a snapshot with the watch's
//! state, then installs the results and raises the watch's events.

pub mod alerts;
pub mod board;
pub mod cache;
pub mod ingest;
pub mod recompute;

use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::{AtomicBool, AtomicI64, Ordering};
use std::sync::{Arc, RwLock};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use tokio::sync::{broadcast, Mutex, Notify};
use tokio_stream::StreamExt;
use tracing::{info, info_span, warn, Instrument};

use crate::domain::{spec, Board, DatasetSpec, EventRecord, ScoreRow, StoredDataset, StoredModel};
use crate::estimate::data::{CONSTANT_EFFECT, ZERO_EFFECT};
use crate::estimate::watch::Watch;
use crate::estimate::EstimateError;
use crate::metrics::{
    ArmLabels, ComponentLabels, DatasetLabels, IngestLabels, KindLabels, Metrics, ModelLabels,
    ScoreLabels, WindowLabels,
};
use crate::shutdown::Shutdown;
use crate::store::{NewSnapshot, Store, StoreError};
use alerts::Raised;
use cache::DatasetCache;
use ingest::{OutcomeIn, PredictionIn, Rejection, UnitIn};
pub use recompute::Asked;
use recompute::{Frame, NuisanceState};

/// Errors of the monitor; api/status.rs maps each to a gRPC code, once.
#[derive(Debug, thiserror::Error)]
pub enum MonitorError {
    #[error("{0}")]
    NotFound(String),
    #[error("{0}")]
    AlreadyExists(String),
    #[error("{field}: {reason}")]
    Invalid { field: String, reason: String },
    #[error("{0}")]
    FailedPrecondition(String),
    /// A refused batch: nothing of it was written.
    #[error("batch refused")]
    Rejected(Vec<Rejection>),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Estimate(#[from] EstimateError),
    #[error("internal error: {0}")]
    Internal(String),
}

pub type MonitorResult<T> = Result<T, MonitorError>;

pub fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0)
}

/// Counts of one committed batch.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct BatchCounts {
    pub accepted: usize,
    pub duplicate: usize,
}

/// A dataset with its counts, for the registry API.
#[derive(Debug, Clone)]
pub struct DatasetInfo {
    pub stored: StoredDataset,
    pub units: u64,
    pub outcomes: u64,
    pub predictions: u64,
    pub active_models: u32,
}

/// What a recompute did.
#[derive(Debug, Clone, Copy)]
pub struct RecomputeSummary {
    pub snapshot_id: u64,
    pub refitted: bool,
    pub units: u64,
    pub millis: f64,
}

/// Scoreboards by window key.
type Boards = BTreeMap<String, Board>;

struct DatasetState {
    stored: StoredDataset,
    cache: DatasetCache,
    nuisance: Option<NuisanceState>,
    /// The stream watch behind the alerts, as the last recompute left it.
    watch: Watch,
    /// Outcomes accepted since the last recompute started.
    pending_outcomes: u64,
}

impl DatasetState {
    fn info(&self) -> DatasetInfo {
        DatasetInfo {
            stored: self.stored.clone(),
            units: self.cache.units() as u64,
            outcomes: self.cache.outcomes() as u64,
            predictions: self.cache.predictions(),
            active_models: self.cache.models.iter().filter(|m| m.active()).count() as u32,
        }
    }

    /// What a recompute reads. The scoring memo moves into the frame (the
    /// recompute installs its successor), so that the job owns it and can
    /// extend it in place; if the job fails the next recompute starts over.
    fn frame(&mut self, now: i64) -> Frame {
        let nuisance = self.nuisance.as_mut().map(|n| NuisanceState {
            memo: std::mem::take(&mut n.memo),
            ..n.clone()
        });
        let c = &self.cache;
        Frame {
            spec: self.stored.spec.clone(),
            columns: c.columns.clone(),
            cohort_names: c.cohort_names.clone(),
            models: c
                .models
                .iter()
                .filter(|m| m.active())
                .map(|m| (m.model.name.clone(), m.effects.clone()))
                .collect(),
            revision: c.revision,
            nuisance,
            now_ms: now,
            ranks_fresh_below: recompute::RANKS_ALWAYS_FRESH_BELOW,
            watch: self.watch.clone(),
            watch_settings: self.stored.spec.watch_settings(),
        }
    }
}

pub struct DatasetHandle {
    pub id: i64,
    pub name: String,
    state: Mutex<DatasetState>,
    /// One recompute at a time per dataset.
    recompute: Mutex<()>,
    /// Wakes the scheduler when enough outcomes are waiting.
    wake: Notify,
    /// The boards of the last recompute, by window: outside `state`, so a
    /// scoreboard read never queues behind intake batches or a recompute
    /// holding the dataset's lock. Replaced whole, under `state`'s lock.
    boards: RwLock<Arc<Boards>>,
}

impl DatasetHandle {
    fn boards(&self) -> Arc<Boards> {
        // A poisoned lock still holds a whole map: replacing it is one store.
        let guard = self.boards.read().unwrap_or_else(|e| e.into_inner());
        Arc::clone(&guard)
    }

    fn publish(&self, boards: Boards) {
        *self.boards.write().unwrap_or_else(|e| e.into_inner()) = Arc::new(boards);
    }
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

pub struct Monitor {
    store: Store,
    metrics: Arc<Metrics>,
    datasets: RwLock<HashMap<String, Arc<DatasetHandle>>>,
    /// Serializes dataset creation so names stay unique.
    create: Mutex<()>,
    events: broadcast::Sender<EventRecord>,
    next_snapshot: AtomicI64,
    ready: Arc<AtomicBool>,
    shutdown: crate::shutdown::ShutdownSignal,
}

fn reserved(name: &str) -> bool {
    name == ZERO_EFFECT || name == CONSTANT_EFFECT
}

impl Monitor {
    /// Rebuilds every dataset's cache from the store, reproduces the latest
    /// nuisance fit of each, and restores the latest scoreboards.
    pub async fn open(
        store: Store,
        metrics: Arc<Metrics>,
        ready: Arc<AtomicBool>,
        shutdown: crate::shutdown::ShutdownSignal,
    ) -> MonitorResult<Arc<Self>> {
        let (events, _) = broadcast::channel(1024);
        let monitor = Arc::new(Self {
            next_snapshot: AtomicI64::new(store.max_snapshot_id().await? + 1),
            store,
            metrics,
            datasets: RwLock::new(HashMap::new()),
            create: Mutex::new(()),
            events,
            ready,
            shutdown,
        });
        for stored in monitor.store.datasets().await? {
            let (state, boards) = monitor.rebuild(stored).await?;
            monitor.install(state, boards);
        }
        monitor.ready.store(true, Ordering::Release);
        Ok(monitor)
    }

    /// A dataset's state and its latest boards, from the store.
    async fn rebuild(&self, stored: StoredDataset) -> MonitorResult<(DatasetState, Boards)> {
        let span = info_span!("rebuild", dataset = %stored.spec.name);
        async {
            let mut cache = DatasetCache::new(stored.spec.feature_names.len());
            // Keys are unique by intake's check, not by an index (see
            // migrations/sqlite/0003): a store that holds one twice was written by
            // something else, and is refused rather than served.
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
                let frame = state.frame(now_ms());
                let limit = fit.last_outcome_seq;
                let reproduced = tokio::task::spawn_blocking(move || frame.reproduce_fit(limit))
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
                // A store written before the watch existed: it starts after
                // the units already scored.
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
            // Boards an earlier version stored were dropped on upgrade
            // (migrations/sqlite/0005): the scheduler recomputes them at start.
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

    fn install(&self, state: DatasetState, boards: Boards) -> Arc<DatasetHandle> {
        let handle = Arc::new(DatasetHandle {
            id: state.stored.id,
            name: state.stored.spec.name.clone(),
            recompute: Mutex::new(()),
            wake: Notify::new(),
            boards: RwLock::new(Arc::new(boards)),
            state: Mutex::new(state),
        });
        if let Ok(mut map) = self.datasets.write() {
            map.insert(handle.name.clone(), Arc::clone(&handle));
        }
        handle
    }

    pub fn ready(&self) -> bool {
        self.ready.load(Ordering::Acquire)
    }

    fn handle(&self, name: &str) -> MonitorResult<Arc<DatasetHandle>> {
        self.datasets
            .read()
            .map_err(|_| MonitorError::Internal("dataset registry lock poisoned".into()))?
            .get(name)
            .cloned()
            .ok_or_else(|| MonitorError::NotFound(format!("dataset {name:?} does not exist")))
    }

    pub fn handles(&self) -> Vec<Arc<DatasetHandle>> {
        let mut v: Vec<_> = self
            .datasets
            .read()
            .map(|m| m.values().cloned().collect())
            .unwrap_or_default();
        v.sort_by_key(|h| h.id);
        v
    }

    pub fn subscribe(&self) -> broadcast::Receiver<EventRecord> {
        self.events.subscribe()
    }

    pub fn store(&self) -> &Store {
        &self.store
    }

    /// The server's shutdown signal, for tasks that must end with it.
    pub fn shutdown_signal(&self) -> &crate::shutdown::ShutdownSignal {
        &self.shutdown
    }

    // ----------------------------------------------------------- registry

    pub async fn create_dataset(self: &Arc<Self>, spec: DatasetSpec) -> MonitorResult<DatasetInfo> {
        let spec = spec
            .normalized()
            .map_err(|(field, reason)| MonitorError::Invalid { field, reason })?;
        let _guard = self.create.lock().await;
        if let Ok(h) = self.handle(&spec.name) {
            let st = h.state.lock().await;
            return if st.stored.spec == spec {
                Ok(st.info())
            } else {
                Err(MonitorError::AlreadyExists(format!(
                    "dataset {:?} exists with other settings",
                    spec.name
                )))
            };
        }
        let stored = self.store.create_dataset(&spec, now_ms()).await?;
        let state = DatasetState {
            cache: DatasetCache::new(spec.feature_names.len()),
            stored,
            nuisance: None,
            watch: Watch::default(),
            pending_outcomes: 0,
        };
        let info = state.info();
        self.update_counts(&state);
        let handle = self.install(state, Boards::new());
        self.spawn_scheduler(handle);
        info!(dataset = %spec.name, features = spec.feature_names.len(), "dataset created");
        Ok(info)
    }

    pub async fn dataset(&self, name: &str) -> MonitorResult<DatasetInfo> {
        Ok(self.handle(name)?.state.lock().await.info())
    }

    pub async fn datasets(&self) -> Vec<DatasetInfo> {
        let mut out = Vec::new();
        for h in self.handles() {
            out.push(h.state.lock().await.info());
        }
        out
    }

    pub async fn register_model(
        &self,
        dataset: &str,
        name: &str,
        version: &str,
        description: &str,
    ) -> MonitorResult<(StoredModel, u64)> {
        spec::check_name("name", name).map_err(|reason| MonitorError::Invalid {
            field: "name".into(),
            reason,
        })?;
        if reserved(name) {
            return Err(MonitorError::Invalid {
                field: "name".into(),
                reason: format!("{name:?} is reserved for a built-in baseline"),
            });
        }
        for (field, v) in [("version", version), ("description", description)] {
            if v.len() > 4096 || v.chars().any(|c| c.is_control() && c != '\n') {
                return Err(MonitorError::Invalid {
                    field: field.into(),
                    reason: "must be at most 4096 bytes without control characters".into(),
                });
            }
        }
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        if let Some(&m) = st.cache.model_index.get(name) {
            let col = &st.cache.models[m];
            return if col.model.version == version && col.model.description == description {
                Ok((col.model.clone(), col.count))
            } else {
                Err(MonitorError::AlreadyExists(format!(
                    "model {name:?} is registered with another version or description"
                )))
            };
        }
        let model = self
            .store
            .register_model(h.id, name, version, description, now_ms())
            .await?;
        st.cache.add_model(model.clone());
        drop(st);
        self.raise(
            &h,
            0,
            Raised {
                kind: "model_registered",
                summary: format!("{dataset}: model {name} registered (version {version:?})"),
                details: serde_json::json!({ "model": name, "version": version }),
            },
        )
        .await;
        Ok((model, 0))
    }

    pub async fn models(
        &self,
        dataset: &str,
        include_retired: bool,
    ) -> MonitorResult<Vec<(StoredModel, u64)>> {
        let h = self.handle(dataset)?;
        let st = h.state.lock().await;
        Ok(st
            .cache
            .models
            .iter()
            .filter(|m| include_retired || m.active())
            .map(|m| (m.model.clone(), m.count))
            .collect())
    }

    pub async fn retire_model(
        &self,
        dataset: &str,
        name: &str,
    ) -> MonitorResult<(StoredModel, u64)> {
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        let Some(&m) = st.cache.model_index.get(name) else {
            return Err(MonitorError::NotFound(format!(
                "model {name:?} is not registered"
            )));
        };
        if !st.cache.models[m].active() {
            let col = &st.cache.models[m];
            return Ok((col.model.clone(), col.count));
        }
        let at = now_ms();
        self.store
            .retire_model(st.cache.models[m].model.id, at)
            .await?;
        st.cache.models[m].model.retired_at_ms = at;
        let out = (st.cache.models[m].model.clone(), st.cache.models[m].count);
        drop(st);
        self.raise(
            &h,
            0,
            Raised {
                kind: "model_retired",
                summary: format!("{dataset}: model {name} retired"),
                details: serde_json::json!({ "model": name }),
            },
        )
        .await;
        Ok(out)
    }

    // ------------------------------------------------------------- intake

    fn count_ingest(&self, dataset: &str, kind: &str, result: &str, n: usize) {
        if n > 0 {
            self.metrics
                .ingest_rows
                .get_or_create(&IngestLabels {
                    dataset: dataset.into(),
                    kind: kind.into(),
                    result: result.into(),
                })
                .inc_by(n as u64);
        }
    }

    fn refused(
        &self,
        dataset: &str,
        kind: &str,
        faults: Vec<Rejection>,
        rows: usize,
    ) -> MonitorError {
        self.count_ingest(dataset, kind, "rejected", rows);
        MonitorError::Rejected(faults)
    }

    pub async fn ingest_units(&self, dataset: &str, rows: &[UnitIn]) -> MonitorResult<BatchCounts> {
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        let checked = ingest::check_units(&st.cache, rows)
            .map_err(|f| self.refused(dataset, "units", f, rows.len()))?;
        let (duplicate, new_rows) = (checked.duplicate, Arc::new(checked.new_rows));
        if !new_rows.is_empty() {
            // The cache takes the batch while the store writes it, on two
            // threads. Nobody else sees the cache before the commit (the
            // lock is held throughout), and a failed write takes the batch
            // back out, so the cache still holds only what is on disk.
            let mark = st.cache.units_mark();
            let write = tokio::spawn({
                let (store, rows, id, at) =
                    (self.store.clone(), Arc::clone(&new_rows), h.id, now_ms());
                async move { store.insert_units(id, &rows, at).await }
            });
            st.cache.add_units(&new_rows);
            let written = match write.await {
                Ok(r) => r.map_err(MonitorError::from),
                Err(e) => Err(MonitorError::Internal(format!("unit write: {e}"))),
            };
            if let Err(e) = written {
                st.cache.truncate_units(mark);
                return Err(e);
            }
        }
        self.update_counts(&st);
        drop(st);
        self.count_ingest(dataset, "units", "accepted", new_rows.len());
        self.count_ingest(dataset, "units", "duplicate", duplicate);
        Ok(BatchCounts {
            accepted: new_rows.len(),
            duplicate,
        })
    }

    pub async fn ingest_outcomes(
        &self,
        dataset: &str,
        rows: &[OutcomeIn],
    ) -> MonitorResult<BatchCounts> {
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        let kind = st.stored.spec.outcome_kind;
        let checked = ingest::check_outcomes(&st.cache, kind, rows)
            .map_err(|f| self.refused(dataset, "outcomes", f, rows.len()))?;
        if !checked.new_rows.is_empty() {
            self.store
                .insert_outcomes(h.id, &checked.new_rows, now_ms())
                .await?;
            for o in &checked.new_rows {
                st.cache.add_outcome(o);
            }
            st.pending_outcomes += checked.new_rows.len() as u64;
            self.metrics
                .last_outcome_seconds
                .get_or_create(&DatasetLabels {
                    dataset: dataset.into(),
                })
                .set(now_ms() as f64 / 1000.0);
        }
        let due = st.pending_outcomes >= u64::from(st.stored.spec.recompute_every_outcomes);
        self.update_counts(&st);
        drop(st);
        if due {
            h.wake.notify_one();
        }
        self.count_ingest(dataset, "outcomes", "accepted", checked.new_rows.len());
        self.count_ingest(dataset, "outcomes", "duplicate", checked.duplicate);
        Ok(BatchCounts {
            accepted: checked.new_rows.len(),
            duplicate: checked.duplicate,
        })
    }

    pub async fn ingest_predictions(
        &self,
        dataset: &str,
        rows: &[PredictionIn],
    ) -> MonitorResult<BatchCounts> {
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        let checked = ingest::check_predictions(&st.cache, rows)
            .map_err(|f| self.refused(dataset, "predictions", f, rows.len()))?;
        if !checked.new_rows.is_empty() {
            self.store
                .insert_predictions(h.id, &checked.new_rows, now_ms())
                .await?;
            for p in &checked.new_rows {
                if let Some(m) = st.cache.model_by_id(p.model_id) {
                    st.cache.add_prediction(m, p);
                }
            }
        }
        drop(st);
        self.count_ingest(dataset, "predictions", "accepted", checked.new_rows.len());
        self.count_ingest(dataset, "predictions", "duplicate", checked.duplicate);
        Ok(BatchCounts {
            accepted: checked.new_rows.len(),
            duplicate: checked.duplicate,
        })
    }

    fn update_counts(&self, st: &DatasetState) {
        let l = DatasetLabels {
            dataset: st.stored.spec.name.clone(),
        };
        // Created at 0 so alert rules see the first failure as an increase.
        let _ = self.metrics.recompute_failures.get_or_create(&l);
        self.metrics
            .units
            .get_or_create(&l)
            .set(st.cache.units() as f64);
        self.metrics
            .outcomes
            .get_or_create(&l)
            .set(st.cache.outcomes() as f64);
    }

    // ---------------------------------------------------------- recompute

    /// Recomputes a dataset now, with a refit or a rank refresh if `asked`.
    pub async fn recompute(&self, dataset: &str, asked: Asked) -> MonitorResult<RecomputeSummary> {
        let h = self.handle(dataset)?;
        let span = info_span!(
            "recompute",
            dataset = %dataset,
            refit_requested = asked.refit,
            rank_refresh_requested = asked.refresh_ranks
        );
        let result = self.recompute_handle(&h, asked).instrument(span).await;
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
        asked: Asked,
    ) -> MonitorResult<RecomputeSummary> {
        let _one_at_a_time = h.recompute.lock().await;
        let started = Instant::now();
        let now = now_ms();
        let (frame, outcomes_in_frame) = {
            let mut st = h.state.lock().await;
            st.pending_outcomes = 0;
            let outcomes = st.cache.outcomes();
            (st.frame(now), outcomes)
        };
        if outcomes_in_frame == 0 {
            return Err(MonitorError::FailedPrecondition(format!(
                "dataset {:?} has no outcomes yet",
                h.name
            )));
        }
        let spec = frame.spec.clone();
        let computed = tokio::task::spawn_blocking(move || {
            let computed = frame.compute(asked);
            if computed.as_ref().is_ok_and(|c| c.refit.is_some()) {
                release_freed_memory();
            }
            computed
        })
        .await
        .map_err(|e| MonitorError::Internal(e.to_string()))??;
        let mut nuisance = computed.nuisance;
        if computed.refit.is_some() {
            let report = serde_json::to_string(&nuisance.report).unwrap_or_default();
            nuisance.fit_id = self
                .store
                .insert_fit(
                    h.id,
                    now,
                    nuisance.fit_units as i64,
                    nuisance.last_outcome_seq,
                    spec.seed as i64,
                    &report,
                )
                .await?;
            nuisance.fitted_at_ms = now;
        }
        let snapshot_id = self.next_snapshot.fetch_add(1, Ordering::SeqCst);
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
            for m in &b.models {
                for (estimator, e) in m.history_values() {
                    scores.push(ScoreRow {
                        model: m.name.clone(),
                        window: w.key.clone(),
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
                dataset_id: h.id,
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
        let (raised, previous, watched_leader) = {
            let mut st = h.state.lock().await;
            let watched_leader = st.watch.state().leader;
            let previous: BTreeMap<String, String> = h
                .boards()
                .iter()
                .map(|(k, b)| (k.clone(), b.leader.clone()))
                .collect();
            st.nuisance = Some(nuisance.clone());
            st.watch = computed.watch.clone();
            let raised: Vec<Raised> = computed
                .signals
                .iter()
                .filter_map(|s| alerts::event(&h.name, s))
                .collect();
            h.publish(boards.clone());
            (raised, previous, watched_leader)
        };
        // The watch looked before any refit: its events come first.
        for r in raised {
            if r.kind == "leader_changed" {
                self.metrics
                    .leader_changes
                    .get_or_create(&WindowLabels {
                        dataset: h.name.clone(),
                        window: alerts::STREAM.into(),
                    })
                    .inc();
            }
            self.raise(h, snapshot_id as u64, r).await;
        }
        if let Some(reason) = computed.refit {
            let report = &nuisance.report;
            self.raise(
                h,
                snapshot_id as u64,
                Raised {
                    kind: "nuisance_refit",
                    summary: format!(
                        "{}: nuisance models refitted on {} units ({reason}); propensity AUC {:.3}",
                        h.name, nuisance.fit_units, report.propensity.auc
                    ),
                    details: serde_json::json!({
                        "reason": reason.code(),
                        "units": nuisance.fit_units,
                        "report": report,
                    }),
                },
            )
            .await;
        }
        let seconds = started.elapsed().as_secs_f64();
        self.metrics
            .recompute_seconds
            .get_or_create(&KindLabels {
                dataset: h.name.clone(),
                kind: if computed.refit.is_some() {
                    "refit"
                } else {
                    "incremental"
                }
                .into(),
            })
            .observe(seconds);
        self.export_boards(&h.name, &boards, &previous, &nuisance);
        self.export_watch(&h.name, watched_leader, &computed.watch);
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

    fn export_boards(
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
            // Forget the previous leader's label so exactly one series is 1.
            if let Some(old) = previous.get(window) {
                m.leader_info.remove(&ModelLabels {
                    dataset: dataset.into(),
                    model: old.clone(),
                    window: window.into(),
                });
            }
            if !b.leader.is_empty() {
                m.leader_info
                    .get_or_create(&ModelLabels {
                        dataset: dataset.into(),
                        model: b.leader.clone(),
                        window: window.into(),
                    })
                    .set(1.0);
            }
            m.leader_uncertain
                .get_or_create(&wl)
                .set(if b.best_set.len() > 1 { 1.0 } else { 0.0 });
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
                m.model_p_best.get_or_create(&ml).set(model.p_best);
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
    fn export_watch(&self, dataset: &str, previous: Option<String>, watch: &Watch) {
        let m = &self.metrics;
        let state = watch.state();
        let wl = WindowLabels {
            dataset: dataset.into(),
            window: alerts::STREAM.into(),
        };
        let leader_labels = |model: String| ModelLabels {
            dataset: dataset.into(),
            model,
            window: alerts::STREAM.into(),
        };
        if let Some(old) = previous.filter(|old| state.leader.as_ref() != Some(old)) {
            m.leader_info.remove(&leader_labels(old));
        }
        if let Some(leader) = &state.leader {
            m.leader_info
                .get_or_create(&leader_labels(leader.clone()))
                .set(1.0);
        }
        let _ = m.leader_changes.get_or_create(&wl);
        let flag = |b: bool| if b { 1.0 } else { 0.0 };
        m.leader_uncertain
            .get_or_create(&wl)
            .set(flag(state.leader.is_some() && !state.leader_settled));
        m.no_heterogeneity.get_or_create(&wl).set(flag(
            state.heterogeneity != crate::estimate::watch::Heterogeneity::Detected,
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

    async fn raise(&self, h: &DatasetHandle, snapshot_id: u64, r: Raised) {
        let at = now_ms();
        let details = r.details.to_string();
        match self
            .store
            .insert_event(h.id, r.kind, at, snapshot_id as i64, &r.summary, &details)
            .await
        {
            Ok(id) => {
                info!(dataset = %h.name, kind = r.kind, event = id, "{}", r.summary);
                self.metrics
                    .events
                    .get_or_create(&KindLabels {
                        dataset: h.name.clone(),
                        kind: r.kind.into(),
                    })
                    .inc();
                let _ = self.events.send(EventRecord {
                    id,
                    dataset: h.name.clone(),
                    kind: r.kind.into(),
                    at_ms: at,
                    snapshot_id: snapshot_id as i64,
                    summary: r.summary,
                    details_json: details,
                });
            }
            Err(e) => warn!(dataset = %h.name, error = %e, "could not store an event"),
        }
    }

    // -------------------------------------------------------------- reads

    pub async fn scoreboard(&self, dataset: &str, window: &str) -> MonitorResult<Board> {
        let h = self.handle(dataset)?;
        let boards = h.boards();
        if boards.is_empty() {
            return Err(MonitorError::FailedPrecondition(format!(
                "dataset {dataset:?} has not been scored yet: send outcomes or call Recompute"
            )));
        }
        boards
            .get(window)
            .cloned()
            .ok_or_else(|| MonitorError::NotFound(format!("no scoreboard for window {window:?}")))
    }

    pub fn dataset_id(&self, dataset: &str) -> MonitorResult<i64> {
        Ok(self.handle(dataset)?.id)
    }

    // ---------------------------------------------------------- scheduler

    /// Starts the recompute scheduler of every dataset.
    pub fn start_schedulers(self: &Arc<Self>) {
        for h in self.handles() {
            if h.boards().is_empty() {
                // Outcomes but no boards (see `rebuild`): recompute now.
                h.wake.notify_one();
            }
            self.spawn_scheduler(h);
        }
    }

    fn spawn_scheduler(self: &Arc<Self>, h: Arc<DatasetHandle>) {
        let monitor = Arc::clone(self);
        let shutdown = self.shutdown.subscribe();
        tokio::spawn(async move { monitor.schedule(h, shutdown).await });
    }

    /// Recomputes when enough outcomes are waiting (woken by intake, then
    /// debounced for a moment so a burst of batches becomes one recompute),
    /// or when outcomes have waited for the dataset's interval.
    async fn schedule(self: Arc<Self>, h: Arc<DatasetHandle>, mut shutdown: Shutdown) {
        loop {
            let interval = {
                let st = h.state.lock().await;
                Duration::from_secs(u64::from(st.stored.spec.recompute_every_seconds.max(1)))
            };
            tokio::select! {
                _ = shutdown.recv() => return,
                _ = h.wake.notified() => {
                    tokio::time::sleep(Duration::from_millis(200)).await;
                }
                _ = tokio::time::sleep(interval) => {}
            }
            if shutdown.is_shutdown() {
                return;
            }
            let pending = h.state.lock().await.pending_outcomes;
            if pending == 0 {
                continue;
            }
            let _ = self.recompute(&h.name, Asked::default()).await;
        }
    }
}
