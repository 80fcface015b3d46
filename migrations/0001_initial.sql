-- lotdrift schema, version 1.
-- Applied migrations are never edited; changes go in a new numbered file.
-- Times are RFC 3339 UTC text with millisecond precision ("2026-03-01T08:30:00.000Z"),
-- fixed width, so text order is time order in SQLite and PostgreSQL alike.

-- A supplier, or one plant of a supplier.
CREATE TABLE source (
    id   INTEGER PRIMARY KEY,
    name TEXT NOT NULL UNIQUE
);

-- A measured property of the part (capacity, resistance, a dimension).
CREATE TABLE characteristic (
    id   INTEGER PRIMARY KEY,
    name TEXT NOT NULL UNIQUE
);

-- One source x one characteristic: the unit that is monitored.
CREATE TABLE series (
    id                INTEGER PRIMARY KEY,
    source_id         INTEGER NOT NULL REFERENCES source (id),
    characteristic_id INTEGER NOT NULL REFERENCES characteristic (id),
    UNIQUE (source_id, characteristic_id)
);

-- Every file that was stored. content_hash (SHA-256 of the bytes) is what makes ingest
-- exactly-once: a file whose hash is here is a duplicate.
CREATE TABLE ingested_file (
    id           INTEGER PRIMARY KEY,
    content_hash TEXT NOT NULL UNIQUE,
    file_name    TEXT NOT NULL,
    received_at  TEXT NOT NULL,
    layout       TEXT NOT NULL,
    row_count    INTEGER NOT NULL
);

-- A lot of one source. sampled_at is the earliest sampling time of any value stored for the
-- lot (NULL when no file gave one); first_seen_at is when its first file was stored.
CREATE TABLE lot (
    id            INTEGER PRIMARY KEY,
    source_id     INTEGER NOT NULL REFERENCES source (id),
    code          TEXT NOT NULL,
    sampled_at    TEXT,
    first_seen_at TEXT NOT NULL,
    UNIQUE (source_id, code)
);

-- The values of one characteristic of one lot (a "sample"), with its sufficient statistics.
-- m2 is the sum of squared deviations from the mean (variance = m2 / (n - 1)).
CREATE TABLE sample (
    id            INTEGER PRIMARY KEY,
    lot_id        INTEGER NOT NULL REFERENCES lot (id),
    series_id     INTEGER NOT NULL REFERENCES series (id),
    file_id       INTEGER NOT NULL REFERENCES ingested_file (id),
    n             INTEGER NOT NULL CHECK (n >= 1),
    mean          REAL NOT NULL,
    m2            REAL NOT NULL CHECK (m2 >= 0),
    min_value     REAL NOT NULL,
    max_value     REAL NOT NULL,
    sampled_at    TEXT,
    content_digest TEXT NOT NULL,
    UNIQUE (lot_id, series_id)
);
CREATE INDEX sample_series ON sample (series_id);

-- One row per measured unit value.
CREATE TABLE measurement (
    id         INTEGER PRIMARY KEY,
    sample_id  INTEGER NOT NULL REFERENCES sample (id),
    seq        INTEGER NOT NULL,
    unit       TEXT,
    value      REAL NOT NULL,
    sampled_at TEXT
);
CREATE INDEX measurement_sample ON measurement (sample_id);

-- Files that were refused, with the reason (also written beside the file in quarantine/).
CREATE TABLE quarantined_file (
    id             INTEGER PRIMARY KEY,
    content_hash   TEXT NOT NULL UNIQUE,
    file_name      TEXT NOT NULL,
    quarantined_at TEXT NOT NULL,
    reason         TEXT NOT NULL
);

