//! Nuisance fit records, snapshots with their boards and the stream
//! watch's state, and history, in PostgreSQL.

use async_trait::async_trait;
use sqlx::Row;

use super::{check_fence, PgStore, INSERT_CHUNK};
use crate::domain::{Board, FitRecord, HistoryRow};
use crate::store::{Fence, HistoryQuery, NewSnapshot, SnapshotLog, StoreError, StoreResult};

#[async_trait]
impl SnapshotLog for PgStore {
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
        check_fence(&mut tx, fence).await?;
        let id = sqlx::query_scalar(
            "INSERT INTO nuisance_fits (dataset_id, fitted_at_ms, units, last_outcome_seq, seed, \
             report_json) VALUES ($1, $2, $3, $4, $5, $6) RETURNING id",
        )
        .bind(fence.dataset_id)
        .bind(now_ms)
        .bind(units)
        .bind(last_outcome_seq)
        .bind(seed)
        .bind(report_json)
        .fetch_one(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(id)
    }

    async fn latest_fit(&self, dataset_id: i64) -> StoreResult<Option<FitRecord>> {
        let row = sqlx::query(
            "SELECT id, fitted_at_ms, units, last_outcome_seq, seed, report_json \
             FROM nuisance_fits WHERE dataset_id = $1 ORDER BY id DESC LIMIT 1",
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
        let dataset_id = fence.dataset_id;
        let (windows, encoded): (Vec<String>, Vec<String>) = boards
            .iter()
            .map(|b| {
                serde_json::to_string(b)
                    .map(|json| (b.window.key(), json))
                    .map_err(|e| StoreError::Corrupt(format!("board {:?}: {e}", b.window)))
            })
            .collect::<StoreResult<Vec<_>>>()?
            .into_iter()
            .unzip();
        let mut tx = self.pool.begin().await?;
        check_fence(&mut tx, fence).await?;
        sqlx::query(
            "INSERT INTO snapshots (id, dataset_id, computed_at_ms, fit_id, refitted, millis) \
             VALUES ($1, $2, $3, $4, $5, $6)",
        )
        .bind(id)
        .bind(dataset_id)
        .bind(now_ms)
        .bind(fit_id)
        .bind(refitted)
        .bind(millis)
        .execute(&mut *tx)
        .await?;
        if !windows.is_empty() {
            sqlx::query(
                "INSERT INTO snapshot_boards (snapshot_id, dataset_id, window_key, board) \
                 SELECT $1, $2, b.window_key, b.board FROM UNNEST($3::TEXT[], $4::TEXT[]) \
                 AS b (window_key, board)",
            )
            .bind(id)
            .bind(dataset_id)
            .bind(windows)
            .bind(encoded)
            .execute(&mut *tx)
            .await?;
        }
        for chunk in scores.chunks(INSERT_CHUNK) {
            let model: Vec<&str> = chunk.iter().map(|s| s.model.as_str()).collect();
            let estimator: Vec<&str> = chunk.iter().map(|s| s.estimator.as_str()).collect();
            let window: Vec<&str> = chunk.iter().map(|s| s.window.as_str()).collect();
            let arm: Vec<&str> = chunk.iter().map(|s| s.arm.as_str()).collect();
            let estimate: Vec<f64> = chunk.iter().map(|s| s.estimate).collect();
            let se: Vec<f64> = chunk.iter().map(|s| s.se).collect();
            let rank: Vec<i64> = chunk.iter().map(|s| s.rank).collect();
            let units: Vec<i64> = chunk.iter().map(|s| s.units).collect();
            sqlx::query(
                "INSERT INTO snapshot_scores (dataset_id, model, estimator, window_key, \
                 snapshot_id, computed_at_ms, estimate, se, rank, units, arm) \
                 SELECT $1, s.model, s.estimator, s.window_key, $2, $3, s.estimate, s.se, \
                        s.rank, s.units, s.arm \
                 FROM UNNEST($4::TEXT[], $5::TEXT[], $6::TEXT[], $7::DOUBLE PRECISION[], \
                             $8::DOUBLE PRECISION[], $9::BIGINT[], $10::BIGINT[], \
                             $11::TEXT[]) \
                      AS s (model, estimator, window_key, estimate, se, rank, units, arm)",
            )
            .bind(dataset_id)
            .bind(id)
            .bind(now_ms)
            .bind(model)
            .bind(estimator)
            .bind(window)
            .bind(estimate)
            .bind(se)
            .bind(rank)
            .bind(units)
            .bind(arm)
            .execute(&mut *tx)
            .await?;
        }
        sqlx::query(
            "INSERT INTO watch_states (dataset_id, snapshot_id, state) VALUES ($1, $2, $3) \
             ON CONFLICT (dataset_id) DO UPDATE SET snapshot_id = EXCLUDED.snapshot_id, \
             state = EXCLUDED.state",
        )
        .bind(dataset_id)
        .bind(id)
        .bind(watch)
        .execute(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(())
    }

    async fn latest_boards(&self, dataset_id: i64) -> StoreResult<Vec<Board>> {
        let rows = sqlx::query(
            "SELECT b.window_key, b.board FROM snapshot_boards b JOIN ( \
                 SELECT window_key, MAX(snapshot_id) AS id FROM snapshot_boards \
                 WHERE dataset_id = $1 GROUP BY window_key \
             ) latest ON b.snapshot_id = latest.id AND b.window_key = latest.window_key",
        )
        .bind(dataset_id)
        .fetch_all(&self.pool)
        .await?;
        let mut boards = Vec::with_capacity(rows.len());
        for r in rows {
            let (window, json): (String, String) = (r.get(0), r.get(1));
            boards.push(
                serde_json::from_str(&json)
                    .map_err(|e| StoreError::Corrupt(format!("board {window}: {e}")))?,
            );
        }
        Ok(boards)
    }

    async fn latest_watch(&self, dataset_id: i64) -> StoreResult<Option<String>> {
        Ok(
            sqlx::query_scalar("SELECT state FROM watch_states WHERE dataset_id = $1")
                .bind(dataset_id)
                .fetch_optional(&self.pool)
                .await?,
        )
    }

    async fn next_snapshot_id(&self) -> StoreResult<i64> {
        Ok(sqlx::query_scalar("SELECT nextval('snapshot_ids')")
            .fetch_one(&self.pool)
            .await?)
    }

    async fn latest_snapshot_id(&self, dataset_id: i64) -> StoreResult<i64> {
        Ok(
            sqlx::query_scalar("SELECT COALESCE(MAX(id), 0) FROM snapshots WHERE dataset_id = $1")
                .bind(dataset_id)
                .fetch_one(&self.pool)
                .await?,
        )
    }

    async fn history(&self, q: &HistoryQuery<'_>) -> StoreResult<Vec<HistoryRow>> {
        let rows = sqlx::query(
            "SELECT snapshot_id, computed_at_ms, estimate, se, rank, units FROM snapshot_scores \
             WHERE dataset_id = $1 AND model = $2 AND estimator = $3 AND window_key = $4 \
             AND computed_at_ms >= $5 AND computed_at_ms <= $6 AND arm = $7 \
             ORDER BY snapshot_id",
        )
        .bind(q.dataset_id)
        .bind(q.model)
        .bind(q.key)
        .bind(q.window)
        .bind(q.from_ms)
        .bind(q.to_ms)
        .bind(q.arm)
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
