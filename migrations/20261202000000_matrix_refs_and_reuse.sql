-- Result reuse: a submission whose canonical spec and method version equal those of a
-- succeeded run is stored as a new, already succeeded run that names the earlier one in
-- `reused_from` and carries its results byte for byte.
-- Forward-only: never edit this file once released; add a new migration instead.

-- The run whose results this run reuses (NULL for a run that was computed).
ALTER TABLE runs ADD COLUMN reused_from TEXT REFERENCES runs (id);

-- Version of the numerical methods that produced the results, read from the provenance
-- (NULL until the run succeeds). A virtual generated column: it needs no backfill of the
-- (immutable) finished runs and can never disagree with the provenance it is read from.
ALTER TABLE runs ADD COLUMN method_version TEXT
    GENERATED ALWAYS AS (json_extract(provenance, '$.method_version')) VIRTUAL;

-- Finds the earliest succeeded run of a spec and method version.
CREATE INDEX runs_reuse ON runs (spec_sha256, method_version, id)
    WHERE status = 'succeeded';
