//! The storage contract: what the service keeps durably, in the domain's
//! records, behind four small traits that every backend implements.
//!
//! - [`DatasetLog`]: datasets, models, and the units, outcomes and
//!   predictions as accepted, read back at start as streams in their order.
//! - [`SnapshotLog`]: nuisance fit records, snapshots with their boards and
//!   the stream watch's state, and the per-model history.
//! - [`EventLog`]: the events the alerts and the registry raise.
//! - [`TokenLog`]: access-token digests.
//!
//! The rules every backend keeps (`tests/store_contract.rs` holds each
//! backend to them):
//!
//! - A write of a batch is one transaction: all of it is stored or none.
//!   The service replies to a client only after the write returns.
//! - A row whose identity is already stored (a unit's sequence number, a
//!   unit's outcome, a model's prediction for a unit, a dataset or model
//!   name) is refused with [`StoreError::Conflict`], and nothing of its batch
//!   is written. Re-sends are made idempotent above the store: intake drops
//!   rows it already holds before it writes.
//! - A unit key is stored once per dataset, even when several processes
//!   write. Intake checks each batch's keys against the keys it holds, under
//!   the dataset's lock; a backend makes that check sufficient. SQLite admits
//!   one server per data directory (a lock file, see [`sqlite`]); a backend
//!   that admits several writers must enforce the rule itself and refuse a
//!   clash with [`StoreError::Conflict`].
//! - Rebuild streams come in order: units by sequence number, outcomes by
//!   arrival order, predictions in any order.
//! - Snapshot ids are chosen by the caller, increasing; a window's latest
//!   board is the one of the largest snapshot id that stored that window.
//!
//! [`open`] is the one place that names a backend.

use std::path::PathBuf;
use std::pin::Pin;
use std::sync::Arc;

use async_trait::async_trait;
use tokio_stream::Stream;

use crate::domain::{
    Board, DatasetSpec, EventRecord, FitRecord, HistoryRow, OutcomeRecord, PredictionRecord,
    ScoreRow, StoredDataset, StoredModel, UnitRecord,
};

pub mod sqlite;

/// What a store can fail with. Each backend maps its own errors into these
/// once, in one `From` impl.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// The row's identity is already stored (see the module's rules).
    #[error("already stored: {0}")]
    Conflict(String),
    /// Stored data that cannot be read back as a record.
    #[error("stored data is corrupt: {0}")]
    Corrupt(String),
    /// The data directory (or database) is held by another server.
    #[error("{0}")]
    InUse(String),
    /// Anything else the backend reports (I/O, connection, migration).
    #[error("storage error: {0}")]
    Backend(String),
}

pub type StoreResult<T> = Result<T, StoreError>;

/// A stream of stored rows, for rebuilding state at start without holding
/// a whole table at once.
pub type RowStream<'a, T> = Pin<Box<dyn Stream<Item = StoreResult<T>> + Send + 'a>>;

/// How hard a commit pushes data to disk.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Deserialize, serde::Serialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum Durability {
    /// fsync at every commit: an acknowledged batch survives power loss.
    #[default]
    Full,
    /// fsync at WAL checkpoints: survives a crash of the process, not of the machine.
    Normal,
}

/// Where and how to open a store.
#[derive(Debug, Clone)]
pub struct StoreConfig {
    /// The SQLite database file.
    pub path: PathBuf,
    pub durability: Durability,
    /// True for a server, which writes datasets: it claims the data
    /// directory, and a second server on it is refused
    /// ([`StoreError::InUse`]). Tools that only manage tokens beside a
    /// running server open without the claim.
    pub claim: bool,
}

/// Datasets, models and the rows they accept.
#[async_trait]
pub trait DatasetLog: Send + Sync {
    /// Refuses a name already stored with [`StoreError::Conflict`].
    async fn create_dataset(&self, spec: &DatasetSpec, now_ms: i64) -> StoreResult<StoredDataset>;
    /// Every dataset, oldest first.
    async fn datasets(&self) -> StoreResult<Vec<StoredDataset>>;

    /// Refuses a name already registered in the dataset with
    /// [`StoreError::Conflict`].
    async fn register_model(
        &self,
        dataset_id: i64,
        name: &str,
        version: &str,
        description: &str,
        now_ms: i64,
    ) -> StoreResult<StoredModel>;
    /// Marks a model retired at `now_ms`; a retired model stays retired.
    async fn retire_model(&self, model_id: i64, now_ms: i64) -> StoreResult<()>;
    /// A dataset's models, in registration order.
    async fn models(&self, dataset_id: i64) -> StoreResult<Vec<StoredModel>>;

    /// Writes a batch of new units (one transaction).
    async fn insert_units(
        &self,
        dataset_id: i64,
        rows: &[UnitRecord],
        now_ms: i64,
    ) -> StoreResult<()>;
    /// Writes a batch of new outcomes (one transaction).
    async fn insert_outcomes(
        &self,
        dataset_id: i64,
        rows: &[OutcomeRecord],
        now_ms: i64,
    ) -> StoreResult<()>;
    /// Writes a batch of new predictions (one transaction).
    async fn insert_predictions(
        &self,
        dataset_id: i64,
        rows: &[PredictionRecord],
        now_ms: i64,
    ) -> StoreResult<()>;

