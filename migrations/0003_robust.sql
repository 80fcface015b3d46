-- Monitoring on real inspection data: the outlier fence and spread distribution learned from
-- a baseline, the outliers found in lots, and the alert lifecycle state of a series.
-- Applied migrations are never edited; changes go in a new numbered file.

-- The baseline's outlier fence (stats::robust::outlier_fence): robust within-lot sd, the
-- fence in those sds, and whether the tails were found heavier than normal. NULL for
-- baselines frozen before this migration (their lots are not screened).
ALTER TABLE baseline ADD COLUMN outlier_scale REAL;
ALTER TABLE baseline ADD COLUMN outlier_fence REAL;
ALTER TABLE baseline ADD COLUMN heavy_tailed INTEGER;
-- The baseline lots' spread statistic ln(mean |x - lot median|) (outliers set aside): mean,
-- sd, lot count, median lot size, and the units' excess kurtosis when the pooled z test
-- applies (stats::robust::SpreadBaseline). NULL spread_mean: spread tested by the F test.
ALTER TABLE baseline ADD COLUMN spread_mean REAL;
ALTER TABLE baseline ADD COLUMN spread_sd REAL;
ALTER TABLE baseline ADD COLUMN spread_lots INTEGER;
ALTER TABLE baseline ADD COLUMN spread_n REAL;
ALTER TABLE baseline ADD COLUMN spread_kurtosis REAL;
-- 1 when the series is tested on the log scale (positive, right-skewed baseline; see
-- engine::screen); NULL or 0: the natural scale.
ALTER TABLE baseline ADD COLUMN log_scale INTEGER;

-- Alert lifecycle state of a series per kind (engine-owned JSON: recent standardised shifts
-- since the last significant lot, the resolution margin, lots since the last resolution).
ALTER TABLE series_state ADD COLUMN lifecycle TEXT;

-- A unit far outside the pattern of its lot and of the baseline. Stored values are never
-- altered: the measurement stays; set_aside says whether the lot's mean and spread tests
-- left it out.
CREATE TABLE outlier (
    id          INTEGER PRIMARY KEY,
    sample_id   INTEGER NOT NULL REFERENCES sample (id),
    -- the measurement's seq within its sample
    seq         INTEGER NOT NULL,
    value       REAL NOT NULL,
    lot_median  REAL NOT NULL,
    -- |value - lot median| in robust within-lot sds of the baseline
    distance    REAL NOT NULL,
    fence       REAL NOT NULL,
    rule        TEXT NOT NULL,
    set_aside   INTEGER NOT NULL,
    found_at    TEXT NOT NULL,
    UNIQUE (sample_id, seq)
);
CREATE INDEX outlier_sample ON outlier (sample_id);
