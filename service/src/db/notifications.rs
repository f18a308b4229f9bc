//! The completion notifications of finished runs (table `notifications`): queued in the
//! transaction that finishes a run ([`enqueue`]), claimed by the notifier
//! ([`Store::claim_notifications`]), and marked delivered, due again, or failed.
//!
//! A claim counts the attempt and moves `next_attempt_at` past the attempt's longest
//! duration, so a notice whose attempt was interrupted (the process stopped during it) is
//! claimed again once that time has passed, and two processes on one database never send
//! the same attempt. Outcomes are fenced by the attempt number: a late outcome of an attempt
//! that lapsed and was claimed again changes nothing.

use super::{now_text, DbError, Store};
use crate::domain::RunStatus;
use std::time::Duration;

/// A notification whose attempt the caller now holds.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DueNotification {
    /// The finished run.
    pub run_id: String,
    /// Where to send it (the job's `notify_url`).
    pub url: String,
    /// This attempt's number (1 for the first).
    pub attempt: u32,
    /// How the run ended.
    pub status: RunStatus,
    /// RFC 3339 UTC: when it ended.
    pub finished_at: String,
}

#[derive(Debug, sqlx::FromRow)]
struct DueRow {
    run_id: String,
    url: String,
    attempts: i64,
    status: String,
    finished_at: Option<String>,
}

/// `now` plus `d`, in the stored text form.
fn text_after(d: Duration) -> String {
    let d = chrono::Duration::from_std(d).unwrap_or(chrono::Duration::MAX);
    let at = chrono::Utc::now()
        .checked_add_signed(d)
        .unwrap_or(chrono::DateTime::<chrono::Utc>::MAX_UTC);
    at.to_rfc3339_opts(chrono::SecondsFormat::Millis, true)
}

/// Queues the completion notification of run `run_id` if the run has a `notify_url` (and
/// none is queued yet), due at once. Runs inside the caller's transaction, which finishes
/// the run.
pub(super) async fn enqueue(
    conn: &mut sqlx::SqliteConnection,
    run_id: &str,
    now: &str,
) -> Result<(), DbError> {
    sqlx::query(
        "INSERT OR IGNORE INTO notifications (run_id, url, next_attempt_at, created_at)
         SELECT id, notify_url, ?2, ?2 FROM runs WHERE id = ?1 AND notify_url IS NOT NULL",
    )
    .bind(run_id)
    .bind(now)
    .execute(conn)
    .await?;
    Ok(())
}

impl Store {
    /// Claims up to `limit` notifications that are due, oldest due first: each attempt is
    /// counted and the notification is held for `hold` (the longest an attempt takes).
    /// Notifications that are due but whose `max_attempts` are all used (the last attempt
    /// was interrupted) are recorded as failed instead. Reads on the read-only pool first,
    /// so the writer is only taken when something is due.
    pub async fn claim_notifications(
        &self,
        limit: u32,
        hold: Duration,
        max_attempts: u32,
    ) -> Result<Vec<DueNotification>, DbError> {
        let now = now_text();
        let due: Option<i64> = sqlx::query_scalar(
            "SELECT 1 FROM notifications WHERE next_attempt_at IS NOT NULL AND next_attempt_at <= ?
             LIMIT 1",
        )
        .bind(&now)
        .fetch_optional(&self.reader)
        .await?;
        if due.is_none() {
            return Ok(Vec::new());
        }
        let mut tx = self.writer.begin_with("BEGIN IMMEDIATE").await?;
        sqlx::query(
            "UPDATE notifications
             SET failed_at = ?1, next_attempt_at = NULL,
                 last_error = COALESCE(last_error || '; ', '')
                     || 'the last attempt did not complete (the service stopped during it)'
             WHERE next_attempt_at IS NOT NULL AND next_attempt_at <= ?1 AND attempts >= ?2",
        )
        .bind(&now)
        .bind(i64::from(max_attempts))
        .execute(&mut *tx)
        .await?;
        let rows: Vec<DueRow> = sqlx::query_as(
            "SELECT n.run_id, n.url, n.attempts, r.status, r.finished_at
             FROM notifications n JOIN runs r ON r.id = n.run_id
             WHERE n.next_attempt_at IS NOT NULL AND n.next_attempt_at <= ?1
             ORDER BY n.next_attempt_at, n.run_id LIMIT ?2",
        )
        .bind(&now)
        .bind(i64::from(limit))
        .fetch_all(&mut *tx)
        .await?;
        let until = text_after(hold);
        let mut claimed = Vec::with_capacity(rows.len());
        for row in rows {
            sqlx::query(
                "UPDATE notifications SET attempts = attempts + 1, next_attempt_at = ?
                 WHERE run_id = ?",
            )
            .bind(&until)
            .bind(&row.run_id)
            .execute(&mut *tx)
            .await?;
            let corrupt = |what: String| DbError::Corrupt {
                id: row.run_id.clone(),
                what,
            };
            let status = RunStatus::parse(&row.status)
                .filter(|s| s.is_finished())
                .ok_or_else(|| corrupt(format!("a notification for a run `{}`", row.status)))?;
            let finished_at = row
                .finished_at
                .clone()
                .ok_or_else(|| corrupt("a finished run without finished_at".to_owned()))?;
            claimed.push(DueNotification {
                attempt: u32::try_from(row.attempts.saturating_add(1)).unwrap_or(u32::MAX),
                run_id: row.run_id,
                url: row.url,
                status,
                finished_at,
            });
        }
        tx.commit().await?;
        Ok(claimed)
    }

    /// Records that attempt `attempt` of run `run_id`'s notification got a 2xx answer.
    /// Returns whether that attempt still held the notification.
    pub async fn notification_delivered(
        &self,
        run_id: &str,
        attempt: u32,
    ) -> Result<bool, DbError> {
        let result = sqlx::query(
            "UPDATE notifications SET delivered_at = ?1, next_attempt_at = NULL
             WHERE run_id = ?2 AND attempts = ?3 AND delivered_at IS NULL AND failed_at IS NULL",
        )
        .bind(now_text())
        .bind(run_id)
        .bind(i64::from(attempt))
        .execute(&self.writer)
        .await?;
        Ok(result.rows_affected() == 1)
    }

    /// Records that attempt `attempt` of run `run_id`'s notification failed with `error`:
    /// due again after `retry_after`, or, with `None`, failed for good. Returns whether that
    /// attempt still held the notification.
    pub async fn notification_failed(
        &self,
        run_id: &str,
        attempt: u32,
        error: &str,
        retry_after: Option<Duration>,
    ) -> Result<bool, DbError> {
        let (next, failed) = match retry_after {
            Some(d) => (Some(text_after(d)), None),
            None => (None, Some(now_text())),
        };
        let result = sqlx::query(
            "UPDATE notifications SET last_error = ?1, next_attempt_at = ?2, failed_at = ?3
             WHERE run_id = ?4 AND attempts = ?5 AND delivered_at IS NULL AND failed_at IS NULL",
        )
        .bind(error)
        .bind(next)
        .bind(failed)
        .bind(run_id)
        .bind(i64::from(attempt))
        .execute(&self.writer)
        .await?;
        Ok(result.rows_affected() == 1)
    }
}
