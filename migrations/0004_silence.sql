-- Silence of a source (no lot for longer than it usually takes), its events, and outbox rows
-- that announce either an alert event, a digest, or a silence event.

-- A source that went silent: opened when its last lot time lies further back than the
-- threshold, resolved when a lot with a later lot time is stored. Lot times are
-- COALESCE(lot.sampled_at, lot.first_seen_at). At most one open silence per source.
CREATE TABLE silence (
    id               INTEGER PRIMARY KEY,
    source_id        INTEGER NOT NULL REFERENCES source (id),
    opened_at        TEXT NOT NULL,
    -- the source's last lot when the silence was noticed, and its lot time
    last_lot_id      INTEGER NOT NULL REFERENCES lot (id),
    last_lot_at      TEXT NOT NULL,
    threshold_days   REAL NOT NULL CHECK (threshold_days > 0),
    -- how the threshold was set: 'learned' from the source's lot intervals, 'configured'
    -- (monitor.silence_days) or 'configured_for_source' (monitor.silence_days_by_source)
    basis            TEXT NOT NULL
                     CHECK (basis IN ('learned', 'configured', 'configured_for_source')),
    -- for 'learned': the intervals it was learned from and their median, in days
    intervals        INTEGER,
    median_days      REAL,
    resolved_at      TEXT,
    -- the lot whose arrival resolved it, and its lot time
    resolving_lot_id INTEGER REFERENCES lot (id),
    resolving_lot_at TEXT,
    CHECK ((resolved_at IS NULL) = (resolving_lot_at IS NULL))
);
CREATE UNIQUE INDEX silence_one_open_per_source ON silence (source_id)
    WHERE resolved_at IS NULL;

-- Every state change of a silence that is announced: opened, resolved.
CREATE TABLE silence_event (
    id         INTEGER PRIMARY KEY,
    silence_id INTEGER NOT NULL REFERENCES silence (id),
    kind       TEXT NOT NULL CHECK (kind IN ('opened', 'resolved')),
    at         TEXT NOT NULL,
    UNIQUE (silence_id, kind)
);

-- The outbox is rebuilt with a third reference (SQLite cannot alter a CHECK). digest_item
-- references outbox: with foreign keys on, dropping the parent would count its rows as
-- violations (even deferred ones stay counted until commit), so digest_item is kept aside,
-- dropped, and made again after the rename with the same rows.
CREATE TABLE outbox_new (
    id               INTEGER PRIMARY KEY,
    alert_event_id   INTEGER REFERENCES alert_event (id),
    digest_id        INTEGER REFERENCES digest (id),
    silence_event_id INTEGER REFERENCES silence_event (id),
    channel          TEXT NOT NULL,
    recipient        TEXT NOT NULL,
    state            TEXT NOT NULL CHECK (state IN ('pending', 'delivered', 'failed', 'expired')),
    attempts         INTEGER NOT NULL DEFAULT 0,
    created_at       TEXT NOT NULL,
    next_attempt_at  TEXT NOT NULL,
    delivered_at     TEXT,
    last_error       TEXT,
    CHECK ((alert_event_id IS NOT NULL) + (digest_id IS NOT NULL)
           + (silence_event_id IS NOT NULL) = 1),
    UNIQUE (alert_event_id, channel, recipient),
    UNIQUE (digest_id, channel, recipient),
    UNIQUE (silence_event_id, channel, recipient)
);
INSERT INTO outbox_new (id, alert_event_id, digest_id, silence_event_id, channel, recipient,
                        state, attempts, created_at, next_attempt_at, delivered_at, last_error)
    SELECT id, alert_event_id, digest_id, NULL, channel, recipient, state, attempts,
           created_at, next_attempt_at, delivered_at, last_error
    FROM outbox;

CREATE TABLE digest_item_kept AS SELECT outbox_id, alert_id FROM digest_item;
DROP TABLE digest_item;
DROP TABLE outbox;
ALTER TABLE outbox_new RENAME TO outbox;
CREATE INDEX outbox_due ON outbox (state, next_attempt_at);

-- As in migration 0002.
CREATE TABLE digest_item (
    outbox_id INTEGER NOT NULL REFERENCES outbox (id),
    alert_id  INTEGER NOT NULL REFERENCES alert (id),
    PRIMARY KEY (outbox_id, alert_id)
);
INSERT INTO digest_item (outbox_id, alert_id) SELECT outbox_id, alert_id FROM digest_item_kept;
DROP TABLE digest_item_kept;
