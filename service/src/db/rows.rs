//! Rows as SQLite returns them, and their conversion into the records the rest of the
//! service uses (runs, claims, stored matrices). JSON columns are kept as text: they are
//! written once and served as stored.

use super::DbError;
use crate::domain::{ReusableRun, RunStatus};

/// Columns of [`RunRow`], in `SELECT` form.
pub(super) const RUN_COLUMNS: &str = "id, status, series, spec, provenance, results, warnings, \
    error, progress_done, progress_total, submitted_at, started_at, finished_at, reused_from, \
    sensitivity, whatif, notify_url, \
    (SELECT json_object('url', n.url, 'attempts', n.attempts, \
                        'next_attempt_at', n.next_attempt_at, 'last_error', n.last_error, \
                        'delivered_at', n.delivered_at, 'failed_at', n.failed_at) \
     FROM notifications n WHERE n.run_id = runs.id) AS notification";

#[derive(Debug, sqlx::FromRow)]
pub(super) struct RunRow {
    id: String,
    status: String,
    series: Option<String>,
    spec: String,
    provenance: Option<String>,
    results: Option<String>,
    warnings: String,
    error: Option<String>,
    progress_done: i64,
    progress_total: i64,
    submitted_at: String,
    started_at: Option<String>,
    finished_at: Option<String>,
    reused_from: Option<String>,
    sensitivity: Option<String>,
    whatif: Option<String>,
    notify_url: Option<String>,
    notification: Option<String>,
}

/// The delivery state of a finished run's completion notification (table `notifications`).
#[derive(Debug, Clone, PartialEq, Eq, serde::Deserialize)]
pub struct NotificationRecord {
    /// Where it goes (the job's `notify_url`).
    pub url: String,
    /// Attempts started so far.
    pub attempts: u32,
    /// RFC 3339 UTC: when the next attempt is due (or an attempt in flight lapses); `None`
    /// once delivered or given up.
    pub next_attempt_at: Option<String>,
    /// Why the latest failed attempt failed.
    pub last_error: Option<String>,
    /// RFC 3339 UTC: when a 2xx answer was received.
    pub delivered_at: Option<String>,
    /// RFC 3339 UTC: when the attempts were used up without a 2xx answer.
    pub failed_at: Option<String>,
}

/// A stored run. JSON members are the stored text.
#[derive(Debug, Clone, PartialEq)]
pub struct RunRecord {
    /// UUID v7.
    pub id: String,
    /// Where the run is.
    pub status: RunStatus,
    /// `spec.series`, if any.
    pub series: Option<String>,
    /// The job as accepted (JSON object text).
    pub spec: String,
    /// Provenance (JSON object text), once succeeded.
    pub provenance: Option<String>,
    /// Results (JSON array text), once succeeded.
    pub results: Option<String>,
    /// Warnings.
    pub warnings: Vec<String>,
    /// Why it failed.
    pub error: Option<String>,
    /// Replicates (or units of work) done.
    pub done: u64,
    /// Replicates (or units of work) in all.
    pub total: u64,
    /// RFC 3339 UTC.
    pub submitted_at: String,
    /// RFC 3339 UTC, first claim.
    pub started_at: Option<String>,
    /// RFC 3339 UTC.
    pub finished_at: Option<String>,
    /// The run whose results this run reuses (nothing was computed for it).
    pub reused_from: Option<String>,
    /// Link sensitivities (JSON array text), when computed.
    pub sensitivity: Option<String>,
    /// What-if answers (JSON object text with `interventions` and/or `plan`), when computed.
    pub whatif: Option<String>,
    /// The job's `notify_url`, if it has one.
    pub notify_url: Option<String>,
    /// Its completion notification, once the run has finished.
    pub notification: Option<NotificationRecord>,
}

fn corrupt(id: &str, what: impl Into<String>) -> DbError {
    DbError::Corrupt {
        id: id.to_owned(),
        what: what.into(),
    }
}

fn warnings(id: &str, text: &str) -> Result<Vec<String>, DbError> {
    serde_json::from_str(text).map_err(|e| corrupt(id, format!("warnings: {e}")))
}

