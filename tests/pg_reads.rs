//! The read methods of the PostgreSQL store answer exactly as the SQLite store does (issue 11).
//!
//! One SQLite history and one PostgreSQL history get the same rows, written directly with SQL
//! (the same statements and bound values on both; unit values as JSON text on SQLite, arrays
//! on PostgreSQL). Then every read method is called on a `Store` of each, and the answers are
//! compared as Debug text: the SQLite store (`src/store/sqlite.rs`, `sqlite/charts.rs`,
//! `sqlite/views.rs`, `sqlite/history.rs`) is the reference of every check.
//!
//! The data has what can tell the backends apart: a mean of 0.1 + 0.2, NULL p-values, a lot
//! without a sampling time, two lots with the same time (order by code, byte order: `L-10`
//! before `l-5`), names whose byte order differs from a dictionary's, a retired baseline, a
//! lot whose spread decision is significant and mean decision not, a lot decided on its
//! spread only, outliers with and without serials (one serial with a quote), ties in the
//! quarantine times, a source without lots.

mod common;

use std::collections::BTreeMap;
use std::path::Path;

use common::pg::PgServer;
use lotdrift::store::{HistoryLot, Location, Store};
use sqlx::postgres::PgPool;
use sqlx::sqlite::{SqliteConnectOptions, SqlitePool};

/// A bound value of a test row.
#[derive(Debug, Clone)]
enum V {
    I(i64),
    F(f64),
    T(String),
    Null,
}

impl From<i64> for V {
    fn from(v: i64) -> V {
        V::I(v)
    }
}

impl From<i32> for V {
    fn from(v: i32) -> V {
        V::I(v.into())
    }
}

impl From<f64> for V {
    fn from(v: f64) -> V {
        V::F(v)
    }
}

impl From<&str> for V {
    fn from(v: &str) -> V {
        V::T(v.to_string())
    }
}

impl<T: Into<V>> From<Option<T>> for V {
    fn from(v: Option<T>) -> V {
        v.map_or(V::Null, Into::into)
    }
}

/// One row to insert: table, column list, values.
struct Ins {
    table: &'static str,
    columns: &'static str,
    values: Vec<V>,
}

macro_rules! ins {
    ($table:literal, $columns:literal, [$($v:expr),* $(,)?]) => {
        Ins { table: $table, columns: $columns, values: vec![$(V::from($v)),*] }
    };
}

/// A sample's unit values and serials (serials None: no unit has one).
struct Units {
    sample_id: i64,
    values: Vec<f64>,
    serials: Option<Vec<Option<&'static str>>>,
}

const NONE_T: Option<&str> = None;
const NONE_F: Option<f64> = None;
const NONE_I: Option<i64> = None;

fn base_rows() -> Vec<Ins> {
    let mut rows = vec![
        ins!("source", "id, name", [1, "Acme"]),
        ins!("source", "id, name", [2, "beta-works"]),
        ins!("source", "id, name", [3, "Zeta"]),
        ins!("characteristic", "id, name", [1, "mass_g"]),
        ins!("characteristic", "id, name", [2, "Length_mm"]),
        ins!("series", "id, source_id, characteristic_id", [1, 1, 1]),
        ins!("series", "id, source_id, characteristic_id", [2, 1, 2]),
        ins!("series", "id, source_id, characteristic_id", [3, 2, 1]),
    ];
    for (id, hash, name, at, site) in [
        (1, "h1", "a.csv", "2026-01-01T09:00:00.000Z", Some("north")),
        (2, "h2", "b.csv", "2026-01-06T09:00:00.000Z", None),
    ] {
        rows.push(ins!(
            "ingested_file",
            "id, content_hash, file_name, received_at, layout, row_count, site",
            [id, hash, name, at, "long", 12, site]
        ));
    }
    for (id, source, code, sampled, seen) in [
        (1, 1, "L-1", Some("2026-01-01"), "2026-01-01T09:00:00.000Z"),
        (2, 1, "L-2", Some("2026-01-02"), "2026-01-02T09:00:00.000Z"),
        (3, 1, "L-3", None, "2026-01-03T10:00:00.000Z"),
        (
            4,
            1,
            "l-5",
            Some("2026-01-04T08:00:00.000Z"),
            "2026-01-04T09:00:00.000Z",
        ),
        (
            5,
            1,
            "L-10",
            Some("2026-01-04T08:00:00.000Z"),
            "2026-01-04T09:00:00.000Z",
        ),
        (6, 1, "L-6", Some("2026-01-06"), "2026-01-06T09:00:00.000Z"),
        (7, 2, "B-1", Some("2026-01-02"), "2026-01-02T09:00:00.000Z"),
        (8, 2, "B-2", None, "2026-01-05T09:00:00.000Z"),
    ] {
        rows.push(ins!(
            "lot",
            "id, source_id, code, sampled_at, first_seen_at",
            [id, source, code, sampled, seen]
        ));
    }
    rows
}

