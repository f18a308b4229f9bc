//! The service's vocabulary between the HTTP edge, the store and the workers: run statuses,
//! a submission prepared from raw request bytes ([`prepare_submission`], [`prepare`]), a
//! matrix to store ([`NewMatrix`]), how a run ends ([`Finish`]), how a run reuses an earlier
//! run's results ([`reuse`]), list queries, and the documents clients receive ([`RunView`]
//! with its [`NotificationView`], [`MatrixView`]).
//!
//! This module owns what a submission records (the normalised spec with a seed picked when
//! the job needs one and its `matrix_ref` resolved into the matrix, the raw body and its
//! hash, the spec and matrix hashes, the validation warnings, the progress total, the method
//! version reuse is keyed on) and the field names of the documents of `api.md`. It knows
//! neither actix nor SQL.
//!
//! Reuse: a submission whose `spec_sha256` and method version equal those of a succeeded run
//! is stored as a new, already succeeded run with `reused_from` naming the earliest such run
//! (which was computed, never itself reused), its `results` text byte for byte, its
//! provenance with this request's `request_sha256` and a `reused_from` member, and warnings
//! that are this submission's validation warnings, then the earlier run's other warnings,
//! then a note naming the earlier run.

use crate::db::{DbError, MatrixRecord, Store};
use crate::problem::{InvalidJob, Pointer, Problem};
use crate::provenance::{matrix_sha256, sha256_hex, spec_sha256};
use crate::spec::{self, FetchedMatrix, Limits, MatrixRefs, NoStoredMatrices};
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
    /// The matrix as sent (or as stored, for `matrix_ref`), stored once under its hash.
    pub matrix: NewMatrix,
    /// Validation warnings (including a picked seed).
    pub warnings: Vec<String>,
    /// Replicates in all for ensembles; 1 (the whole run) otherwise.
    pub total: u64,
    /// `Idempotency-Key`, if sent.
    pub idempotency_key: Option<String>,
    /// Version of the numerical methods that would compute the run (reuse is keyed on it).
    pub method_version: String,
    /// SHA-256 of `spec_json` (for the audit log's submission facts).
    pub spec_text_sha256: String,
    /// Whether a succeeded run with the same spec and method version may answer this one.
    pub allow_reuse: bool,
    /// The succeeded run this run recomputes (a re-verification), if any.
    pub verifies: Option<String>,
    /// The job's `notify_url` (not part of the spec nor of its hash).
    pub notify_url: Option<String>,
}

/// A matrix ready to store, content-addressed by its canonical hash (`api.md`).
#[derive(Debug, Clone, PartialEq)]
pub struct NewMatrix {
    /// Canonical matrix hash (lowercase hex).
    pub sha256: String,
    /// Number of rows (demes) `m`.
    pub demes: usize,
    /// The `m x m` entries as JSON rows, `-0.0` written as `0.0`.
    pub entries_json: String,
}

impl NewMatrix {
    /// The matrix of `rows` (square and finite: validated before), hashed by
    /// [`matrix_sha256`], the one hash of inline, CSV and stored matrices alike.
    pub fn from_rows(rows: &[Vec<f64>]) -> Self {
        let m = rows.len();
        let rows: Vec<Vec<f64>> = rows
            .iter()
            .map(|r| r.iter().map(|&x| if x == 0.0 { 0.0 } else { x }).collect())
            .collect();
        Self {
            sha256: matrix_sha256(m, rows.iter().flatten().copied()),
            demes: m,
            entries_json: serde_json::to_string(&rows).expect("a finite matrix always serialises"),
        }
    }
}

/// Largest `Idempotency-Key`, in bytes.
pub const MAX_IDEMPOTENCY_KEY: usize = 255;

/// Whether `key` is an acceptable `Idempotency-Key`: 1 to 255 visible ASCII characters.
pub fn is_valid_idempotency_key(key: &str) -> bool {
    (1..=MAX_IDEMPOTENCY_KEY).contains(&key.len()) && key.bytes().all(|b| b.is_ascii_graphic())
}

