-- When each token last authenticated a request, in milliseconds since the Unix epoch; NULL for a
-- token never used since this column exists. Kept to the minute, not to the request: a token is
-- written again only once its stored time is a minute old (store::tokens), so status polls do not
-- write on every call.
ALTER TABLE tokens ADD COLUMN last_used_at_ms INTEGER;