fn sample_rows() -> Vec<Ins> {
    let awkward = 0.1 + 0.2;
    let mut rows = Vec::new();
    // (id, lot, series, n, mean, m2, min, max)
    for (id, lot, series, n, mean, m2, min, max) in [
        (1, 1, 1, 4, 10.0, 0.3, 9.6, 10.4),
        (2, 2, 1, 4, 10.1, 0.25, 9.7, 10.5),
        (3, 3, 1, 1, 10.2, 0.0, 10.2, 10.2),
        (4, 4, 1, 4, awkward, 1.0 / 3.0, -0.4, 31.0),
        (5, 5, 1, 3, 11.5, 2.0, 10.0, 12.9),
        (6, 6, 1, 2, 9.95, 0.005, 9.9, 10.0),
        (7, 1, 2, 2, 100.0, 2.0, 99.0, 101.0),
        (8, 2, 2, 2, 100.5, 0.5, 100.0, 101.0),
        (9, 5, 2, 2, 99.5, 0.5, 99.0, 100.0),
        (10, 7, 3, 3, 5.0, 0.02, 4.9, 5.1),
        (11, 8, 3, 3, 5.3, 0.08, 5.1, 5.5),
    ] {
        let sd = (n > 1).then(|| (m2 / (n - 1) as f64).sqrt());
        let file = if id == 6 || id == 11 { 2 } else { 1 };
        rows.push(ins!(
            "sample",
            "id, lot_id, series_id, file_id, n, mean, m2, min_value, max_value, sampled_at, \
             content_digest, sd",
            [
                id,
                lot,
                series,
                file,
                n,
                mean,
                m2,
                min,
                max,
                NONE_T,
                format!("d{id}").as_str(),
                sd
            ]
        ));
    }
    rows
}

fn baseline(id: i64, series: i64, retired: Option<&str>, robust: bool) -> Ins {
    let some = |v: f64| robust.then_some(v);
    ins!(
        "baseline",
        "id, series_id, frozen_at, retired_at, definition, lot_count, n, mean, m2, min_value, \
         max_value, last_order_key, mean_of_means, msb, msw, df_between, df_within, n0, \
         n_harmonic, var_between, var_within, between_p, normality_p, level_mean, level_spread, \
         cusum_k, cusum_h, design_note, outlier_scale, outlier_fence, heavy_tailed, spread_mean, \
         spread_sd, spread_lots, spread_n, spread_kurtosis, log_scale",
        [
            id,
            series,
            "2026-01-02T12:00:00.000Z",
            retired,
            "first 2 lots",
            2,
            8,
            10.05 + id as f64 / 100.0,
            0.55,
            9.6,
            10.5,
            "2026-01-02|L-2",
            10.05,
            0.02,
            0.1 + 0.2,
            1.0,
            6.0,
            4.0,
            4.0,
            0.0,
            0.091_666_666_666_666_67,
            0.7,
            if robust { NONE_F } else { Some(0.04) },
            0.01,
            0.001,
            some(0.5),
            some(4.0),
            "",
            some(1.4826),
            some(3.5),
            robust.then_some(1),
            some(0.3),
            some(0.05),
            robust.then_some(2),
            some(4.0),
            some(-0.25),
            robust.then_some(0)
        ]
    )
}