impl RunRow {
    pub(super) fn into_record(self) -> Result<RunRecord, DbError> {
        let status = RunStatus::parse(&self.status)
            .ok_or_else(|| corrupt(&self.id, format!("status {:?}", self.status)))?;
        let notification = self
            .notification
            .as_deref()
            .map(serde_json::from_str::<NotificationRecord>)
            .transpose()
            .map_err(|e| corrupt(&self.id, format!("notification: {e}")))?;
        Ok(RunRecord {
            warnings: warnings(&self.id, &self.warnings)?,
            notify_url: self.notify_url,
            notification,
            status,
            series: self.series,
            spec: self.spec,
            provenance: self.provenance,
            results: self.results,
            error: self.error,
            done: u64::try_from(self.progress_done).unwrap_or(0),
            total: u64::try_from(self.progress_total).unwrap_or(0),
            submitted_at: self.submitted_at,
            started_at: self.started_at,
            finished_at: self.finished_at,
            reused_from: self.reused_from,
            sensitivity: self.sensitivity,
            whatif: self.whatif,
            id: self.id,
        })
    }
}

#[derive(Debug, sqlx::FromRow)]
pub(super) struct ClaimRow {
    id: String,
    spec: String,
    request_sha256: String,
    warnings: String,
    attempts: i64,
    cancel_requested: i64,
}

/// A run handed to a worker, with what it needs to compute it.
#[derive(Debug, Clone)]
pub struct Claim {
    /// Run id.
    pub id: String,
    /// The job as accepted (JSON text).
    pub spec: String,
    /// SHA-256 of the request body, for provenance.
    pub request_sha256: String,
    /// Validation warnings recorded at submission (or unreadable-warnings text on error).
    pub warnings: Result<Vec<String>, String>,
    /// The committed checkpoint log, oldest first: one JSON `compute::ChunkStep` per chunk.
    pub checkpoint: Vec<String>,
    /// This claim's number (1 for the first).
    pub attempt: u64,
    /// Cancellation was requested before the claim.
    pub cancel_requested: bool,
}

impl ClaimRow {
    pub(super) fn attempts(&self) -> i64 {
        self.attempts
    }

    pub(super) fn id(&self) -> &str {
        &self.id
    }

    pub(super) fn into_claim(self, checkpoint: Vec<String>) -> Claim {
        Claim {
            warnings: warnings(&self.id, &self.warnings).map_err(|e| e.to_string()),
            id: self.id,
            spec: self.spec,
            request_sha256: self.request_sha256,
            checkpoint,
            attempt: u64::try_from(self.attempts).unwrap_or(0),
            cancel_requested: self.cancel_requested != 0,
        }
    }
}

/// Columns of [`MatrixRow`], in `SELECT` form.
pub(super) const MATRIX_COLUMNS: &str = "matrix_sha256, demes, entries, created_at";

#[derive(Debug, sqlx::FromRow)]
pub(super) struct MatrixRow {
    matrix_sha256: String,
    demes: i64,
    entries: String,
    created_at: String,
}

/// A stored matrix.
#[derive(Debug, Clone, PartialEq)]
pub struct MatrixRecord {
    /// Canonical matrix hash (lowercase hex).
    pub sha256: String,
    /// Number of rows `m`.
    pub demes: u64,
    /// The `m x m` entries as JSON rows (text as stored).
    pub entries: String,
    /// RFC 3339 UTC, when it was first stored.
    pub created_at: String,
}

impl MatrixRow {
    pub(super) fn into_record(self) -> Result<MatrixRecord, DbError> {
        let demes = u64::try_from(self.demes)
            .map_err(|_| corrupt(&self.matrix_sha256, format!("demes {}", self.demes)))?;
        Ok(MatrixRecord {
            sha256: self.matrix_sha256,
            demes,
            entries: self.entries,
            created_at: self.created_at,
        })
    }
}

#[derive(Debug, sqlx::FromRow)]
pub(super) struct ReusableRow {
    id: String,
    provenance: Option<String>,
    results: Option<String>,
    warnings: String,
    sensitivity: Option<String>,
    whatif: Option<String>,
}

impl ReusableRow {
    /// The run, or `None` when it lacks provenance or results (never for a succeeded run).
    pub(super) fn into_reusable(self) -> Result<Option<ReusableRun>, DbError> {
        let warnings = warnings(&self.id, &self.warnings)?;
        Ok(match (self.provenance, self.results) {
            (Some(provenance), Some(results)) => Some(ReusableRun {
                id: self.id,
                provenance,
                results,
                sensitivity: self.sensitivity,
                whatif: self.whatif,
                warnings,
            }),
            _ => None,
        })
    }
}
