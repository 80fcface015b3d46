-- Unit values packed into one row per sample (issue 10: the backfill). Applied migrations are
-- never edited; changes go in a new numbered file.
--
-- One row per unit value cost every value a primary-key insert and a foreign-key probe; a
-- backfill of millions of values spent most of its writing time there. Here a sample's values
-- are one JSON array, in unit order (the array index is the unit's `seq`), and
-- `measurement_view` unpacks them with `json_each`, one row per value as before.
--
-- `values_json`: the values, each written with the shortest text that reads back as the same
-- double (`json_each` and lotdrift's own readers get the stored bits back exactly).
-- `units_json`: the unit serials (JSON null for a unit without one); NULL when no unit has one.
-- `sampled_at_json`: each value's own sampling time (JSON null for none); NULL when every
-- value's time equals the sample's `sampled_at` (the common case: one time per lot, or none).
CREATE TABLE sample_values (
    sample_id       INTEGER PRIMARY KEY REFERENCES sample (id),
    values_json     TEXT NOT NULL,
    units_json      TEXT,
    sampled_at_json TEXT
);

-- `%!.17g` is SQLite's round-trip format for a double (17 significant digits, always with a
-- decimal point or exponent, so JSON reads it back as a real); json_group_array would round
-- values to 15 digits. Each sample's values keep their seq order (seqs were 0, 1, 2, ...).
INSERT INTO sample_values (sample_id, values_json, units_json, sampled_at_json)
SELECT m.sample_id,
       '[' || group_concat(printf('%!.17g', m.value), ',' ORDER BY m.seq) || ']',
       CASE WHEN COUNT(m.unit) = 0 THEN NULL
            ELSE json_group_array(m.unit ORDER BY m.seq) END,
       CASE WHEN SUM(m.sampled_at IS NOT sm.sampled_at) = 0 THEN NULL
            ELSE json_group_array(m.sampled_at ORDER BY m.seq) END
FROM measurement m
JOIN sample sm ON sm.id = m.sample_id
GROUP BY m.sample_id
ORDER BY m.sample_id;

DROP VIEW measurement_view;
DROP TABLE measurement;

-- One row per stored unit value: the same columns, names and rows as migration 0008's view.
-- Written with json_each and json_extract only (no `->>`), so SQLite tools older than 3.38
-- with the JSON functions read it too.
-- `unit` is the measured unit's serial as the lot file gave it (NULL when it gave none; `seq`
-- is then the only name of the unit); `unit_of_measure` is the characteristic's configured
-- unit (mAh, g). `sampled_at` is the value's own sampling time, else its lot's. Replaced
-- values are not here (see `replaced_measurement`).
CREATE VIEW measurement_view AS
SELECT src.name AS source,
       ch.name AS characteristic,
       l.code AS lot,
       COALESCE(json_extract(sv.sampled_at_json, '$[' || v.key || ']'), sm.sampled_at,
                l.sampled_at) AS sampled_at,
       json_extract(sv.units_json, '$[' || v.key || ']') AS unit,
       v.value AS value,
       cu.unit AS unit_of_measure,
       v.key AS seq,
       sm.id AS sample_id
FROM sample_values sv
JOIN json_each(sv.values_json) v
JOIN sample sm ON sm.id = sv.sample_id
JOIN lot l ON l.id = sm.lot_id
JOIN series se ON se.id = sm.series_id
JOIN source src ON src.id = se.source_id
JOIN characteristic ch ON ch.id = se.characteristic_id
LEFT JOIN characteristic_unit cu ON cu.characteristic = ch.name;
