//! Matrices stored by the service: the matrix document of `POST /v1/matrices`, and how a
//! job's `migration.matrix_ref` is resolved.
//!
//! A stored matrix is checked for everything that does not depend on a job: it is square,
//! has 1 to [`MAX_DEMES`] rows, and every entry is a finite, non-negative number. These are
//! the shape and entry checks of `demefix_science::migration::resolve`, reported at the same
//! kind of pointers as an inline matrix (`/matrix/1/2`, or the line and field of CSV text).
//! What depends on the job (its number of demes; a row or column of zeros under its
//! orientation and rule) is checked when a job names the matrix, at `/migration/matrix_ref`.
//!
//! Deme ids are not part of a stored matrix (`api.md` hashes them with the spec, not with
//! the matrix): a CSV header row is skipped unchecked, and a job's `population.demes` gives
//! the rows their meaning.
//!
//! Validation never reaches a database: a caller that can resolve references hands
//! [`super::validate_with`] a [`MatrixRefs`] (the service fetches the one matrix a job names
//! before validating, [`FetchedMatrix`]); the command line uses [`NoStoredMatrices`].

use super::walk::Walker;
use super::{csv, json_matrix, normalise_zeros, report_issue, Locator, SentMatrix, MAX_DEMES};
use crate::problem::{Pointer, Problem};
use demefix_science::migration::{self, Needed};
use demefix_science::{MatrixIssue, MigrationInput, Orientation, SelfFlows};
use serde_json::Value;

/// Prefix of a matrix reference: `sha256:` then the canonical matrix hash.
pub const REF_PREFIX: &str = "sha256:";

/// Whether `hex` is a canonical matrix hash as written: 64 lowercase hex digits.
pub fn is_sha256_hex(hex: &str) -> bool {
    hex.len() == 64
        && hex
            .bytes()
            .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
}

/// The hash named by a reference `sha256:<64 lowercase hex digits>`, if well formed.
pub fn sha256_of_ref(reference: &str) -> Option<&str> {
    reference
        .strip_prefix(REF_PREFIX)
        .filter(|hex| is_sha256_hex(hex))
}

/// The hash a job document names at `/migration/matrix_ref`, when that member is a
/// well-formed reference (anything else is reported by validation).
pub fn matrix_ref(doc: &Value) -> Option<&str> {
    doc.get("migration")?
        .get("matrix_ref")?
        .as_str()
        .and_then(sha256_of_ref)
}

/// What a [`MatrixRefs`] knows about a hash.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum RefLookup<'a> {
    /// The stored matrix, rows in deme order.
    Found(&'a [Vec<f64>]),
    /// No matrix with this hash is stored.
    Unknown,
    /// References cannot be resolved here (no store).
    Unavailable,
}

/// Resolves `migration.matrix_ref` during validation.
pub trait MatrixRefs {
    /// The stored matrix whose canonical hash is `sha256` (64 lowercase hex digits).
    fn lookup(&self, sha256: &str) -> RefLookup<'_>;
}

/// No store at hand (the command line, or a spec that is known to hold its matrix): every
/// reference is [`RefLookup::Unavailable`].
#[derive(Debug, Clone, Copy, Default)]
pub struct NoStoredMatrices;

impl MatrixRefs for NoStoredMatrices {
    fn lookup(&self, _sha256: &str) -> RefLookup<'_> {
        RefLookup::Unavailable
    }
}

/// The one matrix a job names, fetched from the store before validation.
#[derive(Debug, Clone, PartialEq)]
pub struct FetchedMatrix {
    /// The hash that was looked up.
    pub sha256: String,
    /// The stored rows, or `None` when no matrix has that hash.
    pub rows: Option<Vec<Vec<f64>>>,
}

impl MatrixRefs for FetchedMatrix {
    fn lookup(&self, sha256: &str) -> RefLookup<'_> {
        match &self.rows {
            Some(rows) if sha256 == self.sha256 => RefLookup::Found(rows),
            _ => RefLookup::Unknown,
        }
    }
}

