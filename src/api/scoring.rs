//! Scoring: recompute, scoreboards, history, overlap and comparisons.

use std::sync::Arc;

use tonic::{Request, Response, Status};

use super::boards::window_of;
use super::pb;
use super::status::from_monitor;
use crate::auth::{caller, Access};
use crate::domain::board::history_keys;
use crate::domain::{Board, Window};
use crate::estimate::compare;
use crate::estimate::scoreboard::CI_LEVEL;
use crate::estimate::stats::Estimate;
use crate::monitor::RecomputeOptions;
use crate::monitor::{board, Monitor};
use crate::store::HistoryQuery;

pub struct ScoringService {
    pub monitor: Arc<Monitor>,
}

impl ScoringService {
    /// The latest board of a request's dataset and window.
    async fn latest(&self, dataset: &str, w: &Option<pb::Window>) -> Result<Board, Status> {
        self.monitor
            .scoreboard(dataset, &window_of(w)?.key())
            .await
            .map_err(from_monitor)
    }
}

/// The board a comparison reads: a binary dataset's window board (no arm
/// named), or on a dataset with arms the board of the named arm's
/// contrast. Naming no arm there, or an arm the board lacks, is refused
/// with the arms there are.
fn contrast(board: Board, arm: &str) -> Result<Board, Status> {
    if board.contrasts.is_empty() {
        // A binary dataset's board, or a window without scores (whose
        // state the caller reports).
        if !arm.is_empty() && board.degenerate.is_empty() {
            return Err(Status::invalid_argument(format!(
                "arm: {arm:?} given, but the dataset declares no arms"
            )));
        }
        return Ok(board);
    }
    let arms: Vec<&str> = board.contrasts.iter().map(|c| c.arm.as_str()).collect();
    if arm.is_empty() {
        return Err(Status::invalid_argument(format!(
            "arm: the dataset has arms; name the contrast to compare on (one of {})",
            arms.join(", ")
        )));
    }
    let named = arms.join(", ");
    board
        .contrasts
        .into_iter()
        .find(|c| c.arm == arm)
        .ok_or_else(|| {
            Status::invalid_argument(format!(
                "arm: {arm:?} has no board against {} (one of {named})",
                board.reference_arm
            ))
        })
}

/// Checks a request's `arm` against the dataset's declared arms (the
/// reference first; none on a binary dataset): required on a dataset with
/// arms, where it names a contrast (any arm but the reference; another is
/// NOT_FOUND), and refused on a binary one. `what` ends the message that
/// asks for it ("whose history to read").
fn declared_arm(arms: &[String], arm: &str, what: &str) -> Result<(), Status> {
    let Some((reference, contrasts)) = arms.split_first() else {
        if arm.is_empty() {
            return Ok(());
        }
        return Err(Status::invalid_argument(format!(
            "arm: {arm:?} given, but the dataset declares no arms"
        )));
    };
    let named = contrasts.join(", ");
    if arm.is_empty() {
        return Err(Status::invalid_argument(format!(
            "arm: the dataset has arms; name the contrast {what} (one of {named})"
        )));
    }
    if !contrasts.iter().any(|a| a == arm) {
        return Err(Status::not_found(format!(
            "arm: {arm:?} has no contrast against {reference} (one of {named})"
        )));
    }
    Ok(())
}

