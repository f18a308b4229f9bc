-- What-if answers of a succeeded run (`interventions`, `plan`): one JSON object with either or
-- both members, written with the results, or NULL when the job asked for neither. Served as
-- the run document's top-level `interventions` and `plan`, and copied byte for byte on reuse.
-- Forward-only: never edit this file once released; add a new migration instead.
ALTER TABLE runs ADD COLUMN whatif TEXT;
