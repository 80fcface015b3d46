//! The PostgreSQL schema (migrations/postgres/) against SQLite's (migrations/), on a private
//! PostgreSQL server per test (tests/common/pg.rs): the same tables and views with the same
//! columns in the same order, the same index and trigger names, the same seed rows, the same
//! rows in `measurement_view` for the same stored values, and triggers with the same effects.

mod common;

use std::collections::BTreeMap;
use std::time::Instant;

use common::pg::PgServer;
use sqlx::sqlite::{SqliteConnectOptions, SqlitePool, SqlitePoolOptions};
use sqlx::{Connection, PgConnection, PgPool};

/// Runs one statement with positional arguments (`$1`, `$2`: both backends read them) on a
/// pool of either backend, panicking with the statement when it fails.
macro_rules! exec {
    ($pool:expr, $sql:expr $(, $arg:expr)* $(,)?) => {
        sqlx::query($sql)
            $(.bind($arg))*
            .execute($pool)
            .await
            .unwrap_or_else(|e| panic!("{}: {e}", $sql))
    };
}

#[tokio::test]
async fn private_server_starts_answers_and_survives_an_immediate_stop() {
    let started = Instant::now();
    let server = PgServer::start();
    eprintln!("one PgServer start: {:?}", started.elapsed());
    let url = server.create_database("smoke");

    let mut conn = PgConnection::connect(&url)
        .await
        .expect("connect to the private server");
    let two: i64 = sqlx::query_scalar("SELECT 1::BIGINT + 1")
        .fetch_one(&mut conn)
        .await
        .expect("run a query");
    assert_eq!(two, 2);
    exec!(&mut conn, "CREATE TABLE kept (id BIGINT PRIMARY KEY)");
    exec!(&mut conn, "INSERT INTO kept (id) VALUES (7)");
    conn.close().await.ok();

    server.stop_immediately();
    server.start_again();
    let mut conn = PgConnection::connect(&url)
        .await
        .expect("connect after the restart on the same port");
    let kept: i64 = sqlx::query_scalar("SELECT id FROM kept")
        .fetch_one(&mut conn)
        .await
        .expect("read the committed row after crash recovery");
    assert_eq!(kept, 7);
}

/// Both schemas, migrated from empty: SQLite in a temp file, PostgreSQL in a private cluster.
struct Both {
    sqlite: SqlitePool,
    pg: PgPool,
    _sqlite_dir: tempfile::TempDir,
    _server: PgServer,
}

async fn migrate_both() -> Both {
    let dir = tempfile::tempdir().expect("temp folder for the SQLite file");
    let options = SqliteConnectOptions::new()
        .filename(dir.path().join("lotdrift.db"))
        .create_if_missing(true)
        .foreign_keys(true);
    let sqlite = SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(options)
        .await
        .expect("open the SQLite file");
    sqlx::migrate!()
        .run(&sqlite)
        .await
        .expect("SQLite migrations (migrations/)");

    let server = PgServer::start();
    let pg = PgPool::connect(&server.create_database("lotdrift"))
        .await
        .expect("connect to the private PostgreSQL server");
    sqlx::migrate!("migrations/postgres")
        .run(&pg)
        .await
        .expect("PostgreSQL migrations (migrations/postgres/)");
    Both {
        sqlite,
        pg,
        _sqlite_dir: dir,
        _server: server,
    }
}

/// A table or view: "table" or "view", and its column names in order.
type Relations = BTreeMap<String, (String, Vec<String>)>;

async fn sqlite_relations(pool: &SqlitePool) -> Relations {
    let names: Vec<(String, String)> = sqlx::query_as(
        "SELECT name, type FROM sqlite_master WHERE type IN ('table', 'view') \
         AND name NOT LIKE 'sqlite_%' AND name <> '_sqlx_migrations'",
    )
    .fetch_all(pool)
    .await
    .expect("list SQLite tables and views");
    let mut out = Relations::new();
    for (name, kind) in names {
        let columns: Vec<String> =
            sqlx::query_scalar("SELECT name FROM pragma_table_info($1) ORDER BY cid")
                .bind(&name)
                .fetch_all(pool)
                .await
                .unwrap_or_else(|e| panic!("SQLite columns of {name}: {e}"));
        out.insert(name, (kind, columns));
    }
    out
}

