-- The core corner frequency as a stored figure and as a limit.
-- A fit's core corner is the dispersive core's corner (or resonance) frequency, or Rp/(2π·L0) for the
-- single-pole core; NULL for a lossless core and for rational models: such a fit has no corner, and a
-- query or limit on the corner never matches or passes it.
ALTER TABLE fits ADD COLUMN core_corner_hz DOUBLE PRECISION;

UPDATE fits
SET core_corner_hz = (report_json::jsonb #>> '{derived,core_corner_hz}')::double precision
WHERE report_json IS NOT NULL AND status = 'succeeded';

CREATE INDEX fits_core_corner ON fits (core_corner_hz);

-- Bounds on the core corner frequency among a part's limits.
ALTER TABLE parts ADD COLUMN core_corner_min_hz DOUBLE PRECISION;
ALTER TABLE parts ADD COLUMN core_corner_max_hz DOUBLE PRECISION;
