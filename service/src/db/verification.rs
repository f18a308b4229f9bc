//! Re-verification rows: opened with the check run's submission, closed (outcome, hashes,
//! differing fields) in the transaction that ends the check run, read back as records. The
//! comparison itself is `crate::verification`'s.

use super::audit::{self, verification_json, VERIFICATION_COLUMNS};
use super::{DbError, Store};
use crate::audit::EventKind;
use crate::verification::{self, StoredResult};
use serde::Serialize;
use serde_json::{json, Value};
use sqlx::{Row, SqliteConnection};

/// A re-verification as served.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VerificationRecord {
    /// The run that recomputes the original (its own run record).
    pub check_run_id: String,
    /// The run verified.
    pub run_id: String,
    /// RFC 3339 UTC.
    pub requested_at: String,
    /// `pending` until the check run ends; then `identical`, `different`, or
    /// `not_recomputed` (the check run failed or was cancelled).
    pub status: String,
    /// Whether the canonical result documents are byte-identical (`None` while pending or
    /// when not recomputed).
    pub byte_identical: Option<bool>,
    /// SHA-256 of the original's canonical result document.
    pub original_result_sha256: String,
    /// SHA-256 of the recomputed one.
    pub recomputed_result_sha256: Option<String>,
    /// JSON pointers of the fields that differ (at most 50).
    pub differences: Vec<String>,
    /// Whether more fields differ than are listed.
    pub more_differences: bool,
    /// The method version that computed the original, the service's when asked, and
    /// whether it has moved on since.
    pub method_version: Value,
    /// RFC 3339 UTC, once ended.
    pub finished_at: Option<String>,
}

impl VerificationRecord {
    fn from_row(v: &Value) -> Self {
        let text = |k: &str| v[k].as_str().map(str::to_owned);
        let recorded = text("recorded_method_version").unwrap_or_default();
        let current = text("current_method_version").unwrap_or_default();
        let outcome = text("outcome");
        Self {
            check_run_id: text("check_run_id").unwrap_or_default(),
            run_id: text("run_id").unwrap_or_default(),
            requested_at: text("requested_at").unwrap_or_default(),
            byte_identical: match outcome.as_deref() {
                Some("identical") => Some(true),
                Some("different") => Some(false),
                _ => None,
            },
            status: outcome.unwrap_or_else(|| "pending".to_owned()),
            original_result_sha256: text("original_result_sha256").unwrap_or_default(),
            recomputed_result_sha256: text("recomputed_result_sha256"),
            differences: text("differences")
                .and_then(|d| serde_json::from_str(&d).ok())
                .unwrap_or_default(),
            more_differences: v["more_differences"].as_bool().unwrap_or(false),
            method_version: json!({
                "moved_on": recorded != current,
                "recorded": recorded,
                "current": current,
            }),
            finished_at: text("finished_at"),
        }
    }
}

async fn stored_result(
    conn: &mut SqliteConnection,
    id: &str,
) -> Result<Option<(Option<String>, Option<String>, Option<String>, String)>, DbError> {
    let row = sqlx::query("SELECT results, sensitivity, whatif, status FROM runs WHERE id = ?")
        .bind(id)
        .fetch_optional(&mut *conn)
        .await?;
    Ok(match row {
        None => None,
        Some(r) => Some((r.try_get(0)?, r.try_get(1)?, r.try_get(2)?, r.try_get(3)?)),
    })
}

