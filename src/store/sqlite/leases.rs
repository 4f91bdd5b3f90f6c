//! Dataset leases, in SQLite. One server writes a SQLite store (the data
//! directory's claim), so it takes every lease; the table keeps the
//! contract's epochs, so that fenced writes behave as on PostgreSQL.

use async_trait::async_trait;
use sqlx::Row;

use super::SqliteStore;
use crate::store::{Fence, LeaseLog, LeaseRecord, RecomputeAsk, StoreResult};

fn now_ms() -> i64 {
    crate::monitor::now_ms()
}

#[async_trait]
impl LeaseLog for SqliteStore {
    async fn acquire_lease(
        &self,
        dataset_id: i64,
        holder: &str,
        ttl_ms: i64,
    ) -> StoreResult<Option<Fence>> {
        let now = now_ms();
        let epoch: Option<i64> = sqlx::query_scalar(
            "INSERT INTO dataset_leases (dataset_id, holder, epoch, expires_at_ms) \
             VALUES (?, ?, 1, ?) \
             ON CONFLICT (dataset_id) DO UPDATE SET holder = excluded.holder, \
                 epoch = dataset_leases.epoch + 1, expires_at_ms = excluded.expires_at_ms \
             WHERE dataset_leases.expires_at_ms < ? \
             RETURNING epoch",
        )
        .bind(dataset_id)
        .bind(holder)
        .bind(now.saturating_add(ttl_ms))
        .bind(now)
        .fetch_optional(&self.pool)
        .await?;
        Ok(epoch.map(|epoch| Fence { dataset_id, epoch }))
    }

    async fn renew_lease(&self, fence: Fence, holder: &str, ttl_ms: i64) -> StoreResult<bool> {
        let done = sqlx::query(
            "UPDATE dataset_leases SET expires_at_ms = ? \
             WHERE dataset_id = ? AND holder = ? AND epoch = ?",
        )
        .bind(now_ms().saturating_add(ttl_ms))
        .bind(fence.dataset_id)
        .bind(holder)
        .bind(fence.epoch)
        .execute(&self.pool)
        .await?;
        Ok(done.rows_affected() == 1)
    }

    async fn release_lease(&self, fence: Fence, holder: &str) -> StoreResult<()> {
        sqlx::query(
            "UPDATE dataset_leases SET expires_at_ms = 0 \
             WHERE dataset_id = ? AND holder = ? AND epoch = ?",
        )
        .bind(fence.dataset_id)
        .bind(holder)
        .bind(fence.epoch)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    async fn leases(&self) -> StoreResult<Vec<LeaseRecord>> {
        let now = now_ms();
        let rows = sqlx::query(
            "SELECT dataset_id, holder, epoch, expires_at_ms FROM dataset_leases \
             ORDER BY dataset_id",
        )
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|r| LeaseRecord {
                dataset_id: r.get(0),
                holder: r.get(1),
                epoch: r.get(2),
                expires_in_ms: r.get::<i64, _>(3) - now,
            })
            .collect())
    }

    async fn ask_recompute(&self, ask: &RecomputeAsk) -> StoreResult<i64> {
        Ok(sqlx::query_scalar(
            "INSERT INTO recompute_asks (dataset_id, refit, refresh_ranks, asked_at_ms) VALUES (?, ?, ?, ?) RETURNING id",
        )
        .bind(ask.dataset_id)
        .bind(ask.refit)
        .bind(ask.refresh_ranks)
        .bind(ask.asked_at_ms)
        .fetch_one(&self.pool)
        .await?)
    }

    async fn open_asks(&self, dataset_id: i64) -> StoreResult<Vec<(i64, RecomputeAsk)>> {
        let rows = sqlx::query(
            "SELECT id, refit, refresh_ranks, asked_at_ms FROM recompute_asks WHERE dataset_id = ? AND answered_at_ms = 0 ORDER BY id",
        )
        .bind(dataset_id)
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|r| {
                (
                    r.get(0),
                    RecomputeAsk {
                        dataset_id,
                        refit: r.get(1),
                        refresh_ranks: r.get(2),
                        asked_at_ms: r.get(3),
                    },
                )
            })
            .collect())
    }

    async fn answer_ask(&self, id: i64, answer_json: &str, now_ms: i64) -> StoreResult<()> {
        sqlx::query("UPDATE recompute_asks SET answer = ?, answered_at_ms = ? WHERE id = ?")
            .bind(answer_json)
            .bind(now_ms.max(1))
            .bind(id)
            .execute(&self.pool)
            .await?;
        Ok(())
    }

    async fn answer(&self, id: i64) -> StoreResult<Option<String>> {
        Ok(sqlx::query_scalar::<_, Option<String>>(
            "SELECT answer FROM recompute_asks WHERE id = ?",
        )
        .bind(id)
        .fetch_optional(&self.pool)
        .await?
        .flatten())
    }
}