/// An evaluation: (id, sample, series, kind, test, p, p_adjusted, significant, cusum, cpk).
#[allow(clippy::too_many_arguments)]
fn evaluation(
    id: i64,
    sample: i64,
    series: i64,
    kind: &str,
    test: &str,
    p: Option<f64>,
    p_adjusted: Option<f64>,
    significant: i64,
    cusum: Option<(f64, f64, f64, i64)>,
    cpk: bool,
) -> Ins {
    let baseline_id = if series == 3 { 3 } else { 2 };
    let (upper, lower, h, signal) = match cusum {
        Some((u, l, h, s)) => (Some(u), Some(l), Some(h), s),
        None => (None, None, None, 0),
    };
    let cpk = |v: f64| cpk.then_some(v);
    ins!(
        "evaluation",
        "id, sample_id, series_id, baseline_id, kind, decided_at, test, model, alternative, \
         delta, statistic, df, df2, p_value, p_adjusted, method, family_size, level, \
         significant, baseline_n, baseline_mean, baseline_sd, lot_n, lot_mean, lot_sd, \
         estimate, ci_low, ci_high, std_error, cusum_upper, cusum_lower, cusum_h, \
         cusum_signal, cpk, cpk_low, cpk_high, note, site",
        [
            id,
            sample,
            series,
            baseline_id,
            kind,
            "2026-01-07T00:00:00.000Z",
            test,
            (kind == "mean").then_some("units"),
            "two-sided",
            0.0,
            p.map(|p| -p.ln()),
            (kind == "mean").then_some(5.5),
            (kind == "spread").then_some(7.0),
            p,
            p_adjusted,
            "holm",
            2,
            0.01,
            significant,
            8,
            10.05,
            Some(0.28),
            4,
            10.0 + id as f64 / 7.0,
            (id % 2 == 0).then_some(0.3),
            p.map(|_| 0.1 + 0.2),
            p.map(|_| -0.1),
            p.map(|_| 0.7),
            p.map(|_| 0.2),
            upper,
            lower,
            h,
            signal,
            cpk(1.1),
            cpk(0.9),
            cpk(1.3),
            (id == 3).then_some("normality doubtful"),
            "north"
        ]
    )
}

fn decision_rows() -> Vec<Ins> {
    let mut rows = vec![
        baseline(1, 1, Some("2026-01-03T00:00:00.000Z"), false),
        baseline(2, 1, None, true),
        baseline(3, 3, None, false),
    ];
    for (b, s) in [(1, 1), (2, 1), (2, 2), (3, 10)] {
        rows.push(ins!("baseline_lot", "baseline_id, sample_id", [b, s]));
    }
    let cusum = Some((5.5, 0.0, 4.0, 1));
    rows.extend([
        evaluation(1, 3, 1, "mean", "cusum", None, None, 1, cusum, false),
        evaluation(2, 3, 1, "spread", "f", Some(0.3), Some(0.6), 0, None, false),
        evaluation(
            3,
            4,
            1,
            "mean",
            "welch",
            Some(1e-9),
            Some(2e-9),
            1,
            cusum,
            true,
        ),
        evaluation(4, 4, 1, "spread", "f", Some(0.001), None, 1, None, false),
        evaluation(
            5,
            5,
            1,
            "mean",
            "welch",
            Some(0.1 + 0.2),
            Some(0.6),
            0,
            None,
            true,
        ),
        evaluation(
            6,
            6,
            1,
            "spread",
            "f",
            Some(0.002),
            Some(0.004),
            1,
            None,
            false,
        ),
        evaluation(7, 11, 3, "mean", "welch", None, None, 0, None, false),
        evaluation(
            8,
            5,
            1,
            "spread",
            "levene",
            Some(0.004),
            Some(0.008),
            1,
            None,
            false,
        ),
    ]);
    for (id, kind, state, opened, eval, resolved) in [
        (
            1,
            "mean",
            "resolved",
            "2026-01-03T10:00:00.000Z",
            1,
            Some("2026-01-04T09:00:00.000Z"),
        ),
        (2, "spread", "open", "2026-01-04T09:00:00.000Z", 4, None),
        (3, "mean", "open", "2026-01-04T09:00:01.000Z", 3, None),
    ] {
        rows.push(ins!(
            "alert",
            "id, series_id, kind, state, opened_at, opening_evaluation, resolved_at",
            [id, 1, kind, state, opened, eval, resolved]
        ));
    }
    for (id, alert, kind, at, eval) in [
        (1, 1, "opened", "2026-01-03T10:00:00.000Z", Some(1)),
        (2, 2, "opened", "2026-01-04T09:00:00.000Z", Some(4)),
        (3, 1, "resolved", "2026-01-04T09:00:00.000Z", Some(5)),
        (4, 3, "opened", "2026-01-04T09:00:01.000Z", Some(3)),
        (5, 2, "attached", "2026-01-04T09:00:02.000Z", Some(8)),
        (6, 3, "repeated", "2026-01-06T09:00:00.000Z", NONE_I),
    ] {
        rows.push(ins!(
            "alert_event",
            "id, alert_id, kind, at, evaluation_id",
            [id, alert, kind, at, eval]
        ));
    }
    for (id, alert, by, note) in [(1, 2, "ana", "looking"), (2, 2, "bo", "")] {
        rows.push(ins!(
            "alert_ack",
            "id, alert_id, acked_at, acked_by, note",
            [id, alert, "2026-01-05T08:00:00.000Z", by, note]
        ));
    }
    rows
}

