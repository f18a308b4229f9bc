//! The audit log's rows: appending an entry inside the caller's transaction, paging through
//! the log, and checking the whole chain against the records as they are now (on the
//! service's read-only pool, or offline on a database file). The hashing rules are
//! `crate::audit`'s.

use super::DbError;
use crate::audit::{self, ChainCheck, Current, Entry, EventKind, RunFields, Verdict, Witness};
use serde_json::Value;
use sqlx::sqlite::{SqliteConnectOptions, SqlitePoolOptions};
use sqlx::{Row, SqliteConnection, SqlitePool};
use std::path::Path;

/// Entries read per page while checking the chain.
const CHECK_PAGE: i64 = 2_000;

const ENTRY_COLUMNS: &str =
    "seq, at, kind, run_id, content, content_sha256, prev_sha256, entry_sha256";

#[derive(Debug, sqlx::FromRow)]
struct EntryRow {
    seq: i64,
    at: String,
    kind: String,
    run_id: Option<String>,
    content: String,
    content_sha256: String,
    prev_sha256: String,
    entry_sha256: String,
}

impl From<EntryRow> for Entry {
    fn from(r: EntryRow) -> Self {
        Entry {
            seq: u64::try_from(r.seq).unwrap_or(0),
            at: r.at,
            kind: r.kind,
            run_id: r.run_id,
            content: r.content,
            content_sha256: r.content_sha256,
            prev_sha256: r.prev_sha256,
            entry_sha256: r.entry_sha256,
        }
    }
}

/// Appends an entry of `kind` about `run_id` with `members` (plus the facts of the record
/// it vouches for, read back inside the same transaction) at the end of the chain. Call it
/// inside the `BEGIN IMMEDIATE` transaction that made the change, after the change.
pub(super) async fn append(
    conn: &mut SqliteConnection,
    at: &str,
    kind: EventKind,
    run_id: Option<&str>,
    members: Value,
) -> Result<(), DbError> {
    append_with(conn, at, kind, run_id, members, None).await
}

/// [`append`] of a `submitted` entry whose facts the caller has in hand
/// ([`crate::audit::submission_facts_from`]), so the stored row is not read back and hashed
/// again under the write lock.
pub(super) async fn append_with(
    conn: &mut SqliteConnection,
    at: &str,
    kind: EventKind,
    run_id: Option<&str>,
    members: Value,
    facts_in_hand: Option<Value>,
) -> Result<(), DbError> {
    let facts = match kind.witness() {
        None => None,
        Some(Witness::Submission) if facts_in_hand.is_some() => facts_in_hand,
        Some(witness) => {
            let key = witness_key(witness, run_id, &members);
            match current(conn, witness, key.as_deref()).await? {
                Current::Facts(f) => Some(f),
                Current::Missing | Current::NotApplicable => {
                    return Err(DbError::Corrupt {
                        id: key.unwrap_or_default(),
                        what: format!("missing while recording a {} entry", kind.as_str()),
                    })
                }
            }
        }
    };
    let last = sqlx::query("SELECT seq, entry_sha256 FROM audit_log ORDER BY seq DESC LIMIT 1")
        .fetch_optional(&mut *conn)
        .await?;
    let last = match last {
        Some(row) => Some((row.try_get::<i64, _>(0)?, row.try_get::<String, _>(1)?)),
        None => None,
    };
    let entry = audit::next_entry(
        last.as_ref()
            .map(|(seq, hash)| (u64::try_from(*seq).unwrap_or(0), hash.as_str())),
        at,
        kind,
        run_id,
        &audit::content(members, facts),
    );
    sqlx::query(
        "INSERT INTO audit_log (seq, at, kind, run_id, content, content_sha256, prev_sha256,
                                entry_sha256)
         VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
    )
    .bind(i64::try_from(entry.seq).unwrap_or(i64::MAX))
    .bind(&entry.at)
    .bind(&entry.kind)
    .bind(&entry.run_id)
    .bind(&entry.content)
    .bind(&entry.content_sha256)
    .bind(&entry.prev_sha256)
    .bind(&entry.entry_sha256)
    .execute(&mut *conn)
    .await?;
    Ok(())
}

/// The id of the record a witness looks up: the run, or the matrix named in the content.
fn witness_key(witness: Witness, run_id: Option<&str>, members: &Value) -> Option<String> {
    match witness {
        Witness::Matrix => members
            .get("matrix_sha256")
            .and_then(Value::as_str)
            .map(str::to_owned),
        Witness::Submission | Witness::Outcome => run_id.map(str::to_owned),
        Witness::Verification => members
            .get("check_run_id")
            .and_then(Value::as_str)
            .map(str::to_owned),
    }
}

