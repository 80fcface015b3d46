//! `lotdrift migrate-store --to URL` through the real binary: a SQLite history (the reference)
//! moved into an empty PostgreSQL database keeps every row of every table and shows the same
//! rows in the four views; the moved history takes new files and decisions; a database that
//! already holds anything is refused, and so is a second move into the same one.
//!
//! A private PostgreSQL server per test (tests/common/pg.rs). The history is `run --once` over
//! the plumbing scenario of tests/common with a shifted series (alerts), a lot with a gross
//! outlier, an acknowledged alert, a replaced lot and a baseline reset (the audit trail).

mod common;

use std::collections::BTreeMap;
use std::path::Path;

use common::pg::PgServer;
use common::*;
use lotdrift::config::Config;
use lotdrift::ingest::{build_file, content_hash};
use lotdrift::store::{FileOutcome, Location, Store};
use sqlx::Row;

/// Every table of the schema.
const TABLES: &[&str] = &[
    "source",
    "characteristic",
    "series",
    "ingested_file",
    "lot",
    "sample",
    "sample_values",
    "quarantined_file",
    "sample_replacement",
    "replaced_measurement",
    "baseline",
    "baseline_change",
    "baseline_lot",
    "evaluation",
    "series_state",
    "alert",
    "alert_ack",
    "alert_event",
    "digest",
    "outlier",
    "silence",
    "silence_event",
    "health_event",
    "health",
    "outbox",
    "digest_item",
    "pending_sample",
    "tally",
    "characteristic_unit",
];

/// The views, each in one order on both databases. `measurement_view`'s values are compared
/// apart (see `sample_values_are_equal`): SQLite's JSON parser is not correctly rounded, so its
/// view may show a value one unit in the last place from the stored text.
const VIEWS: &[&str] = &[
    "SELECT source, characteristic, lot, sampled_at, unit, unit_of_measure, seq, sample_id \
     FROM measurement_view ORDER BY sample_id, seq",
    "SELECT * FROM lot_view ORDER BY sample_id",
    "SELECT * FROM decision_view ORDER BY decision_id",
    "SELECT * FROM alert_view ORDER BY alert_id",
];

/// A SQLite history with alerts, outliers, an acknowledgement, a replacement and a baseline
/// change.
fn history() -> Site {
    let site = Site::new("[characteristic.capacity_mah]\nunit = \"mAh\"\n");
    let scenario = Scenario {
        sources: vec!["alder-cells".into(), "birchworks".into()],
        chars: vec!["capacity_mah".into(), "mass_g".into()],
        lots: 26,
        n: 8,
        shift: Some((1, 0, 22, 4.0)),
    };
    for (name, text, _) in scenario.files() {
        drop_file(&site.inbox(), &name, &text);
    }
    let mut gross = lot_values(8, 100.0, 1.0, 301);
    gross[2] += 40.0;
    let late = long_file(
        "alder-cells",
        "AL-LATE",
        &lot_date(30),
        &[("capacity_mah", gross)],
    );
    drop_file(&site.inbox(), "alder-cells_late.csv", &late);
    // Quarantined under a name COPY's text format must escape (a backslash, a tab).
    drop_file(&site.inbox(), "back\\slash\ttab.csv", "not,a\nlot file\n");
    site.once();
    let alert = site.alerts()[0]["id"].as_i64().unwrap().to_string();
    let acked = site.run(&[
        "alerts", "ack", &alert, "--note", "8D asked", "--by", "R. Q",
    ]);
    assert!(acked.status.success(), "{}", text(&acked.stderr));
    let corrected = site.path().join("corrected.csv");
    let values = vec![100.25; 8];
    let text_ = long_file("alder-cells", "AL-003", &lot_date(2), &[("mass_g", values)]);
    std::fs::write(&corrected, text_).unwrap();
    let replaced = site.run(&[
        "replace",
        corrected.to_str().unwrap(),
        "--reason",
        "gauge re-zeroed",
        "--by",
        "K. Lab",
    ]);
    assert!(replaced.status.success(), "{}", text(&replaced.stderr));
    let reset = site.run(&[
        "baseline",
        "reset",
        "alder-cells",
        "capacity_mah",
        "--reason",
        "new chemistry",
        "--by",
        "J. Eng",
    ]);
    assert!(reset.status.success(), "{}", text(&reset.stderr));
    site
}

