-- The grid is only ever read by fit (its primary key, fit_id then k): the |Z|-over-a-band and
-- L-at-a-frequency queries look up the grid rows of each candidate fit. The index on (k, z_mag_ohm)
-- served no query, yet every stored fit added 161 entries scattered across it, so each result's
-- transaction rewrote about as many index pages as grid points. It is dropped.
DROP INDEX IF EXISTS fit_grid_k;
