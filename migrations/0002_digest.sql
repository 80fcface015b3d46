-- The daily digest of open alerts, and outbox rows that announce either an alert event or a
-- digest.

-- One row per local day a digest was made for (even when nobody was due a message).
CREATE TABLE digest (
    id           INTEGER PRIMARY KEY,
    -- the local date (YYYY-MM-DD) of the scheduled time
    local_date   TEXT NOT NULL UNIQUE,
    -- the scheduled time, RFC 3339 UTC
    scheduled_at TEXT NOT NULL,
    created_at   TEXT NOT NULL,
    open_alerts  INTEGER NOT NULL
);

-- SQLite cannot relax a NOT NULL column in place: the outbox is rebuilt with its rows.
CREATE TABLE outbox_new (
    id              INTEGER PRIMARY KEY,
    alert_event_id  INTEGER REFERENCES alert_event (id),
    digest_id       INTEGER REFERENCES digest (id),
    channel         TEXT NOT NULL,
    recipient       TEXT NOT NULL,
    state           TEXT NOT NULL CHECK (state IN ('pending', 'delivered', 'failed', 'expired')),
    attempts        INTEGER NOT NULL DEFAULT 0,
    created_at      TEXT NOT NULL,
    next_attempt_at TEXT NOT NULL,
    delivered_at    TEXT,
    last_error      TEXT,
    CHECK ((alert_event_id IS NULL) <> (digest_id IS NULL)),
    UNIQUE (alert_event_id, channel, recipient),
    UNIQUE (digest_id, channel, recipient)
);
INSERT INTO outbox_new (id, alert_event_id, digest_id, channel, recipient, state, attempts,
                        created_at, next_attempt_at, delivered_at, last_error)
    SELECT id, alert_event_id, NULL, channel, recipient, state, attempts, created_at,
           next_attempt_at, delivered_at, last_error
    FROM outbox;
DROP TABLE outbox;
ALTER TABLE outbox_new RENAME TO outbox;
CREATE INDEX outbox_due ON outbox (state, next_attempt_at);

-- The open alerts a digest message lists, per outbox row (each recipient gets the alerts
-- they receive).
CREATE TABLE digest_item (
    outbox_id INTEGER NOT NULL REFERENCES outbox (id),
    alert_id  INTEGER NOT NULL REFERENCES alert (id),
    PRIMARY KEY (outbox_id, alert_id)
);
