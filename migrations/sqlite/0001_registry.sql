-- The registry: parts and their limits, lots, uploaded sweeps (bytes kept as uploaded), fits and their
-- revisions, the job queue, figures for behavioural queries, bearer tokens and the audit trail.
-- Never edit this file once applied; add a new migration instead.

CREATE TABLE parts (
    part_id              INTEGER PRIMARY KEY,
    part_number          TEXT    NOT NULL UNIQUE,
    description          TEXT    NOT NULL DEFAULT '',
    l_nominal_h          REAL,
    l_test_frequency_hz  REAL,
    l_tolerance_percent  REAL,
    dcr_max_ohm          REAL,
    srf_min_hz           REAL,
    q_min                REAL,
    q_test_frequency_hz  REAL,
    z_min_ohm            REAL,
    z_band_min_hz        REAL,
    z_band_max_hz        REAL,
    -- The approved fit revision new fits are compared against (drift).
    baseline_fit_id      INTEGER,
    -- The newest succeeded fit: the figures "any" queries answer from.
    latest_fit_id        INTEGER,
    created_at_ms        INTEGER NOT NULL
);
CREATE INDEX parts_baseline ON parts (baseline_fit_id);
CREATE INDEX parts_latest ON parts (latest_fit_id);

CREATE TABLE lots (
    lot_id   INTEGER PRIMARY KEY,
    part_id  INTEGER NOT NULL REFERENCES parts (part_id),
    lot      TEXT    NOT NULL,
    UNIQUE (part_id, lot)
);

CREATE TABLE sweeps (
    sweep_id          INTEGER PRIMARY KEY,
    part_id           INTEGER NOT NULL REFERENCES parts (part_id),
    lot_id            INTEGER NOT NULL REFERENCES lots (lot_id),
    file_name         TEXT    NOT NULL,
    file_bytes        BLOB    NOT NULL,
    sha256            TEXT    NOT NULL,
    method            TEXT    NOT NULL,
    z0_ohm            REAL,
    dcr_ohm           REAL,
    temperature_c     REAL,
    operator          TEXT    NOT NULL DEFAULT '',
    -- Optional fixture-compensation sweeps (open and short dummies), kept byte-for-byte.
    fixture_open_name   TEXT,
    fixture_open_bytes  BLOB,
    fixture_short_name  TEXT,
    fixture_short_bytes BLOB,
    points            INTEGER NOT NULL,
    uploaded_by       TEXT    NOT NULL,
    uploaded_at_ms    INTEGER NOT NULL
);
CREATE INDEX sweeps_sha ON sweeps (part_id, sha256);

-- An uploaded file is evidence: it never changes.
CREATE TRIGGER sweeps_immutable BEFORE UPDATE ON sweeps
BEGIN SELECT RAISE(ABORT, 'sweeps are immutable'); END;
CREATE TRIGGER sweeps_kept BEFORE DELETE ON sweeps
BEGIN SELECT RAISE(ABORT, 'sweeps are never deleted'); END;

CREATE TABLE fits (
    fit_id            INTEGER PRIMARY KEY,
    sweep_id          INTEGER NOT NULL REFERENCES sweeps (sweep_id),
    part_id           INTEGER NOT NULL REFERENCES parts (part_id),
    lot_id            INTEGER NOT NULL REFERENCES lots (lot_id),
    -- 1 for the first fit of a sweep; a refit adds the next number, never overwrites.
    revision          INTEGER NOT NULL,
    status            TEXT    NOT NULL CHECK (status IN ('queued', 'running', 'succeeded', 'failed', 'cancelled')),
    progress          REAL    NOT NULL DEFAULT 0,
    error             TEXT,
    options_json      TEXT    NOT NULL,
    -- SHA-256 of the canonical options JSON: duplicate-upload detection.
    options_key       TEXT    NOT NULL,
    engine_version    TEXT,
    report_json       TEXT,
    created_at_ms     INTEGER NOT NULL,
    started_at_ms     INTEGER,
    finished_at_ms    INTEGER,
    -- Figures copied from the report for queries (SI units).
    srf_hz            REAL,
    srf_above_hz      REAL,
    l0_h              REAL,
    rdc_ohm           REAL,
    band_min_hz       REAL,
    band_max_hz       REAL,
    verdict           TEXT CHECK (verdict IN ('pass', 'fail')),
    verdict_json      TEXT,
    drift_json        TEXT,
    drift_max_sigma   REAL,
    approval          TEXT CHECK (approval IN ('approved', 'rejected')),
    UNIQUE (sweep_id, revision)
);
CREATE INDEX fits_status ON fits (status, fit_id);
CREATE INDEX fits_part ON fits (part_id, fit_id);
CREATE INDEX fits_lot ON fits (lot_id, fit_id);
CREATE INDEX fits_created ON fits (created_at_ms);
CREATE INDEX fits_srf ON fits (srf_hz);
CREATE INDEX fits_rdc ON fits (rdc_ohm);
CREATE INDEX fits_l0 ON fits (l0_h);
CREATE INDEX fits_duplicate ON fits (sweep_id, options_key);

