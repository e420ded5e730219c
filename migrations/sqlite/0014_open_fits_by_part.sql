-- The queued and running fits of each part, for the per-part queue bound every upload, retry and
-- refit checks inside its write: the count reads only the part's open fits from this index instead of
-- every fit the part ever had (the status is in the index, so the count never reads the table).
CREATE INDEX fits_part_open ON fits (part_id, status) WHERE status IN ('queued', 'running');
