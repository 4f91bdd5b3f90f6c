//! Which datasets this server owns. Every server takes every call; only a
//! dataset's owner recomputes it, stores its fits and snapshots and raises
//! its alerts' events. Ownership is a lease in the store, granted with an
//! epoch larger than any before it and checked by every fenced write (see
//! [`crate::store::LeaseLog`]).
//!
//! Timing, for a lease period L (`lease_seconds`, 10 s by default): one
//! task looks every L/20 (the tick). It renews what it owns every L/4, for
//! L - 2 ticks, and tries to take datasets whose lease lapsed. An owner that
//! dies is replaced at most L - 2 ticks after its last renewal plus one
//! tick of the taker's, so within L. An owner that cannot renew stops
//! acting on its own clock a tick before the store's lease lapses: its
//! [`Held::fence`] goes empty, so it starts no fenced write it would then
//! have to lose. And were it to write anyway, the epoch check refuses it.
//!
//! On SQLite one server holds the directory (its claim), so it takes every
//! lease at start; the same code runs, never loses one, and keeps no local
//! deadline.

use std::sync::Arc;
use std::time::{Duration, Instant};

use tracing::{info, warn};

use super::{
    now_ms, DatasetHandle, Monitor, MonitorError, MonitorResult, RecomputeOptions, RecomputeSummary,
};
use crate::metrics::http::Ownership;
use crate::metrics::DatasetLabels;
use crate::store::{Fence, RecomputeAsk};

/// How long a recompute asked of another server's dataset waits for the
/// owner's answer.
const ASK_WAIT: Duration = Duration::from_secs(600);

/// How long a stopping server waits for its leases to be handed back.
const LEASE_RELEASE_WAIT: Duration = Duration::from_secs(10);

/// An owner's answer to a recompute asked at another server, as stored.
#[derive(Debug, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
enum Answer {
    Done {
        snapshot_id: u64,
        refitted: bool,
        units: u64,
        millis: f64,
    },
    /// The recompute could not run as asked (no outcomes yet, data that
    /// cannot support the estimates): the caller's to fix.
    Refused(String),
    Failed(String),
}

impl Answer {
    fn of(result: &MonitorResult<RecomputeSummary>) -> Self {
        match result {
            Ok(s) => Answer::Done {
                snapshot_id: s.snapshot_id,
                refitted: s.refitted,
                units: s.units,
                millis: s.millis,
            },
            Err(e @ MonitorError::FailedPrecondition(_)) => Answer::Refused(e.to_string()),
            Err(MonitorError::Estimate(crate::estimate::EstimateError::Degenerate(d))) => {
                Answer::Refused(format!("the data cannot support the estimates: {d}"))
            }
            Err(e) => Answer::Failed(e.to_string()),
        }
    }

    fn result(self) -> MonitorResult<RecomputeSummary> {
        match self {
            Answer::Done {
                snapshot_id,
                refitted,
                units,
                millis,
            } => Ok(RecomputeSummary {
                snapshot_id,
                refitted,
                units,
                millis,
            }),
            Answer::Refused(m) => Err(MonitorError::FailedPrecondition(m)),
            Answer::Failed(m) => Err(MonitorError::Internal(format!(
                "the dataset's owner could not recompute it: {m}"
            ))),
        }
    }
}

/// This server among the servers sharing a store.
#[derive(Debug, Clone)]
pub struct Replica {
    /// Unique per process: the name the operator gave (or the host's name),
    /// the process id and a random suffix, so a restarted server never
    /// mistakes its predecessor's lease for its own.
    pub holder: String,
    /// The lease period: how long a dataset may go without a live owner.
    pub lease: Duration,
    /// What `/readyz` shows of this server's leases.
    pub ownership: Arc<Ownership>,
}

impl Replica {
    pub fn new(name: Option<&str>, lease: Duration, ownership: Arc<Ownership>) -> Self {
        let base = name
            .map(str::to_string)
            .or_else(|| std::env::var("HOSTNAME").ok())
            .or_else(|| {
                std::fs::read_to_string("/etc/hostname")
                    .ok()
                    .map(|h| h.trim().to_string())
            })
            .filter(|n| !n.is_empty())
            .unwrap_or_else(|| "plumbline".into());
        let suffix: u32 = rand::random();
        let holder = format!("{base}/{}/{suffix:08x}", std::process::id());
        ownership.set_holder(&holder);
        Self {
            holder,
            lease,
            ownership,
        }
    }

