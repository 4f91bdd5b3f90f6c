//! Dataset leases, in PostgreSQL, by the database's clock.

use async_trait::async_trait;
use sqlx::Row;

use super::{db_now_ms, PgStore};
use crate::store::{Fence, LeaseLog, LeaseRecord, RecomputeAsk, StoreResult};

#[async_trait]
impl LeaseLog for PgStore {
    async fn acquire_lease(
        &self,
        dataset_id: i64,
        holder: &str,
        ttl_ms: i64,
    ) -> StoreResult<Option<Fence>> {
        let epoch: Option<i64> = sqlx::query_scalar(concat!(
            "INSERT INTO dataset_leases (dataset_id, holder, epoch, expires_at_ms) \
             VALUES ($1, $2, 1, ",
            db_now_ms!(),
            " + $3) \
             ON CONFLICT (dataset_id) DO UPDATE SET holder = EXCLUDED.holder, \
                 epoch = dataset_leases.epoch + 1, expires_at_ms = EXCLUDED.expires_at_ms \
             WHERE dataset_leases.expires_at_ms < ",
            db_now_ms!(),
            " RETURNING epoch"
        ))
        .bind(dataset_id)
        .bind(holder)
        .bind(ttl_ms)
        .fetch_optional(&self.pool)
        .await?;
        Ok(epoch.map(|epoch| Fence { dataset_id, epoch }))
    }

    async fn renew_lease(&self, fence: Fence, holder: &str, ttl_ms: i64) -> StoreResult<bool> {
        let done = sqlx::query(concat!(
            "UPDATE dataset_leases SET expires_at_ms = ",
            db_now_ms!(),
            " + $1 WHERE dataset_id = $2 AND holder = $3 AND epoch = $4"
        ))
        .bind(ttl_ms)
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
             WHERE dataset_id = $1 AND holder = $2 AND epoch = $3",
        )
        .bind(fence.dataset_id)
        .bind(holder)
        .bind(fence.epoch)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    async fn leases(&self) -> StoreResult<Vec<LeaseRecord>> {
        let rows = sqlx::query(concat!(
            "SELECT dataset_id, holder, epoch, expires_at_ms - ",
            db_now_ms!(),
            " FROM dataset_leases ORDER BY dataset_id"
        ))
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|r| LeaseRecord {
                dataset_id: r.get(0),
                holder: r.get(1),
                epoch: r.get(2),
                expires_in_ms: r.get(3),
            })
            .collect())
    }

    async fn ask_recompute(&self, ask: &RecomputeAsk) -> StoreResult<i64> {
        Ok(sqlx::query_scalar(
            "INSERT INTO recompute_asks (dataset_id, refit, refresh_ranks, asked_at_ms) VALUES ($1, $2, $3, $4) RETURNING id",
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
            "SELECT id, refit, refresh_ranks, asked_at_ms FROM recompute_asks WHERE dataset_id = $1 AND answered_at_ms = 0 ORDER BY id",
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
        sqlx::query("UPDATE recompute_asks SET answer = $1, answered_at_ms = $2 WHERE id = $3")
            .bind(answer_json)
            .bind(now_ms.max(1))
            .bind(id)
            .execute(&self.pool)
            .await?;
        Ok(())
    }

    async fn answer(&self, id: i64) -> StoreResult<Option<String>> {
        Ok(sqlx::query_scalar::<_, Option<String>>(
            "SELECT answer FROM recompute_asks WHERE id = $1",
        )
        .bind(id)
        .fetch_optional(&self.pool)
        .await?
        .flatten())
    }
}
