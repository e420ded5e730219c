-- Fixture compensation on upload: how the open/short sweeps are applied (NULL when none were given).
ALTER TABLE sweeps ADD COLUMN fixture_topology TEXT
    CHECK (fixture_topology IN ('approximate', 'series-then-shunt', 'shunt-then-series', 'two-port'));

-- The lowest |Z| of the fitted model between grid point k and the next one (or the band's upper end),
-- found on a dense sub-grid, so a "|Z| at least X over a band" query also sees a notch that falls
-- between grid points. NULL on rows written before this migration: queries fall back to z_mag_ohm.
ALTER TABLE fit_grid ADD COLUMN z_mag_floor_ohm DOUBLE PRECISION;
ALTER TABLE fit_grid ADD COLUMN z_floor_at_hz DOUBLE PRECISION;
