//! The SQLite backend: the embedded default, one file per site.
//!
//! SQLite runs in WAL mode with a busy timeout, and every write transaction begins
//! `IMMEDIATE`, so readers (the CLI, the user's own SQL tools) never block the daemon and a
//! second writer waits instead of failing. The bulk paths (a batch's files, lots, samples and
//! unit values; the engine's pending samples and decisions; `history`) go through the
//! connection's own SQLite handle with prepared statements (see [`bulk`]).

use std::collections::{HashMap, HashSet};
use std::path::Path;
use std::str::FromStr;
use std::sync::Mutex;
use std::time::Duration;

use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use sqlx::{ConnectOptions, QueryBuilder, Row, Sqlite, Transaction};

use super::plan::{self, Lookups};
use super::*;

pub(super) mod bulk;
pub(super) mod charts;
pub(super) mod history;
pub(super) mod views;

mod engine;
mod fresh;
mod ingest;
mod outbox;
mod reads;

/// Turns off SQLite's memory statistics for the process, before its first connection. With
/// them on, every allocation SQLite makes takes a process-wide mutex and asks glibc for the
/// block's size: in a backfill's profile that was about 4 % of the writer's time. Without
/// them SQLite has no soft heap limit; each connection's page cache stays bounded by its
/// `cache_size`. Too late (SQLite already initialised, as in a test process that opened a
/// database before) it changes nothing, which is harmless.
fn without_memory_statistics() {
    static ONCE: std::sync::Once = std::sync::Once::new();
    ONCE.call_once(|| {
        use rusqlite::ffi;
        // SAFETY: sqlite3_config with SQLITE_CONFIG_MEMSTATUS takes one int; before
        // sqlite3_initialize it only sets a flag, afterwards it returns SQLITE_MISUSE.
        let rc = unsafe { ffi::sqlite3_config(ffi::SQLITE_CONFIG_MEMSTATUS, 0 as std::ffi::c_int) };
        tracing::debug!(rc, "SQLite memory statistics turned off");
    });
}

/// The SQLite store: its pool and the ids of names already stored.
pub(super) struct Db {
    pool: SqlitePool,
    names: Mutex<NameCache>,
    /// The `[site] name` recorded with each stored file and decision.
    site: String,
    /// Unit values of samples stored by this process and not yet read by the engine.
    fresh: Box<Mutex<fresh::Fresh>>,
}