-- A result, once written, is never replaced: a refit is a new row.
CREATE TRIGGER fits_report_written_once BEFORE UPDATE OF report_json ON fits
WHEN OLD.report_json IS NOT NULL
BEGIN SELECT RAISE(ABORT, 'a fit result is written once'); END;

-- The durable job queue. A worker claims a row with one UPDATE ... RETURNING, holds it by a lease it
-- renews, and writes the result only while its claim token still matches.
CREATE TABLE jobs (
    fit_id          INTEGER PRIMARY KEY REFERENCES fits (fit_id),
    state           TEXT    NOT NULL CHECK (state IN ('queued', 'running', 'done')),
    claim_token     TEXT,
    lease_until_ms  INTEGER,
    attempts        INTEGER NOT NULL DEFAULT 0,
    cancel_requested INTEGER NOT NULL DEFAULT 0,
    enqueued_at_ms  INTEGER NOT NULL
);
CREATE INDEX jobs_claim ON jobs (state, lease_until_ms, fit_id);

-- Resonances of the fitted model, for band queries.
CREATE TABLE fit_resonances (
    fit_id        INTEGER NOT NULL REFERENCES fits (fit_id),
    kind          TEXT    NOT NULL CHECK (kind IN ('series', 'parallel')),
    frequency_hz  REAL    NOT NULL
);
CREATE INDEX fit_resonances_band ON fit_resonances (kind, frequency_hz, fit_id);
CREATE INDEX fit_resonances_fit ON fit_resonances (fit_id);

-- The fitted model on the fixed log-frequency grid (registry::grid), inside the sweep band only.
CREATE TABLE fit_grid (
    fit_id        INTEGER NOT NULL REFERENCES fits (fit_id),
    k             INTEGER NOT NULL,
    z_mag_ohm     REAL    NOT NULL,
    l_eff_h       REAL    NOT NULL,
    PRIMARY KEY (fit_id, k)
) WITHOUT ROWID;
CREATE INDEX fit_grid_k ON fit_grid (k, z_mag_ohm);

CREATE TABLE tokens (
    token_id       INTEGER PRIMARY KEY,
    -- SHA-256 of the token, hex. The token itself is shown once and never stored.
    token_sha256   TEXT    NOT NULL UNIQUE,
    role           TEXT    NOT NULL CHECK (role IN ('reader', 'inspector', 'engineer')),
    label          TEXT    NOT NULL,
    created_at_ms  INTEGER NOT NULL,
    revoked_at_ms  INTEGER
);

-- Who did what, when and why. Append-only.
CREATE TABLE audit (
    audit_id   INTEGER PRIMARY KEY,
    at_ms      INTEGER NOT NULL,
    actor      TEXT    NOT NULL,
    action     TEXT    NOT NULL,
    part_id    INTEGER REFERENCES parts (part_id),
    fit_id     INTEGER REFERENCES fits (fit_id),
    reason     TEXT
);
CREATE INDEX audit_part ON audit (part_id, audit_id);
CREATE INDEX audit_fit ON audit (fit_id, audit_id);
CREATE TRIGGER audit_no_update BEFORE UPDATE ON audit
BEGIN SELECT RAISE(ABORT, 'the audit trail is append-only'); END;
CREATE TRIGGER audit_no_delete BEFORE DELETE ON audit
BEGIN SELECT RAISE(ABORT, 'the audit trail is append-only'); END;
