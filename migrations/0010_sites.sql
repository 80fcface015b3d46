-- Several daemons on one history (issue 11). Applied migrations are never edited; changes go
-- in a new numbered file. The PostgreSQL schema (migrations/postgres/) has the same columns.
--
-- `site`: the `[site] name` of the daemon that stored the file or made the decision (NULL for
-- rows written before sites were recorded).
ALTER TABLE ingested_file ADD COLUMN site TEXT;
ALTER TABLE evaluation ADD COLUMN site TEXT;

-- A message being sent is claimed by one daemon until `claimed_until` (RFC 3339 UTC), so that
-- two daemons on one PostgreSQL history never send it twice, and a daemon that dies while
-- sending leaves it to another once the claim has run out. A SQLite history has one daemon,
-- which does not claim: the columns stay NULL and keep the two schemas alike.
ALTER TABLE outbox ADD COLUMN claimed_by TEXT;
ALTER TABLE outbox ADD COLUMN claimed_until TEXT;
