-- Covering indexes for the behavioural part queries: a band query walks a figure index on fits, then
-- finds the part answering from that fit and its part number without reading the parts table.
CREATE INDEX parts_latest_number ON parts (latest_fit_id, part_number);
CREATE INDEX parts_baseline_number ON parts (baseline_fit_id, part_number);
