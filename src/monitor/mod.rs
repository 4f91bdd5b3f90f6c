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
//! Several servers may share one store (PostgreSQL). Every server keeps
//! every dataset's cache and takes every call; each dataset has one owner
//! at a time, by a lease with a fencing epoch (`leases.rs`), and only the
//! owner recomputes, stores snapshots and raises the alerts' events. The
//! others read what the owner and each other wrote (`follow.rs`).
//!
//! This file holds the [`Monitor`], each dataset's state and handle, the
//! errors, start-up and the event channel. The rest of `impl Monitor` is
//! one file per job: `rebuild.rs` (a dataset restored from the store),
//! `registry.rs` (datasets and models), `intake.rs` (the three ingest
//! methods and their counters), `publish.rs` (a recompute handed to the
//! blocking pool, its snapshot stored, its boards installed, the watch's
//! events raised), `export.rs` (boards and the watch as Prometheus series),
//! `leases.rs` (which datasets this server owns), `follow.rs` (catching up
//! with the other servers' writes), `reads.rs` and `scheduler.rs`.
//! `checks.rs` validates intake rows, `cache/` is the columnar cache,
//! `recompute/` the blocking job.

pub mod alerts;
pub mod board;
pub mod cache;
pub mod checks;
mod export;
mod follow;
mod intake;
mod leases;
mod publish;
mod publish_arms;
mod reads;
mod rebuild;
pub mod recompute;
mod registry;
mod scheduler;

use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, RwLock};
use std::time::{SystemTime, UNIX_EPOCH};

use tokio::sync::{broadcast, Mutex, Notify};
use tracing::{info, warn};

use crate::domain::{Board, EventRecord, StoredDataset};
use crate::estimate::watch::Watch;
use crate::estimate::EstimateError;
use crate::metrics::{KindLabels, Metrics};
use crate::store::{Fence, NewEvent, Store, StoreError};
use alerts::Raised;
use cache::DatasetCache;
use checks::Rejection;
pub use intake::BatchCounts;
pub use leases::Replica;
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
    /// On a dataset with arms: its nuisance state (`nuisance` is None).
    arm_nuisance: Option<recompute::ArmNuisanceState>,
    /// The stream watch behind the alerts, as the last recompute left it.
    watch: Watch,
    /// Outcomes accepted since the last recompute started.
    pending_outcomes: u64,
}

impl DatasetState {
    /// A dataset with nothing read yet.
    fn empty(stored: StoredDataset) -> Self {
        Self {
            cache: DatasetCache::with_arms(
                stored.spec.feature_names.len(),
                stored.spec.arms.clone(),
            ),
            stored,
            nuisance: None,
            arm_nuisance: None,
            watch: Watch::default(),
            pending_outcomes: 0,
        }
    }

    /// The units the kept nuisance fit gave values to, binary or arms.
    fn fit_units(&self) -> Option<usize> {
        self.nuisance
            .as_ref()
            .map(|n| n.fit_units)
            .or_else(|| self.arm_nuisance.as_ref().map(|n| n.fit_units))
    }

