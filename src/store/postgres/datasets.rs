//! Datasets, models, and the rows they accept, in PostgreSQL.

use async_trait::async_trait;
use sqlx::Row;
use tokio_stream::StreamExt;

use super::{PgStore, INSERT_CHUNK};
use crate::domain::{
    BlendDefinition, DatasetSpec, OutcomeRecord, PredictionRecord, StoredDataset, StoredModel,
    UnitRecord,
};
use crate::store::sqlite::{pack_features, unpack_features};
use crate::store::Numbered;
use crate::store::{
    arm_of, blend_json, blend_of, DatasetLog, RowStream, StoreError, StoreResult, Tip,
};

const NEXT_UNIT: &str = "SELECT COALESCE(MAX(seq) + 1, 0) FROM units WHERE dataset_id = $1";
const NEXT_OUTCOME: &str = "SELECT COALESCE(MAX(seq) + 1, 0) FROM outcomes WHERE dataset_id = $1";
const NEXT_PREDICTION: &str =
    "SELECT COALESCE(MAX(seq) + 1, 0) FROM predictions WHERE dataset_id = $1";

/// Takes the dataset's turn to append rows, held until the transaction
/// ends (a row lock on the dataset that foreign-key checks do not wait
/// for), and reads the next number of the table `next` asks about. The
/// batch is stored from that number on: returns it, and how far the
/// batch's own numbers are shifted to reach it.
async fn take_turn<R: Numbered>(
    tx: &mut sqlx::PgConnection,
    dataset_id: i64,
    next: &'static str,
    rows: &[R],
) -> StoreResult<(i64, i64)> {
    let found: Option<i64> =
        sqlx::query_scalar("SELECT id FROM datasets WHERE id = $1 FOR NO KEY UPDATE")
            .bind(dataset_id)
            .fetch_optional(&mut *tx)
            .await?;
    if found.is_none() {
        return Err(StoreError::Backend(format!("no dataset {dataset_id}")));
    }
    let first: i64 = sqlx::query_scalar(next)
        .bind(dataset_id)
        .fetch_one(&mut *tx)
        .await?;
    let proposed = rows.first().map_or(first, Numbered::seq);
    Ok((first, first - proposed))
}