async fn pg_relations(pool: &PgPool) -> Relations {
    let names: Vec<(String, String)> = sqlx::query_as(
        "SELECT table_name::TEXT, \
                CASE table_type WHEN 'VIEW' THEN 'view' ELSE 'table' END \
         FROM information_schema.tables \
         WHERE table_schema = 'public' AND table_name <> '_sqlx_migrations'",
    )
    .fetch_all(pool)
    .await
    .expect("list PostgreSQL tables and views");
    let mut out = Relations::new();
    for (name, kind) in names {
        let columns: Vec<String> = sqlx::query_scalar(
            "SELECT column_name::TEXT FROM information_schema.columns \
             WHERE table_schema = 'public' AND table_name = $1 ORDER BY ordinal_position",
        )
        .bind(&name)
        .fetch_all(pool)
        .await
        .unwrap_or_else(|e| panic!("PostgreSQL columns of {name}: {e}"));
        out.insert(name, (kind, columns));
    }
    out
}

#[tokio::test]
async fn postgres_schema_has_sqlites_tables_views_and_columns() {
    let both = migrate_both().await;
    let sqlite = sqlite_relations(&both.sqlite).await;
    let pg = pg_relations(&both.pg).await;
    assert!(sqlite.contains_key("measurement_view") && sqlite.contains_key("sample_values"));
    assert_eq!(
        sqlite.keys().collect::<Vec<_>>(),
        pg.keys().collect::<Vec<_>>(),
        "table and view names (left SQLite, right PostgreSQL)"
    );
    for (name, shape) in &sqlite {
        if name == "sample_values" {
            continue; // packed differently on purpose: compared below
        }
        assert_eq!(shape, &pg[name], "{name} (left SQLite, right PostgreSQL)");
    }
    let sqlite_packed = ["sample_id", "values_json", "units_json", "sampled_at_json"];
    let pg_packed = ["sample_id", "unit_values", "unit_serials", "unit_times"];
    assert_eq!(sqlite["sample_values"].1, sqlite_packed);
    assert_eq!(pg["sample_values"].1, pg_packed);
}

async fn sqlite_names(pool: &SqlitePool, kind: &str) -> Vec<String> {
    // Indexes SQLite makes for UNIQUE and PRIMARY KEY constraints have no SQL text.
    sqlx::query_scalar(
        "SELECT name FROM sqlite_master WHERE type = $1 AND sql IS NOT NULL ORDER BY name",
    )
    .bind(kind)
    .fetch_all(pool)
    .await
    .unwrap_or_else(|e| panic!("SQLite {kind} names: {e}"))
}

/// Named indexes (not those PostgreSQL makes for constraints, which carry the constraint's
/// name) and the triggers.
async fn pg_names(pool: &PgPool, kind: &str) -> Vec<String> {
    let sql = match kind {
        "index" => {
            "SELECT indexname::TEXT FROM pg_indexes WHERE schemaname = 'public' \
             AND indexname NOT IN (SELECT conname FROM pg_constraint) ORDER BY 1"
        }
        "trigger" => "SELECT tgname::TEXT FROM pg_trigger WHERE NOT tgisinternal ORDER BY 1",
        _ => unreachable!("kind {kind}"),
    };
    sqlx::query_scalar(sql)
        .fetch_all(pool)
        .await
        .unwrap_or_else(|e| panic!("PostgreSQL {kind} names: {e}"))
}

#[tokio::test]
async fn postgres_schema_has_sqlites_indexes_triggers_and_seed_rows() {
    let both = migrate_both().await;
    for kind in ["index", "trigger"] {
        let sqlite = sqlite_names(&both.sqlite, kind).await;
        assert!(!sqlite.is_empty(), "no SQLite {kind} found");
        assert_eq!(
            sqlite,
            pg_names(&both.pg, kind).await,
            "{kind} names (left SQLite, right PostgreSQL)"
        );
    }

    let health = "SELECT component FROM health ORDER BY component";
    let sqlite: Vec<String> = sqlx::query_scalar(health)
        .fetch_all(&both.sqlite)
        .await
        .unwrap();
    let pg: Vec<String> = sqlx::query_scalar(health)
        .fetch_all(&both.pg)
        .await
        .unwrap();
    assert_eq!(sqlite, ["delivery", "ingest"]);
    assert_eq!(pg, sqlite);
    assert_eq!(sqlite_tally(&both.sqlite).await, [1, 0, 0, 0, 0, 0]);
    assert_eq!(pg_tally(&both.pg).await, [1, 0, 0, 0, 0, 0]);
}

