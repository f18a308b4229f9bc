//! Completion notifications: when a run whose job named a `notify_url` finishes (succeeded,
//! failed or cancelled, or answered at once by reuse), the service POSTs a small JSON notice
//! ([`Notice`]) to that URL.
//!
//! This module owns the notifier, a background task started by [`crate::server::start`]:
//! it claims due notifications from the store ([`Store::claim_notifications`]; they were
//! written in the transaction that finished the run, so none is lost), sends each one over
//! the minimal HTTP/1.1 client ([`crate::http_client`]; `http://` only, there is no TLS
//! client), and records the outcome. A 2xx answer marks the notice delivered; anything else
//! (another status, no connection, no answer within [`DELIVERY_TIMEOUT`]) is retried after
//! a backoff that starts at `DEMEFIX_NOTIFY_BACKOFF_MS` and doubles after each failed
//! attempt, capped at [`MAX_BACKOFF`], until `DEMEFIX_NOTIFY_ATTEMPTS` attempts are used;
//! then the failure is recorded (`failed_at`, `last_error`) and logged. Redirects are not
//! followed. Pending notices survive a restart: they are rows in SQLite, picked up by the
//! next start. Delivery is at least once: a receiver should treat `run_id` as the key of a
//! notice (an attempt interrupted by a shutdown after the receiver answered is sent again).

use crate::config::Config;
use crate::db::{DueNotification, Store};
use crate::http_client::{self, HttpUrl, Request};
use serde::Serialize;
use std::time::Duration;
use tokio::sync::watch;
use tokio::task::{JoinHandle, JoinSet};
use tracing::Instrument;

/// Longest wait for one delivery attempt (connection, request and answer).
pub const DELIVERY_TIMEOUT: Duration = Duration::from_secs(10);
/// Longest wait between two attempts.
pub const MAX_BACKOFF: Duration = Duration::from_secs(600);
/// How long a claimed attempt holds its notification: past this the attempt counts as
/// interrupted and the notification is claimed again.
const CLAIM_HOLD: Duration = Duration::from_secs(15);
/// Longest pause between two looks for due notifications.
const IDLE_POLL: Duration = Duration::from_millis(500);
/// Notifications sent at once.
const BATCH: u32 = 16;
/// Largest answer read from a receiver, bytes (the body is only quoted in `last_error`).
const MAX_ANSWER: usize = 1024 * 1024;
/// How much of a receiver's answer is kept in `last_error`, characters.
const ERROR_EXCERPT: usize = 200;

/// The retry policy of completion notifications.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RetryPolicy {
    /// Wait after the first failed attempt; it doubles after each further one.
    pub backoff: Duration,
    /// Attempts before the failure is recorded.
    pub attempts: u32,
}

impl RetryPolicy {
    /// The policy of `config` (`DEMEFIX_NOTIFY_BACKOFF_MS`, `DEMEFIX_NOTIFY_ATTEMPTS`).
    pub fn of(config: &Config) -> Self {
        Self {
            backoff: config.notify_backoff,
            attempts: config.notify_attempts,
        }
    }

    /// The wait after failed attempt `attempt` (from 1) before the next one, or `None` when
    /// it was the last: `backoff * 2^(attempt - 1)`, at most [`MAX_BACKOFF`].
    pub fn retry_after(&self, attempt: u32) -> Option<Duration> {
        if attempt >= self.attempts {
            return None;
        }
        let factor = 1u32 << attempt.saturating_sub(1).min(20);
        Some(self.backoff.saturating_mul(factor).min(MAX_BACKOFF))
    }
}

/// The JSON document POSTed to a `notify_url`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Notice<'a> {
    /// The run.
    pub run_id: &'a str,
    /// `succeeded`, `failed` or `cancelled`.
    pub status: &'static str,
    /// The run's path on the service, `/v1/runs/{id}` (the service does not know the
    /// address its clients reach it by).
    pub run_url: String,
    /// RFC 3339 UTC: when the run finished.
    pub finished_at: &'a str,
}

impl<'a> Notice<'a> {
    /// The notice of `n`.
    pub fn of(n: &'a DueNotification) -> Self {
        Self {
            run_id: &n.run_id,
            status: n.status.as_str(),
            run_url: format!("/v1/runs/{}", n.run_id),
            finished_at: &n.finished_at,
        }
    }
}

/// Starts the notifier; it stops claiming at shutdown and returns once the attempts in
/// flight have ended (each within [`DELIVERY_TIMEOUT`]) and their outcomes are recorded.
pub fn spawn(store: Store, policy: RetryPolicy, shutdown: watch::Receiver<bool>) -> JoinHandle<()> {
    tokio::spawn(run_loop(store, policy, shutdown))
}