    /// How often the lease task looks.
    fn tick(&self) -> Duration {
        (self.lease / 20).max(Duration::from_millis(20))
    }

    /// How long each grant or renewal lasts in the store.
    fn ttl(&self) -> Duration {
        self.lease.saturating_sub(self.tick() * 2)
    }

    fn ttl_ms(&self) -> i64 {
        self.ttl().as_millis() as i64
    }

    fn renew_every(&self) -> Duration {
        self.lease / 4
    }
}

/// This server's hold on one dataset's lease.
#[derive(Debug)]
pub(super) struct Held {
    fence: Option<Fence>,
    /// False while the state is being rebuilt for the owner: the lease is
    /// renewed, but nothing acts on it yet.
    active: bool,
    /// When the last grant or renewal that succeeded was sent: the store's
    /// lease runs from a moment after this.
    since: Instant,
    /// Until when, on this server's clock, it may act on the lease.
    until: Instant,
}

impl Held {
    pub(super) fn none() -> Self {
        let now = Instant::now();
        Self {
            fence: None,
            active: false,
            since: now,
            until: now,
        }
    }

    /// The fence, while the lease is held, active and not past its local
    /// deadline.
    pub(super) fn fence(&self) -> Option<Fence> {
        self.fence
            .filter(|_| self.active && Instant::now() < self.until)
    }
}

impl Monitor {
    /// Takes a dataset's lease if it is free (a stored dataset at start, a
    /// new one, or one whose owner let its lease lapse).
    async fn try_lease(&self, dataset_id: i64) -> MonitorResult<Option<Fence>> {
        Ok(self
            .store
            .acquire_lease(dataset_id, &self.replica.holder, self.replica.ttl_ms())
            .await?)
    }

    /// Records a grant or renewal sent at `sent`. The local deadline is a
    /// tick short of the store's lease: stop acting before anyone else may
    /// start.
    fn hold(&self, h: &DatasetHandle, fence: Fence, sent: Instant, active: bool) {
        // One server per SQLite store (its claim on the directory): nobody
        // can take a lease it lets lapse, so a slow renewal (the writer busy
        // with a large batch) must not stop its recomputes.
        let local = if self.store.shared() {
            self.replica.ttl().saturating_sub(self.replica.tick())
        } else {
            Duration::from_secs(365 * 24 * 3600)
        };
        let mut held = h.lease.lock().unwrap_or_else(|e| e.into_inner());
        *held = Held {
            fence: Some(fence),
            active,
            since: sent,
            until: sent + local,
        };
    }

    /// Takes the lease of a dataset just installed (at start, or new), and
    /// if it is granted becomes its owner.
    pub(super) async fn claim(self: &Arc<Self>, h: &Arc<DatasetHandle>) -> MonitorResult<()> {
        let sent = Instant::now();
        if let Some(fence) = self.try_lease(h.id).await? {
            self.hold(h, fence, sent, false);
            self.promote(h, fence).await?;
        }
        self.export_ownership(h);
        Ok(())
    }

    pub fn holder(&self) -> &str {
        &self.replica.holder
    }

    pub(super) fn export_ownership(&self, h: &DatasetHandle) {
        self.replica.ownership.set(&h.name, h.fence().is_some());
        self.metrics
            .dataset_owned
            .get_or_create(&DatasetLabels {
                dataset: h.name.clone(),
            })
            .set(if h.fence().is_some() { 1.0 } else { 0.0 });
    }