fn sqlite_cell(r: &sqlx::sqlite::SqliteRow, i: usize) -> String {
    use sqlx::{TypeInfo, ValueRef};
    let raw = r.try_get_raw(i).unwrap();
    if raw.is_null() {
        return "NULL".into();
    }
    match raw.type_info().name() {
        "INTEGER" => r.get::<i64, _>(i).to_string(),
        "REAL" => format!("{:?}", r.get::<f64, _>(i)),
        _ => r.get::<String, _>(i),
    }
}

fn pg_cell(r: &sqlx::postgres::PgRow, i: usize) -> String {
    use sqlx::{TypeInfo, ValueRef};
    let raw = r.try_get_raw(i).unwrap();
    if raw.is_null() {
        return "NULL".into();
    }
    match raw.type_info().name() {
        "INT8" => r.get::<i64, _>(i).to_string(),
        "FLOAT8" => format!("{:?}", r.get::<f64, _>(i)),
        "FLOAT8[]" => format!("{:?}", r.get::<Vec<f64>, _>(i)),
        "TEXT[]" => format!("{:?}", r.get::<Vec<Option<String>>, _>(i)),
        _ => r.get::<String, _>(i),
    }
}

/// Every row of `sql` as text (doubles by their exact Debug form).
async fn sqlite_rows(db: &Path, sql: &str) -> Vec<String> {
    let pool = sqlx::SqlitePool::connect(&format!("sqlite:{}", db.display()))
        .await
        .unwrap();
    let rows = sqlx::query(sql).fetch_all(&pool).await.unwrap();
    pool.close().await;
    rows.iter()
        .map(|r| {
            (0..r.len())
                .map(|i| sqlite_cell(r, i))
                .collect::<Vec<_>>()
                .join("|")
        })
        .collect()
}

async fn pg_rows(url: &str, sql: &str) -> Vec<String> {
    let pool = sqlx::PgPool::connect(url).await.unwrap();
    let rows = sqlx::query(sql).fetch_all(&pool).await.unwrap();
    pool.close().await;
    rows.iter()
        .map(|r| {
            (0..r.len())
                .map(|i| pg_cell(r, i))
                .collect::<Vec<_>>()
                .join("|")
        })
        .collect()
}

fn count(rows: Vec<String>) -> i64 {
    rows[0].parse().unwrap()
}

