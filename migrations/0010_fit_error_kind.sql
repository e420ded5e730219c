-- Why a failed or cancelled fit has no model, as one of a closed set of names (registry::wire::FailureKind,
-- mapped from the numeric core's errors in jobs::failure_kind), next to the message in `error`.
-- NULL for queued, running and succeeded fits.
ALTER TABLE fits ADD COLUMN error_kind TEXT CHECK (error_kind IN (
    'too_few_points', 'not_an_inductor', 'invalid_options', 'non_finite', 'not_passive',
    'cancelled', 'unreadable_sweep', 'attempts_exhausted', 'internal'));

-- A cancelled fit's kind follows from its status. Failures stored before this column keep NULL: their
-- kind is known only from the message text, which is not a contract.
UPDATE fits SET error_kind = 'cancelled' WHERE status = 'cancelled';

CREATE INDEX fits_error_kind ON fits (error_kind, fit_id);