fn outlier_rows() -> Vec<Ins> {
    let mut rows = Vec::new();
    // (id, sample, seq, value, distance, set_aside): 9.25 and 12.35 are ties at one decimal.
    for (id, sample, seq, value, distance, aside) in [
        (1, 4, 2, 0.1 + 0.2, 9.25, 1),
        (2, 4, 0, 31.0, 4.04, 0),
        (3, 5, 1, -1.5e-7, 12.35, 1),
        (4, 4, 3, 1e20, 0.05, 0),
        (5, 10, 0, 5.123_456_789_012_345, 3.999_999, 0),
    ] {
        rows.push(ins!(
            "outlier",
            "id, sample_id, seq, value, lot_median, distance, fence, rule, set_aside, found_at",
            [
                id,
                sample,
                seq,
                value,
                10.0,
                distance,
                3.5,
                "mad",
                aside,
                "2026-01-07T00:00:00.000Z"
            ]
        ));
    }
    rows
}

fn message_rows() -> Vec<Ins> {
    let mut rows = Vec::new();
    for (id, date) in [(1, "2026-01-05"), (2, "2026-01-06")] {
        rows.push(ins!(
            "digest",
            "id, local_date, scheduled_at, created_at, open_alerts",
            [
                id,
                date,
                "2026-01-06T07:00:00.000Z",
                "2026-01-06T07:00:01.000Z",
                2
            ]
        ));
    }
    rows.push(ins!(
        "health_event",
        "id, component, kind, at, failing_since, failures, last_error",
        [
            1,
            "delivery",
            "stuck",
            "2026-01-06T08:00:00.000Z",
            "2026-01-06T07:00:00.000Z",
            3,
            "boom"
        ]
    ));
    // (id, alert_event, digest, health_event, channel, state, attempts, delivered, error)
    for (id, event, digest, health, channel, state, delivered, error) in [
        (
            1,
            Some(1),
            None,
            None,
            "email",
            "delivered",
            Some("2026-01-03T10:00:05.000Z"),
            None,
        ),
        (
            2,
            Some(1),
            None,
            None,
            "log",
            "delivered",
            Some("2026-01-03T10:00:09.000Z"),
            None,
        ),
        (
            3,
            Some(4),
            None,
            None,
            "email",
            "failed",
            None,
            Some("550 no such user"),
        ),
        (4, None, Some(1), None, "email", "expired", None, None),
        (
            5,
            None,
            None,
            Some(1),
            "email",
            "pending",
            None,
            Some("timeout"),
        ),
        (6, Some(2), None, None, "log", "expired", None, Some("gone")),
    ] {
        rows.push(ins!(
            "outbox",
            "id, alert_event_id, digest_id, silence_event_id, health_event_id, channel, \
             recipient, state, attempts, created_at, next_attempt_at, delivered_at, last_error",
            [
                id,
                event,
                digest,
                NONE_I,
                health,
                channel,
                "qa@example.com",
                state,
                id,
                "2026-01-03T10:00:00.000Z",
                "2026-01-03T10:00:00.000Z",
                delivered,
                error
            ]
        ));
    }
    for (id, hash, name, at, reason) in [
        (1, "q1", "bad.csv", "2026-01-02T00:00:00.000Z", "no header"),
        (2, "q2", "worse.csv", "2026-01-01T00:00:00.000Z", "empty"),
        (3, "q3", "tie.csv", "2026-01-01T00:00:00.000Z", "empty too"),
    ] {
        rows.push(ins!(
            "quarantined_file",
            "id, content_hash, file_name, quarantined_at, reason",
            [id, hash, name, at, reason]
        ));
    }
    rows
}

