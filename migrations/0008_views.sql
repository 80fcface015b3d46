-- Views for people who query the database with their own SQL tools, and the units of measure
-- they show. Plain SQL: any SQLite tool can read them while the daemon writes.
-- Applied migrations are never edited; changes go in a new numbered file.

-- The unit of measure of each characteristic, `[characteristic.NAME] unit` in the config.
-- Rewritten from the config whenever `lotdrift run` starts (a characteristic without a unit
-- has no row), so it says what the config said when the daemon last started.
CREATE TABLE characteristic_unit (
    characteristic TEXT PRIMARY KEY,
    unit           TEXT NOT NULL
);

-- A sample's standard deviation, sqrt(m2 / (n - 1)), NULL for one unit. Written by lotdrift
-- with the sample (SQLite's own sqrt is missing from many builds, so views cannot compute
-- it); samples stored before this migration are filled in when lotdrift next opens the
-- database, which the partial index finds without a scan.
ALTER TABLE sample ADD COLUMN sd REAL;
CREATE INDEX sample_sd_missing ON sample (id) WHERE sd IS NULL AND n > 1;

-- Who replaced a sample's values (`lotdrift replace --by NAME`, else the login name); NULL
-- for replacements recorded before this migration.
ALTER TABLE sample_replacement ADD COLUMN replaced_by TEXT;

-- One row per stored unit value. `unit` is the measured unit's serial as the lot file gave it
-- (NULL when it gave none; `seq` is then the only name of the unit); `unit_of_measure` is the
-- characteristic's configured unit (mAh, g). `sampled_at` is the value's own sampling time,
-- else its lot's. Replaced values are not here (see `replaced_measurement`).
CREATE VIEW measurement_view AS
SELECT src.name AS source,
       ch.name AS characteristic,
       l.code AS lot,
       COALESCE(m.sampled_at, sm.sampled_at, l.sampled_at) AS sampled_at,
       m.unit AS unit,
       m.value AS value,
       cu.unit AS unit_of_measure,
       m.seq AS seq,
       sm.id AS sample_id
FROM measurement m
JOIN sample sm ON sm.id = m.sample_id
JOIN lot l ON l.id = sm.lot_id
JOIN series se ON se.id = sm.series_id
JOIN source src ON src.id = se.source_id
JOIN characteristic ch ON ch.id = se.characteristic_id
LEFT JOIN characteristic_unit cu ON cu.characteristic = ch.name;

