-- Nightly series: `runs.as_of`, the date a job's data describe (read from the stored spec),
-- and an index to find a series' runs by date.
ALTER TABLE runs ADD COLUMN as_of TEXT
    GENERATED ALWAYS AS (json_extract(spec, '$.as_of')) VIRTUAL;

CREATE INDEX runs_series_as_of ON runs (series, as_of, id) WHERE series IS NOT NULL;