/// Why a submission could not be prepared.
#[derive(Debug, thiserror::Error)]
pub enum SubmissionError {
    /// The job (or the matrix document) is not acceptable: every problem.
    #[error("{}", .0.detail)]
    Invalid(InvalidJob),
    /// The store failed while resolving `matrix_ref`.
    #[error("resolving matrix_ref: {0}")]
    Store(#[from] DbError),
    /// The validation thread did not complete.
    #[error("validation did not complete: {0}")]
    Interrupted(#[from] tokio::task::JoinError),
}

/// Validates `body` and prepares the run to store, resolving `migration.matrix_ref` from
/// `store`. Parsing and validation run on a blocking thread; the only store access is the
/// lookup of the one matrix the job names.
pub async fn prepare_submission(
    store: &Store,
    body: Vec<u8>,
    idempotency_key: Option<String>,
    limits: Limits,
) -> Result<NewRun, SubmissionError> {
    let (body, doc) = tokio::task::spawn_blocking(move || {
        let doc = spec::parse_json(&body);
        (body, doc)
    })
    .await?;
    let doc = doc.map_err(|p| SubmissionError::Invalid(InvalidJob::new(p)))?;
    let fetched = match spec::matrix_ref(&doc) {
        Some(sha256) => Some(FetchedMatrix {
            sha256: sha256.to_owned(),
            rows: match store.matrix(sha256).await? {
                Some(record) => Some(stored_rows(&record)?),
                None => None,
            },
        }),
        None => None,
    };
    tokio::task::spawn_blocking(move || {
        let refs: &dyn MatrixRefs = match &fetched {
            Some(f) => f,
            None => &NoStoredMatrices,
        };
        prepare_document(&doc, &body, idempotency_key, &limits, refs)
    })
    .await?
    .map_err(SubmissionError::Invalid)
}

/// The rows of a stored matrix.
pub fn stored_rows(record: &MatrixRecord) -> Result<Vec<Vec<f64>>, DbError> {
    serde_json::from_str(&record.entries).map_err(|e| DbError::Corrupt {
        id: format!("{}{}", spec::REF_PREFIX, record.sha256),
        what: format!("entries: {e}"),
    })
}

/// Validates `body` and prepares the run to store, without a matrix store (a `matrix_ref`
/// is reported as unresolvable). A job that needs a seed gets one drawn from the random bits
/// of its id (and a warning saying so).
pub fn prepare(
    body: &[u8],
    idempotency_key: Option<String>,
    limits: &Limits,
) -> Result<NewRun, InvalidJob> {
    let doc = spec::parse_json(body).map_err(InvalidJob::new)?;
    prepare_document(&doc, body, idempotency_key, limits, &NoStoredMatrices)
}

/// [`prepare`] for the parsed `doc` of `body`, resolving `matrix_ref` through `refs`.
pub fn prepare_document(
    doc: &serde_json::Value,
    body: &[u8],
    idempotency_key: Option<String>,
    limits: &Limits,
    refs: &dyn MatrixRefs,
) -> Result<NewRun, InvalidJob> {
    let mut job = spec::validate_with(doc, limits, refs).map_err(InvalidJob::new)?;
    let id = uuid::Uuid::now_v7();
    if job.needs_seed() {
        let bytes = id.as_bytes();
        let mut low = [0u8; 8];
        low.copy_from_slice(&bytes[8..16]);
        job.pick_seed(u64::from_le_bytes(low));
    }
    let spec = job.spec();
    let spec_json = serde_json::to_string(spec).expect("a job spec always serialises");
    let total = match crate::compute::ensemble_total(&job) {
        0 => 1,
        n => n,
    };
    Ok(NewRun {
        id: id.to_string(),
        series: spec.series.clone(),
        spec_text_sha256: sha256_hex(spec_json.as_bytes()),
        spec_json,
        spec_sha256: spec_sha256(spec),
        request: body.to_vec(),
        request_sha256: sha256_hex(body),
        matrix: NewMatrix::from_rows(&spec.migration.matrix),
        warnings: job.warnings().to_vec(),
        total,
        idempotency_key,
        method_version: demefix_science::METHOD_VERSION.to_owned(),
        allow_reuse: true,
        verifies: None,
        notify_url: job.notify_url().map(str::to_owned),
    })
}

/// The check run that re-verifies run `original_id` from its stored spec (which carries the
/// recorded seed and method): never answered by reuse, in no series. `None` when the stored
/// spec no longer validates: its problems.
pub fn prepare_verification(
    original_id: &str,
    stored_spec: &str,
    limits: &Limits,
) -> Result<NewRun, InvalidJob> {
    let doc: serde_json::Value = serde_json::from_str(stored_spec).map_err(|e| {
        InvalidJob::new(vec![Problem::new(
            &Pointer::root(),
            format!("the stored spec of run {original_id} is not JSON: {e}"),
        )])
    })?;
    let mut new = prepare_document(
        &doc,
        stored_spec.as_bytes(),
        None,
        limits,
        &NoStoredMatrices,
    )?;
    new.allow_reuse = false;
    new.series = None;
    new.verifies = Some(original_id.to_owned());
    Ok(new)
}

/// The `type` of the problem document of a rejected matrix.
pub const INVALID_MATRIX_TYPE: &str = "/problems/invalid-matrix";

/// How a matrix was sent to `POST /v1/matrices`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MatrixFormat {
    /// `{"matrix": [[...], ...]}`.
    Json,
    /// CSV text, the format of `migration.matrix_csv`.
    Csv,
}

/// The problem document of a rejected matrix (RFC 9457, every problem with its pointer).
pub fn invalid_matrix(errors: Vec<Problem>) -> InvalidJob {
    let detail = match errors.len() {
        1 => "1 problem was found in the matrix".to_owned(),
        n => format!("{n} problems were found in the matrix"),
    };
    InvalidJob {
        kind: INVALID_MATRIX_TYPE,
        title: "Invalid matrix",
        status: 422,
        detail,
        errors,
    }
}

/// Validates a matrix sent to `POST /v1/matrices` (shape and entries, as for an inline
/// matrix) and prepares it for the store.
pub fn prepare_matrix(body: &[u8], format: MatrixFormat) -> Result<NewMatrix, InvalidJob> {
    let rows = match format {
        MatrixFormat::Json => spec::parse_json(body).and_then(|doc| spec::matrix_document(&doc)),
        MatrixFormat::Csv => match std::str::from_utf8(body) {
            Ok(text) => spec::matrix_csv_text(text),
            Err(e) => Err(vec![Problem::new(
                &crate::problem::Pointer::root(),
                format!("the CSV text is not UTF-8: {e}"),
            )]),
        },
    }
    .map_err(invalid_matrix)?;
    Ok(NewMatrix::from_rows(&rows))
}

/// A stored matrix as `GET /v1/matrices/{sha256}` returns it (and, without `matrix`, as
/// `POST /v1/matrices` answers).
#[derive(Debug, Serialize)]
pub struct MatrixView<'a> {
    /// `sha256:<hex>`, the form a job's `matrix_ref` takes.
    pub id: String,
    /// Canonical matrix hash (lowercase hex).
    pub sha256: &'a str,
    /// Number of rows `m` (the matrix is `m x m`).
    pub demes: u64,
    /// RFC 3339 UTC.
    pub created_at: &'a str,
    /// The entries, row-major JSON rows.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub matrix: Option<&'a RawValue>,
}

