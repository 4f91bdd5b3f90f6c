//! The one mapping from monitor errors to gRPC status codes.

use prost::Message;
use tonic::{Code, Status};

use super::pb;
use crate::monitor::checks::{Fault, Rejection, MAX_REJECTIONS};
use crate::monitor::MonitorError;

/// The row-level reasons of a refused batch travel in a response header,
/// which clients cap (16 KiB by default in the Rust and Go stacks; grpcio
/// warns from 8 KiB); the reasons are cut to fit well inside it, the first
/// one always kept, and to at most [`MAX_REJECTIONS`].
const MAX_DETAIL_BYTES: usize = 6 * 1024;

/// How many of `rejections` fit in the status details.
fn reasons_that_fit(rejections: &[Rejection]) -> usize {
    let mut total = 0;
    let keep = rejections
        .iter()
        .take(MAX_REJECTIONS)
        .take_while(|x| {
            total += x.field.len() + x.reason.len() + 16;
            total <= MAX_DETAIL_BYTES
        })
        .count();
    keep.max(1).min(rejections.len())
}

/// Status for a refused intake batch: the code of its first problem, a
/// message naming the batch, row and field, and the receipt (what was
/// committed before, how many rows were refused, and as many row-level
/// reasons as fit) in the status details. `rejections` holds every fault
/// found, so the count is of every refused row, not of the reasons sent.
pub fn refused(batch: u32, rejections: &[Rejection], mut receipt: pb::IntakeReceipt) -> Status {
    let code = match rejections
        .first()
        .map(|r| r.fault)
        .unwrap_or(Fault::Invalid)
    {
        Fault::Invalid => Code::InvalidArgument,
        Fault::Conflict => Code::AlreadyExists,
        Fault::Unknown => Code::NotFound,
        Fault::Order => Code::FailedPrecondition,
    };
    let rows: std::collections::BTreeSet<usize> = rejections.iter().map(|r| r.row).collect();
    receipt.rejected = rows.len() as u64;
    receipt.rejections = rejections[..reasons_that_fit(rejections)]
        .iter()
        .map(|r| pb::RowRejection {
            batch,
            row: r.row as u32,
            field: r.field.clone(),
            reason: r.reason.clone(),
        })
        .collect();
    let message = match rejections.first() {
        Some(r) => format!(
            "batch {batch} refused, nothing of it written: row {} field {}: {}{} ({} batches committed before it)",
            r.row,
            r.field,
            r.reason,
            if rows.len() > 1 {
                format!("; and {} more problem rows", rows.len() - 1)
            } else {
                String::new()
            },
            receipt.batches
        ),
        None => format!("batch {batch} refused"),
    };
    Status::with_details(code, message, receipt.encode_to_vec().into())
}

pub fn from_monitor(e: MonitorError) -> Status {
    match e {
        MonitorError::NotFound(m) => Status::not_found(m),
        MonitorError::AlreadyExists(m) => Status::already_exists(m),
        MonitorError::Invalid { field, reason } => {
            Status::invalid_argument(format!("{field}: {reason}"))
        }
        MonitorError::FailedPrecondition(m) => Status::failed_precondition(m),
        MonitorError::Rejected(r) => refused(0, &r, pb::IntakeReceipt::default()),
        MonitorError::Estimate(crate::estimate::EstimateError::Degenerate(d)) => {
            Status::failed_precondition(format!("the data cannot support the estimates: {d}"))
        }
        MonitorError::Estimate(e) => Status::internal(e.to_string()),
        MonitorError::Store(e) => {
            tracing::error!(error = %e, "store error");
            Status::unavailable(format!("store error: {e}"))
        }
        MonitorError::Internal(m) => Status::internal(m),
    }
}

/// A required field was left empty.
pub fn missing(field: &str) -> Status {
    Status::invalid_argument(format!("{field}: required"))
}

/// Decodes the receipt carried in a refused intake's status details.
pub fn receipt_of(status: &Status) -> Option<pb::IntakeReceipt> {
    pb::IntakeReceipt::decode(status.details()).ok()
}
