-- Whether a succeeded fit's model describes its data within their uncertainty (`ok`) or not (`poor`),
-- copied from the report's assessment. A poor model gets no pass/fail verdict: `verdict` stays NULL and
-- the API reports the verdict as withheld while the part has limits.
ALTER TABLE fits ADD COLUMN quality TEXT CHECK (quality IN ('ok', 'poor'));

-- Reports stored before the assessment existed read as `ok` (the report's own default).
UPDATE fits
SET quality = CASE WHEN (report_json::jsonb #>> '{assessment,status}') = 'poor' THEN 'poor' ELSE 'ok' END
WHERE report_json IS NOT NULL;

UPDATE fits SET verdict = NULL WHERE quality = 'poor';

CREATE INDEX fits_quality ON fits (quality, fit_id);