/// Members of the JSON matrix document of `POST /v1/matrices`.
const MATRIX_DOCUMENT_FIELDS: &[&str] = &["matrix"];

/// Validates the JSON matrix document `{"matrix": [[...], ...]}`; returns the rows with
/// `-0.0` written as `0.0`, or every problem (pointers such as `/matrix/1/2`).
pub fn matrix_document(doc: &Value) -> Result<Vec<Vec<f64>>, Vec<Problem>> {
    let mut w = Walker::default();
    let root = Pointer::root();
    let Some(map) = w.object(doc, &root, MATRIX_DOCUMENT_FIELDS) else {
        return Err(w.into_problems());
    };
    let sent = w
        .required(map, &root, "matrix")
        .and_then(|v| json_matrix(&mut w, v, &root.key("matrix")));
    check_standalone(w, sent)
}

/// Validates a matrix sent as CSV text (the format of `migration.matrix_csv`; a header row
/// of deme ids is skipped). Problems point at the whole document (`""`) and name the line
/// and field.
pub fn matrix_csv_text(text: &str) -> Result<Vec<Vec<f64>>, Vec<Problem>> {
    let mut w = Walker::default();
    let root = Pointer::root();
    let (parsed, details) = csv::parse(text, None);
    for d in details {
        w.report(&root, d);
    }
    if parsed.rows.len() > MAX_DEMES {
        w.report(&root, format!("at most {MAX_DEMES} rows are supported"));
        return Err(w.into_problems());
    }
    let sent = SentMatrix {
        rows: parsed.rows,
        at: Locator::Csv(root, parsed.lines),
    };
    check_standalone(w, Some(sent))
}

/// The job-independent checks: at least one row, square, finite, non-negative.
fn check_standalone(
    mut w: Walker,
    sent: Option<SentMatrix>,
) -> Result<Vec<Vec<f64>>, Vec<Problem>> {
    let Some(sent) = sent else {
        return Err(w.into_problems());
    };
    let m = sent.rows.len();
    if m == 0 {
        w.report(sent.at.whole(), "needs at least one row");
        return Err(w.into_problems());
    }
    // Cells that are not numbers were reported already; they read as 1 here.
    let rows: Vec<Vec<f64>> = sent
        .rows
        .iter()
        .map(|r| r.iter().map(|c| c.unwrap_or(1.0)).collect())
        .collect();
    let input = MigrationInput {
        orientation: Orientation::Flows,
        rows,
        self_flows: SelfFlows::Keep,
    };
    // Sizes only scale conversions, which are not looked at here; of the issues, only those
    // of shape and entries concern a matrix without a job.
    if let Err(issues) = migration::resolve(&input, &vec![1; m], Needed::Dispersal) {
        let names: Vec<String> = (0..m).map(|i| format!("row {i}")).collect();
        let root = Pointer::root();
        for issue in issues.iter().filter(|i| {
            matches!(
                i,
                MatrixIssue::RowCount { .. }
                    | MatrixIssue::RowLength { .. }
                    | MatrixIssue::NotFinite { .. }
                    | MatrixIssue::Negative { .. }
            )
        }) {
            if let MatrixIssue::RowLength { row, len, .. } = *issue {
                let (at, line) = sent.at.row(row);
                let detail = format!(
                    "the matrix has {m} rows, so each row needs {m} entries (it must be \
                     square); this one has {len}"
                );
                if line.is_empty() {
                    w.report(&at, detail);
                } else {
                    w.report(&at, format!("{line}: {detail}"));
                }
            } else {
                report_issue(&mut w, issue, &sent, &root, Orientation::Flows, &names);
            }
        }
    }
    if w.has_problems() {
        return Err(w.into_problems());
    }
    Ok(normalise_zeros(input.rows))
}
