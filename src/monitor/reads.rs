//! Reads of a dataset's published results.

use super::{Monitor, MonitorError, MonitorResult};
use crate::domain::Board;
use crate::estimate::stats::Estimate;

impl Monitor {
    pub async fn scoreboard(&self, dataset: &str, window: &str) -> MonitorResult<Board> {
        let h = self.handle(dataset)?;
        let boards = h.boards();
        if boards.is_empty() {
            return Err(MonitorError::FailedPrecondition(format!(
                "dataset {dataset:?} has not been scored yet: send outcomes or call Recompute"
            )));
        }
        boards
            .get(window)
            .cloned()
            .ok_or_else(|| MonitorError::NotFound(format!("no scoreboard for window {window:?}")))
    }

    /// Corrected PEHE of `first` minus that of `second` in the cumulative
    /// window whose board has `units` units, for any two ranked models (or
    /// baselines), from the co-moments the last recompute kept, and their
    /// policy gains' difference from the decisions it kept; None when
    /// they are not at hand (a recompute is running, or the kept window is
    /// not that board's). Waits for the dataset's lock, which intake and a
    /// recompute's set-up hold only briefly.
    pub async fn cumulative_difference(
        &self,
        dataset: &str,
        units: u64,
        first: &str,
        second: &str,
    ) -> MonitorResult<Option<(Estimate, Estimate)>> {
        let h = self.handle(dataset)?;
        let st = h.state.lock().await;
        Ok(st.nuisance.as_ref().and_then(|n| {
            Some((
                n.memo.cumulative_difference(units, first, second)?,
                n.memo.cumulative_policy_difference(units, first, second)?,
            ))
        }))
    }

    pub fn dataset_id(&self, dataset: &str) -> MonitorResult<i64> {
        Ok(self.handle(dataset)?.id)
    }

    /// The latest published board of a window, None before the dataset's
    /// first recompute. Waits on no lock that intake or a recompute holds.
    pub fn published_board(&self, dataset: &str, window: &str) -> MonitorResult<Option<Board>> {
        Ok(self.handle(dataset)?.boards().get(window).cloned())
    }

    /// Every dataset's name, in creation order.
    pub fn dataset_names(&self) -> Vec<String> {
        self.handles().into_iter().map(|h| h.name.clone()).collect()
    }
}
