//! The PostgreSQL backend against the SQLite one (the reference: its statistics are checked
//! against published values in the stats tests): the same files stored and decided on both
//! give the same unit values, decisions and alerts, bit for bit; two daemons ("sites") on one
//! PostgreSQL history store a file once and decide each lot once.
//!
//! A private PostgreSQL server per test (tests/common/pg.rs); the data are the plumbing
//! scenario of tests/common, with a shifted series, one gross outlier and unit serials.

mod common;

use std::path::Path;

use common::pg::PgServer;
use common::{Scenario, long_file, lot_date, lot_values};
use lotdrift::config::Config;
use lotdrift::ingest::{build_file, content_hash};
use lotdrift::store::{FileOutcome, Location, NewFile, Store};
use sqlx::Row;

/// Three sources, two characteristics, 40 lots of 5 units; cedar-energy's capacity shifts by
/// 3 sd from lot 26; one lot of alder-cells carries a gross outlier.
fn files() -> Vec<NewFile> {
    let scenario = Scenario {
        sources: ["alder-cells", "birchworks", "cedar-energy"]
            .map(String::from)
            .to_vec(),
        chars: ["capacity_mah", "mass_g"].map(String::from).to_vec(),
        lots: 40,
        n: 5,
        shift: Some((2, 0, 25, 3.0)),
    };
    let mut texts: Vec<(String, String, usize)> = scenario.files();
    let mut gross = lot_values(5, 100.0, 1.0, 301);
    gross[2] += 40.0;
    texts.push((
        "alder-cells_late.csv".into(),
        long_file(
            "alder-cells",
            "AL-LATE",
            &lot_date(33),
            &[("capacity_mah", gross)],
        ),
        33,
    ));
    // Arrival order: by sampling order, sources interleaved (as a lab receives them).
    texts.sort_by_key(|(name, _, order)| (*order, name.clone()));
    texts
        .iter()
        .map(|(name, text, _)| {
            build_file(name, &content_hash(text.as_bytes()), text.as_bytes()).unwrap()
        })
        .collect()
}

async fn sqlite_store(dir: &Path) -> Store {
    Store::connect(Location::Sqlite(&dir.join("lotdrift.db")), "north")
        .await
        .unwrap()
}

async fn pg_store(url: &str, site: &str) -> Store {
    let location = Location::Postgres {
        url,
        password: None,
    };
    Store::connect(location, site).await.unwrap()
}

/// Stores `files` in batches of 25, deciding after each batch, as the daemon does.
async fn feed(store: &Store, config: &Config, files: &[NewFile]) {
    for batch in files.chunks(25) {
        let outcomes = store
            .ingest_batch(batch, "2026-12-03T06:00:00.000Z", None)
            .await
            .unwrap();
        assert!(
            outcomes
                .iter()
                .all(|o| matches!(o, FileOutcome::Stored { .. })),
            "{outcomes:?}"
        );
        lotdrift::engine::evaluate(store, config).await.unwrap();
    }
}

const DECISIONS: &str = "SELECT source, characteristic, lot, kind, test, statistic, df, p_value, \
     p_adjusted, significant, cusum_upper, cusum_lower, estimate, ci_low, ci_high, note, \
     alert_id FROM decision_view ORDER BY source, characteristic, sampled_at, lot, kind";

const ALERTS: &str = "SELECT alert_id, source, characteristic, kind, state, lot, \
     significant_lots FROM alert_view ORDER BY alert_id";

const VALUES: &str = "SELECT source, characteristic, lot, seq, unit, value, sampled_at \
     FROM measurement_view ORDER BY source, characteristic, lot, seq";

/// Every row of `sql` as text (doubles by their exact Debug form).
fn rows_as_text<R: Row>(rows: &[R], cell: impl Fn(&R, usize) -> String) -> Vec<String> {
    rows.iter()
        .map(|r| {
            (0..r.len())
                .map(|i| cell(r, i))
                .collect::<Vec<_>>()
                .join("|")
        })
        .collect()
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
        "INT4" => r.get::<i32, _>(i).to_string(),
        "FLOAT8" => format!("{:?}", r.get::<f64, _>(i)),
        _ => r.get::<String, _>(i),
    }
}

