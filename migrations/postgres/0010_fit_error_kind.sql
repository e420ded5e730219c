-- Why a failed or cancelled fit has no model, as one of a closed set of names (registry::wire::FailureKind,
-- mapped from the numeric core's errors in jobs::failure_kind), next to the message in `error`.
-- NULL for queued, running and succeeded fits.
ALTER TABLE fits ADD COLUMN error_kind TEXT;

-- The allowed names are held by a trigger function raising the same message as SQLite's triggers; a
-- later migration adds a kind by replacing the function.
CREATE FUNCTION fits_error_kind_known() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    IF NEW.error_kind IS NOT NULL AND NEW.error_kind NOT IN (
        'too_few_points', 'not_an_inductor', 'invalid_options', 'non_finite', 'not_passive',
        'cancelled', 'unreadable_sweep', 'attempts_exhausted', 'internal')
    THEN
        RAISE EXCEPTION 'unknown error_kind' USING ERRCODE = 'check_violation';
    END IF;
    RETURN NEW;
END;
$$;

CREATE TRIGGER fits_error_kind_known_on_insert BEFORE INSERT ON fits
FOR EACH ROW EXECUTE FUNCTION fits_error_kind_known();
CREATE TRIGGER fits_error_kind_known_on_update BEFORE UPDATE OF error_kind ON fits
FOR EACH ROW EXECUTE FUNCTION fits_error_kind_known();

-- A cancelled fit's kind follows from its status. Failures stored before this column keep NULL: their
-- kind is known only from the message text, which is not a contract.
UPDATE fits SET error_kind = 'cancelled' WHERE status = 'cancelled';

CREATE INDEX fits_error_kind ON fits (error_kind, fit_id);
