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
}
