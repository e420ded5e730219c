-- The grid is only ever read by fit (its primary key, fit_id then k): the index on (k, z_mag_ohm)
-- served no query and cost every stored fit about as many index writes as grid points. It is dropped
-- (as on SQLite).
DROP INDEX IF EXISTS fit_grid_k;