impl<'a> MatrixView<'a> {
    /// The document of `record`, with its entries when `with_entries`.
    pub fn new(record: &'a MatrixRecord, with_entries: bool) -> Result<Self, CorruptColumn> {
        let matrix = if with_entries {
            Some(raw(&record.sha256, "entries", &record.entries)?)
        } else {
            None
        };
        Ok(Self {
            id: format!("{}{}", spec::REF_PREFIX, record.sha256),
            sha256: &record.sha256,
            demes: record.demes,
            created_at: &record.created_at,
            matrix,
        })
    }
}

/// A succeeded run whose results another submission may reuse.
#[derive(Debug, Clone, PartialEq)]
pub struct ReusableRun {
    /// Its id.
    pub id: String,
    /// Its provenance (JSON object text).
    pub provenance: String,
    /// Its results (JSON text), to be copied byte for byte.
    pub results: String,
    /// Its link sensitivities (JSON text), copied byte for byte.
    pub sensitivity: Option<String>,
    /// Its what-if answers (JSON text), copied byte for byte.
    pub whatif: Option<String>,
    /// Its warnings (validation, then computation).
    pub warnings: Vec<String>,
}

/// What a run that reuses an earlier run's results records.
#[derive(Debug, Clone, PartialEq)]
pub struct Reuse {
    /// The earlier run's id.
    pub reused_from: String,
    /// The earlier provenance with this request's hash and `reused_from`.
    pub provenance: String,
    /// The earlier results, byte for byte.
    pub results: String,
    /// The earlier link sensitivities, byte for byte.
    pub sensitivity: Option<String>,
    /// The earlier what-if answers, byte for byte.
    pub whatif: Option<String>,
    /// This submission's warnings, the earlier run's others, and a note.
    pub warnings: Vec<String>,
}

