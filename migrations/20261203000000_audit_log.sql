-- Tamper-evident audit log: one entry per state change, each holding the SHA-256 of the
-- entry before it (a hash chain; the rules are in service/src/audit.rs). Append-only.
CREATE TABLE audit_log (
    -- Position from 1, without gaps.
    seq INTEGER PRIMARY KEY NOT NULL CHECK (seq >= 1),
    at TEXT NOT NULL,
    kind TEXT NOT NULL,
    run_id TEXT,
    -- RFC 8785 canonical JSON object.
    content TEXT NOT NULL,
    content_sha256 TEXT NOT NULL CHECK (length(content_sha256) = 64),
    prev_sha256 TEXT NOT NULL CHECK (length(prev_sha256) = 64),
    entry_sha256 TEXT NOT NULL UNIQUE CHECK (length(entry_sha256) = 64)
) STRICT;

CREATE INDEX audit_log_run ON audit_log (run_id, seq) WHERE run_id IS NOT NULL;

CREATE TRIGGER audit_log_is_append_only
BEFORE UPDATE ON audit_log
BEGIN
    SELECT RAISE(ABORT, 'audit entries are never changed');
END;

CREATE TRIGGER audit_log_is_never_deleted
BEFORE DELETE ON audit_log
BEGIN
    SELECT RAISE(ABORT, 'audit entries are never deleted');
END;