-- One row per lot and characteristic (a sample) with its summary. `sd` is the sample standard
-- deviation (NULL for one unit). `sampled_at` is the lot's sampling time (its earliest), the
-- order lots are decided in; `role`: 'baseline' (in the series' current baseline), 'tested'
-- (has a mean decision), 'former baseline' (only in a baseline that was replaced), 'pending'.
CREATE VIEW lot_view AS
SELECT src.name AS source,
       ch.name AS characteristic,
       l.code AS lot,
       sm.n AS n,
       sm.mean AS mean,
       sm.sd AS sd,
       sm.min_value AS min,
       sm.max_value AS max,
       COALESCE(l.sampled_at, l.first_seen_at) AS sampled_at,
       CASE
           WHEN EXISTS (SELECT 1 FROM baseline_lot bl JOIN baseline b ON b.id = bl.baseline_id
                        WHERE bl.sample_id = sm.id AND b.retired_at IS NULL) THEN 'baseline'
           WHEN EXISTS (SELECT 1 FROM evaluation e
                        WHERE e.sample_id = sm.id AND e.kind = 'mean') THEN 'tested'
           WHEN EXISTS (SELECT 1 FROM baseline_lot bl
                        WHERE bl.sample_id = sm.id) THEN 'former baseline'
           ELSE 'pending'
       END AS role,
       cu.unit AS unit_of_measure,
       l.first_seen_at AS first_seen_at,
       sm.id AS sample_id,
       l.id AS lot_id
FROM sample sm
JOIN lot l ON l.id = sm.lot_id
JOIN series se ON se.id = sm.series_id
JOIN source src ON src.id = se.source_id
JOIN characteristic ch ON ch.id = se.characteristic_id
LEFT JOIN characteristic_unit cu ON cu.characteristic = ch.name;

-- One row per decision (evaluation): a lot's mean or spread against its baseline.
-- `kind` is 'mean' or 'spread'; `test` names the test that decided ('cusum' when the CUSUM
-- alone signalled). `threshold` is the level that `p_adjusted` (or `p_value` where no
-- adjustment applies) was compared with; `significant` is 1 when the lot test or the CUSUM
-- signalled. The CUSUM columns (mean decisions only) hold the sums after this lot and the
-- decision interval h, in standardised units. `alert_id`: the alert the decision opened,
-- attached to or repeated, if any.
CREATE VIEW decision_view AS
SELECT e.id AS decision_id,
       src.name AS source,
       ch.name AS characteristic,
       l.code AS lot,
       COALESCE(l.sampled_at, l.first_seen_at) AS sampled_at,
       e.kind AS kind,
       e.test AS test,
       e.model AS model,
       e.alternative AS alternative,
       e.statistic AS statistic,
       e.df AS df,
       e.df2 AS df2,
       e.p_value AS p_value,
       e.p_adjusted AS p_adjusted,
       e.method AS method,
       e.level AS threshold,
       e.significant AS significant,
       e.cusum_upper AS cusum_upper,
       e.cusum_lower AS cusum_lower,
       e.cusum_h AS cusum_h,
       e.cusum_signal AS cusum_signal,
       e.baseline_mean AS baseline_mean,
       e.lot_n AS lot_n,
       e.lot_mean AS lot_mean,
       e.lot_sd AS lot_sd,
       e.estimate AS estimate,
       e.ci_low AS ci_low,
       e.ci_high AS ci_high,
       cu.unit AS unit_of_measure,
       e.note AS note,
       e.decided_at AS decided_at,
       (SELECT ev.alert_id FROM alert_event ev WHERE ev.evaluation_id = e.id
        AND ev.kind IN ('opened', 'attached', 'repeated') ORDER BY ev.id LIMIT 1) AS alert_id,
       e.sample_id AS sample_id
FROM evaluation e
JOIN sample sm ON sm.id = e.sample_id
JOIN lot l ON l.id = sm.lot_id
JOIN series se ON se.id = e.series_id
JOIN source src ON src.id = se.source_id
JOIN characteristic ch ON ch.id = se.characteristic_id
LEFT JOIN characteristic_unit cu ON cu.characteristic = ch.name;

-- One row per alert, with the decision that opened it and its latest acknowledgement.
-- `significant_lots` counts the lots that opened it, attached to it or repeated it.
CREATE VIEW alert_view AS
SELECT a.id AS alert_id,
       src.name AS source,
       ch.name AS characteristic,
       a.kind AS kind,
       a.state AS state,
       a.opened_at AS opened_at,
       a.resolved_at AS resolved_at,
       l.code AS lot,
       COALESCE(l.sampled_at, l.first_seen_at) AS lot_sampled_at,
       e.test AS test,
       e.p_value AS p_value,
       e.p_adjusted AS p_adjusted,
       e.level AS threshold,
       e.cusum_upper AS cusum_upper,
       e.cusum_lower AS cusum_lower,
       e.cusum_h AS cusum_h,
       e.baseline_mean AS baseline_mean,
       e.lot_mean AS lot_mean,
       e.estimate AS estimate,
       cu.unit AS unit_of_measure,
       (SELECT COUNT(*) FROM alert_event x WHERE x.alert_id = a.id
        AND x.kind IN ('opened', 'attached', 'repeated')) AS significant_lots,
       k.acked_by AS acknowledged_by,
       k.acked_at AS acknowledged_at,
       k.note AS acknowledgement_note
FROM alert a
JOIN evaluation e ON e.id = a.opening_evaluation
JOIN sample sm ON sm.id = e.sample_id
JOIN lot l ON l.id = sm.lot_id
JOIN series se ON se.id = a.series_id
JOIN source src ON src.id = se.source_id
JOIN characteristic ch ON ch.id = se.characteristic_id
LEFT JOIN characteristic_unit cu ON cu.characteristic = ch.name
LEFT JOIN alert_ack k ON k.id = (SELECT MAX(id) FROM alert_ack WHERE alert_id = a.id);
