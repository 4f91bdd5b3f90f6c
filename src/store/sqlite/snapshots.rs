//! Nuisance fit records, snapshots with their boards and the stream
//! watch's state, and history, in SQLite.

use async_trait::async_trait;
use sqlx::{QueryBuilder, Row, Sqlite};

use std::sync::atomic::Ordering;

use super::{check_fence, SqliteStore, INSERT_CHUNK};
use crate::domain::{Board, FitRecord, HistoryRow};
use crate::store::{Fence, HistoryQuery, NewSnapshot, SnapshotLog, StoreError, StoreResult};

#[async_trait]
impl SnapshotLog for SqliteStore {
    async fn insert_fit(
        &self,
        fence: Fence,
        now_ms: i64,
        units: i64,
        last_outcome_seq: i64,
        seed: i64,
        report_json: &str,
    ) -> StoreResult<i64> {
        let mut tx = self.pool.begin().await?;
        let id = sqlx::query_scalar(
            "INSERT INTO nuisance_fits (dataset_id, fitted_at_ms, units, last_outcome_seq, seed, report_json) \
             VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
        )
        .bind(fence.dataset_id)
        .bind(now_ms)
        .bind(units)
        .bind(last_outcome_seq)
        .bind(seed)
        .bind(report_json)
        .fetch_one(&mut *tx)
        .await?;
        check_fence(&mut tx, fence).await?;
        tx.commit().await?;
        Ok(id)
    }

    async fn latest_fit(&self, dataset_id: i64) -> StoreResult<Option<FitRecord>> {
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

    async fn insert_snapshot(&self, snap: &NewSnapshot<'_>) -> StoreResult<()> {
        let NewSnapshot {
            id,
            fence,
            computed_at_ms: now_ms,
            fit_id,
            refitted,
            millis,
            boards,
            scores,
            watch,
        } = *snap;
        // Encoded before the transaction, so the write lock is held for the
        // writes alone.
        let encoded = boards
            .iter()
            .map(|b| {
                serde_json::to_vec(b)
                    .map(|json| (b.window.key(), json))
                    .map_err(|e| StoreError::Corrupt(format!("board {:?}: {e}", b.window)))
            })
            .collect::<StoreResult<Vec<_>>>()?;
        let dataset_id = fence.dataset_id;
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
        for (window, json) in encoded {
            sqlx::query(
                "INSERT INTO snapshot_boards (snapshot_id, window, board) VALUES (?, ?, ?)",
            )
            .bind(id)
            .bind(window)
            .bind(json)
            .execute(&mut *tx)
            .await?;
        }
        for chunk in scores.chunks(INSERT_CHUNK) {
            let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
                "INSERT INTO snapshot_scores (dataset_id, model, arm, estimator, window, \
                 snapshot_id, computed_at_ms, estimate, se, rank, units) ",
            );
            q.push_values(chunk, |mut b, s| {
                b.push_bind(dataset_id)
                    .push_bind(&s.model)
                    .push_bind(&s.arm)
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
        check_fence(&mut tx, fence).await?;
        tx.commit().await?;
        Ok(())
    }

    /// Each window's latest board: a snapshot stores only the windows its
    /// recompute changed (see [`SnapshotLog::insert_snapshot`]).
    async fn latest_boards(&self, dataset_id: i64) -> StoreResult<Vec<Board>> {
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

    /// The stream watch as the latest stored recompute left it (JSON).
    async fn latest_watch(&self, dataset_id: i64) -> StoreResult<Option<String>> {
        let row = sqlx::query("SELECT state FROM watch_states WHERE dataset_id = ?")
            .bind(dataset_id)
            .fetch_optional(&self.pool)
            .await?;
        Ok(row.map(|r| r.get(0)))
    }

    /// One server writes a SQLite store: a counter that started above the
    /// largest stored id when the store opened.
    async fn next_snapshot_id(&self) -> StoreResult<i64> {
        Ok(self.next_snapshot.fetch_add(1, Ordering::Relaxed))
    }

    async fn latest_snapshot_id(&self, dataset_id: i64) -> StoreResult<i64> {
        Ok(
            sqlx::query_scalar("SELECT COALESCE(MAX(id), 0) FROM snapshots WHERE dataset_id = ?")
                .bind(dataset_id)
                .fetch_one(&self.pool)
                .await?,
        )
    }

    async fn history(&self, q: &HistoryQuery<'_>) -> StoreResult<Vec<HistoryRow>> {
        let rows = sqlx::query(
            "SELECT snapshot_id, computed_at_ms, estimate, se, rank, units FROM snapshot_scores \
             WHERE dataset_id = ? AND model = ? AND arm = ? AND estimator = ? AND window = ? \
             AND computed_at_ms >= ? AND computed_at_ms <= ? ORDER BY snapshot_id",
        )
        .bind(q.dataset_id)
        .bind(q.model)
        .bind(q.arm)
        .bind(q.key)
        .bind(q.window)
        .bind(q.from_ms)
        .bind(q.to_ms)
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
}