const TALLY: &str = "SELECT id, files, lots, measurements, evaluations, outliers FROM tally";

async fn sqlite_tally(pool: &SqlitePool) -> [i64; 6] {
    let t: (i64, i64, i64, i64, i64, i64) = sqlx::query_as(TALLY)
        .fetch_one(pool)
        .await
        .expect("SQLite tally");
    [t.0, t.1, t.2, t.3, t.4, t.5]
}

async fn pg_tally(pool: &PgPool) -> [i64; 6] {
    let t: (i64, i64, i64, i64, i64, i64) = sqlx::query_as(TALLY)
        .fetch_one(pool)
        .await
        .expect("PostgreSQL tally");
    [t.0, t.1, t.2, t.3, t.4, t.5]
}

/// The unit values stored in the data tests: a sum that is not 0.3, a negative zero and a
/// tiny value, each of which a careless round trip through text would change.
fn unit_values() -> Vec<f64> {
    vec![0.1 + 0.2, -0.0, 1e-300]
}

/// The same source, characteristic, series, unit, file, lot and sample on either backend
/// (explicit ids, so both agree).
macro_rules! insert_sample {
    ($pool:expr) => {
        exec!(
            $pool,
            "INSERT INTO source (id, name) VALUES (1, 'alder-cells')"
        );
        exec!(
            $pool,
            "INSERT INTO characteristic (id, name) VALUES (1, 'capacity_mah')"
        );
        exec!(
            $pool,
            "INSERT INTO series (id, source_id, characteristic_id) VALUES (1, 1, 1)"
        );
        exec!(
            $pool,
            "INSERT INTO characteristic_unit (characteristic, unit) VALUES ('capacity_mah', 'mAh')"
        );
        exec!(
            $pool,
            "INSERT INTO ingested_file (id, content_hash, file_name, received_at, layout, \
             row_count, site) VALUES (1, 'h1', 'alder.csv', $1, 'long', 3, 'plant-a')",
            "2026-03-01T08:30:00.000Z"
        );
        exec!(
            $pool,
            "INSERT INTO lot (id, source_id, code, sampled_at, first_seen_at) \
             VALUES (1, 1, 'AL-001', $1, $2)",
            "2026-03-01T06:00:00.000Z",
            "2026-03-01T08:30:00.000Z"
        );
        let values = unit_values();
        let (mean, m2, sd) = summary(&values);
        exec!(
            $pool,
            "INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
             max_value, sampled_at, content_digest, sd) \
             VALUES (1, 1, 1, 1, $1, $2, $3, $4, $5, $6, 'd1', $7)",
            values.len() as i64,
            mean,
            m2,
            -0.0,
            0.1 + 0.2,
            "2026-03-01T07:00:00.000Z",
            sd
        );
    };
}

/// (mean, sum of squared deviations, sd) of a few values.
fn summary(values: &[f64]) -> (f64, f64, f64) {
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    let m2: f64 = values.iter().map(|v| (v - mean) * (v - mean)).sum();
    (mean, m2, (m2 / (n - 1.0)).sqrt())
}

/// The second unit has a serial, the third its own sampling time.
async fn store_sqlite(pool: &SqlitePool) {
    insert_sample!(pool);
    exec!(
        pool,
        "INSERT INTO sample_values (sample_id, values_json, units_json, sampled_at_json) \
         VALUES (1, $1, $2, $3)",
        "[0.30000000000000004,-0.0,1e-300]",
        r#"[null,"AL-001-U002",null]"#,
        r#"[null,null,"2026-03-01T07:05:00.000Z"]"#
    );
}

async fn store_pg(pool: &PgPool) {
    insert_sample!(pool);
    exec!(
        pool,
        "INSERT INTO sample_values (sample_id, unit_values, unit_serials, unit_times) \
         VALUES (1, $1, $2, $3)",
        unit_values(),
        vec![None, Some("AL-001-U002"), None::<&str>],
        vec![None, None, Some("2026-03-01T07:05:00.000Z")]
    );
}

/// A row of measurement_view, the value as its bits (so -0.0 and 0.0 differ).
type ViewRow = (
    String,
    String,
    String,
    Option<String>,
    Option<String>,
    u64,
    Option<String>,
    i64,
    i64,
);

type RawRow = (
    String,
    String,
    String,
    Option<String>,
    Option<String>,
    f64,
    Option<String>,
    i64,
    i64,
);