async fn sqlite_rows(db: &Path, sql: &str) -> Vec<String> {
    let pool = sqlx::SqlitePool::connect(&format!("sqlite:{}", db.display()))
        .await
        .unwrap();
    let rows = sqlx::query(sql).fetch_all(&pool).await.unwrap();
    rows_as_text(&rows, sqlite_cell)
}

async fn pg_rows(url: &str, sql: &str) -> Vec<String> {
    let pool = sqlx::PgPool::connect(url).await.unwrap();
    let rows = sqlx::query(sql).fetch_all(&pool).await.unwrap();
    rows_as_text(&rows, pg_cell)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn postgres_stores_and_decides_as_sqlite_does() {
    let server = PgServer::start();
    let url = server.create_database("same");
    let dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(dir.path());
    let files = files();
    let lite = sqlite_store(dir.path()).await;
    feed(&lite, &config, &files).await;
    let pg = pg_store(&url, "north").await;
    feed(&pg, &config, &files).await;

    let db = dir.path().join("lotdrift.db");
    for sql in [DECISIONS, ALERTS, VALUES] {
        let (a, b) = (sqlite_rows(&db, sql).await, pg_rows(&url, sql).await);
        assert!(!a.is_empty(), "{sql}: nothing to compare");
        assert_eq!(a.len(), b.len(), "{sql}");
        for (x, y) in a.iter().zip(&b) {
            assert_eq!(x, y, "{sql}");
        }
    }
    // The shift was found (the comparison above is not of two empty alert lists).
    let alerts = pg_rows(&url, ALERTS).await;
    assert!(
        alerts
            .iter()
            .any(|a| a.contains("cedar-energy|capacity_mah|mean"))
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn two_sites_store_each_file_once_and_decide_each_lot_once() {
    let server = PgServer::start();
    let url = server.create_database("shared");
    let dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(dir.path());
    let files = files();
    let (north, south) = (pg_store(&url, "north").await, pg_store(&url, "south").await);
    // Both plants receive every file, in batches, at the same time; both decide after each.
    let mut stored = 0;
    for batch in files.chunks(25) {
        let at = "2026-12-03T06:00:00.000Z";
        let (a, b) = tokio::join!(
            north.ingest_batch(batch, at, None),
            south.ingest_batch(batch, at, None)
        );
        for (x, y) in a.unwrap().iter().zip(b.unwrap().iter()) {
            let kinds = (
                matches!(x, FileOutcome::Stored { .. }),
                matches!(y, FileOutcome::Stored { .. }),
            );
            assert!(
                kinds == (true, false) || kinds == (false, true),
                "{x:?} / {y:?}"
            );
            let other = if kinds.0 { y } else { x };
            assert!(matches!(other, FileOutcome::Duplicate { .. }), "{other:?}");
            stored += 1;
        }
        let (a, b) = tokio::join!(
            lotdrift::engine::evaluate(&north, &config),
            lotdrift::engine::evaluate(&south, &config)
        );
        a.unwrap();
        b.unwrap();
    }
    assert_eq!(stored, files.len());
    // The decisions are a single daemon's (SQLite fed the same files in the same order).
    let lite = sqlite_store(dir.path()).await;
    feed(&lite, &config, &files).await;
    let db = dir.path().join("lotdrift.db");
    for sql in [DECISIONS, ALERTS] {
        assert_eq!(
            sqlite_rows(&db, sql).await,
            pg_rows(&url, sql).await,
            "{sql}"
        );
    }
    // Both sites' names are on the files they stored, and every file is stored once.
    let sites = pg_rows(
        &url,
        "SELECT site, COUNT(*) FROM ingested_file GROUP BY site ORDER BY site",
    )
    .await;
    let total: i64 = sites
        .iter()
        .map(|s| s.rsplit('|').next().unwrap().parse::<i64>().unwrap())
        .sum();
    assert_eq!(total as usize, files.len(), "{sites:?}");
    assert!(
        sites
            .iter()
            .all(|s| s.starts_with("north|") || s.starts_with("south|"))
    );
}
