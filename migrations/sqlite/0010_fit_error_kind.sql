-- Why a failed or cancelled fit has no model, as one of a closed set of names (registry::wire::FailureKind,
-- mapped from the numeric core's errors in jobs::failure_kind), next to the message in `error`.
-- NULL for queued, running and succeeded fits.
ALTER TABLE fits ADD COLUMN error_kind TEXT;

-- The allowed names are held by triggers rather than a CHECK: SQLite cannot change a column's CHECK
-- without rebuilding the table, and a later migration adds a kind by dropping and recreating these two.
CREATE TRIGGER fits_error_kind_known_on_insert BEFORE INSERT ON fits
WHEN NEW.error_kind IS NOT NULL AND NEW.error_kind NOT IN (
    'too_few_points', 'not_an_inductor', 'invalid_options', 'non_finite', 'not_passive',
    'cancelled', 'unreadable_sweep', 'attempts_exhausted', 'internal')
BEGIN SELECT RAISE(ABORT, 'unknown error_kind'); END;

CREATE TRIGGER fits_error_kind_known_on_update BEFORE UPDATE OF error_kind ON fits
WHEN NEW.error_kind IS NOT NULL AND NEW.error_kind NOT IN (
    'too_few_points', 'not_an_inductor', 'invalid_options', 'non_finite', 'not_passive',
    'cancelled', 'unreadable_sweep', 'attempts_exhausted', 'internal')
BEGIN SELECT RAISE(ABORT, 'unknown error_kind'); END;

-- A cancelled fit's kind follows from its status. Failures stored before this column keep NULL: their
-- kind is known only from the message text, which is not a contract.
UPDATE fits SET error_kind = 'cancelled' WHERE status = 'cancelled';

CREATE INDEX fits_error_kind ON fits (error_kind, fit_id);
