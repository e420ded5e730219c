-- The number of fits in each status, kept by triggers, so the queue summary the dashboard polls reads
-- a few rows instead of counting every fit ever stored.
--
-- Unlike SQLite (one writer, one row per status), several replicas change statuses at once here: one
-- row per status would be a hot row every such transaction waits on, and two transactions changing
-- statuses in different orders could deadlock on it. So the triggers only append signed deltas
-- (+1 for the new status, -1 for the old one); a status's count is SUM(fits) of its rows, and
-- fit_status_counts_fold() folds the deltas into one row per status (one statement, safe to run on
-- any replica at any time: a delta committed meanwhile is simply left for the next fold).
CREATE TABLE fit_status_counts (
    status TEXT    NOT NULL,
    fits   BIGINT  NOT NULL
);
CREATE INDEX fit_status_counts_status ON fit_status_counts (status);

INSERT INTO fit_status_counts (status, fits) SELECT status, COUNT(*) FROM fits GROUP BY status;

CREATE FUNCTION fit_status_counts_change() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    IF TG_OP = 'INSERT' THEN
        INSERT INTO fit_status_counts (status, fits) VALUES (NEW.status, 1);
    ELSIF TG_OP = 'UPDATE' THEN
        INSERT INTO fit_status_counts (status, fits) VALUES (OLD.status, -1), (NEW.status, 1);
    ELSE
        INSERT INTO fit_status_counts (status, fits) VALUES (OLD.status, -1);
    END IF;
    RETURN NULL;
END;
$$;

CREATE TRIGGER fit_status_counts_insert AFTER INSERT ON fits
FOR EACH ROW EXECUTE FUNCTION fit_status_counts_change();
CREATE TRIGGER fit_status_counts_update AFTER UPDATE OF status ON fits
FOR EACH ROW WHEN (OLD.status IS DISTINCT FROM NEW.status) EXECUTE FUNCTION fit_status_counts_change();
CREATE TRIGGER fit_status_counts_delete AFTER DELETE ON fits
FOR EACH ROW EXECUTE FUNCTION fit_status_counts_change();

CREATE FUNCTION fit_status_counts_fold() RETURNS void LANGUAGE sql AS $$
    WITH gone AS (DELETE FROM fit_status_counts RETURNING status, fits)
    INSERT INTO fit_status_counts (status, fits)
    SELECT status, SUM(fits) FROM gone GROUP BY status HAVING SUM(fits) <> 0;
$$;
