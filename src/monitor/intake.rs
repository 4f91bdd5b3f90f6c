//! Intake: the three ingest methods, each a batch checked against the
//! cache, written to the store and appended to the cache, and their
//! counters.
//!
//! On a shared store the cache is caught up first (`follow.rs`); the store
//! takes one writer at a time per dataset and numbers a batch after
//! whatever another server appended since (the cache then reads both
//! back, in number order). A batch that repeats a key another server
//! stored a moment earlier is refused by the store as a conflict: the
//! cache catches up again and the batch is checked once more ([`RETRIES`]
//! times at most), so the repeat counts as a duplicate.

use std::sync::Arc;

use super::checks::{self, OutcomeIn, PredictionIn, Rejection, UnitIn};
use super::{now_ms, DatasetState, Monitor, MonitorError, MonitorResult};
use crate::metrics::{DatasetLabels, IngestLabels, KindLabels};
use crate::store::StoreError;

/// How often a batch refused for repeating a key another server stored a
/// moment earlier is tried again (the retry finds the key and counts it a
/// duplicate; more than one try is needed only when servers keep racing on
/// the same keys). With the backoff below, 8 tries span about 0.3 s.
const RETRIES: usize = 8;

/// Waits before try `tries`: 2 ms doubling to 64 ms, times a random factor
/// in [0.5, 1.5), so that servers refused by each other do not meet again
/// in step.
async fn back_off(tries: usize) {
    use rand::Rng;
    let base = 2.0 * f64::from(1u32 << tries.min(5));
    let factor: f64 = rand::thread_rng().gen_range(0.5..1.5);
    tokio::time::sleep(std::time::Duration::from_secs_f64(base * factor / 1000.0)).await;
}

/// Counts of one committed batch.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct BatchCounts {
    pub accepted: usize,
    pub duplicate: usize,
}

impl Monitor {
    /// Whether a failed write should be checked and numbered again (and
    /// counts it when so).
    fn again(&self, e: &MonitorError, dataset: &str, kind: &str, tries: &mut usize) -> bool {
        let conflict = matches!(e, MonitorError::Store(StoreError::Conflict(_)));
        if !(conflict && self.store.shared() && *tries < RETRIES) {
            return false;
        }
        *tries += 1;
        self.metrics
            .ingest_conflicts
            .get_or_create(&KindLabels {
                dataset: dataset.into(),
                kind: kind.into(),
            })
            .inc();
        true
    }

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
                Ok(first) if first == new_rows[0].seq => break (new_rows.len(), duplicate),
                Ok(_) => {
                    // Another server appended first and the store numbered
                    // the batch after its rows: the cache reads both back,
                    // in number order.
                    st.cache.truncate_units(mark);
                    self.catch_up(&mut st).await?;
                    break (new_rows.len(), duplicate);
                }
                Err(e) => {
                    st.cache.truncate_units(mark);
                    if !self.again(&e, dataset, "units", &mut tries) {
                        return Err(e);
                    }
                    back_off(tries).await;
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
                Ok(first) => {
                    if first == checked.new_rows[0].seq {
                        for o in &checked.new_rows {
                            st.cache.add_outcome(o);
                        }
                        st.pending_outcomes += checked.new_rows.len() as u64;
                    } else {
                        // Numbered after another server's rows: read back
                        // (the catch-up counts them as pending).
                        self.catch_up(&mut st).await?;
                    }
                    self.metrics
                        .last_outcome_seconds
                        .get_or_create(&DatasetLabels {
                            dataset: dataset.into(),
                        })
                        .set(now_ms() as f64 / 1000.0);
                    break checked;
                }
                Err(e) if self.again(&e, dataset, "outcomes", &mut tries) => back_off(tries).await,
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
                Ok(first) if first == checked.new_rows[0].seq => {
                    for p in &checked.new_rows {
                        if let Some(m) = st.cache.model_by_id(p.model_id) {
                            st.cache.add_prediction(m, p);
                        }
                    }
                    break checked;
                }
                Ok(_) => {
                    // Numbered after another server's rows: read back.
                    self.catch_up(&mut st).await?;
                    break checked;
                }
                Err(e) if self.again(&e, dataset, "predictions", &mut tries) => {
                    back_off(tries).await
                }
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