-- Values of a stored sample replaced on purpose (lotdrift replace), kept for the audit trail.
CREATE TABLE sample_replacement (
    id           INTEGER PRIMARY KEY,
    sample_id    INTEGER NOT NULL REFERENCES sample (id),
    replaced_at  TEXT NOT NULL,
    reason       TEXT NOT NULL,
    old_file_id  INTEGER NOT NULL REFERENCES ingested_file (id),
    new_file_id  INTEGER NOT NULL REFERENCES ingested_file (id),
    old_n        INTEGER NOT NULL,
    old_mean     REAL NOT NULL,
    old_m2       REAL NOT NULL,
    old_digest   TEXT NOT NULL
);

-- The frozen baseline of a series: the lots it was built from, their merged summary, the
-- one-way random-effects analysis of its lots, and the monitoring design derived from it.
CREATE TABLE baseline (
    id             INTEGER PRIMARY KEY,
    series_id      INTEGER NOT NULL REFERENCES series (id),
    frozen_at      TEXT NOT NULL,
    -- set when a re-baseline replaced it; decisions made against it keep pointing here
    retired_at     TEXT,
    definition     TEXT NOT NULL,
    lot_count      INTEGER NOT NULL,
    n              INTEGER NOT NULL,
    mean           REAL NOT NULL,
    m2             REAL NOT NULL,
    min_value      REAL NOT NULL,
    max_value      REAL NOT NULL,
    last_order_key TEXT NOT NULL,
    -- random-effects analysis (see stats::monitoring::random_effects)
    mean_of_means  REAL NOT NULL,
    msb            REAL NOT NULL,
    msw            REAL NOT NULL,
    df_between     REAL NOT NULL,
    df_within      REAL NOT NULL,
    n0             REAL NOT NULL,
    n_harmonic     REAL NOT NULL,
    var_between    REAL NOT NULL,
    var_within     REAL NOT NULL,
    between_p      REAL NOT NULL,
    -- Shapiro-Wilk p of the within-lot residuals (NULL when not computed)
    normality_p    REAL,
    -- design: per-lot levels of the mean and spread tests, CUSUM k and h (z units)
    level_mean     REAL NOT NULL,
    level_spread   REAL NOT NULL,
    cusum_k        REAL,
    cusum_h        REAL,
    design_note    TEXT NOT NULL
);
CREATE UNIQUE INDEX baseline_current ON baseline (series_id) WHERE retired_at IS NULL;

-- Audit trail of baseline changes made by people (lotdrift baseline set / reset).
CREATE TABLE baseline_change (
    id             INTEGER PRIMARY KEY,
    series_id      INTEGER NOT NULL REFERENCES series (id),
    changed_at     TEXT NOT NULL,
    changed_by     TEXT NOT NULL,
    reason         TEXT NOT NULL,
    old_definition TEXT,
    new_definition TEXT NOT NULL
);

CREATE TABLE baseline_lot (
    baseline_id INTEGER NOT NULL REFERENCES baseline (id),
    sample_id   INTEGER NOT NULL REFERENCES sample (id),
    PRIMARY KEY (baseline_id, sample_id)
);
CREATE INDEX baseline_lot_sample ON baseline_lot (sample_id);

-- Every decision: one test of one sample against its baseline, with the numbers behind it.
-- kind 'mean' (location: the lot test and the CUSUM) or 'spread' (within-lot variance).
CREATE TABLE evaluation (
    id              INTEGER PRIMARY KEY,
    sample_id       INTEGER NOT NULL REFERENCES sample (id),
    series_id       INTEGER NOT NULL REFERENCES series (id),
    baseline_id     INTEGER NOT NULL REFERENCES baseline (id),
    kind            TEXT NOT NULL CHECK (kind IN ('mean', 'spread')),
    decided_at      TEXT NOT NULL,
    test            TEXT NOT NULL,
    model           TEXT,
    alternative     TEXT NOT NULL,
    delta           REAL NOT NULL DEFAULT 0,
    statistic       REAL,
    df              REAL,
    df2             REAL,
    p_value         REAL,
    p_adjusted      REAL,
    method          TEXT NOT NULL,
    family_size     INTEGER NOT NULL,
    level           REAL NOT NULL,
    significant     INTEGER NOT NULL,
    baseline_n      INTEGER NOT NULL,
    baseline_mean   REAL NOT NULL,
    baseline_sd     REAL,
    lot_n           INTEGER NOT NULL,
    lot_mean        REAL NOT NULL,
    lot_sd          REAL,
    estimate        REAL,
    ci_low          REAL,
    ci_high         REAL,
    std_error       REAL,
    cusum_upper     REAL,
    cusum_lower     REAL,
    cusum_h         REAL,
    cusum_signal    INTEGER NOT NULL DEFAULT 0,
    -- Cpk of the lot against the characteristic's specification limits, with its interval
    cpk             REAL,
    cpk_low         REAL,
    cpk_high        REAL,
    note            TEXT,
    UNIQUE (sample_id, kind)
);
CREATE INDEX evaluation_series ON evaluation (series_id);

