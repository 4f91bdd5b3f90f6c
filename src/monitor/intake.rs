//! Intake: the three ingest methods, each a batch checked against the
//! cache, written to the store and appended to the cache, and their
//! counters.
//!
//! On a shared store the cache is caught up first (`follow.rs`), and a
//! batch another server numbered the same way a moment earlier is refused
//! by the store as a conflict: the cache catches up again and the batch is
//! checked and numbered once more ([`RETRIES`] times at most).

use std::sync::Arc;

use super::checks::{self, OutcomeIn, PredictionIn, Rejection, UnitIn};
use super::{now_ms, DatasetState, Monitor, MonitorError, MonitorResult};
use crate::metrics::{DatasetLabels, IngestLabels};
use crate::store::StoreError;

/// How often a batch refused as numbered from a stale view is tried again.
const RETRIES: usize = 4;

/// Whether a failed write should be checked and numbered again.
fn again(e: &MonitorError, shared: bool, tries: &mut usize) -> bool {
    if shared && matches!(e, MonitorError::Store(StoreError::Conflict(_))) && *tries < RETRIES {
        *tries += 1;
        true
    } else {
        false
    }
}

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
        let shared = self.store.shared();
        let mut tries = 0;
        let (accepted, duplicate) = loop {
            self.fresh(&mut st).await?;
            let checked = checks::check_units(&st.cache, rows)
                .map_err(|f| self.refused(dataset, "units", f, rows.len()))?;
            let (duplicate, new_rows) = (checked.duplicate, Arc::new(checked.new_rows));
            if new_rows.is_empty() {
                break (0, duplicate);
            }
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
            match written {
                Ok(()) => break (new_rows.len(), duplicate),
                Err(e) => {
                    st.cache.truncate_units(mark);
                    if !again(&e, shared, &mut tries) {
                        return Err(e);
                    }
                }
            }
        };
        self.update_counts(&st);
        drop(st);
        self.count_ingest(dataset, "units", "accepted", accepted);
        self.count_ingest(dataset, "units", "duplicate", duplicate);
        Ok(BatchCounts {
            accepted,
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
        let shared = self.store.shared();
        let mut tries = 0;
        let checked = loop {
            self.fresh(&mut st).await?;
            let checked = checks::check_outcomes(&st.cache, kind, rows)
                .map_err(|f| self.refused(dataset, "outcomes", f, rows.len()))?;
            if checked.new_rows.is_empty() {
                break checked;
            }
            match self
                .store
                .insert_outcomes(h.id, &checked.new_rows, now_ms())
                .await
                .map_err(MonitorError::from)
            {
                Ok(()) => {
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
                    break checked;
                }
                Err(e) if again(&e, shared, &mut tries) => {}
                Err(e) => return Err(e),
            }
        };
        let due = h.fence().is_some()
            && st.pending_outcomes >= u64::from(st.stored.spec.recompute_every_outcomes);
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
        let shared = self.store.shared();
        let mut tries = 0;
        let checked = loop {
            self.fresh(&mut st).await?;
            let checked = checks::check_predictions(&st.cache, rows)
                .map_err(|f| self.refused(dataset, "predictions", f, rows.len()))?;
            if checked.new_rows.is_empty() {
                break checked;
            }
            match self
                .store
                .insert_predictions(h.id, &checked.new_rows, now_ms())
                .await
                .map_err(MonitorError::from)
            {
                Ok(()) => {
                    for p in &checked.new_rows {
                        if let Some(m) = st.cache.model_by_id(p.model_id) {
                            st.cache.add_prediction(m, p);
                        }
                    }
                    break checked;
                }
                Err(e) if again(&e, shared, &mut tries) => {}
                Err(e) => return Err(e),
            }
        };
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
