-- A tamper-evident audit trail: each row carries the SHA-256 of its own content chained to the row
-- before it, and, for a row about a fit that has a result, the SHA-256 of that result as it was then.
-- The hashes are computed by the service (store::integrity); `henrybook verify` and /readyz check them.
ALTER TABLE audit ADD COLUMN result_sha256 TEXT;
ALTER TABLE audit ADD COLUMN prev_hash TEXT;
ALTER TABLE audit ADD COLUMN hash TEXT;

-- Rows written before the chain existed are sealed once by the service at start; after that no
-- column of a row ever changes.
DROP TRIGGER audit_no_update;
CREATE TRIGGER audit_no_update BEFORE UPDATE ON audit
WHEN NOT (OLD.hash IS NULL AND NEW.hash IS NOT NULL
          AND NEW.audit_id = OLD.audit_id AND NEW.at_ms = OLD.at_ms AND NEW.actor = OLD.actor
          AND NEW.action = OLD.action AND NEW.part_id IS OLD.part_id AND NEW.fit_id IS OLD.fit_id
          AND NEW.reason IS OLD.reason)
BEGIN SELECT RAISE(ABORT, 'the audit trail is append-only'); END;

-- INSERT OR REPLACE deletes the row it replaces without firing delete triggers: refuse an insert whose
-- id is already taken, whatever its conflict clause.
CREATE TRIGGER audit_no_replace BEFORE INSERT ON audit
WHEN EXISTS (SELECT 1 FROM audit WHERE audit_id = NEW.audit_id)
BEGIN SELECT RAISE(ABORT, 'the audit trail is append-only'); END;

-- The same for the other append-only tables: a replaced sweep or fit row would lose what was stored.
CREATE TRIGGER sweeps_no_replace BEFORE INSERT ON sweeps
WHEN EXISTS (SELECT 1 FROM sweeps WHERE sweep_id = NEW.sweep_id)
BEGIN SELECT RAISE(ABORT, 'sweeps are immutable'); END;
CREATE TRIGGER fits_no_replace BEFORE INSERT ON fits
WHEN EXISTS (SELECT 1 FROM fits WHERE fit_id = NEW.fit_id)
BEGIN SELECT RAISE(ABORT, 'a fit row is never replaced'); END;