fn all_rows() -> Vec<Ins> {
    let mut rows = base_rows();
    rows.extend(sample_rows());
    rows.extend(decision_rows());
    rows.extend(outlier_rows());
    rows.extend(message_rows());
    rows
}

fn units() -> Vec<Units> {
    vec![
        Units {
            sample_id: 4,
            values: vec![31.0, -0.4, 0.1 + 0.2, 1e20],
            serials: Some(vec![Some("U-0"), Some("U-1"), None, Some("U\"3")]),
        },
        Units {
            sample_id: 10,
            values: vec![5.123_456_789_012_345, 4.9, 5.1],
            serials: Some(vec![Some("B1-a"), None, None]),
        },
        Units {
            sample_id: 1,
            values: vec![9.6, 10.0, 10.0, 10.4],
            serials: None,
        },
    ]
}

/// `INSERT INTO table (columns) VALUES (…)`, a placeholder made by `mark` for each value
/// (NULL written as such, so PostgreSQL needs no type for it).
fn insert_sql(row: &Ins, mark: impl Fn(usize) -> String) -> String {
    let mut n = 0;
    let marks: Vec<String> = row
        .values
        .iter()
        .map(|v| match v {
            V::Null => "NULL".to_string(),
            _ => {
                n += 1;
                mark(n)
            }
        })
        .collect();
    format!(
        "INSERT INTO {} ({}) VALUES ({})",
        row.table,
        row.columns,
        marks.join(", ")
    )
}

async fn fill_sqlite(path: &Path) {
    let pool = SqlitePool::connect_with(SqliteConnectOptions::new().filename(path))
        .await
        .unwrap();
    for row in all_rows() {
        let sql = insert_sql(&row, |_| "?".into());
        let mut q = sqlx::query(&sql);
        for v in &row.values {
            q = match v {
                V::I(i) => q.bind(*i),
                V::F(f) => q.bind(*f),
                V::T(t) => q.bind(t.clone()),
                V::Null => q,
            };
        }
        q.execute(&pool)
            .await
            .unwrap_or_else(|e| panic!("SQLite: {sql}: {e}"));
    }
    for u in units() {
        sqlx::query(
            "INSERT INTO sample_values (sample_id, values_json, units_json) VALUES (?, ?, ?)",
        )
        .bind(u.sample_id)
        .bind(serde_json::to_string(&u.values).unwrap())
        .bind(u.serials.map(|s| serde_json::to_string(&s).unwrap()))
        .execute(&pool)
        .await
        .unwrap();
    }
    pool.close().await;
}

async fn fill_postgres(url: &str) {
    let pool = PgPool::connect(url).await.unwrap();
    let mut tables = Vec::new();
    for row in all_rows() {
        let sql = insert_sql(&row, |n| format!("${n}"));
        let mut q = sqlx::query(&sql);
        for v in &row.values {
            q = match v {
                V::I(i) => q.bind(*i),
                V::F(f) => q.bind(*f),
                V::T(t) => q.bind(t.clone()),
                V::Null => q,
            };
        }
        q.execute(&pool)
            .await
            .unwrap_or_else(|e| panic!("PostgreSQL: {sql}: {e}"));
        if row.columns.starts_with("id,") && !tables.contains(&row.table) {
            tables.push(row.table);
        }
    }
    for u in units() {
        sqlx::query(
            "INSERT INTO sample_values (sample_id, unit_values, unit_serials) VALUES ($1, $2, $3)",
        )
        .bind(u.sample_id)
        .bind(&u.values)
        .bind(
            u.serials
                .map(|s| s.iter().map(|x| x.map(str::to_string)).collect::<Vec<_>>()),
        )
        .execute(&pool)
        .await
        .unwrap();
    }
    // Rows were given their ids: the identities go on after them, as SQLite's rowids do.
    for table in tables {
        sqlx::query(&format!(
            "SELECT setval(pg_get_serial_sequence('{table}', 'id'), (SELECT MAX(id) FROM {table}))"
        ))
        .execute(&pool)
        .await
        .unwrap();
    }
    pool.close().await;
}

