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
//!
//! This file holds the [`Monitor`], each dataset's state and handle, the
//! errors, start-up and the event channel. The rest of `impl Monitor` is
//! one file per job: `rebuild.rs` (a dataset restored from the store at
//! start), `registry.rs` (datasets and models), `intake.rs` (the three
//! ingest methods and their counters), `publish.rs` (a recompute handed to
//! the blocking pool, its snapshot stored, its boards installed, the
//! watch's events raised), `export.rs` (boards and the watch as Prometheus
//! series), `reads.rs` and `scheduler.rs`. `checks.rs` validates intake
//! rows, `cache/` is the columnar cache, `recompute/` the blocking job.

pub mod alerts;
pub mod board;
pub mod cache;
pub mod checks;
mod export;
mod intake;
mod publish;
mod reads;
mod rebuild;
pub mod recompute;
mod registry;
mod scheduler;

use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::{AtomicBool, AtomicI64, Ordering};
use std::sync::{Arc, RwLock};
use std::time::{SystemTime, UNIX_EPOCH};

use tokio::sync::{broadcast, Mutex, Notify};
use tracing::{info, warn};

use crate::domain::{Board, EventRecord, StoredDataset};
use crate::estimate::watch::Watch;
use crate::estimate::EstimateError;
use crate::metrics::{KindLabels, Metrics};
use crate::store::{Store, StoreError};
use alerts::Raised;
use cache::DatasetCache;
use checks::Rejection;
pub use intake::BatchCounts;
pub use publish::RecomputeSummary;
pub use recompute::RecomputeOptions;
use recompute::{NuisanceState, RecomputeInput};
pub use registry::DatasetInfo;

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
    /// What a recompute reads. The scoring memo moves into the input (the
    /// recompute installs its successor), so that the job owns it and can
    /// extend it in place; if the job fails the next recompute starts over.
    fn recompute_input(&mut self, now: i64, max_fit_units: usize) -> RecomputeInput {
        let nuisance = self.nuisance.as_mut().map(|n| NuisanceState {
            memo: std::mem::take(&mut n.memo),
            ..n.clone()
        });
        let c = &self.cache;
        RecomputeInput {
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
            max_fit_units: Some(max_fit_units),
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
    /// The most units a refit fits the nuisance models on
    /// (`limits.max_fit_units`), so that a refit's time and memory stop
    /// growing with the history.
    max_fit_units: usize,
}

impl Monitor {
    /// Rebuilds every dataset's cache from the store, reproduces the latest
    /// nuisance fit of each, and restores the latest scoreboards.
    pub async fn open(
        store: Store,
        metrics: Arc<Metrics>,
        ready: Arc<AtomicBool>,
        shutdown: crate::shutdown::ShutdownSignal,
        max_fit_units: usize,
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
            max_fit_units,
        });
        for stored in monitor.store.datasets().await? {
            let (state, boards) = monitor.rebuild(stored).await?;
            monitor.install(state, boards);
        }
        monitor.ready.store(true, Ordering::Release);
        Ok(monitor)
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

    /// Stores an event, counts it and sends it to the event streams; a
    /// failed write is logged, never fatal to what raised it.
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
}
