//! The registry: datasets and their models.

use std::sync::Arc;

use tracing::info;

use super::alerts::Raised;
use super::{now_ms, Boards, DatasetHandle, DatasetState, Monitor, MonitorError, MonitorResult};
use crate::domain::{
    spec, BlendDefinition, BlendMember, DatasetSpec, StoredDataset, StoredModel, Window,
};
use crate::estimate::data::{CONSTANT_EFFECT, ZERO_EFFECT};
use crate::store::StoreError;

/// A dataset with its counts, for the registry API.
#[derive(Debug, Clone)]
pub struct DatasetInfo {
    pub stored: StoredDataset,
    pub units: u64,
    pub outcomes: u64,
    pub predictions: u64,
    pub active_models: u32,
}

impl DatasetState {
    fn info(&self) -> DatasetInfo {
        DatasetInfo {
            stored: self.stored.clone(),
            units: self.cache.units() as u64,
            outcomes: self.cache.outcomes() as u64,
            predictions: self.cache.predictions(),
            active_models: self.cache.models.iter().filter(|m| m.active()).count() as u32,
        }
    }
}

fn reserved(name: &str) -> bool {
    name == ZERO_EFFECT || name == CONSTANT_EFFECT
}

impl Monitor {
    pub async fn create_dataset(self: &Arc<Self>, spec: DatasetSpec) -> MonitorResult<DatasetInfo> {
        let spec = spec
            .normalized()
            .map_err(|(field, reason)| MonitorError::Invalid { field, reason })?;
        let guard = self.create.lock().await;
        if let Ok(h) = self.handle(&spec.name) {
            return Self::same_spec(&h, &spec).await;
        }
        let stored = match self.store.create_dataset(&spec, now_ms()).await {
            Ok(stored) => stored,
            Err(StoreError::Conflict(_)) if self.store.shared() => {
                // Another server created it a moment ago: take it in, then
                // answer as for a dataset this server knew.
                self.adopt_new_datasets(&guard).await?;
                let h = self.handle(&spec.name)?;
                return Self::same_spec(&h, &spec).await;
            }
            Err(e) => return Err(e.into()),
        };
        let h = self.install(DatasetState::empty(stored), Boards::new());
        self.claim(&h).await?;
        let info = {
            let st = h.state.lock().await;
            self.update_counts(&st);
            st.info()
        };
        self.spawn_scheduler(h);
        info!(dataset = %spec.name, features = spec.feature_names.len(), "dataset created");
        Ok(info)
    }

    /// A create of a dataset that exists: the same settings are a no-op.
    async fn same_spec(h: &DatasetHandle, spec: &DatasetSpec) -> MonitorResult<DatasetInfo> {
        let st = h.state.lock().await;
        if st.stored.spec == *spec {
            Ok(st.info())
        } else {
            Err(MonitorError::AlreadyExists(format!(
                "dataset {:?} exists with other settings",
                spec.name
            )))
        }
    }

    pub async fn dataset(&self, name: &str) -> MonitorResult<DatasetInfo> {
        Ok(self.handle(name)?.state.lock().await.info())
    }

    pub async fn datasets(&self) -> Vec<DatasetInfo> {
        let mut out = Vec::new();
        for h in self.handles() {
            out.push(h.state.lock().await.info());
        }
        out
    }

    pub async fn register_model(
        &self,
        dataset: &str,
        name: &str,
        version: &str,
        description: &str,
    ) -> MonitorResult<(StoredModel, u64)> {
        self.register(dataset, name, version, description, None)
            .await
    }

    /// Registers the blend of the latest board of a window as a model
    /// named `name`, its members and weights frozen as the board has them.
    /// The cache then derives its predictions (see [`BlendDefinition`]).
    /// A member that is itself a registered blend is replaced by its own
    /// members, their weights scaled by its weight: the same predictions
    /// on every unit the nested blend predicts, and a definition over
    /// models with sent predictions only.
    pub async fn register_blend(
        &self,
        dataset: &str,
        window: &Window,
        name: &str,
        version: &str,
        description: &str,
    ) -> MonitorResult<(StoredModel, u64)> {
        let h = self.handle(dataset)?;
        let window = window.key();
        let board = h.boards().get(&window).cloned().ok_or_else(|| {
            MonitorError::FailedPrecondition(format!(
                "dataset {dataset:?} has no board for window {window:?} yet (recompute first)"
            ))
        })?;
        let Some(blend) = board.blend.as_ref() else {
            return Err(MonitorError::FailedPrecondition(format!(
                "the {window} board of snapshot {} has no blend (it needs at least two ranked \
                 models and scores)",
                board.snapshot_id
            )));
        };
        let members = {
            let st = h.state.lock().await;
            let mut members: Vec<BlendMember> = Vec::new();
            for share in &blend.weights {
                let Some(&m) = st.cache.model_index.get(&share.model) else {
                    return Err(MonitorError::FailedPrecondition(format!(
                        "blend member {:?} is not registered",
                        share.model
                    )));
                };
                let col = &st.cache.models[m];
                if !col.active() {
                    return Err(MonitorError::FailedPrecondition(format!(
                        "blend member {:?} was retired after snapshot {}: recompute, then \
                         register the new board's blend",
                        share.model, board.snapshot_id
                    )));
                }
                let parts = match &col.model.blend {
                    Some(nested) => nested
                        .members
                        .iter()
                        .map(|x| (x.model_id, x.model.clone(), share.weight * x.weight))
                        .collect(),
                    None => vec![(col.model.id, col.model.name.clone(), share.weight)],
                };
                for (model_id, model, weight) in parts {
                    match members.iter_mut().find(|x| x.model_id == model_id) {
                        Some(x) => x.weight += weight,
                        None => members.push(BlendMember {
                            model_id,
                            model,
                            weight,
                        }),
                    }
                }
            }
            members.retain(|x| x.weight > 0.0);
            members.sort_by(|a, b| b.weight.total_cmp(&a.weight));
            members
        };
        let definition = BlendDefinition {
            snapshot_id: board.snapshot_id,
            window: board.window.clone(),
            members,
        };
        self.register(dataset, name, version, description, Some(definition))
            .await
    }

