-- Re-verification: a check run recomputes a succeeded run's stored spec (recorded seed and
-- method); when it ends, its verification row records whether the result is byte-identical.
ALTER TABLE runs ADD COLUMN verifies TEXT REFERENCES runs (id);

CREATE TABLE verifications (
    -- The check run (a run of its own, with `runs.verifies` naming the original).
    check_run_id TEXT PRIMARY KEY NOT NULL REFERENCES runs (id),
    run_id TEXT NOT NULL REFERENCES runs (id),
    requested_at TEXT NOT NULL,
    -- Method version that computed the original, and the service's when asked.
    recorded_method_version TEXT NOT NULL,
    current_method_version TEXT NOT NULL,
    original_result_sha256 TEXT NOT NULL,
    -- Filled in when the check run ends.
    outcome TEXT CHECK (outcome IN ('identical', 'different', 'not_recomputed')),
    recomputed_result_sha256 TEXT,
    -- JSON array of JSON pointers of the fields that differ (at most 50).
    differences TEXT,
    more_differences INTEGER CHECK (more_differences IN (0, 1)),
    finished_at TEXT
) STRICT;

CREATE INDEX verifications_run ON verifications (run_id, requested_at);

CREATE TRIGGER verifications_are_final
BEFORE UPDATE ON verifications
WHEN OLD.outcome IS NOT NULL
BEGIN
    SELECT RAISE(ABORT, 'finished verifications are immutable');
END;
