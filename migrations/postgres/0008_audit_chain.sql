-- A tamper-evident audit trail: each row carries the SHA-256 of its own content chained to the row
-- before it, and, for a row about a fit that has a result, the SHA-256 of that result as it was then.
-- The hashes are computed by the service (store::integrity, SQLite only so far: on PostgreSQL the
-- appends of several replicas still have to be put in one order).
ALTER TABLE audit ADD COLUMN result_sha256 TEXT;
ALTER TABLE audit ADD COLUMN prev_hash TEXT;
ALTER TABLE audit ADD COLUMN hash TEXT;

-- Rows written before the chain existed are sealed once by the service at start; after that no
-- column of a row ever changes.
DROP TRIGGER audit_no_update ON audit;
CREATE FUNCTION audit_seal_only() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    IF OLD.hash IS NULL AND NEW.hash IS NOT NULL
       AND NEW.audit_id = OLD.audit_id AND NEW.at_ms = OLD.at_ms AND NEW.actor = OLD.actor
       AND NEW.action = OLD.action AND NEW.part_id IS NOT DISTINCT FROM OLD.part_id
       AND NEW.fit_id IS NOT DISTINCT FROM OLD.fit_id AND NEW.reason IS NOT DISTINCT FROM OLD.reason
    THEN
        RETURN NEW;
    END IF;
    RAISE EXCEPTION 'the audit trail is append-only' USING ERRCODE = 'restrict_violation';
END;
$$;
CREATE TRIGGER audit_no_update BEFORE UPDATE ON audit
FOR EACH ROW EXECUTE FUNCTION audit_seal_only();

-- SQLite's 0008 also adds triggers against INSERT OR REPLACE, which deletes the row it replaces
-- without firing delete triggers. PostgreSQL has no REPLACE: an insert whose key is taken fails, and
-- INSERT ... ON CONFLICT DO UPDATE fires the update triggers above. Nothing more is needed here.
