//! DatasetRegistry and ModelRegistry.

use std::sync::Arc;

use tonic::{Request, Response, Status};

use super::boards::window_of;
use super::pb;
use super::status::{from_monitor, missing};
use crate::auth::{caller, Access};
use crate::domain::DatasetSpec;
use crate::domain::StoredModel;
use crate::estimate::OutcomeKind;
use crate::limits::{exceeded, Limits};
use crate::monitor::{DatasetInfo, Monitor};

pub struct Datasets {
    pub monitor: Arc<Monitor>,
    pub limits: Limits,
}

pub struct Models {
    pub monitor: Arc<Monitor>,
    pub limits: Limits,
}

/// A dataset or model name within `limits.max_name_bytes`, checked before
/// the name is looked up (and echoed in a message).
fn bounded(l: &Limits, field: &str, name: &str) -> Result<(), Status> {
    if name.len() > l.max_name_bytes {
        return Err(Status::invalid_argument(format!(
            "{field}: {}",
            exceeded(
                "max_name_bytes",
                l.max_name_bytes,
                format!("{} bytes", name.len())
            )
        )));
    }
    Ok(())
}

impl TryFrom<pb::DatasetSpec> for DatasetSpec {
    type Error = Status;
    fn try_from(s: pb::DatasetSpec) -> Result<Self, Status> {
        let outcome_kind = match pb::OutcomeKind::try_from(s.outcome_kind) {
            Ok(pb::OutcomeKind::Continuous) => OutcomeKind::Continuous,
            Ok(pb::OutcomeKind::Binary) => OutcomeKind::Binary,
            _ => {
                return Err(Status::invalid_argument(
                    "outcome_kind: required (continuous or binary)",
                ))
            }
        };
        let overlap = s.overlap.unwrap_or_default();
        let recent = s.recent.unwrap_or_default();
        let recompute = s.recompute.unwrap_or_default();
        let arm_costs = arm_costs(&s.arms, &s.arm_costs)?;
        Ok(DatasetSpec {
            name: s.name,
            feature_names: s.feature_names,
            outcome_kind,
            treatment_cost: s.treatment_cost,
            folds: s.folds,
            overlap_eps: overlap.eps,
            overlap_max_extreme_share: overlap.max_extreme_share,
            overlap_min_effective_share: overlap.min_effective_share,
            recent_last_outcomes: recent.last_outcomes,
            recent_last_days: recent.last_days,
            recompute_every_outcomes: recompute.every_outcomes,
            recompute_every_seconds: recompute.every_seconds,
            refit_growth: recompute.refit_growth,
            refit_every_seconds: recompute.refit_every_seconds,
            rank_refresh_growth: recompute.rank_refresh_growth,
            alert_horizon: recompute.alert_horizon,
            min_coverage: s.min_coverage,
            alpha: s.alpha,
            seed: s.seed,
            arms: s.arms,
            arm_costs,
        })
    }
}

/// The wire's named costs as one cost per declared arm (0 where an arm is
/// not named); an unknown or repeated arm is refused, naming the entry.
fn arm_costs(arms: &[String], named: &[pb::ArmCost]) -> Result<Vec<f64>, Status> {
    if named.is_empty() {
        return Ok(Vec::new());
    }
    if arms.is_empty() {
        return Err(Status::invalid_argument(
            "arm_costs: arm costs need declared arms (a binary dataset has treatment_cost)",
        ));
    }
    let mut costs = vec![0.0; arms.len()];
    let mut seen = vec![false; arms.len()];
    for (j, c) in named.iter().enumerate() {
        let Some(k) = arms.iter().position(|a| *a == c.arm) else {
            return Err(Status::invalid_argument(format!(
                "arm_costs[{j}].arm: {:?} is not a declared arm",
                c.arm
            )));
        };
        if std::mem::replace(&mut seen[k], true) {
            return Err(Status::invalid_argument(format!(
                "arm_costs[{j}].arm: arm {:?} is given a cost twice",
                c.arm
            )));
        }
        costs[k] = c.cost;
    }
    Ok(costs)
}

