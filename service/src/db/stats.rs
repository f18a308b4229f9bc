//! Counts the service reports about itself (runs by status, queue depth), read on the
//! read-only pool so a metrics scrape never waits for the writer.

use super::{DbError, Store};
use crate::domain::RunStatus;

/// How many runs are in each status.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct RunCounts {
    /// Stored, waiting for a worker (the queue depth).
    pub queued: u64,
    /// Held by a worker (including runs whose lease expired and that wait to be rescued).
    pub running: u64,
    /// Finished with results.
    pub succeeded: u64,
    /// Finished with an error.
    pub failed: u64,
    /// Cancelled on request.
    pub cancelled: u64,
}

impl RunCounts {
    /// The count of `status`.
    pub fn of(&self, status: RunStatus) -> u64 {
        match status {
            RunStatus::Queued => self.queued,
            RunStatus::Running => self.running,
            RunStatus::Succeeded => self.succeeded,
            RunStatus::Failed => self.failed,
            RunStatus::Cancelled => self.cancelled,
        }
    }

    fn slot(&mut self, status: RunStatus) -> &mut u64 {
        match status {
            RunStatus::Queued => &mut self.queued,
            RunStatus::Running => &mut self.running,
            RunStatus::Succeeded => &mut self.succeeded,
            RunStatus::Failed => &mut self.failed,
            RunStatus::Cancelled => &mut self.cancelled,
        }
    }
}

impl Store {
    /// Runs by status, from one `GROUP BY` over the `(status, id)` index.
    pub async fn run_counts(&self) -> Result<RunCounts, DbError> {
        let rows: Vec<(String, i64)> =
            sqlx::query_as("SELECT status, count(*) FROM runs GROUP BY status")
                .fetch_all(&self.reader)
                .await?;
        let mut counts = RunCounts::default();
        for (status, n) in rows {
            let status = RunStatus::parse(&status).ok_or_else(|| DbError::Corrupt {
                id: "(any)".to_owned(),
                what: format!("a run has the unknown status {status:?}"),
            })?;
            *counts.slot(status) = u64::try_from(n).unwrap_or(0);
        }
        Ok(counts)
    }
}
