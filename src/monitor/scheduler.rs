//! The recompute scheduler: one task per dataset.

use std::sync::Arc;
use std::time::Duration;

use super::{DatasetHandle, Monitor, RecomputeOptions};
use crate::shutdown::Shutdown;

impl Monitor {
    /// Starts the recompute scheduler of every dataset and, on a shared
    /// store, the task that follows the other servers' writes.
    pub fn start_schedulers(self: &Arc<Self>) {
        if self.store.shared() {
            tokio::spawn(Arc::clone(self).follow());
        }
        for h in self.handles() {
            if h.boards().is_empty() {
                // Outcomes but no boards (see `rebuild`): recompute now.
                h.wake.notify_one();
            }
            self.spawn_scheduler(h);
        }
    }

    pub(super) fn spawn_scheduler(self: &Arc<Self>, h: Arc<DatasetHandle>) {
        let monitor = Arc::clone(self);
        let shutdown = self.shutdown.subscribe();
        tokio::spawn(async move { monitor.schedule(h, shutdown).await });
    }

    /// Recomputes when enough outcomes are waiting (woken by intake, then
    /// debounced for a moment so a burst of batches becomes one recompute),
    /// or when outcomes have waited for the dataset's interval.
    async fn schedule(self: Arc<Self>, h: Arc<DatasetHandle>, mut shutdown: Shutdown) {
        loop {
            let interval = {
                let st = h.state.lock().await;
                Duration::from_secs(u64::from(st.stored.spec.recompute_every_seconds.max(1)))
            };
            tokio::select! {
                _ = shutdown.recv() => return,
                _ = h.wake.notified() => {
                    tokio::time::sleep(Duration::from_millis(200)).await;
                }
                _ = tokio::time::sleep(interval) => {}
            }
            if shutdown.is_shutdown() {
                return;
            }
            let pending = h.state.lock().await.pending_outcomes;
            // Only the dataset's owner recomputes it (see `leases.rs`).
            if pending == 0 || h.fence().is_none() {
                continue;
            }
            let _ = self.recompute(&h.name, RecomputeOptions::default()).await;
        }
    }
}
