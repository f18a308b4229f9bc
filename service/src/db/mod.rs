//! The job store: SQLite through sqlx. The only module that writes SQL.
//!
//! This module owns the connection settings that make the service's promises hold
//! (`journal_mode=WAL` set when the store opens, `synchronous=FULL`, a `busy_timeout`,
//! `foreign_keys=ON`), the split into one writer connection and a pool of read-only readers,
//! the migrations (`migrations/` at the package root, applied on open), and every statement:
//! submission with its idempotency check and result reuse, the content-addressed matrices
//! (stored once per canonical hash, never changed), the queue (claim, heartbeat, the
//! append-only log of ensemble chunks,
//! completion fenced by the lease token, requeue on shutdown, rescue of expired leases by
//! the claim itself), cancellation, the completion notifications of finished runs (`db/notifications.rs`:
//! queued in the transaction that finishes a run), and the read side (one run, a page of
//! runs, a matrix).
//! Every state change appends its audit entry (`db/audit.rs`) in the transaction that made
//! it, so the log and the records never disagree about what happened.
//!
//! Every read-then-write transaction starts with `BEGIN IMMEDIATE`, so it takes the write
//! lock before reading and never fails half-way with `SQLITE_BUSY_SNAPSHOT`. Single-statement
//! writes (claim, heartbeat, completion) are their own transactions. No transaction is held
//! across a computation. Statements are checked at run time (`sqlx::query`), so building
//! needs no database.

mod audit;
mod notifications;
mod rows;
mod series;
mod stats;
mod verification;

pub use audit::verify_file as verify_audit_file;

pub use notifications::DueNotification;
pub use rows::{Claim, MatrixRecord, NotificationRecord, RunRecord};
pub use series::{SeriesRun, SeriesSummary};
pub use stats::RunCounts;
pub use verification::VerificationRecord;

use crate::audit::{Entry, EventKind, Verdict};
use crate::domain::{self, Finish, ListQuery, NewMatrix, NewRun, RunStatus};
use rows::{ClaimRow, MatrixRow, ReusableRow, RunRow, MATRIX_COLUMNS, RUN_COLUMNS};
use serde_json::json;
use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use sqlx::Row;
use std::path::Path;
use std::time::{Duration, Instant};

/// How long a connection waits for another process's write lock before giving up.
const BUSY_TIMEOUT: Duration = Duration::from_secs(10);
/// How long a request waits for the single writer connection.
const WRITER_ACQUIRE_TIMEOUT: Duration = Duration::from_secs(30);
/// Read-only connections.
const READERS: u32 = 4;
/// Interval of the background WAL checkpoint (the writer never checkpoints on a commit).
pub const WAL_CHECKPOINT_EVERY: Duration = Duration::from_millis(500);