/// How `new` reuses `earlier` (same spec hash and method version), or `None` when the
/// earlier provenance cannot be read (the run is then computed afresh).
pub fn reuse(new: &NewRun, earlier: &ReusableRun) -> Option<Reuse> {
    let provenance = crate::provenance::reused_provenance(
        &earlier.provenance,
        &new.request_sha256,
        &earlier.id,
    )
    .map_err(|e| {
        tracing::warn!(run_id = %earlier.id, error = %e, "unreadable provenance; not reused");
    })
    .ok()?;
    let mut warnings = new.warnings.clone();
    for w in &earlier.warnings {
        if !warnings.contains(w) && !spec::is_picked_seed_warning(w) {
            warnings.push(w.clone());
        }
    }
    warnings.push(format!(
        "results reused from run {}, which has the same canonical spec (spec_sha256) and \
         method version; nothing was recomputed",
        earlier.id
    ));
    Some(Reuse {
        reused_from: earlier.id.clone(),
        provenance,
        results: earlier.results.clone(),
        sensitivity: earlier.sensitivity.clone(),
        whatif: earlier.whatif.clone(),
        warnings,
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
        /// Link sensitivities JSON, when computed.
        sensitivity: Option<String>,
        /// What-if answers JSON (`crate::whatif::WhatIfResults::to_json`), when computed.
        whatif: Option<String>,
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
    /// Link sensitivities, when the job asked for them and its method gives them.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub sensitivity: Option<&'a RawValue>,
    /// What-if scenarios against the baseline, when the job has them.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub interventions: Option<&'a RawValue>,
    /// The greedy plan of link reductions, when the job asks for one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub plan: Option<&'a RawValue>,
    /// Warnings.
    pub warnings: &'a [String],
    /// Why the run failed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<&'a str>,
    /// The run whose results this run reuses (nothing was computed for it).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reused_from: Option<&'a str>,
    /// The standing disclaimer, with results.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub disclaimer: Option<&'static str>,
    /// The completion notification, when the job has a `notify_url`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub notification: Option<NotificationView<'a>>,
}

/// Where a completion notification is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum NotificationState {
    /// The run has not finished yet.
    Waiting,
    /// The run has finished; the notice is being delivered (or waits for its next attempt).
    Pending,
    /// A 2xx answer was received.
    Delivered,
    /// Every attempt failed; `last_error` says why the last one did.
    Failed,
}

/// `notification` of the run document: where the completion notice goes and how its
/// delivery stands.
#[derive(Debug, Serialize)]
pub struct NotificationView<'a> {
    /// The job's `notify_url`.
    pub url: &'a str,
    /// Where the delivery is.
    pub state: NotificationState,
    /// Attempts started so far.
    pub attempts: u32,
    /// RFC 3339 UTC: when the next attempt is due, while pending.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub next_attempt_at: Option<&'a str>,
    /// RFC 3339 UTC: when a 2xx answer was received.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub delivered_at: Option<&'a str>,
    /// RFC 3339 UTC: when the attempts were used up.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub failed_at: Option<&'a str>,
    /// Why the latest failed attempt failed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub last_error: Option<&'a str>,
}

