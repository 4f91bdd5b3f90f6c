//! Reads of a dataset's published results.

use super::{Monitor, MonitorError, MonitorResult};
use crate::domain::Board;

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
