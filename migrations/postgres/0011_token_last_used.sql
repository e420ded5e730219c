-- When each token last authenticated a request, in milliseconds since the Unix epoch; NULL for a
-- token never used since this column exists. Kept to the minute, not to the request (store::tokens).
ALTER TABLE tokens ADD COLUMN last_used_at_ms BIGINT;