-- Running state of a series' monitoring after its latest decided lot: CUSUM sums, and the
-- online FDR state when monitor.over_time is "lond" or "lord" (tests so far, and the 1-based
-- indices of the rejected ones, comma-separated).
CREATE TABLE series_state (
    series_id     INTEGER PRIMARY KEY REFERENCES series (id),
    cusum_upper   REAL NOT NULL DEFAULT 0,
    cusum_lower   REAL NOT NULL DEFAULT 0,
    online_tests  INTEGER NOT NULL DEFAULT 0,
    online_rejected TEXT NOT NULL DEFAULT ''
);

-- An alert: a series that shifted. At most one open alert per series and kind of shift.
CREATE TABLE alert (
    id                 INTEGER PRIMARY KEY,
    series_id          INTEGER NOT NULL REFERENCES series (id),
    kind               TEXT NOT NULL CHECK (kind IN ('mean', 'spread')),
    state              TEXT NOT NULL CHECK (state IN ('open', 'resolved')),
    opened_at          TEXT NOT NULL,
    opening_evaluation INTEGER NOT NULL REFERENCES evaluation (id),
    resolved_at        TEXT,
    in_control_run     INTEGER NOT NULL DEFAULT 0,
    -- when the last message about it was queued, and the shift (lot − baseline) it reported
    notified_at        TEXT,
    notified_estimate  REAL
);
CREATE UNIQUE INDEX alert_one_open_per_series ON alert (series_id, kind) WHERE state = 'open';

-- Acknowledgements of alerts by people (lotdrift alerts ack): the audit trail is kept.
CREATE TABLE alert_ack (
    id        INTEGER PRIMARY KEY,
    alert_id  INTEGER NOT NULL REFERENCES alert (id),
    acked_at  TEXT NOT NULL,
    acked_by  TEXT NOT NULL,
    note      TEXT NOT NULL
);

-- Every state change of an alert: opened, attached (a later significant lot), resolved.
CREATE TABLE alert_event (
    id            INTEGER PRIMARY KEY,
    alert_id      INTEGER NOT NULL REFERENCES alert (id),
    kind          TEXT NOT NULL CHECK (kind IN ('opened', 'attached', 'repeated', 'resolved')),
    at            TEXT NOT NULL,
    evaluation_id INTEGER REFERENCES evaluation (id)
);

-- Messages to deliver, written in the same transaction as the event they announce.
CREATE TABLE outbox (
    id              INTEGER PRIMARY KEY,
    alert_event_id  INTEGER NOT NULL REFERENCES alert_event (id),
    channel         TEXT NOT NULL,
    recipient       TEXT NOT NULL,
    state           TEXT NOT NULL CHECK (state IN ('pending', 'delivered', 'failed', 'expired')),
    attempts        INTEGER NOT NULL DEFAULT 0,
    created_at      TEXT NOT NULL,
    next_attempt_at TEXT NOT NULL,
    delivered_at    TEXT,
    last_error      TEXT,
    UNIQUE (alert_event_id, channel, recipient)
);
CREATE INDEX outbox_due ON outbox (state, next_attempt_at);
