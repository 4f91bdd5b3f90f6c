//! Datasets, models, and the rows they accept, in SQLite.

use async_trait::async_trait;
use sqlx::{QueryBuilder, Row, Sqlite};
use tokio_stream::StreamExt;

use super::{pack_features, unpack_features, SqliteStore, INSERT_CHUNK};
use crate::domain::{
    BlendDefinition, DatasetSpec, OutcomeRecord, PredictionRecord, StoredDataset, StoredModel,
    UnitRecord,
};
use crate::store::{
    arm_of, blend_json, blend_of, DatasetLog, RowStream, StoreError, StoreResult, Tip,
};

#[async_trait]
impl DatasetLog for SqliteStore {
    async fn create_dataset(&self, spec: &DatasetSpec, now_ms: i64) -> StoreResult<StoredDataset> {
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

    async fn datasets(&self) -> StoreResult<Vec<StoredDataset>> {
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

    async fn register_model(
        &self,
        dataset_id: i64,
        name: &str,
        version: &str,
        description: &str,
        now_ms: i64,
    ) -> StoreResult<StoredModel> {
        self.insert_model(dataset_id, name, version, description, now_ms, None)
            .await
    }

    async fn register_blend_model(
        &self,
        dataset_id: i64,
        name: &str,
        version: &str,
        description: &str,
        now_ms: i64,
        blend: &BlendDefinition,
    ) -> StoreResult<StoredModel> {
        self.insert_model(dataset_id, name, version, description, now_ms, Some(blend))
            .await
    }

    async fn retire_model(&self, model_id: i64, now_ms: i64) -> StoreResult<()> {
        sqlx::query("UPDATE models SET retired_at_ms = ? WHERE id = ? AND retired_at_ms = 0")
            .bind(now_ms)
            .bind(model_id)
            .execute(&self.pool)
            .await?;
        Ok(())
    }

    async fn models(&self, dataset_id: i64) -> StoreResult<Vec<StoredModel>> {
        let rows = sqlx::query(
            "SELECT id, name, version, description, registered_at_ms, retired_at_ms, blend_json \
             FROM models WHERE dataset_id = ? ORDER BY id",
        )
        .bind(dataset_id)
        .fetch_all(&self.pool)
        .await?;
        rows.into_iter()
            .map(|r| {
                Ok(StoredModel {
                    id: r.get(0),
                    dataset_id,
                    name: r.get(1),
                    version: r.get(2),
                    description: r.get(3),
                    registered_at_ms: r.get(4),
                    retired_at_ms: r.get(5),
                    blend: blend_of(r.get(6))?,
                })
            })
            .collect()
    }

    /// Writes a batch of new units in one transaction.
    async fn insert_units(
        &self,
        dataset_id: i64,
        rows: &[UnitRecord],
        now_ms: i64,
    ) -> StoreResult<i64> {
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
        // One writer: the caller's numbers are the next ones.
        Ok(rows.first().map_or(0, |r| r.seq))
    }

    /// Writes a batch of new outcomes in one transaction.
    async fn insert_outcomes(
        &self,
        dataset_id: i64,
        rows: &[OutcomeRecord],
        now_ms: i64,
    ) -> StoreResult<i64> {
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
        // One writer: the caller's numbers are the next ones.
        Ok(rows.first().map_or(0, |r| r.seq))
    }

    /// Writes a batch of new predictions in one transaction.
    async fn insert_predictions(
        &self,
        dataset_id: i64,
        rows: &[PredictionRecord],
        now_ms: i64,
    ) -> StoreResult<i64> {
        let mut tx = self.pool.begin().await?;
        for chunk in rows.chunks(INSERT_CHUNK) {
            let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
                "INSERT INTO predictions (dataset_id, model_id, unit_seq, seq, arm, effect, \
                 predicted_at_ms, received_at_ms) ",
            );
            q.push_values(chunk, |mut b, p| {
                b.push_bind(dataset_id)
                    .push_bind(p.model_id)
                    .push_bind(p.unit_seq)
                    .push_bind(p.seq)
                    .push_bind(i64::from(p.arm))
                    .push_bind(p.effect)
                    .push_bind(p.predicted_at_ms)
                    .push_bind(now_ms);
            });
            q.build().execute(&mut *tx).await?;
        }
        tx.commit().await?;
        // One writer: the caller's numbers are the next ones.
        Ok(rows.first().map_or(0, |r| r.seq))
    }

    fn units(&self, dataset_id: i64, from: i64) -> RowStream<'_, UnitRecord> {
        // Streamed one row at a time: a rebuild never holds the table.
        Box::pin(
            sqlx::query(
                "SELECT seq, key, features, treatment, propensity, cohort, assigned_at_ms \
                 FROM units WHERE dataset_id = ? AND seq >= ? ORDER BY seq",
            )
            .bind(dataset_id)
            .bind(from)
            .fetch(&self.pool)
            .map(|r| {
                let r = r?;
                Ok(UnitRecord {
                    seq: r.get(0),
                    key: r.get(1),
                    features: unpack_features(r.get::<&[u8], _>(2))?,
                    treatment: arm_of(r.get(3))?,
                    propensity: r.get(4),
                    cohort: r.get(5),
                    assigned_at_ms: r.get(6),
                })
            }),
        )
    }

