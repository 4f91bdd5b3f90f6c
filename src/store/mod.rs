//! The durable log: datasets, models, units, outcomes, predictions, nuisance
//! fit records, score snapshots and events, in SQLite through sqlx.
//!
//! Every write of a batch is one transaction, and callers reply to clients
//! only after it commits. WAL journaling lets readers (history, events) run
//! beside the single writer. Queries are parameterized; nothing a client
//! sends is ever spliced into SQL text.
//!
//! Commits never copy the WAL back into the database file themselves
//! (`wal_autocheckpoint = 0`): a background task checkpoints every
//! [`CHECKPOINT_EVERY`] on a connection of its own, beside the writer, so an
//! intake batch waits only for its own WAL append and fsync.

use std::path::Path;
use std::str::FromStr;
use std::sync::{Arc, Weak};
use std::time::Duration;

use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use sqlx::{QueryBuilder, Row, Sqlite};
use tokio_stream::StreamExt;

use crate::domain::{
    Board, DatasetSpec, EventRecord, FitRecord, HistoryRow, OutcomeRecord, PredictionRecord,
    ScoreRow, StoredDataset, StoredModel, UnitRecord,
};

mod tokens;
pub use tokens::TokenRecord;

#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("database error: {0}")]
    Sql(#[from] sqlx::Error),
    #[error("migration failed: {0}")]
    Migrate(#[from] sqlx::migrate::MigrateError),
    #[error("stored data is corrupt: {0}")]
    Corrupt(String),
}

pub type StoreResult<T> = Result<T, StoreError>;

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

/// Packs features as little-endian doubles: 8 bytes a feature, exact.
pub fn pack_features(values: &[f64]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

pub fn unpack_features(bytes: &[u8]) -> StoreResult<Vec<f64>> {
    if bytes.len() % 8 != 0 {
        return Err(StoreError::Corrupt(format!(
            "feature blob of {} bytes is not a whole number of doubles",
            bytes.len()
        )));
    }
    Ok(bytes
        .chunks_exact(8)
        .map(|c| {
            let mut b = [0u8; 8];
            b.copy_from_slice(c);
            f64::from_le_bytes(b)
        })
        .collect())
}

/// How often the background task copies the WAL into the database file.
/// Between checkpoints the WAL grows by what was written in the interval
/// (at full ingest speed, tens of MB).
pub const CHECKPOINT_EVERY: Duration = Duration::from_millis(500);

/// Rows per multi-row INSERT: SQLite allows 32,766 bound parameters.
const INSERT_CHUNK: usize = 500;

/// Copies committed WAL frames into the database file every
/// [`CHECKPOINT_EVERY`] until the pool closes or the last [`Store`] holding
/// `alive` is dropped. PASSIVE never waits for the
/// writer or for readers; frames it cannot copy yet are copied next time,
/// and the writer starts the WAL over once a checkpoint has caught up.
async fn checkpoints(pool: SqlitePool, alive: Weak<()>) {
    let mut tick = tokio::time::interval(CHECKPOINT_EVERY);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        tick.tick().await;
        if pool.is_closed() || alive.strong_count() == 0 {
            return;
        }
        if let Err(e) = sqlx::query("PRAGMA wal_checkpoint(PASSIVE)")
            .execute(&pool)
            .await
        {
            if pool.is_closed() {
                return;
            }
            tracing::warn!(error = %e, "WAL checkpoint failed; the next one retries");
        }
    }
}

#[derive(Clone)]
pub struct Store {
    pool: SqlitePool,
    /// Held by every clone; the checkpoint task stops when the last goes.
    _alive: Arc<()>,
}

impl Store {
    /// Opens (creating if needed) the database file and applies migrations.
    pub async fn open(path: &Path, durability: Durability) -> StoreResult<Self> {
        let options = SqliteConnectOptions::from_str("sqlite://")?
            .filename(path)
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(match durability {
                Durability::Full => SqliteSynchronous::Full,
                Durability::Normal => SqliteSynchronous::Normal,
            })
            .foreign_keys(true)
            .pragma("wal_autocheckpoint", "0")
            // 16 MiB of page cache per connection (SQLite's default is 2 MiB),
            // for the B-tree pages intake and rebuilds walk.
            .pragma("cache_size", "-16384")
            .busy_timeout(Duration::from_secs(10));
        let pool = SqlitePoolOptions::new()
            .max_connections(4)
            .connect_with(options)
            .await?;
        sqlx::migrate!("./migrations").run(&pool).await?;
        let alive = Arc::new(());
        tokio::spawn(checkpoints(pool.clone(), Arc::downgrade(&alive)));
        Ok(Self {
            pool,
            _alive: alive,
        })
    }

    /// Closes the pool; the last connection to close checkpoints the WAL
    /// into the database file and removes it.
    pub async fn close(&self) {
        self.pool.close().await;
    }

    // ------------------------------------------------------------ datasets

    pub async fn create_dataset(
        &self,
        spec: &DatasetSpec,
        now_ms: i64,
    ) -> StoreResult<StoredDataset> {
        let json = serde_json::to_string(spec).map_err(|e| StoreError::Corrupt(e.to_string()))?;
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO datasets (name, spec_json, created_at_ms) VALUES (?, ?, ?) RETURNING id",
        )
        .bind(&spec.name)
        .bind(json)
        .bind(now_ms)
        .fetch_one(&self.pool)
        .await?;
        Ok(StoredDataset {
            id,
            spec: spec.clone(),
            created_at_ms: now_ms,
        })
    }

    pub async fn datasets(&self) -> StoreResult<Vec<StoredDataset>> {
        let rows = sqlx::query("SELECT id, spec_json, created_at_ms FROM datasets ORDER BY id")
            .fetch_all(&self.pool)
            .await?;
        rows.into_iter()
            .map(|r| {
                let spec: DatasetSpec = serde_json::from_str(r.get::<&str, _>(1))
                    .map_err(|e| StoreError::Corrupt(format!("dataset spec: {e}")))?;
                Ok(StoredDataset {
                    id: r.get(0),
                    spec,
                    created_at_ms: r.get(2),
                })
            })
            .collect()
    }

    // -------------------------------------------------------------- models

    pub async fn register_model(
        &self,
        dataset_id: i64,
        name: &str,
        version: &str,
        description: &str,
        now_ms: i64,
    ) -> StoreResult<StoredModel> {
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO models (dataset_id, name, version, description, registered_at_ms) \
             VALUES (?, ?, ?, ?, ?) RETURNING id",
        )
        .bind(dataset_id)
        .bind(name)
        .bind(version)
        .bind(description)
        .bind(now_ms)
        .fetch_one(&self.pool)
        .await?;
        Ok(StoredModel {
            id,
            dataset_id,
            name: name.into(),
            version: version.into(),
            description: description.into(),
            registered_at_ms: now_ms,
            retired_at_ms: 0,
        })
    }

    pub async fn retire_model(&self, model_id: i64, now_ms: i64) -> StoreResult<()> {
        sqlx::query("UPDATE models SET retired_at_ms = ? WHERE id = ? AND retired_at_ms = 0")
            .bind(now_ms)
            .bind(model_id)
            .execute(&self.pool)
            .await?;
        Ok(())
    }

    pub async fn models(&self, dataset_id: i64) -> StoreResult<Vec<StoredModel>> {
        let rows = sqlx::query(
            "SELECT id, name, version, description, registered_at_ms, retired_at_ms \
             FROM models WHERE dataset_id = ? ORDER BY id",
        )
        .bind(dataset_id)
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|r| StoredModel {
                id: r.get(0),
                dataset_id,
                name: r.get(1),
                version: r.get(2),
                description: r.get(3),
                registered_at_ms: r.get(4),
                retired_at_ms: r.get(5),
            })
            .collect())
    }

    // ---------------------------------------------------------------- data

    /// Writes a batch of new units in one transaction.
    pub async fn insert_units(
        &self,
        dataset_id: i64,
        rows: &[UnitRecord],
        now_ms: i64,
    ) -> StoreResult<()> {
        let mut tx = self.pool.begin().await?;
        for chunk in rows.chunks(INSERT_CHUNK) {
            let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
                "INSERT INTO units (dataset_id, seq, key, features, treatment, propensity, cohort, \
                 assigned_at_ms, received_at_ms) ",
            );
            q.push_values(chunk, |mut b, u| {
                b.push_bind(dataset_id)
                    .push_bind(u.seq)
                    .push_bind(&u.key)
                    .push_bind(pack_features(&u.features))
                    .push_bind(i64::from(u.treatment))
                    .push_bind(u.propensity)
                    .push_bind(&u.cohort)
                    .push_bind(u.assigned_at_ms)
                    .push_bind(now_ms);
            });
            q.build().execute(&mut *tx).await?;
        }
        tx.commit().await?;
        Ok(())
    }

    /// Writes a batch of new outcomes in one transaction.
    pub async fn insert_outcomes(
        &self,
        dataset_id: i64,
        rows: &[OutcomeRecord],
        now_ms: i64,
    ) -> StoreResult<()> {
        let mut tx = self.pool.begin().await?;
        for chunk in rows.chunks(INSERT_CHUNK) {
            let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
                "INSERT INTO outcomes (dataset_id, unit_seq, seq, value, observed_at_ms, received_at_ms) ",
            );
            q.push_values(chunk, |mut b, o| {
                b.push_bind(dataset_id)
                    .push_bind(o.unit_seq)
                    .push_bind(o.seq)
                    .push_bind(o.value)
                    .push_bind(o.observed_at_ms)
                    .push_bind(now_ms);
            });
            q.build().execute(&mut *tx).await?;
        }
        tx.commit().await?;
        Ok(())
    }

    /// Writes a batch of new predictions in one transaction.
    pub async fn insert_predictions(
        &self,
        dataset_id: i64,
        rows: &[PredictionRecord],
        now_ms: i64,
    ) -> StoreResult<()> {
        let mut tx = self.pool.begin().await?;
        for chunk in rows.chunks(INSERT_CHUNK) {
            let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
                "INSERT INTO predictions (dataset_id, model_id, unit_seq, effect, predicted_at_ms, \
                 received_at_ms) ",
            );
            q.push_values(chunk, |mut b, p| {
                b.push_bind(dataset_id)
                    .push_bind(p.model_id)
                    .push_bind(p.unit_seq)
                    .push_bind(p.effect)
                    .push_bind(p.predicted_at_ms)
                    .push_bind(now_ms);
            });
            q.build().execute(&mut *tx).await?;
        }
        tx.commit().await?;
        Ok(())
    }

    /// Hands every unit of a dataset to `each`, in sequence order. Rows
    /// are streamed from SQLite one at a time, so a rebuild holds one row
    /// at a time on top of what `each` keeps, never the whole table.
    pub async fn for_each_unit(
        &self,
        dataset_id: i64,
        mut each: impl FnMut(UnitRecord),
    ) -> StoreResult<()> {
        let mut rows = sqlx::query(
            "SELECT seq, key, features, treatment, propensity, cohort, assigned_at_ms \
             FROM units WHERE dataset_id = ? ORDER BY seq",
        )
        .bind(dataset_id)
        .fetch(&self.pool);
        while let Some(r) = rows.next().await {
            let r = r?;
            each(UnitRecord {
                seq: r.get(0),
                key: r.get(1),
                features: unpack_features(r.get::<&[u8], _>(2))?,
                treatment: r.get::<i64, _>(3) as u8,
                propensity: r.get(4),
                cohort: r.get(5),
                assigned_at_ms: r.get(6),
            });
        }
        Ok(())
    }

    /// Hands every outcome of a dataset to `each`, in arrival order,
    /// streamed as [`Store::for_each_unit`] does.
    pub async fn for_each_outcome(
        &self,
        dataset_id: i64,
        mut each: impl FnMut(OutcomeRecord),
    ) -> StoreResult<()> {
        let mut rows = sqlx::query(
            "SELECT unit_seq, seq, value, observed_at_ms FROM outcomes WHERE dataset_id = ? ORDER BY seq",
        )
        .bind(dataset_id)
        .fetch(&self.pool);
        while let Some(r) = rows.next().await {
            let r = r?;
            each(OutcomeRecord {
                unit_seq: r.get(0),
                seq: r.get(1),
                value: r.get(2),
                observed_at_ms: r.get(3),
            });
        }
        Ok(())
    }

    /// Hands every prediction of a dataset to `each`, streamed as
    /// [`Store::for_each_unit`] does.
    pub async fn for_each_prediction(
        &self,
        dataset_id: i64,
        mut each: impl FnMut(PredictionRecord),
    ) -> StoreResult<()> {
        let mut rows = sqlx::query(
            "SELECT model_id, unit_seq, effect, predicted_at_ms FROM predictions WHERE dataset_id = ?",
        )
        .bind(dataset_id)
        .fetch(&self.pool);
        while let Some(r) = rows.next().await {
            let r = r?;
            each(PredictionRecord {
                model_id: r.get(0),
                unit_seq: r.get(1),
                effect: r.get(2),
                predicted_at_ms: r.get(3),
            });
        }
        Ok(())
    }

    // ------------------------------------------------------- fits, scores

    pub async fn insert_fit(
        &self,
        dataset_id: i64,
        now_ms: i64,
        units: i64,
        last_outcome_seq: i64,
        seed: i64,
        report_json: &str,
    ) -> StoreResult<i64> {
        Ok(sqlx::query_scalar(
            "INSERT INTO nuisance_fits (dataset_id, fitted_at_ms, units, last_outcome_seq, seed, report_json) \
             VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
        )
        .bind(dataset_id)
        .bind(now_ms)
        .bind(units)
        .bind(last_outcome_seq)
        .bind(seed)
        .bind(report_json)
        .fetch_one(&self.pool)
        .await?)
    }

    pub async fn latest_fit(&self, dataset_id: i64) -> StoreResult<Option<FitRecord>> {
        let row = sqlx::query(
            "SELECT id, fitted_at_ms, units, last_outcome_seq, seed, report_json FROM nuisance_fits \
             WHERE dataset_id = ? ORDER BY id DESC LIMIT 1",
        )
        .bind(dataset_id)
        .fetch_optional(&self.pool)
        .await?;
        Ok(row.map(|r| FitRecord {
            id: r.get(0),
            fitted_at_ms: r.get(1),
            units: r.get(2),
            last_outcome_seq: r.get(3),
            seed: r.get(4),
            report_json: r.get(5),
        }))
    }

    /// Stores a snapshot, its boards and its per-model values in one
    /// transaction, with the stream watch it left; returns the snapshot id.
    /// `boards` holds the windows the recompute changed;
    /// [`Store::latest_boards`] finds each window's latest.
    #[allow(clippy::too_many_arguments)]
    pub async fn insert_snapshot(
        &self,
        id: i64,
        dataset_id: i64,
        now_ms: i64,
        fit_id: Option<i64>,
        refitted: bool,
        millis: f64,
        boards: &[Board],
        scores: &[ScoreRow],
        watch: &str,
    ) -> StoreResult<i64> {
        let mut tx = self.pool.begin().await?;
        sqlx::query(
            "INSERT INTO snapshots (id, dataset_id, computed_at_ms, fit_id, refitted, millis) \
             VALUES (?, ?, ?, ?, ?, ?)",
        )
        .bind(id)
        .bind(dataset_id)
        .bind(now_ms)
        .bind(fit_id)
        .bind(refitted)
        .bind(millis)
        .execute(&mut *tx)
        .await?;
        for board in boards {
            let json = serde_json::to_vec(board)
                .map_err(|e| StoreError::Corrupt(format!("board {:?}: {e}", board.window)))?;
            sqlx::query(
                "INSERT INTO snapshot_boards (snapshot_id, window, board) VALUES (?, ?, ?)",
            )
            .bind(id)
            .bind(board.window.key())
            .bind(json)
            .execute(&mut *tx)
            .await?;
        }
        for chunk in scores.chunks(INSERT_CHUNK) {
            let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
                "INSERT INTO snapshot_scores (dataset_id, model, estimator, window, snapshot_id, \
                 computed_at_ms, estimate, se, rank, units) ",
            );
            q.push_values(chunk, |mut b, s| {
                b.push_bind(dataset_id)
                    .push_bind(&s.model)
                    .push_bind(&s.estimator)
                    .push_bind(&s.window)
                    .push_bind(id)
                    .push_bind(now_ms)
                    .push_bind(s.estimate)
                    .push_bind(s.se)
                    .push_bind(s.rank)
                    .push_bind(s.units);
            });
            q.build().execute(&mut *tx).await?;
        }
        sqlx::query(
            "INSERT INTO watch_states (dataset_id, snapshot_id, state) VALUES (?, ?, ?) \
             ON CONFLICT (dataset_id) DO UPDATE SET snapshot_id = excluded.snapshot_id, \
             state = excluded.state",
        )
        .bind(dataset_id)
        .bind(id)
        .bind(watch)
        .execute(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(id)
    }

    /// The stream watch as the latest stored recompute left it (JSON).
    pub async fn latest_watch(&self, dataset_id: i64) -> StoreResult<Option<String>> {
        let row = sqlx::query("SELECT state FROM watch_states WHERE dataset_id = ?")
            .bind(dataset_id)
            .fetch_optional(&self.pool)
            .await?;
        Ok(row.map(|r| r.get(0)))
    }

    /// Each window's latest board: a snapshot stores only the windows its
    /// recompute changed (see [`Store::insert_snapshot`]).
    pub async fn latest_boards(&self, dataset_id: i64) -> StoreResult<Vec<Board>> {
        let rows = sqlx::query(
            "SELECT b.window, b.board FROM snapshot_boards b JOIN ( \
                 SELECT sb.window AS window, MAX(sb.snapshot_id) AS id \
                 FROM snapshot_boards sb JOIN snapshots s ON s.id = sb.snapshot_id \
                 WHERE s.dataset_id = ? GROUP BY sb.window \
             ) latest ON b.snapshot_id = latest.id AND b.window = latest.window",
        )
        .bind(dataset_id)
        .fetch_all(&self.pool)
        .await?;
        let mut boards = Vec::with_capacity(rows.len());
        for r in rows {
            let (window, bytes): (String, Vec<u8>) = (r.get(0), r.get(1));
            boards.push(
                serde_json::from_slice(&bytes)
                    .map_err(|e| StoreError::Corrupt(format!("board {window}: {e}")))?,
            );
        }
        Ok(boards)
    }

    /// Largest snapshot id in the store (0 when none).
    pub async fn max_snapshot_id(&self) -> StoreResult<i64> {
        Ok(
            sqlx::query_scalar("SELECT COALESCE(MAX(id), 0) FROM snapshots")
                .fetch_one(&self.pool)
                .await?,
        )
    }

    pub async fn history(
        &self,
        dataset_id: i64,
        model: &str,
        estimator: &str,
        window: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> StoreResult<Vec<HistoryRow>> {
        let rows = sqlx::query(
            "SELECT snapshot_id, computed_at_ms, estimate, se, rank, units FROM snapshot_scores \
             WHERE dataset_id = ? AND model = ? AND estimator = ? AND window = ? \
             AND computed_at_ms >= ? AND computed_at_ms <= ? ORDER BY snapshot_id",
        )
        .bind(dataset_id)
        .bind(model)
        .bind(estimator)
        .bind(window)
        .bind(from_ms)
        .bind(to_ms)
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|r| HistoryRow {
                snapshot_id: r.get(0),
                computed_at_ms: r.get(1),
                estimate: r.get(2),
                se: r.get(3),
                rank: r.get(4),
                units: r.get(5),
            })
            .collect())
    }

    // -------------------------------------------------------------- events

    pub async fn insert_event(
        &self,
        dataset_id: i64,
        kind: &str,
        at_ms: i64,
        snapshot_id: i64,
        summary: &str,
        details_json: &str,
    ) -> StoreResult<i64> {
        Ok(sqlx::query_scalar(
            "INSERT INTO events (dataset_id, kind, at_ms, snapshot_id, summary, details_json) \
             VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
        )
        .bind(dataset_id)
        .bind(kind)
        .bind(at_ms)
        .bind(snapshot_id)
        .bind(summary)
        .bind(details_json)
        .fetch_one(&self.pool)
        .await?)
    }

    /// Events after an id, oldest first; `dataset_id` None for all datasets.
    pub async fn events(
        &self,
        dataset_id: Option<i64>,
        after_id: i64,
        limit: i64,
    ) -> StoreResult<Vec<EventRecord>> {
        let rows = sqlx::query(
            "SELECT e.id, d.name, e.kind, e.at_ms, e.snapshot_id, e.summary, e.details_json \
             FROM events e JOIN datasets d ON d.id = e.dataset_id \
             WHERE e.id > ? AND (? IS NULL OR e.dataset_id = ?) ORDER BY e.id LIMIT ?",
        )
        .bind(after_id)
        .bind(dataset_id)
        .bind(dataset_id)
        .bind(limit)
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|r| EventRecord {
                id: r.get(0),
                dataset: r.get(1),
                kind: r.get(2),
                at_ms: r.get(3),
                snapshot_id: r.get(4),
                summary: r.get(5),
                details_json: r.get(6),
            })
            .collect())
    }

    /// When the dataset's last outcome was received (Unix ms), if any.
    pub async fn last_outcome_received_ms(&self, dataset_id: i64) -> StoreResult<Option<i64>> {
        Ok(
            sqlx::query_scalar("SELECT MAX(received_at_ms) FROM outcomes WHERE dataset_id = ?")
                .bind(dataset_id)
                .fetch_one(&self.pool)
                .await?,
        )
    }

    /// Row counts of units, outcomes and predictions for one dataset.
    pub async fn counts(&self, dataset_id: i64) -> StoreResult<(i64, i64, i64)> {
        let units: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM units WHERE dataset_id = ?")
            .bind(dataset_id)
            .fetch_one(&self.pool)
            .await?;
        let outcomes: i64 =
            sqlx::query_scalar("SELECT COUNT(*) FROM outcomes WHERE dataset_id = ?")
                .bind(dataset_id)
                .fetch_one(&self.pool)
                .await?;
        let predictions: i64 =
            sqlx::query_scalar("SELECT COUNT(*) FROM predictions WHERE dataset_id = ?")
                .bind(dataset_id)
                .fetch_one(&self.pool)
                .await?;
        Ok((units, outcomes, predictions))
    }
}
