-- The number of fits in each status, kept by triggers, so the queue summary the dashboard polls reads
-- five rows instead of counting every fit ever stored.
CREATE TABLE fit_status_counts (
    status TEXT    PRIMARY KEY,
    fits   INTEGER NOT NULL
) WITHOUT ROWID;

INSERT INTO fit_status_counts (status, fits) SELECT status, COUNT(*) FROM fits GROUP BY status;

CREATE TRIGGER fit_status_counts_insert AFTER INSERT ON fits
BEGIN
    INSERT INTO fit_status_counts (status, fits) VALUES (NEW.status, 1)
        ON CONFLICT (status) DO UPDATE SET fits = fits + 1;
END;

CREATE TRIGGER fit_status_counts_update AFTER UPDATE OF status ON fits
WHEN OLD.status IS NOT NEW.status
BEGIN
    UPDATE fit_status_counts SET fits = fits - 1 WHERE status = OLD.status;
    INSERT INTO fit_status_counts (status, fits) VALUES (NEW.status, 1)
        ON CONFLICT (status) DO UPDATE SET fits = fits + 1;
END;

CREATE TRIGGER fit_status_counts_delete AFTER DELETE ON fits
BEGIN
    UPDATE fit_status_counts SET fits = fits - 1 WHERE status = OLD.status;
END;