/// Opens the verification of run `original` by check run `check_run_id`.
pub(super) async fn open(
    conn: &mut SqliteConnection,
    original: &str,
    check_run_id: &str,
    current_method_version: &str,
    now: &str,
) -> Result<(), DbError> {
    let (results, sensitivity, whatif, _) =
        stored_result(conn, original)
            .await?
            .ok_or_else(|| DbError::Corrupt {
                id: original.to_owned(),
                what: "the run to verify is missing".to_owned(),
            })?;
    let recorded: Option<String> =
        sqlx::query_scalar("SELECT method_version FROM runs WHERE id = ?")
            .bind(original)
            .fetch_one(&mut *conn)
            .await?;
    let doc = StoredResult {
        results: results.as_deref(),
        sensitivity: sensitivity.as_deref(),
        whatif: whatif.as_deref(),
    }
    .document();
    sqlx::query(
        "INSERT INTO verifications (check_run_id, run_id, requested_at, recorded_method_version,
                                    current_method_version, original_result_sha256)
         VALUES (?, ?, ?, ?, ?, ?)",
    )
    .bind(check_run_id)
    .bind(original)
    .bind(now)
    .bind(recorded.unwrap_or_default())
    .bind(current_method_version)
    .bind(verification::result_sha256(&doc))
    .execute(&mut *conn)
    .await?;
    Ok(())
}

/// Closes the verification whose check run `id` just ended (nothing when `id` is no check
/// run), and appends its `verified` audit entry.
pub(super) async fn close(conn: &mut SqliteConnection, id: &str, now: &str) -> Result<(), DbError> {
    let original: Option<Option<String>> =
        sqlx::query_scalar("SELECT verifies FROM runs WHERE id = ?")
            .bind(id)
            .fetch_optional(&mut *conn)
            .await?;
    let Some(Some(original)) = original else {
        return Ok(());
    };
    let before = stored_result(conn, &original).await?;
    let after = stored_result(conn, id).await?;
    let (outcome, recomputed, differences, more) = match (before, after) {
        (Some(b), Some(a)) if a.3 == "succeeded" => {
            let c = verification::compare(
                StoredResult {
                    results: b.0.as_deref(),
                    sensitivity: b.1.as_deref(),
                    whatif: b.2.as_deref(),
                },
                StoredResult {
                    results: a.0.as_deref(),
                    sensitivity: a.1.as_deref(),
                    whatif: a.2.as_deref(),
                },
            );
            (
                if c.identical {
                    "identical"
                } else {
                    "different"
                },
                Some(c.recomputed_sha256),
                Some(serde_json::to_string(&c.differences).unwrap_or_default()),
                Some(i64::from(c.more_differences)),
            )
        }
        _ => ("not_recomputed", None, None, None),
    };
    sqlx::query(
        "UPDATE verifications
         SET outcome = ?, recomputed_result_sha256 = ?, differences = ?, more_differences = ?,
             finished_at = ?
         WHERE check_run_id = ? AND outcome IS NULL",
    )
    .bind(outcome)
    .bind(recomputed)
    .bind(differences)
    .bind(more)
    .bind(now)
    .bind(id)
    .execute(&mut *conn)
    .await?;
    audit::append(
        conn,
        now,
        EventKind::Verified,
        Some(&original),
        json!({ "run_id": original, "check_run_id": id, "outcome": outcome }),
    )
    .await?;
    Ok(())
}

impl Store {
    /// The verification made by check run `check_run_id`.
    pub async fn verification(
        &self,
        check_run_id: &str,
    ) -> Result<Option<VerificationRecord>, DbError> {
        let row = sqlx::query(&format!(
            "SELECT {VERIFICATION_COLUMNS} FROM verifications WHERE check_run_id = ?"
        ))
        .bind(check_run_id)
        .fetch_optional(&self.reader)
        .await?;
        match row {
            None => Ok(None),
            Some(r) => Ok(Some(VerificationRecord::from_row(&verification_json(&r)?))),
        }
    }

    /// Every verification of run `run_id`, oldest first.
    pub async fn verifications(&self, run_id: &str) -> Result<Vec<VerificationRecord>, DbError> {
        let rows = sqlx::query(&format!(
            "SELECT {VERIFICATION_COLUMNS} FROM verifications WHERE run_id = ?
             ORDER BY requested_at, check_run_id"
        ))
        .bind(run_id)
        .fetch_all(&self.reader)
        .await?;
        rows.iter()
            .map(|r| Ok(VerificationRecord::from_row(&verification_json(r)?)))
            .collect()
    }
}