/// The two stores, filled alike. The server and the SQLite folder live as long as they do.
struct Pair {
    sqlite: Store,
    pg: Store,
    sqlite_path: std::path::PathBuf,
    pg_url: String,
    _server: PgServer,
    _dir: tempfile::TempDir,
}

async fn pair() -> Pair {
    let server = PgServer::start();
    let pg_url = server.create_database("reads");
    let dir = tempfile::tempdir().unwrap();
    let sqlite_path = dir.path().join("history.db");
    let sqlite = Store::connect(Location::Sqlite(&sqlite_path), "north")
        .await
        .unwrap();
    let pg = Store::connect(
        Location::Postgres {
            url: &pg_url,
            password: None,
        },
        "north",
    )
    .await
    .unwrap();
    fill_sqlite(&sqlite_path).await;
    fill_postgres(&pg_url).await;
    Pair {
        sqlite,
        pg,
        sqlite_path,
        pg_url,
        _server: server,
        _dir: dir,
    }
}

/// Asserts both answers have the same Debug text (the SQLite one is the reference).
fn same(what: &str, sqlite: impl std::fmt::Debug, pg: impl std::fmt::Debug) {
    let (a, b) = (format!("{sqlite:#?}"), format!("{pg:#?}"));
    assert!(
        a == b,
        "{what}: PostgreSQL differs from SQLite\n--- SQLite\n{a}\n--- PostgreSQL\n{b}"
    );
}

/// Calls the same read on both stores and compares the answers.
macro_rules! both {
    ($p:expr, $method:ident ( $($arg:expr),* )) => {{
        let a = $p.sqlite.$method($($arg),*).await.unwrap();
        let b = $p.pg.$method($($arg),*).await.unwrap();
        let what = format!("{}{:?}", stringify!($method), ($(&$arg,)*));
        same(&what, &a, &b);
        a
    }};
}

/// Every lot `history_each` hands over, as Debug text, or the error `each` stopped with.
async fn history_of(store: &Store, source: &str, ch: Option<&str>, stop_at: usize) -> Vec<String> {
    let mut seen = Vec::new();
    let stopped = store
        .history_each(source, ch, |lot: &HistoryLot<'_>| {
            if seen.len() == stop_at {
                return Err(format!("stopped at {}", lot.lot));
            }
            seen.push(format!("{lot:#?}"));
            Ok(())
        })
        .await
        .unwrap();
    if let Err(e) = stopped {
        seen.push(e);
    }
    seen
}

#[tokio::test(flavor = "multi_thread")]
async fn every_read_answers_as_on_sqlite() {
    let p = pair().await;

    let alerts = both!(p, alerts(false));
    assert_eq!(alerts.len(), 3, "the data has three alerts");
    both!(p, alerts(true));
    let status = both!(p, status());
    assert_eq!((status.lots, status.outliers), (8, 5), "tally: {status:?}");
    both!(p, series_named("Acme", "mass_g"));
    both!(p, series_named("Acme", "volume"));
    let undelivered = both!(p, undelivered());
    assert_eq!(undelivered.len(), 3);
    let lots = both!(p, lots_per_source());
    assert_eq!(
        lots[2],
        ("beta-works".to_string(), 2),
        "byte order: {lots:?}"
    );
    both!(p, quarantined());
    for name in ["Acme", "acme", "Zeta", "nobody"] {
        both!(p, source_exists(name));
    }
    for (source, ch, limit) in [
        ("Acme", "mass_g", 100),
        ("Acme", "mass_g", 3),
        ("Acme", "Length_mm", 10),
        ("beta-works", "mass_g", 1),
        ("Zeta", "mass_g", 5),
    ] {
        both!(p, recent_lot_means(source, ch, limit));
    }
    let means = p
        .sqlite
        .recent_lot_means("Acme", "mass_g", 100)
        .await
        .unwrap();
    let l10 = means.iter().find(|m| m.lot == "L-10").unwrap();
    assert!(!l10.significant, "the mean decision's, not the spread's");
}