impl Db {
    /// Opens (creating if needed) the SQLite database at `path` and applies migrations.
    pub async fn open(path: &Path, site: &str) -> Result<Db> {
        let shown = path.display().to_string();
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(|e| StoreError::Open {
                path: shown.clone(),
                source: sqlx::Error::Io(e),
            })?;
        }
        without_memory_statistics();
        let options = SqliteConnectOptions::from_str("sqlite:")
            .map_err(|source| StoreError::Open {
                path: shown.clone(),
                source,
            })?
            .filename(path)
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            // FULL: a commit is on disk before ingest moves the batch's files to the archive.
            // With NORMAL a power cut could roll back the last commits of a WAL database while
            // their files already sat in the archive, never stored.
            .synchronous(SqliteSynchronous::Full)
            .busy_timeout(Duration::from_secs(30))
            .foreign_keys(true)
            // 16 MiB of page cache per connection (negative = KiB), at most four: a backfill
            // touches the indexes of lots, files and samples at random, and the default 2 MiB
            // makes it read pages back; 32 MiB each put a backfill's peak memory near 250 MiB.
            .pragma("cache_size", "-16384")
            // Statement journals (a write that fires triggers opens one per statement) in
            // memory: on disk a backfill wrote gigabytes of them to /var/tmp, never read.
            .pragma("temp_store", "memory")
            // A backfill's large statements are expected; only report them at debug level.
            .log_slow_statements(tracing::log::LevelFilter::Debug, Duration::from_secs(5));
        let pool = SqlitePoolOptions::new()
            .max_connections(4)
            .after_release(|conn, _| Box::pin(async move { reusable(conn).await }))
            .connect_with(options)
            .await
            .map_err(|source| StoreError::Open {
                path: shown.clone(),
                source,
            })?;
        // Two processes opening a new database at once (the daemon starting, `status` run
        // beside it) would both apply the first migration and one would fail ("table already
        // exists"): migrations run under an exclusive lock on a file beside the database.
        let lock = migration_lock(path).await?;
        let migrated = sqlx::migrate!().run(&pool).await;
        drop(lock);
        migrated.map_err(|source| StoreError::Migrate {
            path: shown,
            source,
        })?;
        let store = Db {
            pool,
            names: Mutex::new(NameCache::default()),
            fresh: Box::default(),
            site: site.to_string(),
        };
        store.fill_missing_sd().await?;
        Ok(store)
    }

    /// Writes a consistent copy of the database to `dest` (`VACUUM INTO`: one read
    /// transaction, so a daemon writing meanwhile is neither blocked nor half-copied). SQLite
    /// refuses a `dest` that exists and is not empty.
    pub async fn backup_into(&self, dest: &Path) -> Result<()> {
        let shown = dest.display().to_string();
        sqlx::query("VACUUM INTO ?")
            .bind(dest.to_string_lossy().into_owned())
            .execute(&self.pool)
            .await
            .map_err(|source| StoreError::Backup {
                path: shown,
                source,
            })?;
        Ok(())
    }

    /// Opens a database copy read-only (no migrations), runs `PRAGMA integrity_check` and
    /// counts its lots and measurements.
    pub async fn check_copy(path: &Path) -> Result<CopyCheck> {
        let err = |source| StoreError::CheckCopy {
            path: path.display().to_string(),
            source,
        };
        let mut conn = SqliteConnectOptions::new()
            .filename(path)
            .read_only(true)
            .connect()
            .await
            .map_err(err)?;
        let findings: Vec<String> = sqlx::query_scalar("PRAGMA integrity_check")
            .fetch_all(&mut conn)
            .await
            .map_err(err)?;
        let (lots, measurements): (i64, i64) = sqlx::query_as(
            "SELECT (SELECT COUNT(*) FROM lot), \
                 (SELECT COUNT(*) FROM sample_values sv JOIN json_each(sv.values_json))",
        )
        .fetch_one(&mut conn)
        .await
        .map_err(err)?;
        let _ = sqlx::Connection::close(conn).await;
        Ok(CopyCheck {
            integrity: findings.join("\n"),
            lots,
            measurements,
        })
    }

    /// Closes the pool, checkpointing the WAL.
    pub(super) fn pool(&self) -> &SqlitePool {
        &self.pool
    }

    pub async fn close(self) {
        self.pool.close().await;
    }

    async fn begin(&self) -> Result<Transaction<'static, Sqlite>> {
        self.pool
            .begin_with("BEGIN IMMEDIATE")
            .await
            .doing("beginning a write transaction")
    }
}

/// `prefix (?, ?, …)suffix` with `ids` bound: the chunked `IN` lists of id queries.
fn in_list<'a>(prefix: &str, ids: &'a [i64], suffix: &str) -> QueryBuilder<'a, Sqlite> {
    let mut q = QueryBuilder::new(prefix);
    q.push(" (");
    let mut sep = q.separated(", ");
    for id in ids {
        sep.push_bind(*id);
    }
    q.push(")");
    q.push(suffix);
    q
}

/// Whether a connection handed back to the pool can be used again. A COMMIT that fails
/// (database or disk full) leaves the transaction rolled back by SQLite but still counted by
/// sqlx; the ROLLBACK sqlx then sends fails as well ("no transaction is active"), and every
/// later BEGIN on that connection would fail with "non-zero transaction depth", so ingest
/// would never recover once space is freed. Such a connection is closed instead (the pool
/// opens a new one). The ping first lets the connection's worker finish a queued rollback.
async fn reusable(conn: &mut sqlx::SqliteConnection) -> std::result::Result<bool, sqlx::Error> {
    use sqlx::Connection as _;
    conn.ping().await?;
    if conn.is_in_transaction() {
        tracing::warn!("a database connection was left inside a failed transaction; closing it");
        return Ok(false);
    }
    Ok(true)
}

