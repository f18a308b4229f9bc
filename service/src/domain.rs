//! The service's vocabulary between the HTTP edge, the store and the workers: run statuses,
//! a submission prepared from raw request bytes ([`prepare`]), how a run ends ([`Finish`]),
//! list queries, and the run document clients receive ([`RunView`]).
//!
//! This module owns what a submission records (the normalised spec with a seed picked when
//! the job needs one, the raw body and its hash, the spec and matrix hashes, the validation
//! warnings, the progress total) and the field names of the run document of `api.md`. It
//! knows neither actix nor SQL.

use crate::problem::InvalidJob;
use crate::provenance::{matrix_sha256, sha256_hex, spec_sha256};
use crate::spec::{self, Limits};
use serde::Serialize;
use serde_json::value::RawValue;

/// Where a run is. Finished runs (`succeeded`, `failed`, `cancelled`) never change again.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum RunStatus {
    /// Stored, waiting for a worker.
    Queued,
    /// A worker holds its lease.
    Running,
    /// Results are stored.
    Succeeded,
    /// The computation failed; `error` says why.
    Failed,
    /// Cancelled on request.
    Cancelled,
}

impl RunStatus {
    /// Every status, in lifecycle order.
    pub const ALL: [RunStatus; 5] = [
        RunStatus::Queued,
        RunStatus::Running,
        RunStatus::Succeeded,
        RunStatus::Failed,
        RunStatus::Cancelled,
    ];

    /// The stored and wire name.
    pub fn as_str(self) -> &'static str {
        match self {
            RunStatus::Queued => "queued",
            RunStatus::Running => "running",
            RunStatus::Succeeded => "succeeded",
            RunStatus::Failed => "failed",
            RunStatus::Cancelled => "cancelled",
        }
    }

    /// The status named `s`.
    pub fn parse(s: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|x| x.as_str() == s)
    }

    /// Whether the run can no longer change.
    pub fn is_finished(self) -> bool {
        matches!(
            self,
            RunStatus::Succeeded | RunStatus::Failed | RunStatus::Cancelled
        )
    }
}

/// A validated submission, ready to store.
#[derive(Debug, Clone)]
pub struct NewRun {
    /// UUID v7 (text).
    pub id: String,
    /// `spec.series`.
    pub series: Option<String>,
    /// The normalised spec as JSON text.
    pub spec_json: String,
    /// SHA-256 of its RFC 8785 canonical form.
    pub spec_sha256: String,
    /// The raw request body.
    pub request: Vec<u8>,
    /// Its SHA-256.
    pub request_sha256: String,
    /// Canonical hash of the matrix as sent.
    pub matrix_sha256: String,
    /// Number of demes.
    pub demes: usize,
    /// The matrix as sent, JSON rows.
    pub matrix_json: String,
    /// Validation warnings (including a picked seed).
    pub warnings: Vec<String>,
    /// Replicates in all for ensembles; 1 (the whole run) otherwise.
    pub total: u64,
    /// `Idempotency-Key`, if sent.
    pub idempotency_key: Option<String>,
}

/// Largest `Idempotency-Key`, in bytes.
pub const MAX_IDEMPOTENCY_KEY: usize = 255;

/// Whether `key` is an acceptable `Idempotency-Key`: 1 to 255 visible ASCII characters.
pub fn is_valid_idempotency_key(key: &str) -> bool {
    (1..=MAX_IDEMPOTENCY_KEY).contains(&key.len()) && key.bytes().all(|b| b.is_ascii_graphic())
}

/// Validates `body` and prepares the run to store. A job that needs a seed gets one drawn
/// from the random bits of its id (and a warning saying so).
pub fn prepare(
    body: &[u8],
    idempotency_key: Option<String>,
    limits: &Limits,
) -> Result<NewRun, InvalidJob> {
    let mut job = spec::parse_bytes(body, limits).map_err(InvalidJob::new)?;
    let id = uuid::Uuid::now_v7();
    if job.needs_seed() {
        let bytes = id.as_bytes();
        let mut low = [0u8; 8];
        low.copy_from_slice(&bytes[8..16]);
        job.pick_seed(u64::from_le_bytes(low));
    }
    let spec = job.spec();
    let m = spec.population.demes.len();
    let total = match crate::compute::ensemble_total(&job) {
        0 => 1,
        n => n,
    };
    Ok(NewRun {
        id: id.to_string(),
        series: spec.series.clone(),
        spec_json: serde_json::to_string(spec).expect("a job spec always serialises"),
        spec_sha256: spec_sha256(spec),
        request: body.to_vec(),
        request_sha256: sha256_hex(body),
        matrix_sha256: matrix_sha256(m, spec.migration.matrix.iter().flatten().copied()),
        demes: m,
        matrix_json: serde_json::to_string(&spec.migration.matrix)
            .expect("a finite matrix always serialises"),
        warnings: job.warnings().to_vec(),
        total,
        idempotency_key,
    })
}

