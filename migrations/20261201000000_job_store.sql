-- The job store: matrices (content-addressed) and runs (the queue and the record).
-- Forward-only: never edit this file once released; add a new migration instead.

CREATE TABLE matrices (
    -- Canonical matrix hash of api.md (lowercase hex SHA-256).
    matrix_sha256 TEXT PRIMARY KEY NOT NULL CHECK (length(matrix_sha256) = 64),
    -- Number of demes m.
    demes INTEGER NOT NULL CHECK (demes >= 1),
    -- The m x m entries as a JSON array of rows, as sent (after -0.0 -> 0.0).
    entries TEXT NOT NULL,
    created_at TEXT NOT NULL
) STRICT;

CREATE TABLE runs (
    -- UUID v7 as text: sorts by submission time.
    id TEXT PRIMARY KEY NOT NULL,
    status TEXT NOT NULL
        CHECK (status IN ('queued', 'running', 'succeeded', 'failed', 'cancelled')),
    series TEXT,
    -- The job as accepted, defaults filled in (JSON object).
    spec TEXT NOT NULL,
    spec_sha256 TEXT NOT NULL,
    -- The raw request body and its SHA-256 (provenance and idempotency).
    request BLOB NOT NULL,
    request_sha256 TEXT NOT NULL,
    matrix_sha256 TEXT NOT NULL REFERENCES matrices (matrix_sha256),
    -- JSON array of strings: validation warnings, then those of the computation.
    warnings TEXT NOT NULL DEFAULT '[]',
    provenance TEXT,
    results TEXT,
    -- Why a failed run failed (opaque to clients beyond this message).
    error TEXT,
    progress_done INTEGER NOT NULL DEFAULT 0,
    progress_total INTEGER NOT NULL DEFAULT 0,
    submitted_at TEXT NOT NULL,
    started_at TEXT,
    finished_at TEXT,
    idempotency_key TEXT,
    cancel_requested INTEGER NOT NULL DEFAULT 0 CHECK (cancel_requested IN (0, 1)),
    -- Lease of the worker holding a running run; completions must present the token.
    lease_token TEXT,
    lease_expires_ms INTEGER,
    heartbeat_at TEXT,
    attempts INTEGER NOT NULL DEFAULT 0,
    -- Ensemble checkpoint (JSON) committed after every chunk.
    checkpoint TEXT
) STRICT;

CREATE UNIQUE INDEX runs_idempotency_key ON runs (idempotency_key)
    WHERE idempotency_key IS NOT NULL;
CREATE INDEX runs_status_id ON runs (status, id);
CREATE INDEX runs_series_id ON runs (series, id);

-- Finished runs are immutable and runs are never deleted.
CREATE TRIGGER runs_finished_are_immutable
BEFORE UPDATE ON runs
WHEN OLD.status IN ('succeeded', 'failed', 'cancelled')
BEGIN
    SELECT RAISE(ABORT, 'finished runs are immutable');
END;

CREATE TRIGGER runs_are_never_deleted
BEFORE DELETE ON runs
BEGIN
    SELECT RAISE(ABORT, 'runs are never deleted');
END;

CREATE TRIGGER matrices_are_immutable
BEFORE UPDATE ON matrices
BEGIN
    SELECT RAISE(ABORT, 'matrices are immutable');
END;