impl From<&DatasetSpec> for pb::DatasetSpec {
    fn from(s: &DatasetSpec) -> Self {
        pb::DatasetSpec {
            name: s.name.clone(),
            feature_names: s.feature_names.clone(),
            outcome_kind: match s.outcome_kind {
                OutcomeKind::Continuous => pb::OutcomeKind::Continuous as i32,
                OutcomeKind::Binary => pb::OutcomeKind::Binary as i32,
            },
            treatment_cost: s.treatment_cost,
            folds: s.folds,
            overlap: Some(pb::OverlapThresholds {
                eps: s.overlap_eps,
                max_extreme_share: s.overlap_max_extreme_share,
                min_effective_share: s.overlap_min_effective_share,
            }),
            recent: Some(pb::RecentWindow {
                last_outcomes: s.recent_last_outcomes,
                last_days: s.recent_last_days,
            }),
            recompute: Some(pb::RecomputePolicy {
                every_outcomes: s.recompute_every_outcomes,
                every_seconds: s.recompute_every_seconds,
                refit_growth: s.refit_growth,
                refit_every_seconds: s.refit_every_seconds,
                rank_refresh_growth: s.rank_refresh_growth,
                alert_horizon: s.alert_horizon,
            }),
            min_coverage: s.min_coverage,
            alpha: s.alpha,
            seed: s.seed,
            arms: s.arms.clone(),
            arm_costs: s
                .arms
                .iter()
                .zip(&s.arm_costs)
                .map(|(arm, &cost)| pb::ArmCost {
                    arm: arm.clone(),
                    cost,
                })
                .collect(),
        }
    }
}

impl From<DatasetInfo> for pb::Dataset {
    fn from(d: DatasetInfo) -> Self {
        pb::Dataset {
            spec: Some((&d.stored.spec).into()),
            created_at_ms: d.stored.created_at_ms,
            units: d.units,
            outcomes: d.outcomes,
            predictions: d.predictions,
            active_models: d.active_models,
        }
    }
}

fn model_pb(dataset: &str, (m, count): (StoredModel, u64)) -> pb::Model {
    pb::Model {
        dataset: dataset.into(),
        name: m.name,
        version: m.version,
        description: m.description,
        registered_at_ms: m.registered_at_ms,
        retired_at_ms: m.retired_at_ms,
        predictions: count,
        blend: m.blend.map(|b| pb::ModelBlend {
            snapshot_id: b.snapshot_id,
            window: Some((&b.window).into()),
            members: b
                .members
                .into_iter()
                .map(|x| pb::BlendWeight {
                    model: x.model,
                    weight: x.weight,
                })
                .collect(),
        }),
    }
}

#[tonic::async_trait]
impl pb::dataset_registry_server::DatasetRegistry for Datasets {
    #[tracing::instrument(skip_all, fields(rpc = "CreateDataset"))]
    async fn create_dataset(
        &self,
        request: Request<pb::CreateDatasetRequest>,
    ) -> Result<Response<pb::Dataset>, Status> {
        caller(&request)?.require_admin()?;
        let spec: DatasetSpec = request
            .into_inner()
            .spec
            .ok_or_else(|| missing("spec"))?
            .try_into()?;
        let l = &self.limits;
        bounded(l, "name", &spec.name)?;
        if spec.feature_names.len() > l.max_features {
            return Err(Status::invalid_argument(format!(
                "feature_names: {}",
                exceeded(
                    "max_features",
                    l.max_features,
                    format!("{} features", spec.feature_names.len())
                )
            )));
        }
        // Counted before the creation, so concurrent creations of new names
        // near the limit may pass it by a few.
        let existing = self.monitor.handles();
        if existing.len() >= l.max_datasets && !existing.iter().any(|h| h.name == spec.name) {
            return Err(Status::resource_exhausted(format!(
                "datasets: {}",
                exceeded(
                    "max_datasets",
                    l.max_datasets,
                    format!("a new dataset would be number {}", existing.len() + 1)
                )
            )));
        }
        let info = self
            .monitor
            .create_dataset(spec)
            .await
            .map_err(from_monitor)?;
        Ok(Response::new(info.into()))
    }

    #[tracing::instrument(skip_all, fields(rpc = "GetDataset"))]
    async fn get_dataset(
        &self,
        request: Request<pb::GetDatasetRequest>,
    ) -> Result<Response<pb::Dataset>, Status> {
        let who = caller(&request)?;
        let name = request.into_inner().name;
        who.require(Access::Read, &name)?;
        bounded(&self.limits, "name", &name)?;
        let info = self.monitor.dataset(&name).await.map_err(from_monitor)?;
        Ok(Response::new(info.into()))
    }