/// (table, rows) of each line of migrate-store's report.
fn reported(stdout: &str) -> BTreeMap<String, i64> {
    stdout
        .lines()
        .filter(|l| l.contains(" rows  sha256 "))
        .map(|l| {
            let words: Vec<&str> = l.split_whitespace().collect();
            (words[0].to_string(), words[1].parse().unwrap())
        })
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_sqlite_history_moves_to_postgres_whole() {
    let site = history();
    let db = site.path().join("lotdrift.db");
    let server = PgServer::start();
    // A password in the URL (trust auth ignores it) is never printed.
    let url = server
        .create_database("moved")
        .replace("postgres@", "postgres:s3cret@");

    let out = site.run(&["migrate-store", "--to", &url]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let said = text(&out.stdout);
    println!("{said}");
    assert!(said.contains("set [database] url"), "{said}");
    assert!(!said.contains("s3cret"), "{said}");

    // Counts in the report are the SQLite history's (the reference) and PostgreSQL's.
    let rows = reported(&said);
    for table in TABLES {
        let sql = format!("SELECT COUNT(*) FROM {table}");
        let lite = count(sqlite_rows(&db, &sql).await);
        assert_eq!(
            rows.get(*table),
            Some(&lite),
            "{table} in the report:\n{said}"
        );
        assert_eq!(count(pg_rows(&url, &sql).await), lite, "{table}");
    }
    for table in [
        "alert",
        "alert_ack",
        "outlier",
        "sample_replacement",
        "baseline_change",
        "quarantined_file",
    ] {
        assert!(
            rows[table] > 0,
            "the history has no {table}: nothing compared"
        );
    }
    let values = "SELECT COUNT(*) FROM measurement_view";
    assert_eq!(
        rows["measurement_view"],
        count(sqlite_rows(&db, values).await)
    );

    // Every column of every table but sample_values (JSON there, arrays here) as text, and
    // the views, equal row by row.
    for table in TABLES.iter().filter(|t| **t != "sample_values") {
        let sql = format!("SELECT * FROM {table} ORDER BY 1, 2");
        assert_eq!(
            sqlite_rows(&db, &sql).await,
            pg_rows(&url, &sql).await,
            "{table}"
        );
    }
    let names = pg_rows(&url, "SELECT file_name FROM quarantined_file").await;
    assert_eq!(names, ["back\\slash\ttab.csv"]);
    sample_values_are_equal(&db, &url).await;
    for sql in VIEWS {
        let (a, b) = (sqlite_rows(&db, sql).await, pg_rows(&url, sql).await);
        assert!(!a.is_empty(), "{sql}: nothing to compare");
        assert_eq!(a, b, "{sql}");
    }

    // The moved history goes on: new ids after the copied ones, triggers on again.
    moved_history_takes_a_new_lot(site.path(), &url).await;

    // A second move into the same database is refused, naming it (redacted); nothing changes.
    let files = count(pg_rows(&url, "SELECT COUNT(*) FROM ingested_file").await);
    let again = site.run(&["migrate-store", "--to", &url]);
    assert_eq!(again.status.code(), Some(1), "{}", text(&again.stderr));
    let err = text(&again.stderr);
    assert!(err.contains("is not empty"), "{err}");
    assert!(err.contains("postgres:***@127.0.0.1"), "{err}");
    assert!(!err.contains("s3cret"), "{err}");
    let after = count(pg_rows(&url, "SELECT COUNT(*) FROM ingested_file").await);
    assert_eq!(after, files);
}

/// SQLite's `sample_values` (JSON text: the values parsed by Rust, correctly rounded, as
/// lotdrift reads them; serials and times by serde_json) and PostgreSQL's arrays, bit for bit.
async fn sample_values_are_equal(db: &Path, url: &str) {
    type Unpacked = (
        i64,
        Vec<u64>,
        Option<Vec<Option<String>>>,
        Option<Vec<Option<String>>>,
    );
    let json = |r: &sqlx::sqlite::SqliteRow, i| {
        r.get::<Option<String>, _>(i)
            .map(|t| serde_json::from_str::<Vec<Option<String>>>(&t).unwrap())
    };
    let lite = sqlx::SqlitePool::connect(&format!("sqlite:{}", db.display()))
        .await
        .unwrap();
    let sql = "SELECT sample_id, values_json, units_json, sampled_at_json FROM sample_values \
               ORDER BY sample_id";
    let a: Vec<Unpacked> = sqlx::query(sql)
        .fetch_all(&lite)
        .await
        .unwrap()
        .iter()
        .map(|r| {
            let text: String = r.get(1);
            let inner = text.trim_start_matches('[').trim_end_matches(']');
            let bits = inner
                .split(',')
                .map(|v| v.parse::<f64>().unwrap().to_bits());
            (r.get(0), bits.collect(), json(r, 2), json(r, 3))
        })
        .collect();
    let pg = sqlx::PgPool::connect(url).await.unwrap();
    let sql = "SELECT sample_id, unit_values, unit_serials, unit_times FROM sample_values \
               ORDER BY sample_id";
    let b: Vec<Unpacked> = sqlx::query(sql)
        .fetch_all(&pg)
        .await
        .unwrap()
        .iter()
        .map(|r| {
            let values: Vec<f64> = r.get(1);
            let bits = values.iter().map(|v| v.to_bits()).collect();
            (r.get(0), bits, r.get(2), r.get(3))
        })
        .collect();
    assert!(!a.is_empty());
    assert_eq!(a, b);
    assert!(a.iter().any(|s| s.2.is_some()), "no unit serials compared");
}

/// Stores one more lot on the moved history and decides it (the library, as the daemon does).
async fn moved_history_takes_a_new_lot(dir: &Path, url: &str) {
    let before = pg_rows(url, "SELECT files, lots FROM tally").await;
    let max_file = count(pg_rows(url, "SELECT MAX(id) FROM ingested_file").await);
    let store = Store::connect(
        Location::Postgres {
            url,
            password: None,
        },
        "north",
    )
    .await
    .unwrap();
    let text_ = long_file(
        "birchworks",
        "BI-NEW",
        &lot_date(40),
        &[("mass_g", lot_values(8, 200.0, 1.0, 99))],
    );
    let file = build_file("new.csv", &content_hash(text_.as_bytes()), text_.as_bytes()).unwrap();
    let out = store
        .ingest_batch(&[file], "2026-12-03T06:00:00.000Z", None)
        .await
        .unwrap();
    assert!(matches!(out[0], FileOutcome::Stored { .. }), "{out:?}");
    let pending = pg_rows(url, "SELECT COUNT(*) FROM pending_sample").await;
    assert_ne!(pending, ["0"], "the queue trigger did not fire");
    lotdrift::engine::evaluate(&store, &Config::defaults_in(dir))
        .await
        .unwrap();
    store.close().await;
    let new_file = count(pg_rows(url, "SELECT MAX(id) FROM ingested_file").await);
    assert_eq!(new_file, max_file + 1);
    let after = pg_rows(url, "SELECT files, lots FROM tally").await;
    let (f, l) = before[0].split_once('|').unwrap();
    let want = format!(
        "{}|{}",
        f.parse::<i64>().unwrap() + 1,
        l.parse::<i64>().unwrap() + 1
    );
    assert_eq!(after, [want], "tally triggers");
    let decided = "SELECT COUNT(*) FROM decision_view WHERE lot = 'BI-NEW'";
    assert!(count(pg_rows(url, decided).await) > 0);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_database_that_holds_anything_is_refused() {
    let site = Site::new("");
    for lot in 0..3 {
        let code = format!("AL-{:03}", lot + 1);
        let values = lot_values(8, 10.0, 0.1, lot);
        let text_ = long_file("alder-cells", &code, &lot_date(lot), &[("mass_g", values)]);
        drop_file(&site.inbox(), &format!("{code}.csv"), &text_);
    }
    site.once();
    let server = PgServer::start();
    let url = server.create_database("used");
    // The schema, then one source of another history.
    Store::connect(
        Location::Postgres {
            url: &url,
            password: None,
        },
        "south",
    )
    .await
    .unwrap()
    .close()
    .await;
    server.psql("used", "INSERT INTO source (name) VALUES ('elsewhere')");

    let out = site.run(&["migrate-store", "--to", &url]);
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    let err = text(&out.stderr);
    assert!(err.contains(&url) && err.contains("not empty"), "{err}");
    assert!(err.contains("source"), "{err}");
    // All or nothing: the seed rows are as the migration left them, nothing else came.
    assert_eq!(pg_rows(&url, "SELECT COUNT(*) FROM lot").await, ["0"]);
    assert_eq!(pg_rows(&url, "SELECT files FROM tally").await, ["0"]);
    assert_eq!(pg_rows(&url, "SELECT COUNT(*) FROM health").await, ["2"]);
    assert_eq!(
        pg_rows(&url, "SELECT name FROM source").await,
        ["elsewhere"]
    );

    // A config that already uses PostgreSQL is a usage error (nothing to copy from).
    let pg_site = Site::new(&format!("[database]\nurl = \"{url}\"\n"));
    let out = pg_site.run(&["migrate-store", "--to", &url]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert!(text(&out.stderr).contains("[database]"));
}
