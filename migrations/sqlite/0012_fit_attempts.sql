-- How many times a fit's job was started, kept on the fit when its finished job row is deleted
-- (store::jobs prune_finished_jobs, after the retention `serve --job-retention-s` sets). While the
-- job row exists, the fit's detail reads the count from it; this column is written at the pruning.
ALTER TABLE fits ADD COLUMN attempts INTEGER NOT NULL DEFAULT 0;
UPDATE fits SET attempts = (SELECT j.attempts FROM jobs j WHERE j.fit_id = fits.fit_id)
WHERE fit_id IN (SELECT fit_id FROM jobs);