    fn outcomes(&self, dataset_id: i64, from: i64) -> RowStream<'_, OutcomeRecord> {
        Box::pin(
            sqlx::query(
                "SELECT unit_seq, seq, value, observed_at_ms FROM outcomes \
                 WHERE dataset_id = ? AND seq >= ? ORDER BY seq",
            )
            .bind(dataset_id)
            .bind(from)
            .fetch(&self.pool)
            .map(|r| {
                let r = r?;
                Ok(OutcomeRecord {
                    unit_seq: r.get(0),
                    seq: r.get(1),
                    value: r.get(2),
                    observed_at_ms: r.get(3),
                })
            }),
        )
    }

    /// One server writes a SQLite store, so only a rebuild reads this, from
    /// 0: in the table's order then (an index on the arrival order would slow
    /// every prediction batch, and a sort would slow every start), stepped
    /// in place on a connection of its own (`bulk.rs`).
    fn predictions(&self, dataset_id: i64, from: i64) -> RowStream<'_, PredictionRecord> {
        if from == 0 {
            return super::bulk::predictions(self.path.clone(), dataset_id);
        }
        Box::pin(
            sqlx::query(
                "SELECT model_id, unit_seq, seq, effect, predicted_at_ms, arm FROM predictions \
                 WHERE dataset_id = ? AND seq >= ? ORDER BY seq",
            )
            .bind(dataset_id)
            .bind(from)
            .fetch(&self.pool)
            .map(|r| {
                let r = r?;
                Ok(PredictionRecord {
                    model_id: r.get(0),
                    unit_seq: r.get(1),
                    seq: r.get(2),
                    effect: r.get(3),
                    predicted_at_ms: r.get(4),
                    arm: arm_of(r.get(5))?,
                })
            }),
        )
    }

    /// When the dataset's last outcome was received (Unix ms), if any.
    async fn last_outcome_received_ms(&self, dataset_id: i64) -> StoreResult<Option<i64>> {
        Ok(
            sqlx::query_scalar("SELECT MAX(received_at_ms) FROM outcomes WHERE dataset_id = ?")
                .bind(dataset_id)
                .fetch_one(&self.pool)
                .await?,
        )
    }

    /// Row counts of units, outcomes and predictions for one dataset.
    async fn counts(&self, dataset_id: i64) -> StoreResult<(i64, i64, i64)> {
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

    async fn tip(&self, dataset_id: i64) -> StoreResult<Tip> {
        // One writer: the row counts are the next numbers. Only a shared
        // store's servers ask this often; here it serves the contract.
        let (units, outcomes, predictions) = self.counts(dataset_id).await?;
        let row = sqlx::query(
            "SELECT COUNT(*), COALESCE(SUM(retired_at_ms <> 0), 0) FROM models \
             WHERE dataset_id = ?",
        )
        .bind(dataset_id)
        .fetch_one(&self.pool)
        .await?;
        Ok(Tip {
            units,
            outcomes,
            predictions,
            models: row.get(0),
            retired: row.get(1),
        })
    }
}

impl SqliteStore {
    /// One model row, with its blend definition as JSON when it is a blend.
    async fn insert_model(
        &self,
        dataset_id: i64,
        name: &str,
        version: &str,
        description: &str,
        now_ms: i64,
        blend: Option<&BlendDefinition>,
    ) -> StoreResult<StoredModel> {
        let blend_json = blend_json(blend)?;
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO models (dataset_id, name, version, description, registered_at_ms, \
             blend_json) VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
        )
        .bind(dataset_id)
        .bind(name)
        .bind(version)
        .bind(description)
        .bind(now_ms)
        .bind(blend_json)
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
            blend: blend.cloned(),
        })
    }
}