/// An exclusive lock on `<database>.migrate-lock`, held while migrations run (blocking on
/// another process's migration, which takes well under a second).
async fn migration_lock(db: &Path) -> Result<std::fs::File> {
    let mut name = db.file_name().unwrap_or_default().to_os_string();
    name.push(".migrate-lock");
    let path = db.with_file_name(name);
    let shown = path.display().to_string();
    tokio::task::spawn_blocking(move || {
        let file = std::fs::OpenOptions::new()
            .create(true)
            .truncate(false)
            .write(true)
            .open(&path)?;
        file.lock()?;
        Ok(file)
    })
    .await
    .map_err(|e| std::io::Error::other(e.to_string()))
    .and_then(|r| r)
    .map_err(|source| StoreError::Lock {
        path: shown,
        source,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A database with the migrations whose file names sort before `next`, without foreign
    /// keys (rows can be added in any order).
    async fn database_before(dir: &Path, next: &str) -> SqlitePool {
        let migrations = dir.join(format!("m-{next}"));
        std::fs::create_dir(&migrations).unwrap();
        let all = concat!(env!("CARGO_MANIFEST_DIR"), "/migrations");
        for entry in std::fs::read_dir(all).unwrap() {
            let path = entry.unwrap().path();
            let name = path.file_name().unwrap().to_str().unwrap().to_string();
            if name.as_str() < next {
                std::fs::copy(&path, migrations.join(&name)).unwrap();
            }
        }
        let options = SqliteConnectOptions::new()
            .filename(dir.join("old.db"))
            .create_if_missing(true)
            .foreign_keys(false);
        let pool = SqlitePoolOptions::new()
            .max_connections(1)
            .connect_with(options)
            .await
            .unwrap();
        sqlx::migrate::Migrator::new(migrations.as_path())
            .await
            .unwrap()
            .run(&pool)
            .await
            .unwrap();
        pool
    }

    async fn count(pool: &SqlitePool, sql: &str) -> i64 {
        sqlx::query_scalar(sql).fetch_one(pool).await.unwrap()
    }

    #[tokio::test]
    async fn the_flat_cost_migration_finds_pending_samples_and_keeps_counts() {
        let dir = tempfile::tempdir().unwrap();
        let pool = database_before(dir.path(), "0007").await;
        // Sample 1 is a baseline lot, sample 2 was decided, sample 3 waits.
        sqlx::raw_sql(
            "INSERT INTO ingested_file VALUES (1, 'h', 'f.csv', 't', 'long', 7); \
             INSERT INTO lot VALUES (1, 1, 'L1', NULL, 't'), (2, 1, 'L2', NULL, 't'), \
                                    (3, 1, 'L3', NULL, 't'); \
             INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, content_digest) VALUES (1, 1, 5, 1, 2, 1, 0, 1, 1, 'a'), \
                 (2, 2, 5, 1, 3, 1, 0, 1, 1, 'b'), (3, 3, 5, 1, 2, 1, 0, 1, 1, 'c'); \
             INSERT INTO measurement (sample_id, seq, unit, value, sampled_at) VALUES \
                 (1, 0, 'u1', 1.5, NULL), (1, 1, 'u2', 2.5, NULL), (2, 0, NULL, 3.5, 'x'), \
                 (2, 1, NULL, 4.5, NULL), (2, 2, NULL, 5.5, NULL), (3, 0, NULL, 6.5, NULL), \
                 (3, 1, NULL, 7.5, NULL); \
             INSERT INTO baseline_lot VALUES (9, 1); \
             INSERT INTO evaluation (sample_id, series_id, baseline_id, kind, decided_at, test, \
                 alternative, method, family_size, level, significant, baseline_n, \
                 baseline_mean, lot_n, lot_mean) VALUES \
                 (2, 5, 9, 'mean', 't', 'welch', 'two-sided', 'holm', 1, 0.01, 0, 2, 1, 3, 1), \
                 (3, 5, 9, 'spread', 't', 'f', 'two-sided', 'holm', 1, 0.01, 0, 2, 1, 2, 1);",
        )
        .execute(&pool)
        .await
        .unwrap();
        sqlx::migrate!().run(&pool).await.unwrap();

        let pending = "SELECT group_concat(sample_id) FROM pending_sample";
        let one: Option<String> = sqlx::query_scalar(pending).fetch_one(&pool).await.unwrap();
        assert_eq!(one.as_deref(), Some("3"));
        let tally = "SELECT files || ' ' || lots || ' ' || measurements || ' ' || evaluations \
                     || ' ' || outliers FROM tally";
        let t: String = sqlx::query_scalar(tally).fetch_one(&pool).await.unwrap();
        assert_eq!(t, "1 3 7 2 0");
        // Every unit value came across, in (sample, seq) order.
        let values: Vec<f64> = sqlx::query_scalar(
            "SELECT v.value FROM sample_values sv JOIN json_each(sv.values_json) v \
                 ORDER BY sv.sample_id, v.key",
        )
        .fetch_all(&pool)
        .await
        .unwrap();
        assert_eq!(values, [1.5, 2.5, 3.5, 4.5, 5.5, 6.5, 7.5]);

        // The triggers keep both as rows come and go.
        sqlx::raw_sql(
            "INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, content_digest) VALUES (4, 3, 6, 1, 4, 1, 0, 1, 1, 'd'); \
             INSERT INTO baseline_lot VALUES (10, 3); \
             UPDATE sample SET n = 5 WHERE id = 2; \
             INSERT INTO lot VALUES (4, 1, 'L4', NULL, 't');",
        )
        .execute(&pool)
        .await
        .unwrap();
        let one: Option<String> = sqlx::query_scalar(pending).fetch_one(&pool).await.unwrap();
        assert_eq!(one.as_deref(), Some("4"));
        let t: String = sqlx::query_scalar(tally).fetch_one(&pool).await.unwrap();
        assert_eq!(t, "1 4 13 2 0");
        sqlx::raw_sql("DELETE FROM baseline_lot WHERE sample_id = 3")
            .execute(&pool)
            .await
            .unwrap();
        assert_eq!(count(&pool, "SELECT COUNT(*) FROM pending_sample").await, 2);
    }

    /// Samples stored before migration 0008 get their sd when the database is next opened,
    /// and the views read them.
    #[tokio::test]
    async fn the_views_migration_fills_in_older_samples_sd() {
        let dir = tempfile::tempdir().unwrap();
        let pool = database_before(dir.path(), "0008").await;
        sqlx::raw_sql(
            "INSERT INTO source VALUES (1, 'alder-cells'); \
             INSERT INTO characteristic VALUES (1, 'mass_g'); \
             INSERT INTO series VALUES (5, 1, 1); \
             INSERT INTO ingested_file VALUES (1, 'h', 'f.csv', 't', 'long', 4); \
             INSERT INTO lot VALUES (1, 1, 'L1', NULL, 't'), (2, 1, 'L2', NULL, 't'); \
             INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, content_digest) VALUES (1, 1, 5, 1, 3, 2, 8, 0, 4, 'a'), \
                 (2, 2, 5, 1, 1, 1, 0, 1, 1, 'b');",
        )
        .execute(&pool)
        .await
        .unwrap();
        pool.close().await;
        let store = Db::open(&dir.path().join("old.db"), "test").await.unwrap();
        let sds: Vec<Option<f64>> = sqlx::query_scalar("SELECT sd FROM lot_view ORDER BY lot")
            .fetch_all(&store.pool)
            .await
            .unwrap();
        assert_eq!(sds, [Some(2.0), None]);
        let mut units = std::collections::BTreeMap::new();
        units.insert("mass_g".to_string(), "g".to_string());
        store.set_units(&units).await.unwrap();
        let unit: Option<String> =
            sqlx::query_scalar("SELECT unit_of_measure FROM lot_view LIMIT 1")
                .fetch_one(&store.pool)
                .await
                .unwrap();
        assert_eq!(unit.as_deref(), Some("g"));
    }

    /// A database with one row per unit value (before migration 0009) keeps every value bit
    /// for bit, its serial and its time, in the view and in the store's readers.
    // More digits than a double holds, on purpose: the value a person typed.
    #[allow(clippy::excessive_precision)]
    #[tokio::test]
    async fn the_packed_values_migration_moves_every_value() {
        let dir = tempfile::tempdir().unwrap();
        let pool = database_before(dir.path(), "0009").await;
        sqlx::raw_sql(
            "INSERT INTO source VALUES (1, 'alder-cells'); \
             INSERT INTO characteristic VALUES (1, 'mass_g'); \
             INSERT INTO series VALUES (5, 1, 1); \
             INSERT INTO ingested_file VALUES (1, 'h', 'f.csv', 't', 'long', 6); \
             INSERT INTO lot VALUES (1, 1, 'L1', 'T1', 't'), (2, 1, 'L2', NULL, 't'); \
             INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, sampled_at, content_digest) VALUES \
                 (1, 1, 5, 1, 4, 2, 8, 0, 4, 'T1', 'a'), (2, 2, 5, 1, 2, 1, 0, 1, 1, NULL, 'b');",
        )
        .execute(&pool)
        .await
        .unwrap();
        let awkward = [0.1 + 0.2, 1e-300, 123456789.123456789, 5.0, 1e16, 7.25];
        let rows = [
            (1, 2, Some("u\"2"), "T1"),
            (1, 0, Some("u0"), "T1"),
            (1, 1, None, "T2"),
            (1, 3, None, ""),
            (2, 1, None, ""),
            (2, 0, None, ""),
        ];
        for (k, (sample, seq, unit, time)) in rows.iter().enumerate() {
            sqlx::query(
                "INSERT INTO measurement (sample_id, seq, unit, value, sampled_at) \
                 VALUES (?, ?, ?, ?, NULLIF(?, ''))",
            )
            .bind(sample)
            .bind(seq)
            .bind(unit)
            .bind(awkward[k])
            .bind(time)
            .execute(&pool)
            .await
            .unwrap();
        }
        pool.close().await;
        let store = Db::open(&dir.path().join("old.db"), "test").await.unwrap();
        type Row = (i64, i64, Option<String>, Option<String>, f64);
        let view: Vec<Row> = sqlx::query_as(
            "SELECT sample_id, seq, unit, sampled_at, value FROM measurement_view \
             ORDER BY sample_id, seq",
        )
        .fetch_all(&store.pool)
        .await
        .unwrap();
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        let in_order = [
            awkward[1], awkward[2], awkward[0], awkward[3], awkward[5], awkward[4],
        ];
        let values: Vec<f64> = view.iter().map(|r| r.4).collect();
        assert_eq!(bits(&values), bits(&in_order));
        let units: Vec<Option<&str>> = view.iter().map(|r| r.2.as_deref()).collect();
        assert_eq!(units, [Some("u0"), None, Some("u\"2"), None, None, None]);
        let times: Vec<Option<&str>> = view.iter().map(|r| r.3.as_deref()).collect();
        assert_eq!(
            times,
            [Some("T1"), Some("T2"), Some("T1"), Some("T1"), None, None]
        );
        let seqs: Vec<(i64, i64)> = view.iter().map(|r| (r.0, r.1)).collect();
        assert_eq!(seqs, [(1, 0), (1, 1), (1, 2), (1, 3), (2, 0), (2, 1)]);
        // Sample 2 had neither serials nor times of its own: NULL columns, not arrays of nulls.
        let packed: (Option<String>, Option<String>) = sqlx::query_as(
            "SELECT units_json, sampled_at_json FROM sample_values WHERE sample_id = 2",
        )
        .fetch_one(&store.pool)
        .await
        .unwrap();
        assert_eq!(packed, (None, None));
        let read = store.unit_values(&[1, 2]).await.unwrap();
        let values = |id: i64| read[&id].iter().map(|(_, v)| *v).collect::<Vec<f64>>();
        assert_eq!(bits(&values(1)), bits(&in_order[..4]));
        assert_eq!(bits(&values(2)), bits(&in_order[4..]));
        let status = store.status().await.unwrap();
        assert_eq!(status.measurements, 6);
        assert_eq!(
            Db::check_copy(&dir.path().join("old.db"))
                .await
                .unwrap()
                .measurements,
            6
        );
        store.close().await;
    }

    /// A database made before the digest (migration 0001 only) keeps its outbox rows when
    /// migration 0002 rebuilds the table.
    #[tokio::test]
    async fn the_digest_migration_keeps_queued_messages() {
        let dir = tempfile::tempdir().unwrap();
        let pool = database_before(dir.path(), "0002").await;
        sqlx::query(
            "INSERT INTO outbox (id, alert_event_id, channel, recipient, state, attempts, \
             created_at, next_attempt_at, last_error) VALUES \
             (7, 3, 'email', 'q@x.org', 'pending', 2, '2026-01-01T00:00:00Z', \
              '2026-01-01T00:05:00Z', '451 busy')",
        )
        .execute(&pool)
        .await
        .unwrap();
        sqlx::migrate!().run(&pool).await.unwrap();
        let row = sqlx::query(
            "SELECT id, alert_event_id, digest_id, recipient, state, attempts, last_error \
             FROM outbox",
        )
        .fetch_one(&pool)
        .await
        .unwrap();
        assert_eq!(row.get::<i64, _>(0), 7);
        assert_eq!(row.get::<i64, _>(1), 3);
        assert_eq!(row.get::<Option<i64>, _>(2), None);
        assert_eq!(row.get::<String, _>(3), "q@x.org");
        assert_eq!(row.get::<String, _>(4), "pending");
        assert_eq!(row.get::<i64, _>(5), 2);
        assert_eq!(row.get::<String, _>(6), "451 busy");
        // A row must announce exactly one thing.
        let neither = sqlx::query(
            "INSERT INTO outbox (channel, recipient, state, created_at, next_attempt_at) \
             VALUES ('log', 'log', 'pending', 'x', 'x')",
        )
        .execute(&pool)
        .await;
        assert!(neither.is_err());
    }

    /// A database of migrations 0001 and 0002 with queued alert and digest messages keeps
    /// them, and the digest's listed alerts, when migration 0004 rebuilds the outbox with
    /// foreign keys on.
    #[tokio::test]
    async fn the_silence_migration_keeps_queued_alert_and_digest_messages() {
        let dir = tempfile::tempdir().unwrap();
        let old = dir.path().join("m2");
        std::fs::create_dir(&old).unwrap();
        for f in ["0001_initial.sql", "0002_digest.sql"] {
            let from = Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("migrations")
                .join(f);
            std::fs::copy(from, old.join(f)).unwrap();
        }
        let db = dir.path().join("old.db");
        let connect = |fk: bool| {
            SqlitePoolOptions::new().max_connections(1).connect_with(
                SqliteConnectOptions::new()
                    .filename(&db)
                    .create_if_missing(true)
                    .foreign_keys(fk),
            )
        };
        // Rows are written without their upstream parents (not needed to move the outbox).
        let pool = connect(false).await.unwrap();
        let migrator = sqlx::migrate::Migrator::new(old.as_path()).await.unwrap();
        migrator.run(&pool).await.unwrap();
        sqlx::query(
            "INSERT INTO alert (id, series_id, kind, state, opened_at, opening_evaluation) \
             VALUES (4, 1, 'mean', 'open', 't', 1); \
             INSERT INTO alert_event (id, alert_id, kind, at) VALUES (3, 4, 'opened', 't'); \
             INSERT INTO digest (id, local_date, scheduled_at, created_at, open_alerts) \
             VALUES (2, '2026-01-01', 't', 't', 1); \
             INSERT INTO outbox (id, alert_event_id, digest_id, channel, recipient, state, \
             attempts, created_at, next_attempt_at, last_error) VALUES \
             (7, 3, NULL, 'email', 'q@x.org', 'pending', 2, 't', 'u', '451 busy'), \
             (8, NULL, 2, 'email', 'q@x.org', 'pending', 0, 't', 't', NULL); \
             INSERT INTO digest_item (outbox_id, alert_id) VALUES (8, 4);",
        )
        .execute(&pool)
        .await
        .unwrap();
        pool.close().await;
        let pool = connect(true).await.unwrap();
        sqlx::migrate!().run(&pool).await.unwrap();
        // (id, alert event, digest, silence event, attempts, last error) of each row.
        type Row = (
            i64,
            Option<i64>,
            Option<i64>,
            Option<i64>,
            i64,
            Option<String>,
        );
        let rows: Vec<Row> = sqlx::query_as(
            "SELECT id, alert_event_id, digest_id, silence_event_id, attempts, last_error \
             FROM outbox ORDER BY id",
        )
        .fetch_all(&pool)
        .await
        .unwrap();
        assert_eq!(
            rows,
            vec![
                (7, Some(3), None, None, 2, Some("451 busy".into())),
                (8, None, Some(2), None, 0, None)
            ]
        );
        let items: Vec<(i64, i64)> = sqlx::query_as("SELECT outbox_id, alert_id FROM digest_item")
            .fetch_all(&pool)
            .await
            .unwrap();
        assert_eq!(items, vec![(8, 4)]);
        // digest_item still refers to the (new) outbox, and a row announces exactly one thing.
        let orphan = sqlx::query("INSERT INTO digest_item (outbox_id, alert_id) VALUES (99, 4)")
            .execute(&pool)
            .await;
        assert!(orphan.is_err());
        let two = sqlx::query(
            "INSERT INTO outbox (alert_event_id, digest_id, channel, recipient, state, \
             created_at, next_attempt_at) VALUES (3, 2, 'log', 'log', 'pending', 'x', 'x')",
        )
        .execute(&pool)
        .await;
        assert!(two.is_err());
        let tables: i64 = sqlx::query_scalar(
            "SELECT COUNT(*) FROM sqlite_master WHERE name IN ('outbox_new', 'digest_item_kept')",
        )
        .fetch_one(&pool)
        .await
        .unwrap();
        assert_eq!(tables, 0);
    }

    /// A database of migrations 0001 to 0005 with queued alert, digest and silence messages
    /// keeps them, and the digest's listed alerts, when migration 0006 rebuilds the outbox
    /// with foreign keys on; both components start healthy.
    #[tokio::test]
    async fn the_health_migration_keeps_queued_messages_and_starts_healthy() {
        let dir = tempfile::tempdir().unwrap();
        let old = dir.path().join("m5");
        std::fs::create_dir(&old).unwrap();
        for f in [
            "0001_initial.sql",
            "0002_digest.sql",
            "0003_robust.sql",
            "0004_silence.sql",
            "0005_replaced_values.sql",
        ] {
            let from = Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("migrations")
                .join(f);
            std::fs::copy(from, old.join(f)).unwrap();
        }
        let db = dir.path().join("old.db");
        let connect = |fk: bool| {
            SqlitePoolOptions::new().max_connections(1).connect_with(
                SqliteConnectOptions::new()
                    .filename(&db)
                    .create_if_missing(true)
                    .foreign_keys(fk),
            )
        };
        let pool = connect(false).await.unwrap();
        let migrator = sqlx::migrate::Migrator::new(old.as_path()).await.unwrap();
        migrator.run(&pool).await.unwrap();
        sqlx::query(
            "INSERT INTO alert (id, series_id, kind, state, opened_at, opening_evaluation) \
             VALUES (4, 1, 'mean', 'open', 't', 1); \
             INSERT INTO alert_event (id, alert_id, kind, at) VALUES (3, 4, 'opened', 't'); \
             INSERT INTO digest (id, local_date, scheduled_at, created_at, open_alerts) \
             VALUES (2, '2026-01-01', 't', 't', 1); \
             INSERT INTO silence (id, source_id, opened_at, last_lot_id, last_lot_at, \
             threshold_days, basis) VALUES (1, 1, 't', 1, 't', 3.0, 'configured'); \
             INSERT INTO silence_event (id, silence_id, kind, at) VALUES (6, 1, 'opened', 't'); \
             INSERT INTO outbox (id, alert_event_id, digest_id, silence_event_id, channel, \
             recipient, state, attempts, created_at, next_attempt_at, last_error) VALUES \
             (7, 3, NULL, NULL, 'email', 'q@x.org', 'pending', 2, 't', 'u', '451 busy'), \
             (8, NULL, 2, NULL, 'email', 'q@x.org', 'pending', 0, 't', 't', NULL), \
             (9, NULL, NULL, 6, 'log', 'log', 'delivered', 1, 't', 't', NULL); \
             INSERT INTO digest_item (outbox_id, alert_id) VALUES (8, 4);",
        )
        .execute(&pool)
        .await
        .unwrap();
        pool.close().await;
        let pool = connect(true).await.unwrap();
        sqlx::migrate!().run(&pool).await.unwrap();
        type Row = (i64, Option<i64>, Option<i64>, Option<i64>, Option<i64>, i64);
        let rows: Vec<Row> = sqlx::query_as(
            "SELECT id, alert_event_id, digest_id, silence_event_id, health_event_id, attempts \
             FROM outbox ORDER BY id",
        )
        .fetch_all(&pool)
        .await
        .unwrap();
        assert_eq!(
            rows,
            vec![
                (7, Some(3), None, None, None, 2),
                (8, None, Some(2), None, None, 0),
                (9, None, None, Some(6), None, 1)
            ]
        );
        let items: Vec<(i64, i64)> = sqlx::query_as("SELECT outbox_id, alert_id FROM digest_item")
            .fetch_all(&pool)
            .await
            .unwrap();
        assert_eq!(items, vec![(8, 4)]);
        let health: Vec<(String, Option<String>, i64)> =
            sqlx::query_as("SELECT component, failing_since, failures FROM health ORDER BY 1")
                .fetch_all(&pool)
                .await
                .unwrap();
        assert_eq!(
            health,
            vec![("delivery".into(), None, 0), ("ingest".into(), None, 0)]
        );
        // A row announces exactly one thing, a health event included.
        sqlx::query(
            "INSERT INTO health_event (id, component, kind, at, failing_since, failures, \
             last_error) VALUES (1, 'ingest', 'stuck', 't', 't', 3, 'e')",
        )
        .execute(&pool)
        .await
        .unwrap();
        let two = sqlx::query(
            "INSERT INTO outbox (silence_event_id, health_event_id, channel, recipient, state, \
             created_at, next_attempt_at) VALUES (6, 1, 'log', 'log', 'pending', 'x', 'x')",
        )
        .execute(&pool)
        .await;
        assert!(two.is_err());
        let tables: i64 = sqlx::query_scalar(
            "SELECT COUNT(*) FROM sqlite_master WHERE name IN ('outbox_new', 'digest_item_kept')",
        )
        .fetch_one(&pool)
        .await
        .unwrap();
        assert_eq!(tables, 0);
    }

    /// A failing streak gets one "stuck" notice however often it is checked, and one
    /// "recovered" notice when it ends; a short streak ends without any.
    #[tokio::test]
    async fn a_streak_is_noticed_once_and_its_end_once() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(&dir.path().join("h.db")).await.unwrap();
        let log = [("log".to_string(), "log".to_string())];
        assert!(!store.health_stuck("ingest", "z", "t1", &log).await.unwrap());
        store
            .health_failed("ingest", "disk full", "2026-01-01T00:00:00.000Z")
            .await
            .unwrap();
        store
            .health_failed("ingest", "still full", "2026-01-01T00:01:00.000Z")
            .await
            .unwrap();
        // Not failing long enough yet.
        let before = "2025-12-31T23:59:00.000Z";
        assert!(
            !store
                .health_stuck("ingest", before, "t", &log)
                .await
                .unwrap()
        );
        let later = "2026-01-01T00:30:00.000Z";
        assert!(
            store
                .health_stuck("ingest", later, later, &log)
                .await
                .unwrap()
        );
        assert!(
            !store
                .health_stuck("ingest", later, later, &log)
                .await
                .unwrap()
        );
        let rows = store.health().await.unwrap();
        assert_eq!(rows[0].component, "ingest");
        assert_eq!(
            rows[0].failing_since.as_deref(),
            Some("2026-01-01T00:00:00.000Z")
        );
        assert_eq!((rows[0].failures, rows[0].notice_sent), (2, true));
        assert_eq!(rows[0].last_error.as_deref(), Some("still full"));
        let due = store.due_health_messages("9999", 10).await.unwrap();
        assert_eq!(due.len(), 1);
        assert_eq!((due[0].kind.as_str(), due[0].failures), ("stuck", 2));
        assert!(
            store
                .health_recovered("ingest", "2026-01-01T01:00:00.000Z", &log)
                .await
                .unwrap()
        );
        assert!(
            !store
                .health_recovered("ingest", "2026-01-01T01:01:00.000Z", &log)
                .await
                .unwrap()
        );
        let due = store.due_health_messages("9999", 10).await.unwrap();
        assert_eq!(due.len(), 2);
        assert_eq!(due[1].kind, "recovered");
        // A short streak: no notice either way, but the error stays for `status`.
        store
            .health_failed("delivery", "refused", "t4")
            .await
            .unwrap();
        assert!(
            !store
                .health_recovered("delivery", "t5", &log)
                .await
                .unwrap()
        );
        let rows = store.health().await.unwrap();
        assert_eq!(rows[1].failing_since, None);
        assert_eq!(rows[1].last_error.as_deref(), Some("refused"));
        assert_eq!(rows[1].recovered_at.as_deref(), Some("t5"));
        assert_eq!(
            store.due_health_messages("9999", 10).await.unwrap().len(),
            2
        );
        store.close().await;
    }

    /// Values kept after a batch are the stored ones; a kept entry is taken once; a sample
    /// replaced since (another file) is read from the database.
    #[tokio::test]
    async fn kept_values_match_the_stored_ones_and_a_replacement_is_read_back() {
        let dir = tempfile::tempdir().unwrap();
        let store = Db::open(&dir.path().join("kept.db"), "test").await.unwrap();
        let file = |name: &str, lot: &str, values: &str| {
            let mut csv = String::from("source,characteristic,lot,value\n");
            for v in values.split(' ') {
                csv.push_str(&format!("s,c,{lot},{v}\n"));
            }
            crate::ingest::build_file(name, name, csv.as_bytes()).unwrap()
        };
        let at = "2026-01-01T00:00:00Z";
        let a = file("a.csv", "L1", "0.1 2.25 1e-3");
        store.ingest_batch(&[a], at, None).await.unwrap();
        let pending = store.pending_work().await.unwrap().remove(0).pending;
        let ids: Vec<i64> = pending.iter().map(|s| s.sample_id).collect();
        let stored = store.unit_values(&ids).await.unwrap();
        assert_eq!(stored[&ids[0]], vec![(0, 0.1), (1, 2.25), (2, 1e-3)]);
        assert_eq!(store.pending_values(&pending).await.unwrap(), stored);
        assert_eq!(
            store.fresh.lock().unwrap().len(),
            0,
            "taken by the first read"
        );
        assert_eq!(store.pending_values(&pending).await.unwrap(), stored);

        // Kept, then replaced by another file before the engine reads it.
        let b = file("b.csv", "L2", "7.5 8.5");
        store.ingest_batch(&[b], at, None).await.unwrap();
        assert_eq!(store.fresh.lock().unwrap().len(), 2);
        let replace = Replacement {
            reason: "re-measured",
            by: "test",
        };
        let c = file("c.csv", "L2", "7.5 9.5");
        store.ingest_batch(&[c], at, Some(&replace)).await.unwrap();
        let pending = store.pending_work().await.unwrap().remove(0).pending;
        let l2 = pending.iter().find(|s| s.lot == "L2").unwrap().sample_id;
        let values = store.pending_values(&pending).await.unwrap();
        assert_eq!(values[&l2], vec![(0, 7.5), (1, 9.5)]);
        assert_eq!(store.fresh.lock().unwrap().len(), 0);
        store.close().await;
    }
}
