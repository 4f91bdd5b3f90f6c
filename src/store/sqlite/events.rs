//! Events, in SQLite.

use async_trait::async_trait;
use sqlx::Row;

use super::{check_fence, SqliteStore};
use crate::domain::EventRecord;
use crate::store::{EventLog, Fence, NewEvent, StoreResult};

#[async_trait]
impl EventLog for SqliteStore {
    async fn insert_event(&self, e: &NewEvent<'_>) -> StoreResult<i64> {
        // One writer per SQLite store: ids are in commit order already.
        let mut tx = self.pool.begin().await?;
        let id = sqlx::query_scalar(
            "INSERT INTO events (dataset_id, kind, at_ms, snapshot_id, summary, details_json) \
             VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
        )
        .bind(e.dataset_id)
        .bind(e.kind)
        .bind(e.at_ms)
        .bind(e.snapshot_id)
        .bind(e.summary)
        .bind(e.details_json)
        .fetch_one(&mut *tx)
        .await?;
        if let Some(epoch) = e.epoch {
            check_fence(
                &mut tx,
                Fence {
                    dataset_id: e.dataset_id,
                    epoch,
                },
            )
            .await?;
        }
        tx.commit().await?;
        Ok(id)
    }

    async fn last_event_id(&self, dataset_id: i64) -> StoreResult<i64> {
        Ok(
            sqlx::query_scalar("SELECT COALESCE(MAX(id), 0) FROM events WHERE dataset_id = ?")
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
}
