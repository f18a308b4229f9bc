-- Ensemble checkpoints as an append-only log: one row per committed chunk of a running run.
-- `step` is the JSON of compute::ChunkStep (the cell index and what the chunk added: counts,
-- tick sums and that chunk's times); a resumed run replays its rows in `seq` order. A commit
-- therefore writes one chunk's worth of data however long the run is. The rows of a run are
-- deleted when it finishes. `runs.checkpoint` is no longer written; a checkpoint an older
-- version left there is ignored and that run starts its ensembles afresh.
-- Forward-only: never edit this file once released; add a new migration instead.
CREATE TABLE run_chunks (
    run_id TEXT NOT NULL REFERENCES runs (id),
    seq INTEGER NOT NULL CHECK (seq >= 0),
    step TEXT NOT NULL,
    PRIMARY KEY (run_id, seq)
) WITHOUT ROWID;