const MEASUREMENTS: &str = "SELECT source, characteristic, lot, sampled_at, unit, value, \
     unit_of_measure, seq, sample_id FROM measurement_view ORDER BY sample_id, seq";

fn with_bits(rows: Vec<RawRow>) -> Vec<ViewRow> {
    rows.into_iter()
        .map(|r| (r.0, r.1, r.2, r.3, r.4, r.5.to_bits(), r.6, r.7, r.8))
        .collect()
}

fn expected_measurements() -> Vec<ViewRow> {
    let row = |sampled_at: &str, unit: Option<&str>, value: f64, seq: i64| {
        (
            "alder-cells".to_string(),
            "capacity_mah".to_string(),
            "AL-001".to_string(),
            Some(sampled_at.to_string()),
            unit.map(str::to_string),
            value.to_bits(),
            Some("mAh".to_string()),
            seq,
            1,
        )
    };
    let sample_time = "2026-03-01T07:00:00.000Z";
    vec![
        row(sample_time, None, 0.1 + 0.2, 0),
        row(sample_time, Some("AL-001-U002"), -0.0, 1),
        row("2026-03-01T07:05:00.000Z", None, 1e-300, 2),
    ]
}

#[tokio::test]
async fn stored_values_read_back_alike_through_measurement_view_and_triggers() {
    let both = migrate_both().await;
    store_sqlite(&both.sqlite).await;
    store_pg(&both.pg).await;

    let sqlite: Vec<RawRow> = sqlx::query_as(MEASUREMENTS)
        .fetch_all(&both.sqlite)
        .await
        .expect("SQLite measurement_view");
    let pg: Vec<RawRow> = sqlx::query_as(MEASUREMENTS)
        .fetch_all(&both.pg)
        .await
        .expect("PostgreSQL measurement_view");
    assert_eq!(with_bits(sqlite), expected_measurements(), "SQLite");
    assert_eq!(with_bits(pg), expected_measurements(), "PostgreSQL");

    let pending = "SELECT sample_id, series_id FROM pending_sample";
    let sqlite: Vec<(i64, i64)> = sqlx::query_as(pending)
        .fetch_all(&both.sqlite)
        .await
        .unwrap();
    let pg: Vec<(i64, i64)> = sqlx::query_as(pending).fetch_all(&both.pg).await.unwrap();
    assert_eq!(sqlite, [(1, 1)], "SQLite queues the new sample");
    assert_eq!(pg, sqlite, "PostgreSQL queues the new sample");
    assert_eq!(sqlite_tally(&both.sqlite).await, [1, 1, 1, 3, 0, 0]);
    assert_eq!(pg_tally(&both.pg).await, [1, 1, 1, 3, 0, 0]);

    // A replacement that changes n moves the measurement count by the difference.
    exec!(&both.sqlite, "UPDATE sample SET n = 5 WHERE id = 1");
    exec!(&both.pg, "UPDATE sample SET n = 5 WHERE id = 1");
    assert_eq!(sqlite_tally(&both.sqlite).await, [1, 1, 1, 5, 0, 0]);
    assert_eq!(pg_tally(&both.pg).await, [1, 1, 1, 5, 0, 0]);
}

#[tokio::test]
async fn outbox_rows_need_exactly_one_reference_on_both() {
    let both = migrate_both().await;
    let orphan = "INSERT INTO outbox (channel, recipient, state, created_at, next_attempt_at) \
                  VALUES ('email', 'qe@example.com', 'pending', 'x', 'x')";
    let sqlite = sqlx::query(orphan).execute(&both.sqlite).await;
    let pg = sqlx::query(orphan).execute(&both.pg).await;
    assert!(
        sqlite.is_err(),
        "SQLite took an outbox row without reference"
    );
    assert!(
        pg.is_err(),
        "PostgreSQL took an outbox row without reference"
    );

    exec!(
        &both.sqlite,
        "INSERT INTO digest (id, local_date, scheduled_at, created_at, open_alerts) \
         VALUES (1, '2026-03-01', 'x', 'x', 0)"
    );
    exec!(
        &both.pg,
        "INSERT INTO digest (id, local_date, scheduled_at, created_at, open_alerts) \
         VALUES (1, '2026-03-01', 'x', 'x', 0)"
    );
    let one = "INSERT INTO outbox (digest_id, channel, recipient, state, created_at, \
               next_attempt_at) VALUES (1, 'email', 'qe@example.com', 'pending', 'x', 'x')";
    exec!(&both.sqlite, one);
    exec!(&both.pg, one);
}
