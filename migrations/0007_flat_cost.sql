-- Costs that stay flat as the history grows (issue: speed). Applied migrations are never
-- edited; changes go in a new numbered file.

-- Samples awaiting a decision: neither a mean evaluation nor a place in a baseline. Kept by
-- the triggers below whatever writes the rows, so finding new work reads this short table
-- instead of anti-joining every stored sample.
CREATE TABLE pending_sample (
    sample_id INTEGER PRIMARY KEY REFERENCES sample (id),
    series_id INTEGER NOT NULL REFERENCES series (id)
);
CREATE INDEX pending_sample_series ON pending_sample (series_id);

INSERT INTO pending_sample (sample_id, series_id)
SELECT sm.id, sm.series_id FROM sample sm
WHERE NOT EXISTS (SELECT 1 FROM evaluation e WHERE e.sample_id = sm.id AND e.kind = 'mean')
  AND NOT EXISTS (SELECT 1 FROM baseline_lot bl WHERE bl.sample_id = sm.id);

CREATE TRIGGER sample_awaits_decision AFTER INSERT ON sample
BEGIN
    INSERT INTO pending_sample (sample_id, series_id) VALUES (NEW.id, NEW.series_id);
END;

CREATE TRIGGER evaluation_decides_sample AFTER INSERT ON evaluation WHEN NEW.kind = 'mean'
BEGIN
    DELETE FROM pending_sample WHERE sample_id = NEW.sample_id;
END;

CREATE TRIGGER baseline_lot_decides_sample AFTER INSERT ON baseline_lot
BEGIN
    DELETE FROM pending_sample WHERE sample_id = NEW.sample_id;
END;

-- Rows removed by hand (lotdrift never deletes them): the sample waits again if nothing
-- else decided it.
CREATE TRIGGER evaluation_removed AFTER DELETE ON evaluation WHEN OLD.kind = 'mean'
BEGIN
    INSERT OR IGNORE INTO pending_sample (sample_id, series_id)
    SELECT sm.id, sm.series_id FROM sample sm
    WHERE sm.id = OLD.sample_id
      AND NOT EXISTS (SELECT 1 FROM baseline_lot bl WHERE bl.sample_id = sm.id);
END;

CREATE TRIGGER baseline_lot_removed AFTER DELETE ON baseline_lot
BEGIN
    INSERT OR IGNORE INTO pending_sample (sample_id, series_id)
    SELECT sm.id, sm.series_id FROM sample sm
    WHERE sm.id = OLD.sample_id
      AND NOT EXISTS (SELECT 1 FROM evaluation e WHERE e.sample_id = sm.id AND e.kind = 'mean')
      AND NOT EXISTS (SELECT 1 FROM baseline_lot bl WHERE bl.sample_id = sm.id);
END;

-- Running counts for `status`, kept by triggers (SQLite's COUNT(*) reads the whole table).
-- Measurements are counted through their sample's n, which always equals its rows in
-- `measurement` (both are written together, and a replacement rewrites both).
CREATE TABLE tally (
    id           INTEGER PRIMARY KEY CHECK (id = 1),
    files        INTEGER NOT NULL,
    lots         INTEGER NOT NULL,
    measurements INTEGER NOT NULL,
    evaluations  INTEGER NOT NULL,
    outliers     INTEGER NOT NULL
);
INSERT INTO tally (id, files, lots, measurements, evaluations, outliers) VALUES (
    1,
    (SELECT COUNT(*) FROM ingested_file),
    (SELECT COUNT(*) FROM lot),
    (SELECT COUNT(*) FROM measurement),
    (SELECT COUNT(*) FROM evaluation),
    (SELECT COUNT(*) FROM outlier)
);

CREATE TRIGGER tally_file AFTER INSERT ON ingested_file
BEGIN
    UPDATE tally SET files = files + 1 WHERE id = 1;
END;
CREATE TRIGGER tally_lot AFTER INSERT ON lot
BEGIN
    UPDATE tally SET lots = lots + 1 WHERE id = 1;
END;
CREATE TRIGGER tally_sample AFTER INSERT ON sample
BEGIN
    UPDATE tally SET measurements = measurements + NEW.n WHERE id = 1;
END;
CREATE TRIGGER tally_sample_replaced AFTER UPDATE OF n ON sample
BEGIN
    UPDATE tally SET measurements = measurements + NEW.n - OLD.n WHERE id = 1;
END;
CREATE TRIGGER tally_evaluation AFTER INSERT ON evaluation
BEGIN
    UPDATE tally SET evaluations = evaluations + 1 WHERE id = 1;
END;
CREATE TRIGGER tally_outlier AFTER INSERT ON outlier
BEGIN
    UPDATE tally SET outliers = outliers + 1 WHERE id = 1;
END;
CREATE TRIGGER tally_outlier_removed AFTER DELETE ON outlier
BEGIN
    UPDATE tally SET outliers = outliers - 1 WHERE id = 1;
END;

-- `history` looks up each evaluation's alert events.
CREATE INDEX alert_event_evaluation ON alert_event (evaluation_id);

-- The silence watch reads each source's most recent lot times.
CREATE INDEX lot_source_time ON lot (source_id, COALESCE(sampled_at, first_seen_at), code);

-- One B-tree for the unit values instead of a table and an index: each value is written
-- once, in (sample, seq) order, which is also the order every reader asks for.
CREATE TABLE measurement_packed (
    sample_id  INTEGER NOT NULL REFERENCES sample (id),
    seq        INTEGER NOT NULL,
    unit       TEXT,
    value      REAL NOT NULL,
    sampled_at TEXT,
    PRIMARY KEY (sample_id, seq)
) WITHOUT ROWID;
INSERT INTO measurement_packed (sample_id, seq, unit, value, sampled_at)
SELECT sample_id, seq, unit, value, sampled_at FROM measurement ORDER BY sample_id, seq;
DROP TABLE measurement;
ALTER TABLE measurement_packed RENAME TO measurement;