#[tokio::test(flavor = "multi_thread")]
async fn series_and_charts_answer_as_on_sqlite() {
    let p = pair().await;
    both!(p, series_list(None::<&str>));
    both!(p, series_list(Some("Acme")));
    both!(p, series_list(Some("nobody")));
    for id in [1, 2, 3, 99] {
        both!(p, series_design(id));
    }
    let windows: [(Option<&str>, Option<&str>, i64); 6] = [
        (None, None, 100),
        (None, None, 2),
        (Some("2026-01-03"), None, 100),
        (None, Some("2026-01-04"), 100),
        (Some("2026-01-02"), Some("2026-01-04"), 2),
        (Some("2026-02-01"), None, 10),
    ];
    for id in [1, 2, 3] {
        for (from, to, limit) in windows {
            both!(p, chart_lots(id, from, to, limit));
        }
    }
    let lots = p.sqlite.chart_lots(1, None, None, 100).await.unwrap();
    let l5 = lots.iter().find(|l| l.lot == "l-5").unwrap();
    assert_eq!(
        l5.opened,
        [("mean".to_string(), 3), ("spread".to_string(), 2)],
        "openings by evaluation kind, then event"
    );
}

#[tokio::test(flavor = "multi_thread")]
async fn history_and_decisions_answer_as_on_sqlite() {
    let p = pair().await;
    for (source, ch) in [
        ("Acme", None),
        ("Acme", Some("mass_g")),
        ("Acme", Some("Length_mm")),
        ("beta-works", None),
        ("Zeta", None),
        ("nobody", None),
    ] {
        let a = history_of(&p.sqlite, source, ch, usize::MAX).await;
        let b = history_of(&p.pg, source, ch, usize::MAX).await;
        same(&format!("history_each({source}, {ch:?})"), &a, &b);
        let a = p.sqlite.history(source, ch).await.unwrap();
        let b = p.pg.history(source, ch).await.unwrap();
        same(&format!("history({source}, {ch:?})"), &a, &b);
        both!(p, lot_decisions(source, ch));
    }
    // The first error of `each` stops the read, on both.
    let a = history_of(&p.sqlite, "Acme", None, 2).await;
    let b = history_of(&p.pg, "Acme", None, 2).await;
    same("history_each stopped", &a, &b);
    assert_eq!(a.len(), 3);

    let rows = p.sqlite.history("Acme", Some("mass_g")).await.unwrap();
    let l5 = rows.iter().find(|r| r.lot == "l-5").unwrap();
    assert_eq!(
        l5.outliers, "U-0 = 31.0 (4.0 sd); #2 = 0.3 (9.3 sd, set aside); U\"3 = 1.0e+20 (0.1 sd)",
        "SQLite's own number texts"
    );
    assert_eq!(l5.events, "opened spread alert 2; opened mean alert 3");
    let l10 = rows.iter().find(|r| r.lot == "L-10").unwrap();
    assert_eq!(l10.outliers, "#1 = -1.5e-07 (12.3 sd, set aside)");
}

#[tokio::test(flavor = "multi_thread")]
async fn writes_of_the_read_side_answer_as_on_sqlite() {
    let p = pair().await;
    for (alert, note) in [(3, "seen"), (2, "again"), (99, "no such alert")] {
        both!(
            p,
            acknowledge(alert, "cy", "2026-01-08T00:00:00.000Z", note)
        );
    }
    both!(p, alerts(false));

    let sqlite_pool =
        SqlitePool::connect_with(SqliteConnectOptions::new().filename(&p.sqlite_path))
            .await
            .unwrap();
    let pg_pool = PgPool::connect(&p.pg_url).await.unwrap();
    let read = "SELECT characteristic, unit FROM characteristic_unit ORDER BY characteristic";
    for units in [
        BTreeMap::from([
            ("mass_g".to_string(), "g".to_string()),
            ("Length_mm".into(), "mm".into()),
        ]),
        BTreeMap::from([("mass_g".to_string(), "kg".to_string())]),
        BTreeMap::new(),
    ] {
        p.sqlite.set_units(&units).await.unwrap();
        p.pg.set_units(&units).await.unwrap();
        let a: Vec<(String, String)> = sqlx::query_as(read).fetch_all(&sqlite_pool).await.unwrap();
        let b: Vec<(String, String)> = sqlx::query_as(read).fetch_all(&pg_pool).await.unwrap();
        same("characteristic_unit after set_units", &a, &b);
        assert_eq!(a.len(), units.len());
    }
}