/// A failure of the store.
#[derive(Debug, thiserror::Error)]
pub enum DbError {
    /// SQLite or the driver failed.
    #[error("database: {0}")]
    Sqlx(#[from] sqlx::Error),
    /// A migration could not be applied.
    #[error("migration: {0}")]
    Migrate(#[from] sqlx::migrate::MigrateError),
    /// A stored value is not what the schema promises.
    #[error("stored record {id} is corrupt: {what}")]
    Corrupt {
        /// Run id.
        id: String,
        /// What could not be read.
        what: String,
    },
}

/// What a submission did.
#[derive(Debug)]
pub enum Submitted {
    /// A new run was stored.
    Created(RunRecord),
    /// The idempotency key was used before with the same body: that run.
    Existing(RunRecord),
    /// The idempotency key was used before with another body (the id of that run).
    KeyReused(String),
    /// A new run was stored already succeeded, with the results of an earlier succeeded
    /// run of the same spec and method version (its `reused_from`).
    Reused(RunRecord),
}

/// What storing a matrix did.
#[derive(Debug)]
pub enum MatrixStored {
    /// The matrix was new.
    Created(MatrixRecord),
    /// A matrix with the same canonical hash was stored before: that one.
    Existing(MatrixRecord),
}

/// What a cancellation request did.
#[derive(Debug)]
pub enum Cancelled {
    /// No such run.
    NotFound,
    /// The run after the request (cancelled at once if queued, marked if running).
    Run(RunRecord),
    /// The run had already succeeded or failed.
    AlreadyFinished(RunRecord),
}

/// The store: one writer connection and read-only readers on the same file.
#[derive(Debug, Clone)]
pub struct Store {
    writer: SqlitePool,
    reader: SqlitePool,
    /// One read-write connection that only runs WAL checkpoints (see [`Store::checkpoint_wal`]).
    maintenance: SqlitePool,
}

fn now_text() -> String {
    chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true)
}

fn now_ms() -> i64 {
    chrono::Utc::now().timestamp_millis()
}

fn millis(d: Duration) -> i64 {
    i64::try_from(d.as_millis()).unwrap_or(i64::MAX)
}

/// Extends the lease of run `id` held with `token` and records progress: `None` when the
/// lease is lost (expired and taken, or the run is no longer running), otherwise whether
/// cancellation was requested.
async fn extend_lease(
    conn: &mut sqlx::SqliteConnection,
    id: &str,
    token: &str,
    lease: Duration,
    done: u64,
) -> Result<Option<bool>, DbError> {
    let cancel: Option<i64> = sqlx::query_scalar(
        "UPDATE runs
         SET lease_expires_ms = ?1, heartbeat_at = ?2, progress_done = ?3
         WHERE id = ?4 AND lease_token = ?5 AND status = 'running'
         RETURNING cancel_requested",
    )
    .bind(now_ms().saturating_add(millis(lease)))
    .bind(now_text())
    .bind(done as i64)
    .bind(id)
    .bind(token)
    .fetch_optional(conn)
    .await?;
    Ok(cancel.map(|c| c != 0))
}

/// Records one writer operation's time, from asking for the writer connection to its commit
/// or failure, in `demefix_db_write_duration_seconds{op}` when dropped: a submission that
/// waits behind another writer shows up there, not only in the HTTP latency.
struct WriteTimer {
    op: &'static str,
    started: Instant,
}

impl WriteTimer {
    fn start(op: &'static str) -> Self {
        Self {
            op,
            started: Instant::now(),
        }
    }
}

impl Drop for WriteTimer {
    fn drop(&mut self) {
        metrics::histogram!("demefix_db_write_duration_seconds", "op" => self.op)
            .record(self.started.elapsed().as_secs_f64());
    }
}

/// Deletes the checkpoint log of run `id`.
async fn delete_chunks(conn: &mut sqlx::SqliteConnection, id: &str) -> Result<(), DbError> {
    sqlx::query("DELETE FROM run_chunks WHERE run_id = ?")
        .bind(id)
        .execute(conn)
        .await?;
    Ok(())
}

/// Inserts `matrix` unless its hash is stored already; returns whether it was new.
async fn insert_matrix(
    tx: &mut sqlx::SqliteConnection,
    matrix: &NewMatrix,
    now: &str,
) -> Result<bool, DbError> {
    let result = sqlx::query(
        "INSERT INTO matrices (matrix_sha256, demes, entries, created_at) VALUES (?, ?, ?, ?)
         ON CONFLICT (matrix_sha256) DO NOTHING",
    )
    .bind(&matrix.sha256)
    .bind(matrix.demes as i64)
    .bind(&matrix.entries_json)
    .bind(now)
    .execute(&mut *tx)
    .await?;
    let created = result.rows_affected() == 1;
    if created {
        audit::append(
            tx,
            now,
            EventKind::MatrixStored,
            None,
            json!({ "matrix_sha256": matrix.sha256 }),
        )
        .await?;
    }
    Ok(created)
}

impl Store {
    /// Opens (creating if missing) and migrates the database at `path`.
    pub async fn open(path: &Path) -> Result<Self, DbError> {
        let base = SqliteConnectOptions::new()
            .filename(path)
            .busy_timeout(BUSY_TIMEOUT)
            .foreign_keys(true)
            .synchronous(SqliteSynchronous::Full);
        // The writer never checkpoints the WAL itself (`wal_autocheckpoint = 0`), so a commit
        // never pays for copying the log into the database; `checkpoint_wal` does it on its
        // own connection.
        let writer = SqlitePoolOptions::new()
            .max_connections(1)
            .min_connections(1)
            .acquire_timeout(WRITER_ACQUIRE_TIMEOUT)
            .idle_timeout(None)
            .max_lifetime(None)
            .connect_with(
                base.clone()
                    .create_if_missing(true)
                    .journal_mode(SqliteJournalMode::Wal)
                    .pragma("wal_autocheckpoint", "0"),
            )
            .await?;
        sqlx::migrate!("./migrations").run(&writer).await?;
        let maintenance = SqlitePoolOptions::new()
            .max_connections(1)
            .connect_with(base.clone().pragma("wal_autocheckpoint", "0"))
            .await?;
        let reader = SqlitePoolOptions::new()
            .max_connections(READERS)
            .connect_with(base.read_only(true))
            .await?;
        Ok(Self {
            writer,
            reader,
            maintenance,
        })
    }

