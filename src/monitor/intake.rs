//! Intake: the three ingest methods, each a batch checked against the
//! cache, written to the store and appended to the cache, and their
//! counters.

use std::sync::Arc;

use super::checks::{self, OutcomeIn, PredictionIn, Rejection, UnitIn};
use super::{now_ms, DatasetState, Monitor, MonitorError, MonitorResult};
use crate::metrics::{DatasetLabels, IngestLabels};

/// Counts of one committed batch.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct BatchCounts {
    pub accepted: usize,
    pub duplicate: usize,
}

impl Monitor {
    fn count_ingest(&self, dataset: &str, kind: &str, result: &str, n: usize) {
        if n > 0 {
            self.metrics
                .ingest_rows
                .get_or_create(&IngestLabels {
                    dataset: dataset.into(),
                    kind: kind.into(),
                    result: result.into(),
                })
                .inc_by(n as u64);
        }
    }

    fn refused(
        &self,
        dataset: &str,
        kind: &str,
        faults: Vec<Rejection>,
        rows: usize,
    ) -> MonitorError {
        self.count_ingest(dataset, kind, "rejected", rows);
        MonitorError::Rejected(faults)
    }

    pub async fn ingest_units(&self, dataset: &str, rows: &[UnitIn]) -> MonitorResult<BatchCounts> {
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        let checked = checks::check_units(&st.cache, rows)
            .map_err(|f| self.refused(dataset, "units", f, rows.len()))?;
        let (duplicate, new_rows) = (checked.duplicate, Arc::new(checked.new_rows));
        if !new_rows.is_empty() {
            // The cache takes the batch while the store writes it, on two
            // threads. Nobody else sees the cache before the commit (the
            // lock is held throughout), and a failed write takes the batch
            // back out, so the cache still holds only what is on disk.
            let mark = st.cache.units_mark();
            let write = tokio::spawn({
                let (store, rows, id, at) =
                    (self.store.clone(), Arc::clone(&new_rows), h.id, now_ms());
                async move { store.insert_units(id, &rows, at).await }
            });
            st.cache.add_units(&new_rows);
            let written = match write.await {
                Ok(r) => r.map_err(MonitorError::from),
                Err(e) => Err(MonitorError::Internal(format!("unit write: {e}"))),
            };
            if let Err(e) = written {
                st.cache.truncate_units(mark);
                return Err(e);
            }
        }
        self.update_counts(&st);
        drop(st);
        self.count_ingest(dataset, "units", "accepted", new_rows.len());
        self.count_ingest(dataset, "units", "duplicate", duplicate);
        Ok(BatchCounts {
            accepted: new_rows.len(),
            duplicate,
        })
    }

    pub async fn ingest_outcomes(
        &self,
        dataset: &str,
        rows: &[OutcomeIn],
    ) -> MonitorResult<BatchCounts> {
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        let kind = st.stored.spec.outcome_kind;
        let checked = checks::check_outcomes(&st.cache, kind, rows)
            .map_err(|f| self.refused(dataset, "outcomes", f, rows.len()))?;
        if !checked.new_rows.is_empty() {
            self.store
                .insert_outcomes(h.id, &checked.new_rows, now_ms())
                .await?;
            for o in &checked.new_rows {
                st.cache.add_outcome(o);
            }
            st.pending_outcomes += checked.new_rows.len() as u64;
            self.metrics
                .last_outcome_seconds
                .get_or_create(&DatasetLabels {
                    dataset: dataset.into(),
                })
                .set(now_ms() as f64 / 1000.0);
        }
        let due = st.pending_outcomes >= u64::from(st.stored.spec.recompute_every_outcomes);
        self.update_counts(&st);
        drop(st);
        if due {
            h.wake.notify_one();
        }
        self.count_ingest(dataset, "outcomes", "accepted", checked.new_rows.len());
        self.count_ingest(dataset, "outcomes", "duplicate", checked.duplicate);
        Ok(BatchCounts {
            accepted: checked.new_rows.len(),
            duplicate: checked.duplicate,
        })
    }

    pub async fn ingest_predictions(
        &self,
        dataset: &str,
        rows: &[PredictionIn],
    ) -> MonitorResult<BatchCounts> {
        let h = self.handle(dataset)?;
        let mut st = h.state.lock().await;
        let checked = checks::check_predictions(&st.cache, rows)
            .map_err(|f| self.refused(dataset, "predictions", f, rows.len()))?;
        if !checked.new_rows.is_empty() {
            self.store
                .insert_predictions(h.id, &checked.new_rows, now_ms())
                .await?;
            for p in &checked.new_rows {
                if let Some(m) = st.cache.model_by_id(p.model_id) {
                    st.cache.add_prediction(m, p);
                }
            }
        }
        drop(st);
        self.count_ingest(dataset, "predictions", "accepted", checked.new_rows.len());
        self.count_ingest(dataset, "predictions", "duplicate", checked.duplicate);
        Ok(BatchCounts {
            accepted: checked.new_rows.len(),
            duplicate: checked.duplicate,
        })
    }

    pub(super) fn update_counts(&self, st: &DatasetState) {
        let l = DatasetLabels {
            dataset: st.stored.spec.name.clone(),
        };
        // Created at 0 so alert rules see the first failure as an increase.
        let _ = self.metrics.recompute_failures.get_or_create(&l);
        self.metrics
            .units
            .get_or_create(&l)
            .set(st.cache.units() as f64);
        self.metrics
            .outcomes
            .get_or_create(&l)
            .set(st.cache.outcomes() as f64);
    }
}
