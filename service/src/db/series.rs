//! Reads of the nightly series: the series and their runs by date, and the run of a series
//! that a change report compares (by id, or the latest succeeded run of a date).

use super::rows::{RunRow, RUN_COLUMNS};
use super::{DbError, RunRecord, Store};
use serde::Serialize;
use sqlx::Row;

/// One series, as `GET /v1/series` lists it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SeriesSummary {
    /// Its name.
    pub name: String,
    /// Runs in it (all statuses).
    pub runs: i64,
    /// Succeeded runs.
    pub succeeded: i64,
    /// Earliest and latest `as_of`, when any run has one.
    pub first_as_of: Option<String>,
    /// Latest `as_of`.
    pub last_as_of: Option<String>,
    /// The newest run.
    pub latest_run_id: String,
}

/// A run of a series with its date.
#[derive(Debug, Clone)]
pub struct SeriesRun {
    /// The run.
    pub run: RunRecord,
    /// Its `as_of`.
    pub as_of: Option<String>,
}

impl Store {
    /// Every series, by name.
    pub async fn series(&self) -> Result<Vec<SeriesSummary>, DbError> {
        let rows = sqlx::query(
            "SELECT series, count(*), sum(status = 'succeeded'), min(as_of), max(as_of), max(id)
             FROM runs WHERE series IS NOT NULL GROUP BY series ORDER BY series",
        )
        .fetch_all(&self.reader)
        .await?;
        rows.iter()
            .map(|r| {
                Ok(SeriesSummary {
                    name: r.try_get(0)?,
                    runs: r.try_get(1)?,
                    succeeded: r.try_get(2)?,
                    first_as_of: r.try_get(3)?,
                    last_as_of: r.try_get(4)?,
                    latest_run_id: r.try_get(5)?,
                })
            })
            .collect()
    }

    /// The runs of series `name`, by date then submission.
    pub async fn series_runs(&self, name: &str) -> Result<Vec<SeriesRun>, DbError> {
        let sql =
            format!("SELECT {RUN_COLUMNS}, as_of FROM runs WHERE series = ? ORDER BY as_of, id");
        let rows = sqlx::query(&sql).bind(name).fetch_all(&self.reader).await?;
        rows.iter()
            .map(|r| {
                let as_of: Option<String> = r.try_get("as_of")?;
                let run = <RunRow as sqlx::FromRow<_>>::from_row(r)?.into_record()?;
                Ok(SeriesRun { run, as_of })
            })
            .collect()
    }
}
