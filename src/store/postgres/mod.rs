//! The PostgreSQL backend of the storage contract ([`crate::store`]), through
//! sqlx, with its migrations in `migrations/postgres/`.
//!
//! Several servers share one database. What one SQLite server keeps true by
//! being alone, the database keeps true here: unique indexes refuse a unit
//! key or a sequence number stored twice (so a server that numbered a batch
//! from a stale view gets [`StoreError::Conflict`] and catches up), and each
//! fenced write locks its dataset's lease row and checks the epoch in its
//! own transaction, so a server that lost its lease cannot write after the
//! new holder took it. Lease times are the database's clock, never a
//! server's.
//!
//! Batches go in as one `INSERT ... SELECT FROM UNNEST(...)` per chunk: one
//! round trip and one statement plan for thousands of rows. The SQL is
//! plain (no advisory locks, triggers or functions of our own), so that
//! PostgreSQL-compatible engines can run it; `deploy/README.md` says which
//! were tried.

use std::time::Duration;

use async_trait::async_trait;
use sqlx::postgres::{PgConnectOptions, PgPool, PgPoolOptions};
use sqlx::PgConnection;

use super::{Backend, Fence, StoreError, StoreResult};

mod datasets;
mod events;
mod leases;
mod snapshots;
mod tokens;

/// Rows per INSERT statement: each column is one array parameter, so this
/// bounds a statement's size, not its parameter count.
const INSERT_CHUNK: usize = 5_000;

/// The database's clock in Unix milliseconds, as SQL (a macro, so that
/// queries that use it stay `&'static str` for `concat!`).
macro_rules! db_now_ms {
    () => {
        "CAST(EXTRACT(EPOCH FROM CURRENT_TIMESTAMP) * 1000 AS BIGINT)"
    };
}
use db_now_ms;

/// Refuses a fenced write unless the dataset's lease is still at the
/// fence's epoch. Locks the lease row until the transaction ends, so a
/// server taking the lease waits for this write and every later write at
/// the old epoch sees the new one.
async fn check_fence(conn: &mut PgConnection, fence: Fence) -> StoreResult<()> {
    let epoch: Option<i64> =
        sqlx::query_scalar("SELECT epoch FROM dataset_leases WHERE dataset_id = $1 FOR UPDATE")
            .bind(fence.dataset_id)
            .fetch_optional(&mut *conn)
            .await?;
    fence.admits(epoch)
}

pub struct PgStore {
    pool: PgPool,
}

impl PgStore {
    /// Connects and applies migrations (sqlx holds a lock while it does,
    /// so replicas starting together migrate once).
    pub async fn open(url: &str) -> StoreResult<Self> {
        let options: PgConnectOptions = url
            .parse()
            .map_err(|e| StoreError::Backend(format!("{}: {e}", super::redact(url))))?;
        let pool = PgPoolOptions::new()
            .max_connections(8)
            .acquire_timeout(Duration::from_secs(10))
            .connect_with(options.application_name("plumbline"))
            .await
            .map_err(|e| StoreError::Backend(format!("{}: {e}", super::redact(url))))?;
        sqlx::migrate!("./migrations/postgres").run(&pool).await?;
        Ok(Self { pool })
    }
}

#[async_trait]
impl Backend for PgStore {
    fn name(&self) -> &'static str {
        "postgres"
    }

    fn shared(&self) -> bool {
        true
    }

    async fn close(&self) {
        self.pool.close().await;
    }
}
