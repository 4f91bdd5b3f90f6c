//! Events, in SQLite.

use async_trait::async_trait;
use sqlx::Row;

use super::SqliteStore;
use crate::domain::EventRecord;
use crate::store::{EventLog, StoreResult};

#[async_trait]
impl EventLog for SqliteStore {
    async fn insert_event(
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
