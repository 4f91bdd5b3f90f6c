//! Intake: client-streaming batches, each validated and committed in one
//! transaction before the next is read.

use std::future::Future;
use std::sync::Arc;

use prost::Message;
use tokio_stream::StreamExt;
use tonic::{Code, Request, Response, Status, Streaming};

use super::pb;
use super::status::{from_monitor, refused};
use crate::auth::{caller, Access, Caller};
use crate::limits::{exceeded, Limits};
use crate::monitor::checks::{Fault, OutcomeIn, PredictionIn, Rejection, UnitIn};
use crate::monitor::{BatchCounts, Monitor, MonitorError};

pub struct IntakeService {
    pub monitor: Arc<Monitor>,
    pub limits: Limits,
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
            arm: r.arm,
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
            arm: r.arm,
        }
    }
}

/// An intake row type whose keys and names the configured length limits
/// bound: it labels each such string with its field and its limit, for
/// [`check_limits`].
trait LengthLimited {
    /// (field, value, the limit's name, the limit).
    fn limited<'a>(&'a self, l: &Limits) -> Vec<(&'static str, &'a str, &'static str, usize)>;
}

impl LengthLimited for UnitIn {
    fn limited<'a>(&'a self, l: &Limits) -> Vec<(&'static str, &'a str, &'static str, usize)> {
        vec![
            ("key", &self.key, "max_key_bytes", l.max_key_bytes),
            ("arm", &self.arm, "max_name_bytes", l.max_name_bytes),
        ]
    }
}

impl LengthLimited for OutcomeIn {
    fn limited<'a>(&'a self, l: &Limits) -> Vec<(&'static str, &'a str, &'static str, usize)> {
        vec![("unit_key", &self.unit_key, "max_key_bytes", l.max_key_bytes)]
    }
}

impl LengthLimited for PredictionIn {
    fn limited<'a>(&'a self, l: &Limits) -> Vec<(&'static str, &'a str, &'static str, usize)> {
        vec![
            ("model", &self.model, "max_name_bytes", l.max_name_bytes),
            ("unit_key", &self.unit_key, "max_key_bytes", l.max_key_bytes),
            ("arm", &self.arm, "max_name_bytes", l.max_name_bytes),
        ]
    }
}

/// The configured limits a batch must meet before the monitor sees it:
/// its row count, and the length of every key and name.
fn check_limits<R: LengthLimited>(l: &Limits, rows: &[R]) -> Result<(), Vec<Rejection>> {
    let invalid = |row: usize, field: &str, reason: String| Rejection {
        row,
        field: field.into(),
        reason,
        fault: Fault::Invalid,
    };
    if rows.len() > l.max_batch_rows {
        return Err(vec![invalid(
            l.max_batch_rows,
            "rows",
            exceeded(
                "max_batch_rows",
                l.max_batch_rows,
                format!("{} rows", rows.len()),
            ),
        )]);
    }
    let mut faults = Vec::new();
    for (i, r) in rows.iter().enumerate() {
        for (field, value, limit, max) in r.limited(l) {
            if value.len() > max {
                faults.push(invalid(
                    i,
                    field,
                    exceeded(limit, max, format!("{} bytes", value.len())),
                ));
            }
        }
    }
    if faults.is_empty() {
        Ok(())
    } else {
        Err(faults)
    }
}

/// A stream-level failure after `receipt.batches` commits, with the receipt
/// in the details so the client knows what is stored.
fn with_receipt(code: Code, message: String, receipt: &pb::IntakeReceipt) -> Status {
    Status::with_details(code, message, receipt.encode_to_vec().into())
}

