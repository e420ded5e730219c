-- How many times a fit's job was started, kept on the fit when its finished job row is deleted
-- (PgStore::prune_finished_jobs, after the retention `serve --job-retention-s` sets). While the job
-- row exists, the fit's detail reads the count from it; these columns are written at the pruning.
-- job_claim_token keeps the job's claim counter too: a pruned job queued again by a retry continues
-- from it, so no claim handed out before the pruning can ever match the new row's (SQLite's claim
-- tokens are random and need no such column).
ALTER TABLE fits ADD COLUMN attempts BIGINT NOT NULL DEFAULT 0;
ALTER TABLE fits ADD COLUMN job_claim_token BIGINT NOT NULL DEFAULT 0;
UPDATE fits f SET attempts = j.attempts, job_claim_token = j.claim_token FROM jobs j
WHERE j.fit_id = f.fit_id;
