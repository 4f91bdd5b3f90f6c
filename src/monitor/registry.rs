//! The registry: datasets and their models.

use std::sync::Arc;

use tracing::info;

use super::alerts::Raised;
use super::{now_ms, Boards, DatasetHandle, DatasetState, Monitor, MonitorError, MonitorResult};
use crate::domain::{spec, DatasetSpec, StoredDataset, StoredModel};
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
                return if col.model.version == version && col.model.description == description {
                    Ok((col.model.clone(), col.count))
                } else {
                    Err(MonitorError::AlreadyExists(format!(
                        "model {name:?} is registered with another version or description"
                    )))
                };
            }
            match self
                .store
                .register_model(h.id, name, version, description, now_ms())
                .await
            {
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
        drop(st);
        self.raise(
            &h,
            None,
            0,
            Raised {
                kind: "model_registered",
                summary: format!("{dataset}: model {name} registered (version {version:?})"),
                details: serde_json::json!({ "model": name, "version": version }),
            },
        )
        .await;
        Ok((model, 0))
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
            .map(|m| (m.model.clone(), m.count))
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
            return Ok((col.model.clone(), col.count));
        }
        let at = now_ms();
        self.store
            .retire_model(st.cache.models[m].model.id, at)
            .await?;
        st.cache.models[m].model.retired_at_ms = at;
        let out = (st.cache.models[m].model.clone(), st.cache.models[m].count);
        drop(st);
        // Its series go at once (the next recompute leaves it off the
        // boards; a server that does not own the dataset exports none).
        self.forget_models(dataset, &[name.to_string()]);
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