    /// What a recompute reads. The scoring memo moves into the input (the
    /// recompute installs its successor), so that the job owns it and can
    /// extend it in place; if the job fails the next recompute starts over.
    fn recompute_input(
        &mut self,
        now: i64,
        max_fit_units: usize,
        blend_models: usize,
    ) -> RecomputeInput {
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
            arm_models: if self.stored.spec.has_arms() {
                c.models
                    .iter()
                    .filter(|m| m.active())
                    .map(|m| {
                        let columns = m.arms().map(|(_, e, _)| e.clone()).collect();
                        (m.model.name.clone(), columns)
                    })
                    .collect()
            } else {
                Vec::new()
            },
            revision: c.revision,
            nuisance,
            arm_nuisance: self.arm_nuisance.clone(),
            max_fit_units: Some(max_fit_units),
            blend_models,
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
    /// This server's lease on the dataset, while it owns it.
    lease: std::sync::Mutex<leases::Held>,
    /// Events of the dataset read so far (see `follow.rs`).
    events_seen: std::sync::Mutex<follow::EventsSeen>,
    /// Recomputes other servers asked of this owner, taken already.
    asks_taken: std::sync::Mutex<std::collections::BTreeSet<i64>>,
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

    /// The fence of this server's lease, while it owns the dataset.
    pub(super) fn fence(&self) -> Option<Fence> {
        self.lease.lock().unwrap_or_else(|e| e.into_inner()).fence()
    }
}

pub struct Monitor {
    store: Store,
    metrics: Arc<Metrics>,
    datasets: RwLock<HashMap<String, Arc<DatasetHandle>>>,
    /// Serializes dataset creation so names stay unique.
    create: Mutex<()>,
    events: broadcast::Sender<EventRecord>,
    ready: Arc<AtomicBool>,
    shutdown: crate::shutdown::ShutdownSignal,
    replica: Replica,
    /// The most units a refit fits the nuisance models on
    /// (`limits.max_fit_units`), so that a refit's time and memory stop
    /// growing with the history.
    max_fit_units: usize,
    /// The most models a window's blend takes (`limits.max_blend_models`).
    blend_models: usize,
    /// The lease keeper, which hands every lease back once the shutdown
    /// fires: [`Monitor::leases_released`] waits for it, so the store is
    /// not closed under it.
    lease_keeper: std::sync::Mutex<Option<tokio::task::JoinHandle<()>>>,
}

impl Monitor {
    /// Rebuilds every dataset's cache from the store; for each dataset
    /// whose lease it takes, also reproduces the latest nuisance fit and
    /// restores the stream watch. Restores every dataset's latest boards.
    pub async fn open(
        store: Store,
        metrics: Arc<Metrics>,
        ready: Arc<AtomicBool>,
        shutdown: crate::shutdown::ShutdownSignal,
        replica: Replica,
        max_fit_units: usize,
        blend_models: usize,
    ) -> MonitorResult<Arc<Self>> {
        let (events, _) = broadcast::channel(1024);
        let monitor = Arc::new(Self {
            store,
            metrics,
            datasets: RwLock::new(HashMap::new()),
            create: Mutex::new(()),
            events,
            ready,
            shutdown,
            replica,
            max_fit_units,
            blend_models,
            lease_keeper: std::sync::Mutex::new(None),
        });
        // Renewals run from the start: rebuilding a large dataset can take
        // longer than its lease. The keeper subscribes to the shutdown
        // before it is spawned, so a shutdown fired at once still reaches it.
        let keeper = tokio::spawn(Arc::clone(&monitor).keep_leases(monitor.shutdown.subscribe()));
        *monitor
            .lease_keeper
            .lock()
            .unwrap_or_else(|e| e.into_inner()) = Some(keeper);
        for stored in monitor.store.datasets().await? {
            monitor.adopt(stored).await?;
        }
        monitor.ready.store(true, Ordering::Release);
        Ok(monitor)
    }

    /// Takes a stored dataset in: its handle, its lease if free (then its
    /// state as the owner rebuilds it), else its state as a follower's.
    async fn adopt(self: &Arc<Self>, stored: StoredDataset) -> MonitorResult<Arc<DatasetHandle>> {
        // Events stored before the dataset is taken in are history, not news
        // for the event streams.
        let last_event = self.store.last_event_id(stored.id).await?;
        let h = self.install(DatasetState::empty(stored.clone()), Boards::new());
        h.events_seen
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .start_after(last_event);
        self.claim(&h).await?;
        if h.fence().is_none() {
            let (state, boards) = self.rebuild(stored, false).await?;
            let mut st = h.state.lock().await;
            *st = state;
            h.publish(boards);
        }
        Ok(h)
    }

    fn install(&self, state: DatasetState, boards: Boards) -> Arc<DatasetHandle> {
        let handle = Arc::new(DatasetHandle {
            id: state.stored.id,
            name: state.stored.spec.name.clone(),
            recompute: Mutex::new(()),
            wake: Notify::new(),
            boards: RwLock::new(Arc::new(boards)),
            state: Mutex::new(state),
            lease: std::sync::Mutex::new(leases::Held::none()),
            events_seen: std::sync::Mutex::new(follow::EventsSeen::default()),
            asks_taken: std::sync::Mutex::new(Default::default()),
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
    /// failed write is logged, never fatal to what raised it. `fence` is
    /// the owner's lease for the alerts' events, None for the registry's.
    async fn raise(&self, h: &DatasetHandle, fence: Option<Fence>, snapshot_id: u64, r: Raised) {
        let at = now_ms();
        let details = r.details.to_string();
        match self
            .store
            .insert_event(&NewEvent {
                dataset_id: h.id,
                epoch: fence.map(|f| f.epoch),
                kind: r.kind,
                at_ms: at,
                snapshot_id: snapshot_id as i64,
                summary: &r.summary,
                details_json: &details,
            })
            .await
        {
            Ok(id) => {
                h.events_seen
                    .lock()
                    .unwrap_or_else(|e| e.into_inner())
                    .raised_here(id);
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
