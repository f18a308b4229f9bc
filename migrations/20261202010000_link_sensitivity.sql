-- Link sensitivities of a succeeded run (`outputs.sensitivity`): a JSON array written with the
-- results, or NULL when the job did not ask for them or its method does not give them.
-- Forward-only: never edit this file once released; add a new migration instead.
ALTER TABLE runs ADD COLUMN sensitivity TEXT;
