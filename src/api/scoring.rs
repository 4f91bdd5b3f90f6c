//! Scoring: recompute, scoreboards, history, overlap and comparisons.

use std::sync::Arc;

use tonic::{Request, Response, Status};

use super::pb;
use super::status::from_monitor;
use crate::auth::{caller, Access};
use crate::monitor::board::{history_keys, window_key};
use crate::monitor::Asked;
use crate::monitor::Monitor;

pub struct ScoringService {
    pub monitor: Arc<Monitor>,
}

fn key(w: &Option<pb::Window>) -> Result<String, Status> {
    let w = w.clone().unwrap_or_default();
    if pb::window::Kind::try_from(w.kind) == Ok(pb::window::Kind::Cohort) && w.cohort.is_empty() {
        return Err(Status::invalid_argument(
            "window.cohort: required for a cohort window",
        ));
    }
    Ok(window_key(&w))
}

impl ScoringService {
    /// The latest scoreboard of a request's dataset and window.
    async fn latest(
        &self,
        dataset: &str,
        w: &Option<pb::Window>,
    ) -> Result<pb::Scoreboard, Status> {
        self.monitor
            .scoreboard(dataset, &key(w)?)
            .await
            .map_err(from_monitor)
    }
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
                Asked {
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
        Ok(Response::new(board))
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
        let id = self.monitor.dataset_id(&r.dataset).map_err(from_monitor)?;
        let to = if r.to_ms == 0 { i64::MAX } else { r.to_ms };
        let rows = self
            .monitor
            .store()
            .history(id, &r.model, &r.estimator, &key(&r.window)?, r.from_ms, to)
            .await
            .map_err(|e| from_monitor(e.into()))?;
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
        let board = self.latest(&r.dataset, &r.window).await?;
        let json = serde_json::from_str::<serde_json::Value>(&board.json)
            .ok()
            .and_then(|v| v.get("overlap").map(|o| o.to_string()))
            .unwrap_or_default();
        Ok(Response::new(pb::OverlapReport {
            summary: board.overlap,
            json,
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
        let board = self.latest(&r.dataset, &r.window).await?;
        let doc: serde_json::Value = serde_json::from_str(&board.json).map_err(|_| {
            Status::failed_precondition("the window has no scores (see its degenerate state)")
        })?;
        let pairs = doc
            .get("pairwise")
            .and_then(|p| p.as_array())
            .cloned()
            .unwrap_or_default();
        for p in pairs {
            let (first, second) = (
                p["first"].as_str().unwrap_or(""),
                p["second"].as_str().unwrap_or(""),
            );
            let sign = if first == r.first && second == r.second {
                1.0
            } else if first == r.second && second == r.first {
                -1.0
            } else {
                continue;
            };
            let f = |k: &str| p[k].as_f64().unwrap_or(0.0);
            let (lo, hi) = if sign > 0.0 {
                (f("ci_low"), f("ci_high"))
            } else {
                (-f("ci_high"), -f("ci_low"))
            };
            return Ok(Response::new(pb::CompareModelsResponse {
                difference: Some(pb::Difference {
                    estimate: sign * f("estimate"),
                    se: f("se"),
                    ci_low: lo,
                    ci_high: hi,
                    p_value: f("p_value"),
                }),
                units: board.units,
            }));
        }
        Err(Status::not_found(format!(
            "{:?} and {:?} are not both ranked in this window",
            r.first, r.second
        )))
    }
}
