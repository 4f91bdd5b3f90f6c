//! Catching up with the other servers on a shared store: new datasets, the
//! rows other servers accepted, models registered or retired elsewhere, the
//! owner's boards and everyone's events.
//!
//! Rows are read from the cache's own counts on ("every unit from number n
//! on"): the store numbers rows per dataset and refuses a number twice, so
//! what is committed is always a prefix without gaps (see
//! [`crate::store`]). A catch-up runs under the dataset's lock, before
//! every intake check on a shared store and every [`FOLLOW_EVERY`] in the
//! background, so the owner's recomputes see rows accepted anywhere.
//!
//! On SQLite, where one server writes everything, only a rebuild reads
//! rows this way (from 0); nothing else here runs.

use std::collections::BTreeSet;
use std::sync::Arc;
use std::time::Duration;

use tokio::sync::MutexGuard;
use tokio_stream::StreamExt;
use tracing::warn;

use super::{Boards, DatasetHandle, DatasetState, Monitor, MonitorResult};
use crate::domain::EventRecord;
use crate::store::{StoreError, Tip};

/// How often a server on a shared store reads what the others wrote.
pub const FOLLOW_EVERY: Duration = Duration::from_millis(250);

/// Most events read per dataset per round.
const EVENT_PAGE: i64 = 500;

/// The events of one dataset this server has passed on: those up to
/// `after`, and those it raised itself above it (which its own streams had
/// at once).
#[derive(Debug, Default)]
pub(super) struct EventsSeen {
    after: i64,
    here: BTreeSet<i64>,
}

impl EventsSeen {
    pub(super) fn start_after(&mut self, id: i64) {
        self.after = self.after.max(id);
    }

    pub(super) fn raised_here(&mut self, id: i64) {
        if id > self.after {
            self.here.insert(id);
        }
    }

    /// The events among `read` (ids above `after`, in order) not yet
    /// passed on.
    fn news(&mut self, read: Vec<EventRecord>) -> Vec<EventRecord> {
        let mut out = Vec::new();
        for e in read {
            if e.id <= self.after {
                continue;
            }
            self.after = e.id;
            if !self.here.remove(&e.id) {
                out.push(e);
            }
        }
        let after = self.after;
        self.here.retain(|&id| id > after);
        out
    }
}

impl Monitor {
    /// Catches a dataset's state up before a check, on a shared store.
    pub(super) async fn fresh(&self, st: &mut DatasetState) -> MonitorResult<()> {
        if self.store.shared() {
            self.catch_up(st).await?;
        }
        Ok(())
    }

    /// Reads the rows and models stored since the state was last caught up
    /// (all of them, for a rebuild). Outcomes count as pending for the
    /// owner's scheduler. Returns how many outcomes were new.
    pub(super) async fn catch_up(&self, st: &mut DatasetState) -> MonitorResult<usize> {
        let id = st.stored.id;
        let before = st.cache.units();
        // On a shared store one statement says which tables moved; most
        // catch-ups before an intake check find nothing new and stop here.
        // A table written after the tip was read waits for the next
        // catch-up (an intake check numbered from the older view is
        // renumbered by the store and read back). With one writer only a
        // rebuild catches up, from nothing, so every table is read and the
        // tip's counting would be start-up work for nothing.
        let tip = if self.store.shared() {
            self.store.tip(id).await?
        } else {
            Tip::everything()
        };
        let retired = st
            .cache
            .models
            .iter()
            .filter(|m| m.model.retired_at_ms != 0)
            .count() as i64;
        let models_moved = tip.models != st.cache.models.len() as i64 || tip.retired != retired;
        if tip.units == before as i64
            && tip.outcomes == st.cache.next_outcome_seq()
            && tip.predictions == st.cache.next_prediction_seq()
            && !models_moved
        {
            return Ok(0);
        }
        if tip.units > before as i64 {
            let mut units = self.store.units(id, before as i64);
            while let Some(u) = units.next().await {
                let u = u?;
                // Keys are unique by intake's check (one SQLite server) or
                // by a unique index (PostgreSQL): a store that holds one
                // twice was written by something else, and is refused
                // rather than served.
                if let Some(first) = st.cache.unit_of(&u.key) {
                    return Err(StoreError::Corrupt(format!(
                        "dataset {:?}: unit key {:?} is stored twice (units {first} and {})",
                        st.stored.spec.name, u.key, u.seq
                    ))
                    .into());
                }
                st.cache.add_unit(&u);
            }
        }
        // Tables are read one after another while other servers write: an
        // outcome or prediction read now can name a unit or model committed
        // after its table was read. Each is taken up to the first such row,
        // so that what the cache holds stays a prefix in number order; the
        // rest comes at the next catch-up.
        let known_units = st.cache.units() as i64;
        let mut new_outcomes = 0;
        if tip.outcomes > st.cache.next_outcome_seq() {
            let mut outcomes = self.store.outcomes(id, st.cache.next_outcome_seq());
            while let Some(o) = outcomes.next().await {
                let o = o?;
                if o.unit_seq >= known_units {
                    break;
                }
                st.cache.add_outcome(&o);
                new_outcomes += 1;
            }
        }
        if models_moved {
            for m in self.store.models(id).await? {
                match st.cache.model_by_id(m.id) {
                    Some(i) => st.cache.models[i].model.retired_at_ms = m.retired_at_ms,
                    None => st.cache.add_model(m),
                }
            }
        }
        if tip.predictions > st.cache.next_prediction_seq() {
            let mut predictions = self.store.predictions(id, st.cache.next_prediction_seq());
            // A rebuild reads the rows model by model: the last model found
            // saves a search of the model list per row.
            let mut last: Option<(i64, usize)> = None;
            while let Some(p) = predictions.next().await {
                let p = p?;
                let m = match last {
                    Some((model_id, m)) if model_id == p.model_id => Some(m),
                    _ => st.cache.model_by_id(p.model_id),
                };
                let Some(m) = m.filter(|_| p.unit_seq < known_units) else {
                    break;
                };
                last = Some((p.model_id, m));
                st.cache.add_prediction(m, &p);
            }
        }
        st.pending_outcomes += new_outcomes as u64;
        if new_outcomes > 0 || st.cache.units() > before {
            self.update_counts(st);
        }
        Ok(new_outcomes)
    }