/// How a worker ends a run.
#[derive(Debug, Clone)]
pub enum Finish {
    /// Results and provenance (JSON text) and every warning.
    Succeeded {
        /// Provenance JSON.
        provenance: String,
        /// Results JSON.
        results: String,
        /// Validation and computation warnings.
        warnings: Vec<String>,
    },
    /// The computation failed.
    Failed {
        /// Why, for the run document.
        error: String,
    },
    /// Stopped on request.
    Cancelled,
}

/// Default and largest page size of `GET /v1/runs`.
pub const DEFAULT_PAGE: u32 = 50;
/// Largest `limit` of `GET /v1/runs`.
pub const MAX_PAGE: u32 = 500;

/// A page request of `GET /v1/runs`.
#[derive(Debug, Clone, Default)]
pub struct ListQuery {
    /// Page size.
    pub limit: u32,
    /// Only runs older than this id (the cursor).
    pub after: Option<String>,
    /// Only runs with this status.
    pub status: Option<RunStatus>,
    /// Only runs of this series.
    pub series: Option<String>,
    /// Only runs submitted at or after this RFC 3339 UTC time.
    pub since: Option<String>,
}

/// `progress` of a run.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct Progress {
    /// Replicates (ensembles) or units of work done.
    pub done: u64,
    /// In all.
    pub total: u64,
}

/// The run document (`api.md`, "A run"), borrowing the stored JSON text verbatim.
#[derive(Debug, Serialize)]
pub struct RunView<'a> {
    /// UUID v7.
    pub id: &'a str,
    /// Status.
    pub status: RunStatus,
    /// Progress.
    pub progress: Progress,
    /// RFC 3339 UTC.
    pub submitted_at: &'a str,
    /// RFC 3339 UTC.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub started_at: Option<&'a str>,
    /// RFC 3339 UTC.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub finished_at: Option<&'a str>,
    /// The job as accepted.
    pub spec: &'a RawValue,
    /// Provenance, once succeeded.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub provenance: Option<&'a RawValue>,
    /// Results, once succeeded.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub results: Option<&'a RawValue>,
    /// Warnings.
    pub warnings: &'a [String],
    /// Why the run failed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<&'a str>,
    /// The standing disclaimer, with results.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub disclaimer: Option<&'static str>,
}

/// A stored JSON column that does not parse.
#[derive(Debug, thiserror::Error)]
#[error("stored run {id}: column `{column}` is not JSON: {source}")]
pub struct CorruptColumn {
    id: String,
    column: &'static str,
    source: serde_json::Error,
}

fn raw<'a>(id: &str, column: &'static str, text: &'a str) -> Result<&'a RawValue, CorruptColumn> {
    serde_json::from_str(text).map_err(|source| CorruptColumn {
        id: id.to_owned(),
        column,
        source,
    })
}

impl<'a> RunView<'a> {
    /// The document of `run`.
    pub fn new(run: &'a crate::db::RunRecord) -> Result<Self, CorruptColumn> {
        let optional = |column, text: &'a Option<String>| {
            text.as_deref().map(|t| raw(&run.id, column, t)).transpose()
        };
        Ok(Self {
            id: &run.id,
            status: run.status,
            progress: Progress {
                done: run.done,
                total: run.total,
            },
            submitted_at: &run.submitted_at,
            started_at: run.started_at.as_deref(),
            finished_at: run.finished_at.as_deref(),
            spec: raw(&run.id, "spec", &run.spec)?,
            provenance: optional("provenance", &run.provenance)?,
            results: optional("results", &run.results)?,
            warnings: &run.warnings,
            error: run.error.as_deref(),
            disclaimer: run.results.as_ref().map(|_| crate::document::DISCLAIMER),
        })
    }
}

/// One entry of `GET /v1/runs`.
#[derive(Debug, Serialize)]
pub struct RunSummary<'a> {
    /// UUID v7.
    pub id: &'a str,
    /// Status.
    pub status: RunStatus,
    /// `spec.series`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub series: Option<&'a str>,
    /// Progress.
    pub progress: Progress,
    /// RFC 3339 UTC.
    pub submitted_at: &'a str,
    /// RFC 3339 UTC.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub finished_at: Option<&'a str>,
}

impl<'a> From<&'a crate::db::RunRecord> for RunSummary<'a> {
    fn from(run: &'a crate::db::RunRecord) -> Self {
        Self {
            id: &run.id,
            status: run.status,
            series: run.series.as_deref(),
            progress: Progress {
                done: run.done,
                total: run.total,
            },
            submitted_at: &run.submitted_at,
            finished_at: run.finished_at.as_deref(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn statuses_round_trip_through_their_names() {
        for s in RunStatus::ALL {
            assert_eq!(RunStatus::parse(s.as_str()), Some(s));
        }
        assert_eq!(RunStatus::parse("done"), None);
        assert!(RunStatus::Cancelled.is_finished());
        assert!(!RunStatus::Running.is_finished());
    }

    #[test]
    fn idempotency_keys_are_short_visible_ascii() {
        assert!(is_valid_idempotency_key("nightly-2026-11-30"));
        assert!(!is_valid_idempotency_key(""));
        assert!(!is_valid_idempotency_key("has space"));
        assert!(!is_valid_idempotency_key(&"k".repeat(256)));
    }
}
