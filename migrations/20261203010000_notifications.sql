-- Completion notifications. A job may name a `notify_url` (an http:// URL): delivery
-- metadata, kept beside the spec (never in it, so never in `spec_sha256`). When a run that
-- has one finishes (succeeded, failed or cancelled, or answered at once by reuse), one row is
-- written to `notifications` in the same transaction that finishes the run; the service's
-- notifier POSTs a small JSON notice to the URL with bounded retries and records the outcome
-- here, so a pending notice survives a restart.
-- Forward-only: never edit this file once released; add a new migration instead.

-- The job's `notify_url` as sent, or NULL.
ALTER TABLE runs ADD COLUMN notify_url TEXT;

CREATE TABLE notifications (
    run_id TEXT PRIMARY KEY NOT NULL REFERENCES runs (id),
    url TEXT NOT NULL,
    -- Delivery attempts started so far (an attempt counts from the moment it is claimed).
    attempts INTEGER NOT NULL DEFAULT 0 CHECK (attempts >= 0),
    -- When the next attempt is due (RFC 3339 UTC with milliseconds, so text order is time
    -- order); while an attempt is in flight, when its claim lapses. NULL once delivered or
    -- given up.
    next_attempt_at TEXT,
    -- Why the latest failed attempt failed.
    last_error TEXT,
    -- When a 2xx answer was received.
    delivered_at TEXT,
    -- When the attempts were used up without a 2xx answer.
    failed_at TEXT,
    created_at TEXT NOT NULL,
    CHECK (delivered_at IS NULL OR failed_at IS NULL)
) STRICT;

CREATE INDEX notifications_due ON notifications (next_attempt_at)
    WHERE next_attempt_at IS NOT NULL;