    /// Renews, takes and gives up leases until shutdown, then lets the held
    /// ones lapse at once so another server takes over without waiting.
    pub(super) async fn keep_leases(self: Arc<Self>, mut shutdown: crate::shutdown::Shutdown) {
        let mut tick = tokio::time::interval(self.replica.tick());
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tokio::select! {
                _ = shutdown.recv() => break,
                _ = tick.tick() => {}
            }
            if let Err(e) = self.lease_round().await {
                warn!(error = %e, "lease round failed; the next one retries");
            }
        }
        for h in self.handles() {
            let fence = h.lease.lock().unwrap_or_else(|e| e.into_inner()).fence;
            if let Some(fence) = fence {
                if let Err(e) = self.store.release_lease(fence, &self.replica.holder).await {
                    warn!(dataset = %h.name, error = %e, "could not release the lease");
                }
            }
        }
    }

    /// Waits, after the shutdown has fired, for the lease keeper to hand
    /// this server's leases back (at most `LEASE_RELEASE_WAIT`: a store
    /// that does not answer must not hold the shutdown, and its leases
    /// lapse by themselves). Call before closing the store.
    pub async fn leases_released(&self) {
        let keeper = self
            .lease_keeper
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .take();
        if let Some(keeper) = keeper {
            if tokio::time::timeout(LEASE_RELEASE_WAIT, keeper)
                .await
                .is_err()
            {
                warn!(
                    seconds = LEASE_RELEASE_WAIT.as_secs(),
                    "the leases were not handed back in time; they lapse by themselves"
                );
            }
        }
    }

    async fn lease_round(self: &Arc<Self>) -> MonitorResult<()> {
        let handles = self.handles();
        for h in &handles {
            let (fence, since, active) = {
                let held = h.lease.lock().unwrap_or_else(|e| e.into_inner());
                (held.fence, held.since, held.active)
            };
            let Some(fence) = fence else { continue };
            if since.elapsed() < self.replica.renew_every() {
                continue;
            }
            let sent = Instant::now();
            match self
                .store
                .renew_lease(fence, &self.replica.holder, self.replica.ttl_ms())
                .await
            {
                Ok(true) => {
                    let still = h.lease.lock().unwrap_or_else(|e| e.into_inner()).fence;
                    if still == Some(fence) {
                        self.hold(h, fence, sent, active);
                    }
                }
                Ok(false) => self.demote(h, "another server took its lease").await,
                Err(e) => {
                    let lapsed = sent >= h.lease.lock().unwrap_or_else(|e| e.into_inner()).until;
                    warn!(dataset = %h.name, error = %e, lapsed, "lease renewal failed");
                    if lapsed {
                        self.demote(h, "its lease lapsed while the store was unreachable")
                            .await;
                    }
                }
            }
        }
        // Datasets without a live owner, taken while this server holds no
        // more than its share (so that servers started together spread the
        // datasets between them), or by anyone once a lease has stayed
        // lapsed for a while.
        if !self.ready() {
            // Start-up takes in every stored dataset itself (`adopt`).
            return Ok(());
        }
        let leases = self.store.leases().await?;
        let holders: std::collections::BTreeSet<&str> = leases
            .iter()
            .filter(|l| l.expires_in_ms > 0 && !l.holder.is_empty())
            .map(|l| l.holder.as_str())
            .chain([self.replica.holder.as_str()])
            .collect();
        let share = handles.len().div_ceil(holders.len().max(1));
        let held = |h: &DatasetHandle| {
            h.lease
                .lock()
                .unwrap_or_else(|e| e.into_inner())
                .fence
                .is_some()
        };
        let mut owned = handles.iter().filter(|h| held(h)).count();
        let long_lapsed = -(self.replica.lease.as_millis() as i64) / 2;
        for h in &handles {
            if held(h) {
                continue;
            }
            let lapsed_for = leases
                .iter()
                .find(|l| l.dataset_id == h.id)
                .map_or(i64::MIN, |l| l.expires_in_ms);
            if lapsed_for > 0 || (owned >= share && lapsed_for > long_lapsed) {
                continue;
            }
            let sent = Instant::now();
            if let Some(fence) = self.try_lease(h.id).await? {
                self.hold(h, fence, sent, false);
                // Rebuilt beside this loop, which keeps renewing meanwhile.
                let (monitor, h2) = (Arc::clone(self), Arc::clone(h));
                tokio::spawn(async move {
                    if let Err(e) = monitor.promote(&h2, fence).await {
                        warn!(dataset = %h2.name, error = %e, "could not take the dataset over");
                        monitor.demote(&h2, "taking it over failed").await;
                        let _ = monitor
                            .store
                            .release_lease(fence, &monitor.replica.holder)
                            .await;
                    }
                });
                owned += 1;
            }
        }
        Ok(())
    }

    /// A recompute asked of this server for a dataset another server owns:
    /// left in the store for the owner, whose answer is awaited.
    pub(super) async fn ask_owner(
        &self,
        h: &DatasetHandle,
        options: RecomputeOptions,
    ) -> MonitorResult<RecomputeSummary> {
        let id = self
            .store
            .ask_recompute(&RecomputeAsk {
                dataset_id: h.id,
                refit: options.refit,
                refresh_ranks: options.refresh_ranks,
                asked_at_ms: now_ms(),
            })
            .await?;
        let started = Instant::now();
        loop {
            if let Some(json) = self.store.answer(id).await? {
                let answer: Answer = serde_json::from_str(&json)
                    .map_err(|e| MonitorError::Internal(format!("recompute answer {id}: {e}")))?;
                return answer.result();
            }
            if started.elapsed() > ASK_WAIT {
                return Err(MonitorError::Internal(format!(
                    "dataset {:?}: its owner did not answer a recompute within {} s",
                    h.name,
                    ASK_WAIT.as_secs()
                )));
            }
            tokio::time::sleep(super::follow::FOLLOW_EVERY / 2).await;
        }
    }

    /// Runs the recomputes other servers left for a dataset this server
    /// owns, each once, and stores the answers.
    pub(super) async fn answer_asks(self: &Arc<Self>, h: &Arc<DatasetHandle>) -> MonitorResult<()> {
        for (id, ask) in self.store.open_asks(h.id).await? {
            if !h
                .asks_taken
                .lock()
                .unwrap_or_else(|e| e.into_inner())
                .insert(id)
            {
                continue;
            }
            let (monitor, h) = (Arc::clone(self), Arc::clone(h));
            tokio::spawn(async move {
                let options = RecomputeOptions {
                    refit: ask.refit,
                    refresh_ranks: ask.refresh_ranks,
                };
                let result = monitor.recompute_here(&h, options).await;
                let json = serde_json::to_string(&Answer::of(&result))
                    .unwrap_or_else(|e| format!("{{\"failed\":\"{e}\"}}"));
                if let Err(e) = monitor.store.answer_ask(id, &json, now_ms()).await {
                    warn!(dataset = %h.name, ask = id, error = %e, "could not answer a recompute");
                }
                // Kept taken: an answered ask is no longer open.
            });
        }
        Ok(())
    }

    /// Becomes the dataset's owner: rebuilds its state from the store as
    /// the owner sees it (nuisance fit reproduced, stream watch restored),
    /// catches up with what arrived meanwhile and installs it.
    async fn promote(&self, h: &Arc<DatasetHandle>, fence: Fence) -> MonitorResult<()> {
        let started = Instant::now();
        let stored = h.state.lock().await.stored.clone();
        let (mut state, boards) = self.rebuild(stored, true).await?;
        let _one_at_a_time = h.recompute.lock().await;
        let mut st = h.state.lock().await;
        self.catch_up(&mut state).await?;
        // A recompute is due at once only if the outcomes waiting reach the
        // dataset's threshold, or there are outcomes and no boards yet; the
        // rest waits for the schedule as it would have at the last owner.
        // (Waking unconditionally raced a new dataset's first rows.)
        let due = state.pending_outcomes >= u64::from(state.stored.spec.recompute_every_outcomes)
            || (boards.is_empty() && state.cache.outcomes() > 0);
        *st = state;
        h.publish(boards);
        drop(st);
        {
            let mut held = h.lease.lock().unwrap_or_else(|e| e.into_inner());
            if held.fence != Some(fence) {
                return Ok(());
            }
            held.active = true;
        }
        self.export_ownership(h);
        info!(
            dataset = %h.name,
            epoch = fence.epoch,
            millis = started.elapsed().as_secs_f64() * 1000.0,
            "took the dataset over"
        );
        if due {
            h.wake.notify_one();
        }
        Ok(())
    }

    /// Stops owning a dataset: no more recomputes, fenced writes or alert
    /// events from this server; its nuisance state is dropped (a later
    /// takeover rebuilds it from the store).
    pub(super) async fn demote(&self, h: &DatasetHandle, why: &str) {
        let was = std::mem::replace(
            &mut *h.lease.lock().unwrap_or_else(|e| e.into_inner()),
            Held::none(),
        )
        .fence;
        if let Some(fence) = was {
            warn!(dataset = %h.name, epoch = fence.epoch, "no longer owns the dataset: {why}");
        }
        let mut st = h.state.lock().await;
        st.nuisance = None;
        st.arm_nuisance = None;
        self.forget_exports(&h.name, &h.boards(), &st.watch);
        drop(st);
        self.export_ownership(h);
    }
}
