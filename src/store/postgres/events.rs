//! Events, in PostgreSQL.

use async_trait::async_trait;
use sqlx::Row;

use super::{check_fence, PgStore};
use crate::domain::EventRecord;
use crate::store::{EventLog, Fence, NewEvent, StoreResult};

#[async_trait]
impl EventLog for PgStore {
    async fn insert_event(&self, e: &NewEvent<'_>) -> StoreResult<i64> {
        let mut tx = self.pool.begin().await?;
        // The dataset's lease row is the turn every event writer of the
        // dataset takes: the id is drawn after the lock, so ids of one
        // dataset grow in commit order.
        match e.epoch {
            Some(epoch) => {
                check_fence(
                    &mut tx,
                    Fence {
                        dataset_id: e.dataset_id,
                        epoch,
                    },
                )
                .await?
            }
            None => {
                sqlx::query("SELECT epoch FROM dataset_leases WHERE dataset_id = $1 FOR UPDATE")
                    .bind(e.dataset_id)
                    .fetch_optional(&mut *tx)
                    .await?;
            }
        }
        let id = sqlx::query_scalar(
            "INSERT INTO events (dataset_id, kind, at_ms, snapshot_id, summary, details_json) \
             VALUES ($1, $2, $3, $4, $5, $6) RETURNING id",
        )
        .bind(e.dataset_id)
        .bind(e.kind)
        .bind(e.at_ms)
        .bind(e.snapshot_id)
        .bind(e.summary)
        .bind(e.details_json)
        .fetch_one(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(id)
    }

    async fn last_event_id(&self, dataset_id: i64) -> StoreResult<i64> {
        Ok(
            sqlx::query_scalar("SELECT COALESCE(MAX(id), 0) FROM events WHERE dataset_id = $1")
                .bind(dataset_id)
                .fetch_one(&self.pool)
                .await?,
        )
    }

    async fn events(
        &self,
        dataset_id: Option<i64>,
        after_id: i64,
        limit: i64,
    ) -> StoreResult<Vec<EventRecord>> {
        let rows = sqlx::query(
            "SELECT e.id, d.name, e.kind, e.at_ms, e.snapshot_id, e.summary, e.details_json \
             FROM events e JOIN datasets d ON d.id = e.dataset_id \
             WHERE e.id > $1 AND ($2::BIGINT IS NULL OR e.dataset_id = $2) \
             ORDER BY e.id LIMIT $3",
        )
        .bind(after_id)
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
}