async fn run_loop(store: Store, policy: RetryPolicy, mut shutdown: watch::Receiver<bool>) {
    let pause = IDLE_POLL.min(policy.backoff).max(Duration::from_millis(10));
    loop {
        if *shutdown.borrow() {
            break;
        }
        match store
            .claim_notifications(BATCH, CLAIM_HOLD, policy.attempts)
            .await
        {
            Ok(batch) if !batch.is_empty() => {
                let mut sending = JoinSet::new();
                for n in batch {
                    sending.spawn(async move {
                        let outcome = deliver(&n).await;
                        (n, outcome)
                    });
                }
                while let Some(joined) = sending.join_next().await {
                    match joined {
                        Ok((n, outcome)) => record(&store, &policy, &n, outcome).await,
                        Err(e) => tracing::error!(error = %e, "a notification attempt panicked"),
                    }
                }
                continue;
            }
            Ok(_) => {}
            Err(e) => tracing::warn!(error = %e, "cannot claim due notifications; retrying"),
        }
        tokio::select! {
            () = tokio::time::sleep(pause) => {}
            _ = shutdown.changed() => {}
        }
    }
}

/// Sends one attempt of `n`: `Ok` on a 2xx answer, else why not.
async fn deliver(n: &DueNotification) -> Result<(), String> {
    let url = HttpUrl::parse(&n.url).map_err(|e| format!("notify_url {e}"))?;
    let body = serde_json::to_vec(&Notice::of(n)).map_err(|e| e.to_string())?;
    let user_agent = concat!("demefix/", env!("CARGO_PKG_VERSION"));
    let request = Request::new("POST", url.target())
        .accept("*/*")
        .header("User-Agent", user_agent)
        .json(&body)
        .timeout(DELIVERY_TIMEOUT)
        .max_response(MAX_ANSWER);
    match http_client::send(url.endpoint(), &request).await {
        Ok(reply) if (200..300).contains(&reply.status) => Ok(()),
        Ok(reply) => {
            let text = String::from_utf8_lossy(&reply.body);
            let excerpt: String = text.trim().chars().take(ERROR_EXCERPT).collect();
            Err(if excerpt.is_empty() {
                format!("answered {}", reply.status)
            } else {
                format!("answered {}: {excerpt}", reply.status)
            })
        }
        Err(e) => Err(e.to_string()),
    }
}

/// Records the outcome of attempt `n.attempt`.
async fn record(
    store: &Store,
    policy: &RetryPolicy,
    n: &DueNotification,
    outcome: Result<(), String>,
) {
    let span = tracing::info_span!("notification", run_id = %n.run_id, attempt = n.attempt);
    record_outcome(store, policy, n, outcome)
        .instrument(span)
        .await;
}

async fn record_outcome(
    store: &Store,
    policy: &RetryPolicy,
    n: &DueNotification,
    outcome: Result<(), String>,
) {
    let stored = match &outcome {
        Ok(()) => {
            tracing::info!(url = %n.url, "completion notification delivered");
            store.notification_delivered(&n.run_id, n.attempt).await
        }
        Err(error) => {
            let retry = policy.retry_after(n.attempt);
            match retry {
                Some(after) => tracing::info!(
                    url = %n.url, %error, retry_in_ms = after.as_millis() as u64,
                    "completion notification attempt failed"
                ),
                None => tracing::warn!(
                    url = %n.url, %error, attempts = n.attempt,
                    "completion notification failed: every attempt is used"
                ),
            }
            store
                .notification_failed(&n.run_id, n.attempt, error, retry)
                .await
        }
    };
    match stored {
        Ok(true) => {}
        Ok(false) => tracing::warn!("the attempt had lapsed; its outcome was not recorded"),
        Err(e) => tracing::error!(error = %e, "cannot record the notification attempt"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::domain::RunStatus;

    #[test]
    fn the_backoff_doubles_is_capped_and_ends_with_the_attempts() {
        let policy = RetryPolicy {
            backoff: Duration::from_secs(1),
            attempts: 6,
        };
        let waits: Vec<Option<u64>> = (1..=6)
            .map(|a| policy.retry_after(a).map(|d| d.as_secs()))
            .collect();
        assert_eq!(waits, [Some(1), Some(2), Some(4), Some(8), Some(16), None]);
        let long = RetryPolicy {
            backoff: Duration::from_secs(100),
            attempts: 30,
        };
        assert_eq!(long.retry_after(29), Some(MAX_BACKOFF));
    }

    #[test]
    fn the_notice_names_the_run_its_status_path_and_end() {
        let n = DueNotification {
            run_id: "0193-x".to_owned(),
            url: "http://127.0.0.1:1/".to_owned(),
            attempt: 1,
            status: RunStatus::Cancelled,
            finished_at: "2026-12-03T01:00:00.000Z".to_owned(),
        };
        assert_eq!(
            serde_json::to_value(Notice::of(&n)).unwrap(),
            serde_json::json!({
                "run_id": "0193-x", "status": "cancelled", "run_url": "/v1/runs/0193-x",
                "finished_at": "2026-12-03T01:00:00.000Z"
            })
        );
    }
}
