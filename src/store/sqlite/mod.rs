//! The SQLite backend of the storage contract ([`crate::store`]), through
//! sqlx, with its migrations in `migrations/sqlite/`.
//!
//! One server per data directory: a server claims the directory with a lock
//! file ([`claim`]), because the rule that a unit key is stored once rests
//! on one writer checking keys in memory (the units table has no key index,
//! see `migrations/sqlite/0003`). WAL journaling lets readers (history,
//! events, the token command) run beside that writer. Queries are
//! parameterized; nothing a client sends is ever spliced into SQL text.
//!
//! Commits never copy the WAL back into the database file themselves
//! (`wal_autocheckpoint = 0`): a background task checkpoints every
//! [`CHECKPOINT_EVERY`] on a connection of its own, beside the writer, so an
//! intake batch waits only for its own WAL append and fsync. Those passive
//! checkpoints never wait, so under a stream that commits every few
//! milliseconds they never catch up and the WAL file grows with everything
//! written; once it passes [`StoreConfig::wal_limit_bytes`] the task runs a
//! truncating checkpoint instead, which makes the writer wait while it
//! copies what is left and cuts the file back to nothing.

use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::sync::atomic::AtomicI64;
use std::sync::{Arc, Weak};
use std::time::Duration;

use async_trait::async_trait;
use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use sqlx::SqliteConnection;

use super::{Backend, Durability, Fence, StoreConfig, StoreError, StoreResult};

mod bulk;
mod claim;
mod datasets;
mod events;
mod leases;
mod snapshots;
mod tokens;

pub use claim::Claim;

/// Refuses a fenced write (inside its transaction) unless the dataset's
/// lease is still at the fence's epoch.
async fn check_fence(conn: &mut SqliteConnection, fence: Fence) -> StoreResult<()> {
    let epoch: Option<i64> =
        sqlx::query_scalar("SELECT epoch FROM dataset_leases WHERE dataset_id = ?")
            .bind(fence.dataset_id)
            .fetch_optional(&mut *conn)
            .await?;
    fence.admits(epoch)
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
/// [`CHECKPOINT_EVERY`] until the pool closes or the last store holding
/// `alive` is dropped. PASSIVE never waits for the
/// writer or for readers; frames it cannot copy yet are copied next time,
/// and the writer starts the WAL over once a checkpoint has caught up.
async fn checkpoints(pool: SqlitePool, alive: Weak<()>, wal: PathBuf, limit: u64) {
    let mut tick = tokio::time::interval(CHECKPOINT_EVERY);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        tick.tick().await;
        if pool.is_closed() || alive.strong_count() == 0 {
            return;
        }
        let size = std::fs::metadata(&wal).map(|m| m.len()).unwrap_or(0);
        let mode = if limit > 0 && size > limit {
            "PRAGMA wal_checkpoint(TRUNCATE)"
        } else {
            "PRAGMA wal_checkpoint(PASSIVE)"
        };
        if let Err(e) = sqlx::query(mode).execute(&pool).await {
            if pool.is_closed() {
                return;
            }
            tracing::warn!(error = %e, "WAL checkpoint failed; the next one retries");
        }
    }
}

pub struct SqliteStore {
    pool: SqlitePool,
    /// The database file, for a rebuild's bulk reads (`bulk.rs`).
    path: PathBuf,
    /// The checkpoint task stops when this goes.
    _alive: Arc<()>,
    /// The data directory's claim, for a server; released on close (or
    /// drop), so a server stopped in-process can be started again.
    claim: std::sync::Mutex<Option<Claim>>,
    /// The next snapshot id (see [`crate::store::SnapshotLog::next_snapshot_id`]).
    next_snapshot: AtomicI64,
}

impl SqliteStore {
    /// Claims the data directory (for a server), opens (creating if needed)
    /// the database file and applies migrations.
    pub async fn open(path: &Path, config: &StoreConfig) -> StoreResult<Self> {
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir)
                .map_err(|e| StoreError::Backend(format!("{}: {e}", dir.display())))?;
        }
        let claim = if config.claim {
            Some(Claim::take(path)?)
        } else {
            None
        };
        let durability = config.durability;
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
        sqlx::migrate!("./migrations/sqlite").run(&pool).await?;
        if claim.is_some() {
            // The claim proves every earlier server on this directory is
            // gone: their leases are void, and this server takes them all.
            sqlx::query("UPDATE dataset_leases SET expires_at_ms = 0")
                .execute(&pool)
                .await?;
        }
        let largest: i64 = sqlx::query_scalar("SELECT COALESCE(MAX(id), 0) FROM snapshots")
            .fetch_one(&pool)
            .await?;
        let alive = Arc::new(());
        let mut wal = path.as_os_str().to_owned();
        wal.push("-wal");
        tokio::spawn(checkpoints(
            pool.clone(),
            Arc::downgrade(&alive),
            PathBuf::from(wal),
            config.wal_limit_bytes,
        ));
        Ok(Self {
            pool,
            path: path.to_path_buf(),
            _alive: alive,
            claim: std::sync::Mutex::new(claim),
            next_snapshot: AtomicI64::new(largest + 1),
        })
    }
}

#[async_trait]
impl Backend for SqliteStore {
    fn name(&self) -> &'static str {
        "sqlite"
    }

    /// Closes the pool; the last connection to close checkpoints the WAL
    /// into the database file and removes it.
    async fn close(&self) {
        self.pool.close().await;
        if let Ok(mut claim) = self.claim.lock() {
            claim.take();
        }
    }
}