#[async_trait]
impl DatasetLog for PgStore {
    async fn create_dataset(&self, spec: &DatasetSpec, now_ms: i64) -> StoreResult<StoredDataset> {
        let json = serde_json::to_string(spec).map_err(|e| StoreError::Corrupt(e.to_string()))?;
        let mut tx = self.pool.begin().await?;
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO datasets (name, spec_json, created_at_ms) VALUES ($1, $2, $3) RETURNING id",
        )
        .bind(&spec.name)
        .bind(json)
        .bind(now_ms)
        .fetch_one(&mut *tx)
        .await?;
        // A lapsed lease from the start: the row every event writer of the
        // dataset locks exists before any event is written.
        sqlx::query(
            "INSERT INTO dataset_leases (dataset_id, holder, epoch, expires_at_ms) \
             VALUES ($1, '', 0, 0)",
        )
        .bind(id)
        .execute(&mut *tx)
        .await?;
        tx.commit().await?;
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
        sqlx::query("UPDATE models SET retired_at_ms = $1 WHERE id = $2 AND retired_at_ms = 0")
            .bind(now_ms)
            .bind(model_id)
            .execute(&self.pool)
            .await?;
        Ok(())
    }

    async fn models(&self, dataset_id: i64) -> StoreResult<Vec<StoredModel>> {
        let rows = sqlx::query(
            "SELECT id, name, version, description, registered_at_ms, retired_at_ms, blend_json \
             FROM models WHERE dataset_id = $1 ORDER BY id",
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

    async fn insert_units(
        &self,
        dataset_id: i64,
        rows: &[UnitRecord],
        now_ms: i64,
    ) -> StoreResult<i64> {
        let mut tx = self.pool.begin().await?;
        let (first, shift) = take_turn(&mut tx, dataset_id, NEXT_UNIT, rows).await?;
        for chunk in rows.chunks(INSERT_CHUNK) {
            let seq: Vec<i64> = chunk.iter().map(|u| u.seq + shift).collect();
            let key: Vec<&str> = chunk.iter().map(|u| u.key.as_str()).collect();
            let features: Vec<Vec<u8>> = chunk.iter().map(|u| pack_features(&u.features)).collect();
            let treatment: Vec<i16> = chunk.iter().map(|u| i16::from(u.treatment)).collect();
            let propensity: Vec<Option<f64>> = chunk.iter().map(|u| u.propensity).collect();
            let cohort: Vec<&str> = chunk.iter().map(|u| u.cohort.as_str()).collect();
            let assigned: Vec<i64> = chunk.iter().map(|u| u.assigned_at_ms).collect();
            sqlx::query(
                "INSERT INTO units (dataset_id, seq, key, features, treatment, propensity, \
                 cohort, assigned_at_ms, received_at_ms) \
                 SELECT $1, u.seq, u.key, u.features, u.treatment, u.propensity, u.cohort, \
                        u.assigned_at_ms, $2 \
                 FROM UNNEST($3::BIGINT[], $4::TEXT[], $5::BYTEA[], $6::SMALLINT[], \
                             $7::DOUBLE PRECISION[], $8::TEXT[], $9::BIGINT[]) \
                      AS u (seq, key, features, treatment, propensity, cohort, assigned_at_ms)",
            )
            .bind(dataset_id)
            .bind(now_ms)
            .bind(seq)
            .bind(key)
            .bind(features)
            .bind(treatment)
            .bind(propensity)
            .bind(cohort)
            .bind(assigned)
            .execute(&mut *tx)
            .await?;
        }
        tx.commit().await?;
        Ok(first)
    }

    async fn insert_outcomes(
        &self,
        dataset_id: i64,
        rows: &[OutcomeRecord],
        now_ms: i64,
    ) -> StoreResult<i64> {
        let mut tx = self.pool.begin().await?;
        let (first, shift) = take_turn(&mut tx, dataset_id, NEXT_OUTCOME, rows).await?;
        for chunk in rows.chunks(INSERT_CHUNK) {
            let unit_seq: Vec<i64> = chunk.iter().map(|o| o.unit_seq).collect();
            let seq: Vec<i64> = chunk.iter().map(|o| o.seq + shift).collect();
            let value: Vec<f64> = chunk.iter().map(|o| o.value).collect();
            let observed: Vec<i64> = chunk.iter().map(|o| o.observed_at_ms).collect();
            sqlx::query(
                "INSERT INTO outcomes (dataset_id, unit_seq, seq, value, observed_at_ms, \
                 received_at_ms) \
                 SELECT $1, o.unit_seq, o.seq, o.value, o.observed_at_ms, $2 \
                 FROM UNNEST($3::BIGINT[], $4::BIGINT[], $5::DOUBLE PRECISION[], $6::BIGINT[]) \
                      AS o (unit_seq, seq, value, observed_at_ms)",
            )
            .bind(dataset_id)
            .bind(now_ms)
            .bind(unit_seq)
            .bind(seq)
            .bind(value)
            .bind(observed)
            .execute(&mut *tx)
            .await?;
        }
        tx.commit().await?;
        Ok(first)
    }

    async fn insert_predictions(
        &self,
        dataset_id: i64,
        rows: &[PredictionRecord],
        now_ms: i64,
    ) -> StoreResult<i64> {
        let mut tx = self.pool.begin().await?;
        let (first, shift) = take_turn(&mut tx, dataset_id, NEXT_PREDICTION, rows).await?;
        for chunk in rows.chunks(INSERT_CHUNK) {
            let model: Vec<i64> = chunk.iter().map(|p| p.model_id).collect();
            let unit_seq: Vec<i64> = chunk.iter().map(|p| p.unit_seq).collect();
            let seq: Vec<i64> = chunk.iter().map(|p| p.seq + shift).collect();
            let effect: Vec<f64> = chunk.iter().map(|p| p.effect).collect();
            let predicted: Vec<i64> = chunk.iter().map(|p| p.predicted_at_ms).collect();
            let arm: Vec<i16> = chunk.iter().map(|p| i16::from(p.arm)).collect();
            sqlx::query(
                "INSERT INTO predictions (dataset_id, model_id, unit_seq, seq, effect, \
                 predicted_at_ms, received_at_ms, arm) \
                 SELECT $1, p.model_id, p.unit_seq, p.seq, p.effect, p.predicted_at_ms, $2, p.arm \
                 FROM UNNEST($3::BIGINT[], $4::BIGINT[], $5::BIGINT[], \
                             $6::DOUBLE PRECISION[], $7::BIGINT[], $8::SMALLINT[]) \
                      AS p (model_id, unit_seq, seq, effect, predicted_at_ms, arm)",
            )
            .bind(dataset_id)
            .bind(now_ms)
            .bind(model)
            .bind(unit_seq)
            .bind(seq)
            .bind(effect)
            .bind(predicted)
            .bind(arm)
            .execute(&mut *tx)
            .await?;
        }
        tx.commit().await?;
        Ok(first)
    }

    fn units(&self, dataset_id: i64, from: i64) -> RowStream<'_, UnitRecord> {
        Box::pin(
            sqlx::query(
                "SELECT seq, key, features, treatment, propensity, cohort, assigned_at_ms \
                 FROM units WHERE dataset_id = $1 AND seq >= $2 ORDER BY seq",
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
                    treatment: arm_of(i64::from(r.get::<i16, _>(3)))?,
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
                 WHERE dataset_id = $1 AND seq >= $2 ORDER BY seq",
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

    fn predictions(&self, dataset_id: i64, from: i64) -> RowStream<'_, PredictionRecord> {
        Box::pin(
            sqlx::query(
                "SELECT model_id, unit_seq, seq, effect, predicted_at_ms, arm FROM predictions \
                 WHERE dataset_id = $1 AND seq >= $2 ORDER BY seq",
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
                    arm: arm_of(i64::from(r.get::<i16, _>(5)))?,
                })
            }),
        )
    }

    async fn last_outcome_received_ms(&self, dataset_id: i64) -> StoreResult<Option<i64>> {
        Ok(
            sqlx::query_scalar("SELECT MAX(received_at_ms) FROM outcomes WHERE dataset_id = $1")
                .bind(dataset_id)
                .fetch_one(&self.pool)
                .await?,
        )
    }

    async fn counts(&self, dataset_id: i64) -> StoreResult<(i64, i64, i64)> {
        let row = sqlx::query(
            "SELECT (SELECT COUNT(*) FROM units WHERE dataset_id = $1), \
                    (SELECT COUNT(*) FROM outcomes WHERE dataset_id = $1), \
                    (SELECT COUNT(*) FROM predictions WHERE dataset_id = $1)",
        )
        .bind(dataset_id)
        .fetch_one(&self.pool)
        .await?;
        Ok((row.get(0), row.get(1), row.get(2)))
    }

    async fn tip(&self, dataset_id: i64) -> StoreResult<Tip> {
        // MAX over the (dataset_id, seq) indexes reads one index entry each;
        // COUNT(*) would read every row.
        let row = sqlx::query(
            "SELECT (SELECT COALESCE(MAX(seq) + 1, 0) FROM units WHERE dataset_id = $1), \
                    (SELECT COALESCE(MAX(seq) + 1, 0) FROM outcomes WHERE dataset_id = $1), \
                    (SELECT COALESCE(MAX(seq) + 1, 0) FROM predictions WHERE dataset_id = $1), \
                    (SELECT COUNT(*) FROM models WHERE dataset_id = $1), \
                    (SELECT COUNT(*) FROM models WHERE dataset_id = $1 AND retired_at_ms <> 0)",
        )
        .bind(dataset_id)
        .fetch_one(&self.pool)
        .await?;
        Ok(Tip {
            units: row.get(0),
            outcomes: row.get(1),
            predictions: row.get(2),
            models: row.get(3),
            retired: row.get(4),
        })
    }
}

impl PgStore {
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
             blend_json) VALUES ($1, $2, $3, $4, $5, $6) RETURNING id",
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