impl<'a> NotificationView<'a> {
    /// The notification of `run`, if its job has a `notify_url`.
    pub fn of(run: &'a crate::db::RunRecord) -> Option<Self> {
        let url = run.notify_url.as_deref()?;
        let Some(n) = &run.notification else {
            return Some(Self {
                url,
                state: NotificationState::Waiting,
                attempts: 0,
                next_attempt_at: None,
                delivered_at: None,
                failed_at: None,
                last_error: None,
            });
        };
        let state = if n.delivered_at.is_some() {
            NotificationState::Delivered
        } else if n.failed_at.is_some() {
            NotificationState::Failed
        } else {
            NotificationState::Pending
        };
        Some(Self {
            url: &n.url,
            state,
            attempts: n.attempts,
            next_attempt_at: n.next_attempt_at.as_deref(),
            delivered_at: n.delivered_at.as_deref(),
            failed_at: n.failed_at.as_deref(),
            last_error: n.last_error.as_deref(),
        })
    }
}

/// A stored JSON column that does not parse.
#[derive(Debug, thiserror::Error)]
#[error("stored record {id}: column `{column}` is not JSON: {source}")]
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

/// The members of the `whatif` column, served as top-level members of the run document.
#[derive(Default, serde::Deserialize)]
struct WhatIfColumn<'a> {
    #[serde(borrow, default)]
    interventions: Option<&'a RawValue>,
    #[serde(borrow, default)]
    plan: Option<&'a RawValue>,
}

impl<'a> RunView<'a> {
    /// The document of `run`.
    pub fn new(run: &'a crate::db::RunRecord) -> Result<Self, CorruptColumn> {
        let whatif: WhatIfColumn<'a> = match run.whatif.as_deref() {
            Some(text) => serde_json::from_str(text).map_err(|source| CorruptColumn {
                id: run.id.clone(),
                column: "whatif",
                source,
            })?,
            None => WhatIfColumn::default(),
        };
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
            sensitivity: optional("sensitivity", &run.sensitivity)?,
            interventions: whatif.interventions,
            plan: whatif.plan,
            warnings: &run.warnings,
            error: run.error.as_deref(),
            reused_from: run.reused_from.as_deref(),
            disclaimer: run.results.as_ref().map(|_| crate::document::DISCLAIMER),
            notification: NotificationView::of(run),
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
    /// The run whose results this run reuses.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reused_from: Option<&'a str>,
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
            reused_from: run.reused_from.as_deref(),
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

    fn job(seed: Option<u64>) -> Vec<u8> {
        let mut job = serde_json::json!({
            "population": {"demes": [{"id": "a", "size": 3}, {"id": "b", "size": 4}]},
            "migration": {"orientation": "recruitment", "matrix": [[0.5, 0.5], [2, 2]]},
            "dynamics": {"rule": "death_birth"},
            "selection": {"s": 0.1},
            "method": {"kind": "auto"}
        });
        if let Some(seed) = seed {
            job["method"]["seed"] = seed.into();
        }
        job.to_string().into_bytes()
    }