    /// Every unit of a dataset, by sequence number.
    fn units(&self, dataset_id: i64) -> RowStream<'_, UnitRecord>;
    /// Every outcome of a dataset, in arrival order.
    fn outcomes(&self, dataset_id: i64) -> RowStream<'_, OutcomeRecord>;
    /// Every prediction of a dataset.
    fn predictions(&self, dataset_id: i64) -> RowStream<'_, PredictionRecord>;

    /// When the dataset's last outcome was received (Unix ms), if any.
    async fn last_outcome_received_ms(&self, dataset_id: i64) -> StoreResult<Option<i64>>;
    /// Row counts of units, outcomes and predictions for one dataset.
    async fn counts(&self, dataset_id: i64) -> StoreResult<(i64, i64, i64)>;
}

/// Fit records, snapshots and history.
#[async_trait]
pub trait SnapshotLog: Send + Sync {
    /// Records a full cross-fitted refit; returns its id.
    async fn insert_fit(
        &self,
        dataset_id: i64,
        now_ms: i64,
        units: i64,
        last_outcome_seq: i64,
        seed: i64,
        report_json: &str,
    ) -> StoreResult<i64>;
    /// The dataset's latest fit record.
    async fn latest_fit(&self, dataset_id: i64) -> StoreResult<Option<FitRecord>>;

    /// Stores a snapshot, the boards its recompute changed, the per-model
    /// values history reads and the stream watch's state (JSON), in one
    /// transaction.
    async fn insert_snapshot(&self, snapshot: &NewSnapshot<'_>) -> StoreResult<()>;
    /// Each window's latest board.
    async fn latest_boards(&self, dataset_id: i64) -> StoreResult<Vec<Board>>;
    /// The stream watch as the latest snapshot left it (JSON).
    async fn latest_watch(&self, dataset_id: i64) -> StoreResult<Option<String>>;
    /// The largest snapshot id stored (0 when none).
    async fn max_snapshot_id(&self) -> StoreResult<i64>;
    /// One model's values of one key and window, oldest first, between two
    /// times (inclusive).
    async fn history(&self, query: &HistoryQuery<'_>) -> StoreResult<Vec<HistoryRow>>;
}

/// Events.
#[async_trait]
pub trait EventLog: Send + Sync {
    /// Stores an event; returns its id, larger than every earlier one.
    async fn insert_event(
        &self,
        dataset_id: i64,
        kind: &str,
        at_ms: i64,
        snapshot_id: i64,
        summary: &str,
        details_json: &str,
    ) -> StoreResult<i64>;
    /// Up to `limit` events with id above `after_id`, oldest first; all
    /// datasets when `dataset_id` is None.
    async fn events(
        &self,
        dataset_id: Option<i64>,
        after_id: i64,
        limit: i64,
    ) -> StoreResult<Vec<EventRecord>>;
}

/// Access-token records: a public id, the SHA-256 digest of the token, its
/// scopes and a label. The token itself is never stored.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TokenRecord {
    pub id: String,
    pub digest: Vec<u8>,
    /// A JSON array of [`crate::auth::Scope`]'s display forms.
    pub scopes: String,
    pub label: String,
    pub created_at_ms: i64,
    /// 0 while the token is live.
    pub revoked_at_ms: i64,
}

/// Access tokens.
#[async_trait]
pub trait TokenLog: Send + Sync {
    /// Refuses an id already stored with [`StoreError::Conflict`].
    async fn insert_token(&self, t: &TokenRecord) -> StoreResult<()>;
    /// Marks a token revoked; false when no live token has this id.
    async fn revoke_token(&self, id: &str, now_ms: i64) -> StoreResult<bool>;
    /// Every token, live and revoked, oldest first.
    async fn tokens(&self) -> StoreResult<Vec<TokenRecord>>;
}

/// A backend: the four logs, and closing.
#[async_trait]
pub trait Backend: DatasetLog + SnapshotLog + EventLog + TokenLog {
    /// The backend's name, for logs ("sqlite").
    fn name(&self) -> &'static str;
    /// Flushes and closes; later calls fail.
    async fn close(&self);
}

/// A snapshot to store (see [`SnapshotLog::insert_snapshot`]).
#[derive(Debug, Clone, Copy)]
pub struct NewSnapshot<'a> {
    pub id: i64,
    pub dataset_id: i64,
    pub computed_at_ms: i64,
    pub fit_id: Option<i64>,
    pub refitted: bool,
    pub millis: f64,
    /// The windows the recompute changed.
    pub boards: &'a [Board],
    pub scores: &'a [ScoreRow],
    /// The stream watch's state, JSON.
    pub watch: &'a str,
}

/// What a history query asks for.
#[derive(Debug, Clone, Copy)]
pub struct HistoryQuery<'a> {
    pub dataset_id: i64,
    pub model: &'a str,
    /// An estimator's key or a measure (see `domain::board::history_keys`).
    pub key: &'a str,
    /// A window's key (`cumulative`, `recent`, `cohort:<label>`).
    pub window: &'a str,
    pub from_ms: i64,
    pub to_ms: i64,
}

/// A shared handle on the open backend.
pub type Store = Arc<dyn Backend>;

/// Opens the store a configuration names, applying its migrations.
pub async fn open(config: &StoreConfig) -> StoreResult<Store> {
    Ok(Arc::new(sqlite::SqliteStore::open(config).await?))
}