/// Drives one intake stream: every message names the same dataset; each
/// batch commits or is refused whole; the receipt counts what committed.
///
/// A message is decoded whole before its batch is validated, and the batch
/// runs on its own task while the dataset's lock is held, so neither a slow
/// client nor a cancelled call (deadline, disconnect) can stall the lock or
/// leave a batch committed to disk but missing from the cache.
async fn drain<M, R, F, Fut>(
    who: Caller,
    monitor: &Arc<Monitor>,
    limits: &Limits,
    mut stream: Streaming<M>,
    split: impl Fn(M) -> (String, Vec<R>),
    apply: F,
) -> Result<pb::IntakeReceipt, Status>
where
    R: LengthLimited,
    F: Fn(Arc<Monitor>, String, Vec<R>) -> Fut,
    Fut: Future<Output = Result<BatchCounts, MonitorError>> + Send + 'static,
{
    let mut receipt = pb::IntakeReceipt::default();
    let mut dataset: Option<String> = None;
    loop {
        let batch = receipt.batches;
        let Ok(next) = tokio::time::timeout(limits.stream_idle(), stream.next()).await else {
            let idle = limits.stream_idle_seconds;
            let why = format!(
                "no batch for {idle} s after batch {batch}: above limits.stream_idle_seconds = {idle}"
            );
            return Err(with_receipt(Code::DeadlineExceeded, why, &receipt));
        };
        let Some(message) = next else { break };
        let message = match message {
            Ok(m) => m,
            Err(s) if s.code() == Code::OutOfRange && s.message().contains("too large") => {
                return Err(with_receipt(
                    Code::ResourceExhausted,
                    format!(
                        "batch {batch}: {}; limits.max_request_bytes = {}",
                        s.message(),
                        limits.max_request_bytes
                    ),
                    &receipt,
                ))
            }
            Err(s) => return Err(with_receipt(s.code(), s.message().into(), &receipt)),
        };
        let (name, rows) = split(message);
        if name.len() > limits.max_name_bytes {
            return Err(with_receipt(
                Code::InvalidArgument,
                format!(
                    "batch {batch}: dataset: {}",
                    exceeded(
                        "max_name_bytes",
                        limits.max_name_bytes,
                        format!("{} bytes", name.len())
                    )
                ),
                &receipt,
            ));
        }
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
        if let Err(r) = check_limits(limits, &rows) {
            return Err(refused(batch, &r, receipt));
        }
        let task = tokio::spawn(apply(Arc::clone(monitor), name, rows));
        match task.await {
            Ok(Ok(c)) => {
                receipt.batches += 1;
                receipt.accepted += c.accepted as u64;
                receipt.duplicate += c.duplicate as u64;
            }
            Ok(Err(MonitorError::Rejected(r))) => return Err(refused(batch, &r, receipt)),
            Ok(Err(e)) => return Err(from_monitor(e)),
            Err(e) => {
                return Err(with_receipt(
                    Code::Internal,
                    format!("batch {batch}: {e}"),
                    &receipt,
                ))
            }
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
        let who = caller(&request)?;
        let receipt = drain(
            who,
            &self.monitor,
            &self.limits,
            request.into_inner(),
            |b: pb::UnitBatch| (b.dataset, b.rows.into_iter().map(UnitIn::from).collect()),
            |m, d, rows: Vec<UnitIn>| async move { m.ingest_units(&d, &rows).await },
        )
        .await?;
        Ok(Response::new(receipt))
    }

    #[tracing::instrument(skip_all, fields(rpc = "SendOutcomes"))]
    async fn send_outcomes(
        &self,
        request: Request<Streaming<pb::OutcomeBatch>>,
    ) -> Result<Response<pb::IntakeReceipt>, Status> {
        let who = caller(&request)?;
        let receipt = drain(
            who,
            &self.monitor,
            &self.limits,
            request.into_inner(),
            |b: pb::OutcomeBatch| (b.dataset, b.rows.into_iter().map(OutcomeIn::from).collect()),
            |m, d, rows: Vec<OutcomeIn>| async move { m.ingest_outcomes(&d, &rows).await },
        )
        .await?;
        Ok(Response::new(receipt))
    }

    #[tracing::instrument(skip_all, fields(rpc = "SendPredictions"))]
    async fn send_predictions(
        &self,
        request: Request<Streaming<pb::PredictionBatch>>,
    ) -> Result<Response<pb::IntakeReceipt>, Status> {
        let who = caller(&request)?;
        let receipt = drain(
            who,
            &self.monitor,
            &self.limits,
            request.into_inner(),
            |b: pb::PredictionBatch| {
                (
                    b.dataset,
                    b.rows.into_iter().map(PredictionIn::from).collect(),
                )
            },
            |m, d, rows: Vec<PredictionIn>| async move { m.ingest_predictions(&d, &rows).await },
        )
        .await?;
        Ok(Response::new(receipt))
    }
}