    #[tracing::instrument(skip_all, fields(rpc = "ListDatasets"))]
    async fn list_datasets(
        &self,
        request: Request<pb::ListDatasetsRequest>,
    ) -> Result<Response<pb::ListDatasetsResponse>, Status> {
        // Every caller may list; each sees the datasets it can read.
        let who = caller(&request)?;
        let datasets = self
            .monitor
            .datasets()
            .await
            .into_iter()
            .filter(|d| who.allows(Access::Read, &d.stored.spec.name))
            .map(Into::into)
            .collect();
        Ok(Response::new(pb::ListDatasetsResponse { datasets }))
    }
}

impl Models {
    /// Refuses a new model name once the dataset has
    /// `limits.max_models_per_dataset` (a registered name passes: its
    /// re-send is a no-op or a conflict).
    async fn room_for(&self, dataset: &str, name: &str) -> Result<(), Status> {
        let l = &self.limits;
        let registered = self
            .monitor
            .models(dataset, true)
            .await
            .map_err(from_monitor)?;
        if registered.len() >= l.max_models_per_dataset
            && !registered.iter().any(|(m, _)| m.name == name)
        {
            return Err(Status::resource_exhausted(format!(
                "models: {}",
                exceeded(
                    "max_models_per_dataset",
                    l.max_models_per_dataset,
                    format!("a new model would be number {}", registered.len() + 1)
                )
            )));
        }
        Ok(())
    }
}

#[tonic::async_trait]
impl pb::model_registry_server::ModelRegistry for Models {
    #[tracing::instrument(skip_all, fields(rpc = "RegisterModel"))]
    async fn register_model(
        &self,
        request: Request<pb::RegisterModelRequest>,
    ) -> Result<Response<pb::Model>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Write, &r.dataset)?;
        let l = &self.limits;
        bounded(l, "dataset", &r.dataset)?;
        bounded(l, "name", &r.name)?;
        self.room_for(&r.dataset, &r.name).await?;
        let m = self
            .monitor
            .register_model(&r.dataset, &r.name, &r.version, &r.description)
            .await
            .map_err(from_monitor)?;
        Ok(Response::new(model_pb(&r.dataset, m)))
    }

    #[tracing::instrument(skip_all, fields(rpc = "RegisterBlend"))]
    async fn register_blend(
        &self,
        request: Request<pb::RegisterBlendRequest>,
    ) -> Result<Response<pb::Model>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Write, &r.dataset)?;
        let l = &self.limits;
        bounded(l, "dataset", &r.dataset)?;
        bounded(l, "name", &r.name)?;
        let window = window_of(&r.window)?;
        self.room_for(&r.dataset, &r.name).await?;
        let m = self
            .monitor
            .register_blend(&r.dataset, &window, &r.name, &r.version, &r.description)
            .await
            .map_err(from_monitor)?;
        Ok(Response::new(model_pb(&r.dataset, m)))
    }

    #[tracing::instrument(skip_all, fields(rpc = "ListModels"))]
    async fn list_models(
        &self,
        request: Request<pb::ListModelsRequest>,
    ) -> Result<Response<pb::ListModelsResponse>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Read, &r.dataset)?;
        bounded(&self.limits, "dataset", &r.dataset)?;
        let models = self
            .monitor
            .models(&r.dataset, r.include_retired)
            .await
            .map_err(from_monitor)?
            .into_iter()
            .map(|m| model_pb(&r.dataset, m))
            .collect();
        Ok(Response::new(pb::ListModelsResponse { models }))
    }

    #[tracing::instrument(skip_all, fields(rpc = "RetireModel"))]
    async fn retire_model(
        &self,
        request: Request<pb::RetireModelRequest>,
    ) -> Result<Response<pb::Model>, Status> {
        let who = caller(&request)?;
        let r = request.into_inner();
        who.require(Access::Write, &r.dataset)?;
        bounded(&self.limits, "dataset", &r.dataset)?;
        bounded(&self.limits, "name", &r.name)?;
        let m = self
            .monitor
            .retire_model(&r.dataset, &r.name)
            .await
            .map_err(from_monitor)?;
        Ok(Response::new(model_pb(&r.dataset, m)))
    }
}
