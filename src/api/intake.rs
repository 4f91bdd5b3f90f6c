//! Intake: client-streaming batches, each validated and committed in one
//! transaction before the next is read.

use std::sync::Arc;

use tokio_stream::StreamExt;
use tonic::{Request, Response, Status, Streaming};

use super::pb;
use super::status::{from_monitor, refused};
use crate::auth::{caller, Access, Caller};
use crate::monitor::ingest::{OutcomeIn, PredictionIn, UnitIn};
use crate::monitor::{BatchCounts, Monitor, MonitorError};

pub struct IntakeService {
    pub monitor: Arc<Monitor>,
}

impl From<pb::UnitRow> for UnitIn {
    fn from(r: pb::UnitRow) -> Self {
        UnitIn {
            key: r.key,
            features: r.features,
            treatment: r.treatment,
            propensity: r.propensity,
            cohort: r.cohort,
            assigned_at_ms: r.assigned_at_ms,
        }
    }
}

impl From<pb::OutcomeRow> for OutcomeIn {
    fn from(r: pb::OutcomeRow) -> Self {
        OutcomeIn {
            unit_key: r.unit_key,
            value: r.value,
            observed_at_ms: r.observed_at_ms,
        }
    }
}

impl From<pb::PredictionRow> for PredictionIn {
    fn from(r: pb::PredictionRow) -> Self {
        PredictionIn {
            model: r.model,
            unit_key: r.unit_key,
            effect: r.effect,
            predicted_at_ms: r.predicted_at_ms,
        }
    }
}

/// Drives one intake stream: every message names the same dataset; each
/// batch commits or is refused whole; the receipt counts what committed.
async fn drain<M, R, F, Fut>(
    who: Caller,
    mut stream: Streaming<M>,
    split: impl Fn(M) -> (String, Vec<R>),
    apply: F,
) -> Result<pb::IntakeReceipt, Status>
where
    F: Fn(String, Vec<R>) -> Fut,
    Fut: std::future::Future<Output = Result<BatchCounts, MonitorError>>,
{
    let mut receipt = pb::IntakeReceipt::default();
    let mut dataset: Option<String> = None;
    while let Some(message) = stream.next().await {
        let message = message?;
        let batch = receipt.batches;
        let (name, rows) = split(message);
        match &dataset {
            None => {
                who.require(Access::Write, &name)?;
                dataset = Some(name.clone());
            }
            Some(d) if *d != name => {
                return Err(Status::invalid_argument(format!(
                    "batch {batch}: dataset {name:?} differs from the stream's dataset {d:?}"
                )))
            }
            Some(_) => {}
        }
        match apply(name, rows).await {
            Ok(c) => {
                receipt.batches += 1;
                receipt.accepted += c.accepted as u64;
                receipt.duplicate += c.duplicate as u64;
            }
            Err(MonitorError::Rejected(r)) => return Err(refused(batch, &r, receipt)),
            Err(e) => return Err(from_monitor(e)),
        }
    }
    Ok(receipt)
}

#[tonic::async_trait]
impl pb::intake_server::Intake for IntakeService {
    #[tracing::instrument(skip_all, fields(rpc = "SendUnits"))]
    async fn send_units(
        &self,
        request: Request<Streaming<pb::UnitBatch>>,
    ) -> Result<Response<pb::IntakeReceipt>, Status> {
        let m = &self.monitor;
        let who = caller(&request)?;
        let receipt = drain(
            who,
            request.into_inner(),
            |b: pb::UnitBatch| (b.dataset, b.rows.into_iter().map(UnitIn::from).collect()),
            |d, rows: Vec<UnitIn>| async move { m.ingest_units(&d, &rows).await },
        )
        .await?;
        Ok(Response::new(receipt))
    }

    #[tracing::instrument(skip_all, fields(rpc = "SendOutcomes"))]
    async fn send_outcomes(
        &self,
        request: Request<Streaming<pb::OutcomeBatch>>,
    ) -> Result<Response<pb::IntakeReceipt>, Status> {
        let m = &self.monitor;
        let who = caller(&request)?;
        let receipt = drain(
            who,
            request.into_inner(),
            |b: pb::OutcomeBatch| (b.dataset, b.rows.into_iter().map(OutcomeIn::from).collect()),
            |d, rows: Vec<OutcomeIn>| async move { m.ingest_outcomes(&d, &rows).await },
        )
        .await?;
        Ok(Response::new(receipt))
    }

    #[tracing::instrument(skip_all, fields(rpc = "SendPredictions"))]
    async fn send_predictions(
        &self,
        request: Request<Streaming<pb::PredictionBatch>>,
    ) -> Result<Response<pb::IntakeReceipt>, Status> {
        let m = &self.monitor;
        let who = caller(&request)?;
        let receipt = drain(
            who,
            request.into_inner(),
            |b: pb::PredictionBatch| {
                (
                    b.dataset,
                    b.rows.into_iter().map(PredictionIn::from).collect(),
                )
            },
            |d, rows: Vec<PredictionIn>| async move { m.ingest_predictions(&d, &rows).await },
        )
        .await?;
        Ok(Response::new(receipt))
    }
}