    /// A model sent predictions (`blend` None) or a registered blend. An
    /// identical re-send is a no-op: the same name, version and description
    /// (and, for a blend, a model registered as a blend: its definition
    /// stays the one frozen at the first registration).
    async fn register(
        &self,
        dataset: &str,
        name: &str,
        version: &str,
        description: &str,
        blend: Option<BlendDefinition>,
    ) -> MonitorResult<(StoredModel, u64)> {
        spec::check_name("name", name).map_err(|reason| MonitorError::Invalid {
            field: "name".into(),
            reason,
        })?;
        if reserved(name) {
            return Err(MonitorError::Invalid {
                field: "name".into(),
                reason: format!("{name:?} is reserved for a built-in baseline"),
            });
        }
        for (field, v) in [("version", version), ("description", description)] {
            if v.len() > 4096 || v.chars().any(|c| c.is_control() && c != '\n') {
                return Err(MonitorError::Invalid {
                    field: field.into(),
                    reason: "must be at most 4096 bytes without control characters".into(),
                });
            }
        }
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        self.fresh(&mut st).await?;
        let mut retried = false;
        let model = loop {
            if let Some(&m) = st.cache.model_index.get(name) {
                let col = &st.cache.models[m];
                return if col.model.version == version
                    && col.model.description == description
                    && col.model.blend.is_some() == blend.is_some()
                {
                    Ok((col.model.clone(), col.total()))
                } else {
                    Err(MonitorError::AlreadyExists(format!(
                        "model {name:?} is registered with another version or description{}",
                        if col.model.blend.is_some() == blend.is_some() {
                            ""
                        } else {
                            ", or as another kind (sent predictions or a blend)"
                        }
                    )))
                };
            }
            let stored = match &blend {
                None => {
                    self.store
                        .register_model(h.id, name, version, description, now_ms())
                        .await
                }
                Some(b) => {
                    self.store
                        .register_blend_model(h.id, name, version, description, now_ms(), b)
                        .await
                }
            };
            match stored {
                Ok(model) => break model,
                // Registered by another server a moment ago: read it and
                // answer as for a model this server knew.
                Err(StoreError::Conflict(_)) if self.store.shared() && !retried => {
                    retried = true;
                    self.catch_up(&mut st).await?;
                }
                Err(e) => return Err(e.into()),
            }
        };
        st.cache.add_model(model.clone());
        let count = st.cache.models[st.cache.models.len() - 1].count;
        drop(st);
        let (summary, details) = match &model.blend {
            None => (
                format!("{dataset}: model {name} registered (version {version:?})"),
                serde_json::json!({ "model": name, "version": version }),
            ),
            Some(b) => (
                format!(
                    "{dataset}: blend {name} registered from the {} board of snapshot {} \
                     ({} models)",
                    b.window.key(),
                    b.snapshot_id,
                    b.members.len()
                ),
                serde_json::json!({ "model": name, "version": version, "blend": b }),
            ),
        };
        self.raise(
            &h,
            None,
            0,
            Raised {
                kind: "model_registered",
                summary,
                details,
            },
        )
        .await;
        Ok((model, count))
    }

    pub async fn models(
        &self,
        dataset: &str,
        include_retired: bool,
    ) -> MonitorResult<Vec<(StoredModel, u64)>> {
        let h = self.handle(dataset)?;
        let st = h.state.lock().await;
        Ok(st
            .cache
            .models
            .iter()
            .filter(|m| include_retired || m.active())
            .map(|m| (m.model.clone(), m.total()))
            .collect())
    }

    pub async fn retire_model(
        &self,
        dataset: &str,
        name: &str,
    ) -> MonitorResult<(StoredModel, u64)> {
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        self.fresh(&mut st).await?;
        let Some(&m) = st.cache.model_index.get(name) else {
            return Err(MonitorError::NotFound(format!(
                "model {name:?} is not registered"
            )));
        };
        if !st.cache.models[m].active() {
            let col = &st.cache.models[m];
            return Ok((col.model.clone(), col.total()));
        }
        let at = now_ms();
        self.store
            .retire_model(st.cache.models[m].model.id, at)
            .await?;
        st.cache.models[m].model.retired_at_ms = at;
        let out = (st.cache.models[m].model.clone(), st.cache.models[m].total());
        let contrasts: Vec<String> = st.cache.arms.iter().skip(1).cloned().collect();
        drop(st);
        // Its series go at once, every contrast's too (the next recompute
        // leaves it off the boards; a server that does not own the dataset
        // exports none).
        self.forget_models(dataset, &contrasts, &[name.to_string()]);
        self.raise(
            &h,
            None,
            0,
            Raised {
                kind: "model_retired",
                summary: format!("{dataset}: model {name} retired"),
                details: serde_json::json!({ "model": name }),
            },
        )
        .await;
        Ok(out)
    }
}