    /// Takes in datasets other servers created. The caller holds the
    /// registry's create lock, so a name is installed once.
    pub(super) async fn adopt_new_datasets(
        self: &Arc<Self>,
        _create: &MutexGuard<'_, ()>,
    ) -> MonitorResult<()> {
        for stored in self.store.datasets().await? {
            if self.handle(&stored.spec.name).is_ok() {
                continue;
            }
            let h = self.adopt(stored).await?;
            self.spawn_scheduler(h);
        }
        Ok(())
    }

    /// Reads what the other servers wrote, every [`FOLLOW_EVERY`], until
    /// shutdown.
    pub(super) async fn follow(self: Arc<Self>) {
        let mut shutdown = self.shutdown.subscribe();
        let mut tick = tokio::time::interval(FOLLOW_EVERY);
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tokio::select! {
                _ = shutdown.recv() => return,
                _ = tick.tick() => {}
            }
            if let Err(e) = self.follow_round().await {
                warn!(error = %e, "reading the other servers' writes failed; the next round retries");
            }
        }
    }

    async fn follow_round(self: &Arc<Self>) -> MonitorResult<()> {
        {
            let guard = self.create.lock().await;
            self.adopt_new_datasets(&guard).await?;
        }
        for h in self.handles() {
            let owner = h.fence().is_some();
            let due = {
                let mut st = h.state.lock().await;
                self.catch_up(&mut st).await?;
                owner && st.pending_outcomes >= u64::from(st.stored.spec.recompute_every_outcomes)
            };
            if due {
                h.wake.notify_one();
            }
            if owner {
                self.answer_asks(&h).await?;
            } else {
                self.follow_boards(&h).await?;
            }
            self.follow_events(&h).await?;
        }
        Ok(())
    }

    /// A follower's boards: the owner's latest, once it stores a newer
    /// snapshot.
    async fn follow_boards(&self, h: &DatasetHandle) -> MonitorResult<()> {
        let latest = self.store.latest_snapshot_id(h.id).await?;
        let shown = h
            .boards()
            .values()
            .map(|b| b.snapshot_id as i64)
            .max()
            .unwrap_or(0);
        if latest <= shown {
            return Ok(());
        }
        let mut boards = Boards::new();
        for b in self.store.latest_boards(h.id).await? {
            boards.insert(b.window.key(), b);
        }
        let _st = h.state.lock().await;
        h.publish(boards);
        Ok(())
    }

    /// Passes the events other servers stored to this server's streams.
    async fn follow_events(&self, h: &DatasetHandle) -> MonitorResult<()> {
        loop {
            let after = h
                .events_seen
                .lock()
                .unwrap_or_else(|e| e.into_inner())
                .after;
            let read = self.store.events(Some(h.id), after, EVENT_PAGE).await?;
            let full = read.len() as i64 == EVENT_PAGE;
            let news = h
                .events_seen
                .lock()
                .unwrap_or_else(|e| e.into_inner())
                .news(read);
            for e in news {
                let _ = self.events.send(e);
            }
            if !full {
                return Ok(());
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn event(id: i64) -> EventRecord {
        EventRecord {
            id,
            dataset: "d".into(),
            kind: "k".into(),
            at_ms: 0,
            snapshot_id: 0,
            summary: String::new(),
            details_json: String::new(),
        }
    }

    #[test]
    fn events_raised_here_are_not_passed_on_twice() {
        let mut seen = EventsSeen::default();
        seen.start_after(3);
        seen.raised_here(5);
        let ids = |v: Vec<EventRecord>| v.into_iter().map(|e| e.id).collect::<Vec<_>>();
        assert_eq!(ids(seen.news((2..=6).map(event).collect())), vec![4, 6]);
        assert!(seen.here.is_empty());
        assert_eq!(ids(seen.news((5..=7).map(event).collect())), vec![7]);
    }
}