/// The facts of the record `key` as stored now.
async fn current(
    conn: &mut SqliteConnection,
    witness: Witness,
    key: Option<&str>,
) -> Result<Current, DbError> {
    let Some(key) = key else {
        return Ok(Current::Missing);
    };
    match witness {
        Witness::Matrix => {
            let row = sqlx::query(
                "SELECT demes, entries, created_at FROM matrices WHERE matrix_sha256 = ?",
            )
            .bind(key)
            .fetch_optional(&mut *conn)
            .await?;
            Ok(match row {
                None => Current::Missing,
                Some(r) => Current::Facts(audit::matrix_facts(
                    u64::try_from(r.try_get::<i64, _>(0)?).unwrap_or(0),
                    &r.try_get::<String, _>(1)?,
                    &r.try_get::<String, _>(2)?,
                )),
            })
        }
        Witness::Verification => {
            let row = sqlx::query(&format!(
                "SELECT {VERIFICATION_COLUMNS} FROM verifications WHERE check_run_id = ?"
            ))
            .bind(key)
            .fetch_optional(&mut *conn)
            .await?;
            Ok(match row {
                None => Current::Missing,
                Some(r) => Current::Facts(audit::verification_facts(&verification_json(&r)?)),
            })
        }
        Witness::Submission | Witness::Outcome => {
            let row = sqlx::query(
                "SELECT request, spec, spec_sha256, matrix_sha256, series, idempotency_key,
                        submitted_at, reused_from, status, provenance, results, warnings,
                        sensitivity, whatif, error, finished_at, notify_url
                 FROM runs WHERE id = ?",
            )
            .bind(key)
            .fetch_optional(&mut *conn)
            .await?;
            let Some(r) = row else {
                return Ok(Current::Missing);
            };
            let fields = RunFields {
                request: r.try_get("request")?,
                spec: r.try_get("spec")?,
                spec_sha256: r.try_get("spec_sha256")?,
                matrix_sha256: r.try_get("matrix_sha256")?,
                series: r.try_get("series")?,
                idempotency_key: r.try_get("idempotency_key")?,
                submitted_at: r.try_get("submitted_at")?,
                reused_from: r.try_get("reused_from")?,
                notify_url: r.try_get("notify_url")?,
                status: r.try_get("status")?,
                provenance: r.try_get("provenance")?,
                results: r.try_get("results")?,
                warnings: r.try_get("warnings")?,
                sensitivity: r.try_get("sensitivity")?,
                whatif: r.try_get("whatif")?,
                error: r.try_get("error")?,
                finished_at: r.try_get("finished_at")?,
            };
            Ok(Current::Facts(match witness {
                Witness::Submission => audit::submission_facts(&fields),
                _ => audit::outcome_facts(&fields),
            }))
        }
    }
}

/// Columns of a verification row, in `SELECT` form.
pub(super) const VERIFICATION_COLUMNS: &str = "check_run_id, run_id, requested_at, \
    recorded_method_version, current_method_version, original_result_sha256, outcome, \
    recomputed_result_sha256, differences, more_differences, finished_at";

/// A verification row as a JSON object (column names as members, stored text as is).
pub(super) fn verification_json(r: &sqlx::sqlite::SqliteRow) -> Result<Value, DbError> {
    let mut object = serde_json::Map::new();
    for name in VERIFICATION_COLUMNS.split(", ") {
        let value = if name == "more_differences" {
            r.try_get::<Option<i64>, _>(name)?
                .map_or(Value::Null, |v| Value::Bool(v != 0))
        } else {
            r.try_get::<Option<String>, _>(name)?
                .map_or(Value::Null, Value::String)
        };
        object.insert(name.to_owned(), value);
    }
    Ok(Value::Object(object))
}

/// Up to `limit` entries after position `after`, in order.
pub(super) async fn page(pool: &SqlitePool, after: u64, limit: u32) -> Result<Vec<Entry>, DbError> {
    let sql = format!("SELECT {ENTRY_COLUMNS} FROM audit_log WHERE seq > ? ORDER BY seq LIMIT ?");
    let rows: Vec<EntryRow> = sqlx::query_as(&sql)
        .bind(i64::try_from(after).unwrap_or(i64::MAX))
        .bind(i64::from(limit))
        .fetch_all(pool)
        .await?;
    Ok(rows.into_iter().map(Entry::from).collect())
}

/// Checks the whole chain on `pool` (one read transaction, so the log and the records are
/// seen at one moment).
pub(super) async fn verify(pool: &SqlitePool) -> Result<Verdict, DbError> {
    let mut conn = pool.acquire().await?;
    sqlx::query("BEGIN").execute(&mut *conn).await?;
    let verdict = verify_on(&mut conn).await;
    let _ = sqlx::query("ROLLBACK").execute(&mut *conn).await;
    verdict
}

async fn verify_on(conn: &mut SqliteConnection) -> Result<Verdict, DbError> {
    let sql = format!("SELECT {ENTRY_COLUMNS} FROM audit_log WHERE seq > ? ORDER BY seq LIMIT ?");
    let mut check = ChainCheck::default();
    let mut after = 0i64;
    loop {
        let rows: Vec<EntryRow> = sqlx::query_as(&sql)
            .bind(after)
            .bind(CHECK_PAGE)
            .fetch_all(&mut *conn)
            .await?;
        let Some(last) = rows.last() else {
            break;
        };
        after = last.seq;
        for row in rows {
            let entry = Entry::from(row);
            let now = match EventKind::parse(&entry.kind).and_then(EventKind::witness) {
                None => Current::NotApplicable,
                Some(witness) => {
                    let members: Value = serde_json::from_str(&entry.content).unwrap_or_default();
                    let key = witness_key(witness, entry.run_id.as_deref(), &members);
                    current(conn, witness, key.as_deref()).await?
                }
            };
            check.check(&entry, &now);
        }
    }
    Ok(check.verdict())
}

/// Checks the chain of the database file at `path` without changing it (read-only, no
/// migrations; meant for a copy of the file).
pub async fn verify_file(path: &Path) -> Result<Verdict, DbError> {
    let pool = SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(
            SqliteConnectOptions::new()
                .filename(path)
                .read_only(true)
                .create_if_missing(false),
        )
        .await?;
    let verdict = verify(&pool).await;
    pool.close().await;
    verdict
}