    #[test]
    fn a_reuse_keeps_the_results_and_drops_the_earlier_picked_seed_warning() {
        let limits = Limits::default();
        let earlier_new = prepare(&job(None), None, &limits).unwrap();
        let seed = serde_json::from_str::<serde_json::Value>(&earlier_new.spec_json).unwrap()
            ["method"]["seed"]
            .as_u64()
            .unwrap();
        // The first run had no seed: validation warned about the rescaled row and the seed.
        assert_eq!(earlier_new.warnings.len(), 2, "{:?}", earlier_new.warnings);
        let mut earlier_warnings = earlier_new.warnings.clone();
        earlier_warnings.push("a warning of the computation".to_owned());
        let earlier = ReusableRun {
            id: "run-1".to_owned(),
            provenance: r#"{"request_sha256":"aa","method_version":"1"}"#.to_owned(),
            results: r#"[{"s":0.1,"fixation_probability":0.25}]"#.to_owned(),
            sensitivity: Some(r#"[{"s":0.1,"from":"a","to":"b"}]"#.to_owned()),
            whatif: Some(r#"{"plan":{"s":0.1}}"#.to_owned()),
            warnings: earlier_warnings,
        };
        // Sending the recorded seed gives the same spec, hence the same hash.
        let new = prepare(&job(Some(seed)), None, &limits).unwrap();
        assert_eq!(new.spec_sha256, earlier_new.spec_sha256);
        let reuse = reuse(&new, &earlier).unwrap();
        assert_eq!(reuse.reused_from, "run-1");
        assert_eq!(reuse.results, earlier.results);
        assert_eq!(reuse.sensitivity, earlier.sensitivity);
        assert_eq!(reuse.whatif, earlier.whatif);
        assert_eq!(
            reuse.provenance,
            format!(
                r#"{{"request_sha256":"{}","reused_from":"run-1","method_version":"1"}}"#,
                new.request_sha256
            )
        );
        assert_eq!(reuse.warnings.len(), 3, "{:?}", reuse.warnings);
        assert_eq!(reuse.warnings[0], new.warnings[0]);
        assert_eq!(reuse.warnings[1], "a warning of the computation");
        assert!(reuse.warnings[2].contains("run-1"));
        assert!(!reuse
            .warnings
            .iter()
            .any(|w| spec::is_picked_seed_warning(w)));
        // An unreadable earlier provenance is no reuse.
        let broken = ReusableRun {
            provenance: "not json".to_owned(),
            ..earlier
        };
        assert!(super::reuse(&new, &broken).is_none());
    }

    #[test]
    fn a_matrix_is_hashed_as_its_rows_with_negative_zero_as_zero() {
        let a = NewMatrix::from_rows(&[vec![0.0, 1.0], vec![-0.0, 2.0]]);
        let b = prepare_matrix(b"a,b\n0,1\n0,2\n", MatrixFormat::Csv).unwrap();
        assert_eq!(a, b);
        assert_eq!(a.entries_json, "[[0.0,1.0],[0.0,2.0]]");
        assert_eq!(a.sha256, matrix_sha256(2, [0.0, 1.0, 0.0, 2.0]));
        let bad =
            prepare_matrix(br#"{"matrix": [[1, -1], [0, 1]]}"#, MatrixFormat::Json).unwrap_err();
        assert_eq!(bad.kind, INVALID_MATRIX_TYPE);
        assert_eq!(bad.errors[0].pointer, "/matrix/0/1");
        let bad = prepare_matrix(b"\xff", MatrixFormat::Csv).unwrap_err();
        assert_eq!(bad.errors[0].pointer, "");
    }

    #[test]
    fn idempotency_keys_are_short_visible_ascii() {
        assert!(is_valid_idempotency_key("nightly-2026-11-30"));
        assert!(!is_valid_idempotency_key(""));
        assert!(!is_valid_idempotency_key("has space"));
        assert!(!is_valid_idempotency_key(&"k".repeat(256)));
    }
}