    /// Closes every pool (waits for connections in use to be returned), after a last WAL
    /// checkpoint.
    pub async fn close(&self) {
        let _ = self.checkpoint_wal().await;
        self.writer.close().await;
        self.reader.close().await;
        self.maintenance.close().await;
    }

    /// Copies committed WAL frames into the database file without waiting for readers or
    /// writers (`PRAGMA wal_checkpoint(PASSIVE)`), on the maintenance connection; the server
    /// calls it every [`WAL_CHECKPOINT_EVERY`]. Returns the frames in the log and those
    /// checkpointed.
    pub async fn checkpoint_wal(&self) -> Result<(i64, i64), DbError> {
        let started = Instant::now();
        let row = sqlx::query("PRAGMA wal_checkpoint(PASSIVE)")
            .fetch_one(&self.maintenance)
            .await?;
        metrics::histogram!("demefix_wal_checkpoint_duration_seconds")
            .record(started.elapsed().as_secs_f64());
        Ok((row.try_get(1)?, row.try_get(2)?))
    }

    /// Stores `new` (and its matrix, once per hash), honouring its idempotency key first; then,
    /// when `new.allow_reuse`, the earliest succeeded run with the same spec hash and method
    /// version answers it: the new run is stored already succeeded with that run's results
    /// ([`domain::reuse`]). All in one `BEGIN IMMEDIATE` transaction.
    pub async fn submit(&self, new: &NewRun) -> Result<Submitted, DbError> {
        let _timer = WriteTimer::start("submit");
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        if let Some(key) = &new.idempotency_key {
            let earlier =
                sqlx::query("SELECT id, request_sha256 FROM runs WHERE idempotency_key = ?")
                    .bind(key)
                    .fetch_optional(&mut *tx)
                    .await?;
            if let Some(row) = earlier {
                let id: String = row.try_get("id")?;
                let hash: String = row.try_get("request_sha256")?;
                tx.rollback().await?;
                if hash != new.request_sha256 {
                    return Ok(Submitted::KeyReused(id));
                }
                let run = self.run(&id).await?.ok_or_else(|| DbError::Corrupt {
                    id: id.clone(),
                    what: "vanished after its idempotency key was found".to_owned(),
                })?;
                return Ok(Submitted::Existing(run));
            }
        }
        let now = now_text();
        insert_matrix(&mut tx, &new.matrix, &now).await?;
        let reuse = if new.allow_reuse {
            let earlier: Option<ReusableRow> = sqlx::query_as(
                "SELECT id, provenance, results, warnings, sensitivity, whatif FROM runs
                 WHERE spec_sha256 = ? AND method_version = ? AND status = 'succeeded'
                 ORDER BY id LIMIT 1",
            )
            .bind(&new.spec_sha256)
            .bind(&new.method_version)
            .fetch_optional(&mut *tx)
            .await?;
            match earlier {
                Some(row) => row
                    .into_reusable()?
                    .and_then(|earlier| domain::reuse(new, &earlier)),
                None => None,
            }
        } else {
            None
        };
        let warnings = reuse.as_ref().map_or(&new.warnings, |r| &r.warnings);
        sqlx::query(
            "INSERT INTO runs (id, status, series, spec, spec_sha256, request, request_sha256,
                               matrix_sha256, warnings, progress_total, submitted_at,
                               idempotency_key, provenance, results, progress_done,
                               started_at, finished_at, reused_from, sensitivity, whatif,
                               verifies, notify_url)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14,
                     CASE WHEN ?15 IS NULL THEN 0 ELSE ?10 END,
                     CASE WHEN ?15 IS NULL THEN NULL ELSE ?11 END,
                     CASE WHEN ?15 IS NULL THEN NULL ELSE ?11 END,
                     ?15, ?16, ?17, ?18, ?19)",
        )
        .bind(&new.id)
        .bind(if reuse.is_some() {
            RunStatus::Succeeded.as_str()
        } else {
            RunStatus::Queued.as_str()
        })
        .bind(&new.series)
        .bind(&new.spec_json)
        .bind(&new.spec_sha256)
        .bind(&new.request)
        .bind(&new.request_sha256)
        .bind(&new.matrix.sha256)
        .bind(serde_json::to_string(warnings).unwrap_or_else(|_| "[]".to_owned()))
        .bind(new.total as i64)
        .bind(&now)
        .bind(&new.idempotency_key)
        .bind(reuse.as_ref().map(|r| &r.provenance))
        .bind(reuse.as_ref().map(|r| &r.results))
        .bind(reuse.as_ref().map(|r| &r.reused_from))
        .bind(reuse.as_ref().and_then(|r| r.sensitivity.as_ref()))
        .bind(reuse.as_ref().and_then(|r| r.whatif.as_ref()))
        .bind(&new.verifies)
        .bind(&new.notify_url)
        .execute(&mut *tx)
        .await?;
        if let Some(original) = &new.verifies {
            verification::open(&mut tx, original, &new.id, &new.method_version, &now).await?;
        }
        let members = json!({ "run_id": new.id });
        let facts = crate::audit::submission_facts_from(&crate::audit::Submission {
            request_sha256: &new.request_sha256,
            spec_text_sha256: &new.spec_text_sha256,
            spec_sha256: &new.spec_sha256,
            matrix_sha256: &new.matrix.sha256,
            series: new.series.as_deref(),
            idempotency_key: new.idempotency_key.as_deref(),
            submitted_at: &now,
            reused_from: reuse.as_ref().map(|r| r.reused_from.as_str()),
            notify_url: new.notify_url.as_deref(),
        });
        audit::append_with(
            &mut tx,
            &now,
            EventKind::Submitted,
            Some(&new.id),
            members.clone(),
            Some(facts),
        )
        .await?;
        if reuse.is_some() {
            audit::append(&mut tx, &now, EventKind::Finished, Some(&new.id), members).await?;
            // A reused run is finished from the start.
            notifications::enqueue(&mut tx, &new.id, &now).await?;
        }
        tx.commit().await?;
        let run = self.run(&new.id).await?.ok_or_else(|| DbError::Corrupt {
            id: new.id.clone(),
            what: "not found right after it was stored".to_owned(),
        })?;
        Ok(if reuse.is_some() {
            Submitted::Reused(run)
        } else {
            Submitted::Created(run)
        })
    }

    /// Stores `matrix` under its canonical hash, once: a matrix with the same hash is left
    /// as it is (matrices are immutable) and returned.
    pub async fn store_matrix(&self, matrix: &NewMatrix) -> Result<MatrixStored, DbError> {
        let _timer = WriteTimer::start("store_matrix");
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        let created = insert_matrix(&mut tx, matrix, &now_text()).await?;
        let sql = format!("SELECT {MATRIX_COLUMNS} FROM matrices WHERE matrix_sha256 = ?");
        let row: MatrixRow = sqlx::query_as(&sql)
            .bind(&matrix.sha256)
            .fetch_one(&mut *tx)
            .await?;
        tx.commit().await?;
        let record = row.into_record()?;
        Ok(if created {
            MatrixStored::Created(record)
        } else {
            MatrixStored::Existing(record)
        })
    }

    /// The matrix whose canonical hash is `sha256` (lowercase hex), if stored.
    pub async fn matrix(&self, sha256: &str) -> Result<Option<MatrixRecord>, DbError> {
        let sql = format!("SELECT {MATRIX_COLUMNS} FROM matrices WHERE matrix_sha256 = ?");
        let row: Option<MatrixRow> = sqlx::query_as(&sql)
            .bind(sha256)
            .fetch_optional(&self.reader)
            .await?;
        row.map(MatrixRow::into_record).transpose()
    }

    /// Number of matrices stored.
    pub async fn count_matrices(&self) -> Result<i64, DbError> {
        Ok(sqlx::query_scalar("SELECT count(*) FROM matrices")
            .fetch_one(&self.reader)
            .await?)
    }

    /// The run `id`, if it exists.
    pub async fn run(&self, id: &str) -> Result<Option<RunRecord>, DbError> {
        let sql = format!("SELECT {RUN_COLUMNS} FROM runs WHERE id = ?");
        let row: Option<RunRow> = sqlx::query_as(&sql)
            .bind(id)
            .fetch_optional(&self.reader)
            .await?;
        row.map(RunRow::into_record).transpose()
    }

    /// A page of runs, newest first.
    pub async fn list(&self, q: &ListQuery) -> Result<Vec<RunRecord>, DbError> {
        let sql = format!(
            "SELECT {RUN_COLUMNS} FROM runs
             WHERE (?1 IS NULL OR id < ?1)
               AND (?2 IS NULL OR status = ?2)
               AND (?3 IS NULL OR series = ?3)
               AND (?4 IS NULL OR submitted_at >= ?4)
             ORDER BY id DESC LIMIT ?5"
        );
        let rows: Vec<RunRow> = sqlx::query_as(&sql)
            .bind(&q.after)
            .bind(q.status.map(RunStatus::as_str))
            .bind(&q.series)
            .bind(&q.since)
            .bind(i64::from(q.limit))
            .fetch_all(&self.reader)
            .await?;
        rows.into_iter().map(RunRow::into_record).collect()
    }

    /// Number of runs stored (all statuses).
    pub async fn count_runs(&self) -> Result<i64, DbError> {
        Ok(sqlx::query_scalar("SELECT count(*) FROM runs")
            .fetch_one(&self.reader)
            .await?)
    }

    /// Asks for run `id` to stop: a queued run is cancelled at once, a running one is marked
    /// and its worker stops within a chunk.
    pub async fn cancel(&self, id: &str) -> Result<Cancelled, DbError> {
        let _timer = WriteTimer::start("cancel");
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        let status: Option<String> = sqlx::query_scalar("SELECT status FROM runs WHERE id = ?")
            .bind(id)
            .fetch_optional(&mut *tx)
            .await?;
        let Some(status) = status else {
            tx.rollback().await?;
            return Ok(Cancelled::NotFound);
        };
        let now = now_text();
        let members = json!({ "run_id": id });
        let finished = match status.as_str() {
            "queued" => {
                sqlx::query(
                    "UPDATE runs SET status = 'cancelled', cancel_requested = 1, finished_at = ?
                     WHERE id = ?",
                )
                .bind(&now)
                .bind(id)
                .execute(&mut *tx)
                .await?;
                delete_chunks(&mut tx, id).await?;
                audit::append(&mut tx, &now, EventKind::Finished, Some(id), members).await?;
                verification::close(&mut tx, id, &now).await?;
                notifications::enqueue(&mut tx, id, &now_text()).await?;
                false
            }
            "running" => {
                let first: Option<i64> = sqlx::query_scalar(
                    "UPDATE runs SET cancel_requested = 1 WHERE id = ? AND cancel_requested = 0
                     RETURNING 1",
                )
                .bind(id)
                .fetch_optional(&mut *tx)
                .await?;
                if first.is_some() {
                    audit::append(&mut tx, &now, EventKind::CancelRequested, Some(id), members)
                        .await?;
                }
                false
            }
            "cancelled" => false,
            _ => true,
        };
        tx.commit().await?;
        let run = self.run(id).await?.ok_or_else(|| DbError::Corrupt {
            id: id.to_owned(),
            what: "vanished during cancellation".to_owned(),
        })?;
        Ok(if finished {
            Cancelled::AlreadyFinished(run)
        } else {
            Cancelled::Run(run)
        })
    }

    /// Claims the oldest queued run, or the oldest running run whose lease has expired (its
    /// worker died): one `UPDATE ... RETURNING`, which hands out a fresh lease token so that
    /// the previous holder can no longer complete it.
    pub async fn claim(&self, token: &str, lease: Duration) -> Result<Option<Claim>, DbError> {
        let _timer = WriteTimer::start("claim");
        let now = now_ms();
        let at = now_text();
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        let row: Option<ClaimRow> = sqlx::query_as(
            "UPDATE runs
             SET status = 'running', lease_token = ?1, lease_expires_ms = ?2, heartbeat_at = ?3,
                 started_at = COALESCE(started_at, ?3), attempts = attempts + 1
             WHERE id = (SELECT id FROM runs
                         WHERE status = 'queued'
                            OR (status = 'running' AND lease_expires_ms < ?4)
                         ORDER BY id LIMIT 1)
             RETURNING id, spec, request_sha256, warnings, attempts, cancel_requested",
        )
        .bind(token)
        .bind(now.saturating_add(millis(lease)))
        .bind(&at)
        .bind(now)
        .fetch_optional(&mut *tx)
        .await?;
        let Some(row) = row else {
            tx.rollback().await?;
            return Ok(None);
        };
        let steps: Vec<String> =
            sqlx::query_scalar("SELECT step FROM run_chunks WHERE run_id = ? ORDER BY seq")
                .bind(row.id())
                .fetch_all(&mut *tx)
                .await?;
        audit::append(
            &mut tx,
            &at,
            EventKind::Started,
            Some(row.id()),
            json!({ "run_id": row.id(), "attempt": row.attempts(), "resumed_chunks": steps.len() }),
        )
        .await?;
        tx.commit().await?;
        Ok(Some(row.into_claim(steps)))
    }

    /// Appends ensemble chunk `seq` of run `id` (held with `token`) to its checkpoint log,
    /// extending the lease and recording progress in the same transaction. `None` when the
    /// lease is lost (nothing is written); otherwise whether cancellation was requested.
    pub async fn commit_chunk(
        &self,
        id: &str,
        token: &str,
        lease: Duration,
        done: u64,
        seq: u64,
        step: &str,
    ) -> Result<Option<bool>, DbError> {
        let _timer = WriteTimer::start("commit_chunk");
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        let Some(cancel) = extend_lease(&mut tx, id, token, lease, done).await? else {
            tx.rollback().await?;
            return Ok(None);
        };
        sqlx::query("INSERT INTO run_chunks (run_id, seq, step) VALUES (?, ?, ?)")
            .bind(id)
            .bind(i64::try_from(seq).unwrap_or(i64::MAX))
            .bind(step)
            .execute(&mut *tx)
            .await?;
        audit::append(
            &mut tx,
            &now_text(),
            EventKind::ChunkCommitted,
            Some(id),
            json!({
                "run_id": id,
                "seq": seq,
                "done": done,
                "step_sha256": crate::provenance::sha256_hex(step.as_bytes()),
            }),
        )
        .await?;
        tx.commit().await?;
        Ok(Some(cancel))
    }

    /// Empties the checkpoint log of run `id` if `token` still holds its lease (the run's
    /// ensembles start afresh). Returns whether the lease still held.
    pub async fn discard_chunks(&self, id: &str, token: &str) -> Result<bool, DbError> {
        let _timer = WriteTimer::start("discard_chunks");
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        let held: Option<i64> = sqlx::query_scalar(
            "SELECT 1 FROM runs WHERE id = ? AND lease_token = ? AND status = 'running'",
        )
        .bind(id)
        .bind(token)
        .fetch_optional(&mut *tx)
        .await?;
        if held.is_some() {
            delete_chunks(&mut tx, id).await?;
            audit::append(
                &mut tx,
                &now_text(),
                EventKind::ChunksDiscarded,
                Some(id),
                json!({ "run_id": id }),
            )
            .await?;
        }
        tx.commit().await?;
        Ok(held.is_some())
    }

    /// Extends the lease of run `id` held with `token` and records progress. `None` when
    /// the lease is lost (expired and taken, or the run is no longer running); otherwise
    /// whether cancellation was requested.
    pub async fn heartbeat(
        &self,
        id: &str,
        token: &str,
        lease: Duration,
        done: u64,
    ) -> Result<Option<bool>, DbError> {
        let _timer = WriteTimer::start("heartbeat");
        let mut conn = self.writer.acquire().await?;
        extend_lease(&mut conn, id, token, lease, done).await
    }

    /// Ends run `id` as `finish` says, if `token` still holds its lease (fencing), and drops
    /// its checkpoint log. Returns whether the completion was accepted.
    pub async fn finish(&self, id: &str, token: &str, finish: &Finish) -> Result<bool, DbError> {
        let _timer = WriteTimer::start("finish");
        let now = now_text();
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        let result = match finish {
            Finish::Succeeded {
                provenance,
                results,
                sensitivity,
                whatif,
                warnings,
            } => {
                sqlx::query(
                    "UPDATE runs
                     SET status = 'succeeded', provenance = ?1, results = ?2, warnings = ?3,
                         progress_done = progress_total, finished_at = ?4,
                         lease_token = NULL, lease_expires_ms = NULL, checkpoint = NULL,
                         sensitivity = ?7, whatif = ?8
                     WHERE id = ?5 AND lease_token = ?6 AND status = 'running'",
                )
                .bind(provenance)
                .bind(results)
                .bind(serde_json::to_string(warnings).unwrap_or_else(|_| "[]".to_owned()))
                .bind(&now)
                .bind(id)
                .bind(token)
                .bind(sensitivity)
                .bind(whatif)
                .execute(&mut *tx)
                .await?
            }
            Finish::Failed { error } => {
                sqlx::query(
                    "UPDATE runs
                     SET status = 'failed', error = ?1, finished_at = ?2,
                         lease_token = NULL, lease_expires_ms = NULL
                     WHERE id = ?3 AND lease_token = ?4 AND status = 'running'",
                )
                .bind(error)
                .bind(&now)
                .bind(id)
                .bind(token)
                .execute(&mut *tx)
                .await?
            }
            Finish::Cancelled => {
                sqlx::query(
                    "UPDATE runs
                     SET status = 'cancelled', finished_at = ?1,
                         lease_token = NULL, lease_expires_ms = NULL
                     WHERE id = ?2 AND lease_token = ?3 AND status = 'running'",
                )
                .bind(&now)
                .bind(id)
                .bind(token)
                .execute(&mut *tx)
                .await?
            }
        };
        let accepted = result.rows_affected() == 1;
        if accepted {
            delete_chunks(&mut tx, id).await?;
            audit::append(
                &mut tx,
                &now,
                EventKind::Finished,
                Some(id),
                json!({ "run_id": id }),
            )
            .await?;
            verification::close(&mut tx, id, &now).await?;
            notifications::enqueue(&mut tx, id, &now).await?;
        }
        tx.commit().await?;
        Ok(accepted)
    }

    /// Puts run `id` back in the queue (shutdown), keeping its checkpoint log, if `token` still
    /// holds its lease.
    pub async fn requeue(&self, id: &str, token: &str) -> Result<bool, DbError> {
        let _timer = WriteTimer::start("requeue");
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        let result = sqlx::query(
            "UPDATE runs SET status = 'queued', lease_token = NULL, lease_expires_ms = NULL
             WHERE id = ? AND lease_token = ? AND status = 'running'",
        )
        .bind(id)
        .bind(token)
        .execute(&mut *tx)
        .await?;
        let requeued = result.rows_affected() == 1;
        if requeued {
            audit::append(
                &mut tx,
                &now_text(),
                EventKind::Requeued,
                Some(id),
                json!({ "run_id": id }),
            )
            .await?;
        }
        tx.commit().await?;
        Ok(requeued)
    }

    /// Up to `limit` audit entries after position `after`, in order.
    pub async fn audit_page(&self, after: u64, limit: u32) -> Result<Vec<Entry>, DbError> {
        audit::page(&self.reader, after, limit).await
    }

    /// Checks the whole audit chain against the records as stored now.
    pub async fn verify_audit(&self) -> Result<Verdict, DbError> {
        audit::verify(&self.reader).await
    }

    /// Checks that the database takes the write lock (for `/readyz`).
    pub async fn check_writable(&self) -> Result<(), DbError> {
        let tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        tx.rollback().await?;
        Ok(())
    }
}
