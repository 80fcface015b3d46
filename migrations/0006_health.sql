-- Health of the daemon's two pipelines (ingest, delivery): the current failing streak and its
-- last error, and the operational notices ("stuck", "recovered") with outbox rows that
-- announce them. Read by `lotdrift status` while the daemon runs; kept across restarts.

-- A notice about a component: 'stuck' when it has been failing for longer than
-- health.notice_after_minutes, 'recovered' when a failing streak that was noticed ends.
-- It keeps the streak as it was told.
CREATE TABLE health_event (
    id            INTEGER PRIMARY KEY,
    component     TEXT NOT NULL CHECK (component IN ('ingest', 'delivery')),
    kind          TEXT NOT NULL CHECK (kind IN ('stuck', 'recovered')),
    at            TEXT NOT NULL,
    -- the first failure of the streak, the failures counted, and the latest error
    failing_since TEXT NOT NULL,
    failures      INTEGER NOT NULL CHECK (failures > 0),
    last_error    TEXT NOT NULL
);

-- One row per component. failing_since is the first failure not followed by a success (NULL
-- while the latest attempt succeeded); last_error and last_error_at stay after a recovery.
-- notice_event_id is the 'stuck' notice of the current streak, so it is sent once.
CREATE TABLE health (
    component       TEXT PRIMARY KEY CHECK (component IN ('ingest', 'delivery')),
    failing_since   TEXT,
    failures        INTEGER NOT NULL DEFAULT 0,
    last_error      TEXT,
    last_error_at   TEXT,
    recovered_at    TEXT,
    notice_event_id INTEGER REFERENCES health_event (id),
    CHECK ((failing_since IS NULL) = (failures = 0)),
    CHECK (notice_event_id IS NULL OR failing_since IS NOT NULL)
);
INSERT INTO health (component) VALUES ('ingest'), ('delivery');

-- The outbox is rebuilt with a fourth reference, as in migration 0004 (SQLite cannot alter a
-- CHECK): digest_item references outbox and is kept aside while the outbox is replaced.
CREATE TABLE outbox_new (
    id               INTEGER PRIMARY KEY,
    alert_event_id   INTEGER REFERENCES alert_event (id),
    digest_id        INTEGER REFERENCES digest (id),
    silence_event_id INTEGER REFERENCES silence_event (id),
    health_event_id  INTEGER REFERENCES health_event (id),
    channel          TEXT NOT NULL,
    recipient        TEXT NOT NULL,
    state            TEXT NOT NULL CHECK (state IN ('pending', 'delivered', 'failed', 'expired')),
    attempts         INTEGER NOT NULL DEFAULT 0,
    created_at       TEXT NOT NULL,
    next_attempt_at  TEXT NOT NULL,
    delivered_at     TEXT,
    last_error       TEXT,
    CHECK ((alert_event_id IS NOT NULL) + (digest_id IS NOT NULL)
           + (silence_event_id IS NOT NULL) + (health_event_id IS NOT NULL) = 1),
    UNIQUE (alert_event_id, channel, recipient),
    UNIQUE (digest_id, channel, recipient),
    UNIQUE (silence_event_id, channel, recipient),
    UNIQUE (health_event_id, channel, recipient)
);
INSERT INTO outbox_new (id, alert_event_id, digest_id, silence_event_id, health_event_id,
                        channel, recipient, state, attempts, created_at, next_attempt_at,
                        delivered_at, last_error)
    SELECT id, alert_event_id, digest_id, silence_event_id, NULL, channel, recipient, state,
           attempts, created_at, next_attempt_at, delivered_at, last_error
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
