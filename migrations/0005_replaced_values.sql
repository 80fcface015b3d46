-- The unit values a `lotdrift replace` took out of a sample, kept for the audit trail (the
-- replacement row already kept n, mean and m2; the values themselves were deleted).
-- Applied migrations are never edited; changes go in a new numbered file.
CREATE TABLE replaced_measurement (
    id             INTEGER PRIMARY KEY,
    replacement_id INTEGER NOT NULL REFERENCES sample_replacement (id),
    seq            INTEGER NOT NULL,
    unit           TEXT,
    value          REAL NOT NULL,
    sampled_at     TEXT
);
CREATE INDEX replaced_measurement_replacement ON replaced_measurement (replacement_id);