#[tonic::async_trait]
impl pb::scoring_server::Scoring for ScoringService {
    #[tracing::instrument(skip_all, fields(rpc = "Recompute"))]
    async fn recompute(
        &self,
        request: Request<pb::RecomputeRequest>,
    ) -> Result<Response<pb::RecomputeResponse>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Write, &r.dataset)?;
        let s = self
            .monitor
            .recompute(
                &r.dataset,
                RecomputeOptions {
                    refit: r.refit,
                    refresh_ranks: r.refresh_ranks,
                },
            )
            .await
            .map_err(from_monitor)?;
        Ok(Response::new(pb::RecomputeResponse {
            snapshot_id: s.snapshot_id,
            refitted: s.refitted,
            units: s.units,
            millis: s.millis,
        }))
    }

    #[tracing::instrument(skip_all, fields(rpc = "GetScoreboard"))]
    async fn get_scoreboard(
        &self,
        request: Request<pb::GetScoreboardRequest>,
    ) -> Result<Response<pb::Scoreboard>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Read, &r.dataset)?;
        let board = self.latest(&r.dataset, &r.window).await?;
        Ok(Response::new(board.into()))
    }

    #[tracing::instrument(skip_all, fields(rpc = "GetHistory"))]
    async fn get_history(
        &self,
        request: Request<pb::GetHistoryRequest>,
    ) -> Result<Response<pb::GetHistoryResponse>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Read, &r.dataset)?;
        if !history_keys().any(|k| k == r.estimator) {
            return Err(Status::invalid_argument(format!(
                "estimator: {:?} is not one of {}",
                r.estimator,
                history_keys().collect::<Vec<_>>().join(", ")
            )));
        }
        let info = self
            .monitor
            .dataset(&r.dataset)
            .await
            .map_err(from_monitor)?;
        declared_arm(&info.stored.spec.arms, &r.arm, "whose history to read")?;
        let id = info.stored.id;
        let to = if r.to_ms == 0 { i64::MAX } else { r.to_ms };
        let rows = self
            .monitor
            .store()
            .history(&HistoryQuery {
                dataset_id: id,
                model: &r.model,
                key: &r.estimator,
                window: &window_of(&r.window)?.key(),
                arm: &r.arm,
                from_ms: r.from_ms,
                to_ms: to,
            })
            .await
            .map_err(|e| from_monitor(e.into()))?;
        // No history for a name never registered (retired models keep
        // theirs): say so, rather than answer an empty series.
        if rows.is_empty()
            && !self
                .monitor
                .models(&r.dataset, true)
                .await
                .map_err(from_monitor)?
                .iter()
                .any(|(m, _)| m.name == r.model)
        {
            return Err(Status::not_found(format!(
                "model: {:?} is not registered in dataset {:?}",
                r.model, r.dataset
            )));
        }
        Ok(Response::new(pb::GetHistoryResponse {
            points: rows
                .into_iter()
                .map(|h| pb::HistoryPoint {
                    snapshot_id: h.snapshot_id as u64,
                    computed_at_ms: h.computed_at_ms,
                    value: Some(pb::Estimate {
                        estimate: h.estimate,
                        se: h.se,
                    }),
                    rank: h.rank as u32,
                    units: h.units as u64,
                })
                .collect(),
        }))
    }

    #[tracing::instrument(skip_all, fields(rpc = "GetOverlap"))]
    async fn get_overlap(
        &self,
        request: Request<pb::GetOverlapRequest>,
    ) -> Result<Response<pb::OverlapReport>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Read, &r.dataset)?;
        let info = self
            .monitor
            .dataset(&r.dataset)
            .await
            .map_err(from_monitor)?;
        declared_arm(&info.stored.spec.arms, &r.arm, "whose overlap to read")?;
        let board = self.latest(&r.dataset, &r.window).await?;
        if r.arm.is_empty() {
            let json = detail(&board)
                .and_then(|v| v.get("overlap").map(|o| o.to_string()))
                .unwrap_or_default();
            return Ok(Response::new(pb::OverlapReport {
                summary: board.overlap.map(Into::into),
                json,
            }));
        }
        // A window of a dataset with arms that has no scores keeps no
        // contrast boards: like a binary window without scores, no summary.
        let Some(c) = board.contrasts.iter().find(|c| c.arm == r.arm) else {
            return Ok(Response::new(pb::OverlapReport::default()));
        };
        Ok(Response::new(pb::OverlapReport {
            summary: c.overlap.clone().map(Into::into),
            json: contrast_overlap_json(&board, c),
        }))
    }

    #[tracing::instrument(skip_all, fields(rpc = "CompareModels"))]
    async fn compare_models(
        &self,
        request: Request<pb::CompareModelsRequest>,
    ) -> Result<Response<pb::CompareModelsResponse>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Read, &r.dataset)?;
        let board = contrast(self.latest(&r.dataset, &r.window).await?, &r.arm)?;
        if !board.degenerate.is_empty() {
            return Err(Status::failed_precondition(
                "the window has no scores (see its degenerate state)",
            ));
        }
        let mut difference = board.compare(&r.first, &r.second).map(pb::Difference::from);
        let mut policy_difference = board
            .compare_policy(&r.first, &r.second)
            .map(pb::Difference::from);
        // Any other pair of the cumulative window, from the co-moments and
        // decisions its last recompute keeps: the intervals taken alone
        // (the joint ones are for the families a board keeps). A
        // contrast's board keeps neither.
        if (difference.is_none() || policy_difference.is_none())
            && board.window == Window::Cumulative
            && r.arm.is_empty()
        {
            if let Some((pehe, policy)) = self
                .monitor
                .cumulative_difference(&r.dataset, board.units, &r.first, &r.second)
                .await
                .map_err(from_monitor)?
            {
                difference = difference.or_else(|| Some(pointwise(pehe)));
                policy_difference = policy_difference.or_else(|| Some(pointwise(policy)));
            }
        }
        if let Some(difference) = difference {
            return Ok(Response::new(pb::CompareModelsResponse {
                difference: Some(difference),
                units: board.units,
                policy_difference,
            }));
        }
        Err(Status::not_found(format!(
            "no difference of {:?} and {:?} is kept in this window: both must be ranked; the \
             cumulative window answers any ranked pair between recomputes, the others keep every \
             pair among their top-ranked models and the front-runner against each of the others",
            r.first, r.second
        )))
    }
}

/// A board's detail document, parsed; None when it has none.
fn detail(board: &Board) -> Option<serde_json::Value> {
    serde_json::from_str(&board.detail_json).ok()
}

/// The overlap document of one contrast of a dataset with arms: the
/// contrast board's overlap report (its treated arm the contrast's arm,
/// its control arm the reference, under the conditional propensity
/// e_k / (e_k + e_0)) with the contrast's arms and, as
/// `generalized_propensity`, the two arms' entries of the top board's
/// generalized propensity (the reference first). Empty when the contrast
/// board has no report.
fn contrast_overlap_json(top: &Board, contrast: &Board) -> String {
    let Some(serde_json::Value::Object(mut doc)) =
        detail(contrast).and_then(|v| v.get("overlap").cloned())
    else {
        return String::new();
    };
    let per_arm: Vec<serde_json::Value> = detail(top)
        .and_then(|v| v.get("propensity").and_then(|p| p.as_array()).cloned())
        .unwrap_or_default();
    let entry = |arm: &str| {
        per_arm
            .iter()
            .find(|p| p.get("arm").and_then(|a| a.as_str()) == Some(arm))
            .cloned()
            .unwrap_or(serde_json::Value::Null)
    };
    doc.insert("arm".into(), contrast.arm.clone().into());
    doc.insert(
        "reference_arm".into(),
        contrast.reference_arm.clone().into(),
    );
    doc.insert(
        "generalized_propensity".into(),
        serde_json::Value::Array(vec![entry(&contrast.reference_arm), entry(&contrast.arm)]),
    );
    serde_json::Value::Object(doc).to_string()
}

/// A difference taken alone: its pointwise interval, no joint one.
fn pointwise(e: Estimate) -> pb::Difference {
    board::difference(&compare::Difference::from_estimate(e, CI_LEVEL)).into()
}
