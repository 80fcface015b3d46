//! The outbox on PostgreSQL (src/store/postgres/outbox.rs) with several daemons on one
//! history, on a private server per test (tests/common/pg.rs), and against the SQLite backend
//! (src/store/sqlite.rs, the reference) for the same stored rows.
//!
//! The rules checked are the brief's for issue 11: every `due_*` read claims its rows for its
//! site until now + 10 minutes (`FOR UPDATE SKIP LOCKED`), so two daemons never get the same
//! row; recording an outcome clears the claim; a claim that ran out is taken over; one digest
//! per local date; one open silence per source, resolved once; one notice per failing streak.
//! Upstream rows (alerts and their events) are written with SQL, the same statements on both
//! backends.

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::future::Future;
use std::sync::Arc;

use chrono::TimeDelta;
use common::pg::PgServer;
use lotdrift::store::{
    DeliveryOutcome, Location, LotTime, NewDigestMessage, NewSilence, SilenceEnd, Store,
};
use lotdrift::time::{format_utc, parse_utc};
use sqlx::sqlite::{SqliteConnectOptions, SqlitePool};
use sqlx::{PgPool, Row};

/// The fixture's clock: every time is `at(minutes)` after this.
const T0: &str = "2026-03-01T08:00:00.000Z";

/// Recipients of each alert event in the fixture (one outbox row each).
const RECIPIENTS: i64 = 10;

/// When the fixture's daemons drain: after every queued row's first due time.
fn now() -> String {
    at(1000)
}

fn at(minutes: i64) -> String {
    let t0 = parse_utc(T0).unwrap();
    format_utc(t0 + TimeDelta::minutes(minutes))
}

fn ms_after(t: &str, ms: i64) -> String {
    format_utc(parse_utc(t).unwrap() + TimeDelta::milliseconds(ms))
}

/// One PostgreSQL history with two daemons ("site-a", "site-b") and a plain pool, and one
/// SQLite history with its pool, both holding the same fixture rows.
struct Histories {
    a: Arc<Store>,
    b: Arc<Store>,
    pg: PgPool,
    sqlite: Store,
    sqlite_pool: SqlitePool,
    _dir: tempfile::TempDir,
    _server: PgServer,
}

async fn histories(fixture: &str) -> Histories {
    let server = PgServer::start();
    let url = server.create_database("lotdrift");
    let pg_store = |site: &'static str| {
        let url = url.clone();
        async move {
            let location = Location::Postgres {
                url: &url,
                password: None,
            };
            Store::connect(location, site)
                .await
                .unwrap_or_else(|e| panic!("connect {site}: {e}"))
        }
    };
    let a = Arc::new(pg_store("site-a").await);
    let b = Arc::new(pg_store("site-b").await);
    let pg = PgPool::connect(&url).await.expect("a plain pool");
    sqlx::raw_sql(fixture)
        .execute(&pg)
        .await
        .expect("the fixture on PostgreSQL");

    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("lotdrift.db");
    let sqlite = Store::connect(Location::Sqlite(&path), "site-a")
        .await
        .expect("the SQLite history");
    let options = SqliteConnectOptions::new()
        .filename(&path)
        .foreign_keys(true)
        .busy_timeout(std::time::Duration::from_secs(30));
    let sqlite_pool = SqlitePool::connect_with(options).await.unwrap();
    sqlx::raw_sql(fixture)
        .execute(&sqlite_pool)
        .await
        .expect("the fixture on SQLite");
    Histories {
        a,
        b,
        pg,
        sqlite,
        sqlite_pool,
        _dir: dir,
        _server: server,
    }
}

/// Two sources ("press-B", "press-a": byte order differs from case-blind order) of one
/// characteristic, six lots each (two of the first source share a lot time, one has no
/// sampling time), two open alerts with six events (an opening, a repeat, a resolution and a
/// reopening of alert 1; an opening and an attachment without its own evaluation of alert 2),
/// and `RECIPIENTS` email rows per event: pending and due at staggered times (two of them at
/// the same time), one delivered, one due only far in the future.
fn fixture() -> String {
    let mut sql = String::from(
        "INSERT INTO source (id, name) VALUES (1, 'press-B'), (2, 'press-a');\n\
         INSERT INTO characteristic (id, name) VALUES (1, 'bore');\n\
         INSERT INTO series (id, source_id, characteristic_id) VALUES (1, 1, 1), (2, 2, 1);\n\
         INSERT INTO ingested_file (id, content_hash, file_name, received_at, layout, row_count) \
         VALUES (1, 'h1', 'lots.csv', '2026-02-01T00:00:00.000Z', 'long', 60);\n",
    );
    for source in 1..=2i64 {
        for k in 1..=6i64 {
            let id = (source - 1) * 6 + k;
            let day = if source == 1 && k == 6 { 5 } else { k };
            let sampled = if source == 2 && k == 3 {
                "NULL".to_string()
            } else {
                format!("'2026-02-0{day}T08:00:00.000Z'")
            };
            sql += &format!(
                "INSERT INTO lot (id, source_id, code, sampled_at, first_seen_at) VALUES \
                 ({id}, {source}, 'L{k}', {sampled}, '2026-02-0{k}T09:00:00.000Z');\n\
                 INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, content_digest) VALUES ({id}, {id}, {source}, 1, 5, {mean}, 1.0, \
                 9.0, 11.0, 'd{id}');\n",
                mean = 10.0 + k as f64 * 0.1,
            );
        }
        sql += &format!(
            "INSERT INTO baseline (id, series_id, frozen_at, definition, lot_count, n, mean, \
             m2, min_value, max_value, last_order_key, mean_of_means, msb, msw, df_between, \
             df_within, n0, n_harmonic, var_between, var_within, between_p, level_mean, \
             level_spread, design_note) VALUES ({source}, {source}, '{T0}', 'first 1', 1, 5, \
             10.1, 1.0, 9.0, 11.0, 'k', 10.1, 0.1, 0.2, 0.0, 4.0, 5.0, 5.0, 0.0, 0.2, 1.0, \
             10.1, 0.4, '');\n"
        );
    }
    for id in 1..=12i64 {
        let series = if id <= 6 { 1 } else { 2 };
        sql += &format!(
            "INSERT INTO evaluation (id, sample_id, series_id, baseline_id, kind, decided_at, \
             test, alternative, statistic, df, p_value, p_adjusted, method, family_size, level, \
             significant, baseline_n, baseline_mean, baseline_sd, lot_n, lot_mean, lot_sd, \
             estimate, ci_low, ci_high) VALUES ({id}, {id}, {series}, {series}, 'mean', '{T0}', \
             'welch', 'two-sided', 2.5, 8.25, 0.0125, 0.025, 'holm', 2, 0.05, 1, 20, 10.0, \
             0.5, 5, {mean}, 0.4, 0.3, 0.1, 0.5);\n",
            mean = 10.0 + id as f64 * 0.01,
        );
    }
    sql += &format!(
        "INSERT INTO alert (id, series_id, kind, state, opened_at, opening_evaluation) VALUES \
         (1, 1, 'mean', 'open', '{t1}', 2), (2, 2, 'mean', 'open', '{t5}', 8);\n\
         INSERT INTO alert_ack (id, alert_id, acked_at, acked_by, note) VALUES \
         (1, 2, '{t6}', 'qa', 'looked at it');\n\
         INSERT INTO alert_event (id, alert_id, kind, at, evaluation_id) VALUES \
         (1, 1, 'opened', '{t1}', 2), (2, 1, 'repeated', '{t2}', 3), \
         (3, 1, 'resolved', '{t3}', 4), (4, 1, 'opened', '{t4}', 5), \
         (5, 2, 'opened', '{t5}', 8), (6, 2, 'attached', '{t6}', NULL);\n",
        t1 = at(1),
        t2 = at(2),
        t3 = at(3),
        t4 = at(4),
        t5 = at(5),
        t6 = at(6),
    );
    for event in 1..=6i64 {
        for r in 0..RECIPIENTS {
            let (state, next) = match r {
                7 => ("delivered", at(event * 10 + r)),
                8 => ("pending", at(100_000)),
                9 => ("pending", at(event * 10)),
                _ => ("pending", at(event * 10 + r)),
            };
            sql += &format!(
                "INSERT INTO outbox (alert_event_id, channel, recipient, state, attempts, \
                 created_at, next_attempt_at) VALUES ({event}, 'email', 'q{r}@example.org', \
                 '{state}', 0, '{created}', '{next}');\n",
                created = at(event),
            );
        }
    }
    sql
}

/// The ids of the alert rows due (pending, next attempt not after `now`) in the fixture.
async fn due_alert_rows(pg: &PgPool, now: &str) -> BTreeSet<i64> {
    sqlx::query_scalar(
        "SELECT id FROM outbox WHERE alert_event_id IS NOT NULL AND state = 'pending' \
         AND next_attempt_at <= $1",
    )
    .bind(now)
    .fetch_all(pg)
    .await
    .unwrap()
    .into_iter()
    .collect()
}

/// Runs `f` on both daemons at once (released together by a barrier, each on its own task of
/// the multi-threaded runtime) and returns (site-a's answer, site-b's answer).
async fn race<T, F, Fut>(a: &Arc<Store>, b: &Arc<Store>, f: F) -> (T, T)
where
    F: Fn(Arc<Store>) -> Fut,
    Fut: Future<Output = T> + Send + 'static,
    T: Send + 'static,
{
    let barrier = Arc::new(tokio::sync::Barrier::new(2));
    let spawn = |store: &Arc<Store>| {
        let job = f(store.clone());
        let barrier = barrier.clone();
        tokio::spawn(async move {
            barrier.wait().await;
            job.await
        })
    };
    let (ta, tb) = (spawn(a), spawn(b));
    (ta.await.unwrap(), tb.await.unwrap())
}

/// Calls `due_outbox(now, limit)` until it returns nothing; the ids got, in order.
async fn drain_claims(store: Arc<Store>, now: String, limit: i64) -> Vec<i64> {
    let mut got = Vec::new();
    loop {
        let due = store.due_outbox(&now, limit).await.unwrap();
        if due.is_empty() {
            return got;
        }
        got.extend(due.iter().map(|i| i.id));
    }
}

/// Who holds a claim on each claimed outbox row.
async fn claims(pg: &PgPool) -> BTreeMap<i64, String> {
    sqlx::query("SELECT id, claimed_by FROM outbox WHERE claimed_by IS NOT NULL")
        .fetch_all(pg)
        .await
        .unwrap()
        .iter()
        .map(|r| (r.get(0), r.get(1)))
        .collect()
}

/// Brief (claims): two daemons calling `due_outbox` at once never get the same row, and
/// between them they get every due row; the database records each row's claimer.
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn two_daemons_never_get_the_same_row() {
    let h = histories(&fixture()).await;
    let due = due_alert_rows(&h.pg, &now()).await;
    assert_eq!(due.len(), 6 * 8, "fixture: 8 due rows per event");
    for round in 0..5 {
        sqlx::query("UPDATE outbox SET claimed_by = NULL, claimed_until = NULL")
            .execute(&h.pg)
            .await
            .unwrap();
        let limit = [1, 3, 5, 7, 100][round];
        let (got_a, got_b) = race(&h.a, &h.b, |s| drain_claims(s, now(), limit)).await;
        let set_a: BTreeSet<i64> = got_a.iter().copied().collect();
        let set_b: BTreeSet<i64> = got_b.iter().copied().collect();
        assert_eq!(
            set_a.len(),
            got_a.len(),
            "round {round}: site-a got a row twice"
        );
        assert_eq!(
            set_b.len(),
            got_b.len(),
            "round {round}: site-b got a row twice"
        );
        assert!(
            set_a.is_disjoint(&set_b),
            "round {round}: both got {:?}",
            set_a.intersection(&set_b).collect::<Vec<_>>()
        );
        let union: BTreeSet<i64> = set_a.union(&set_b).copied().collect();
        assert_eq!(union, due, "round {round}: every due row is claimed once");
        let expected: BTreeMap<i64, String> = got_a
            .iter()
            .map(|id| (*id, "site-a".to_string()))
            .chain(got_b.iter().map(|id| (*id, "site-b".to_string())))
            .collect();
        assert_eq!(claims(&h.pg).await, expected, "round {round}: claimed_by");
        eprintln!(
            "round {round} (limit {limit}): site-a {} rows, site-b {} rows",
            got_a.len(),
            got_b.len()
        );
    }
}

/// Reference: SQLite's `due_outbox` and `outbox_attempted_many`. Page by page (each page's
/// outcomes recorded before the next read) both backends return the same messages with the
/// same numbers, and leave the outbox in the same state; a recorded outcome leaves no claim,
/// and a retry due at once is due again at once.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn due_outbox_pages_and_outcomes_match_sqlite() {
    let h = histories(&fixture()).await;
    let now = now();
    let mut kinds = BTreeSet::new();
    for page in 0..8 {
        let pg = h.a.due_outbox(&now, 7).await.unwrap();
        let lite = h.sqlite.due_outbox(&now, 7).await.unwrap();
        assert_eq!(
            format!("{pg:#?}"),
            format!("{lite:#?}"),
            "page {page}: PostgreSQL (left) and SQLite (right)"
        );
        kinds.extend(pg.iter().map(|i| i.event_kind.clone()));
        let outcomes: Vec<(i64, DeliveryOutcome)> = pg
            .iter()
            .enumerate()
            .map(|(n, item)| (item.id, outcome(n, &now)))
            .collect();
        h.a.outbox_attempted_many(&outcomes, &now).await.unwrap();
        h.sqlite
            .outbox_attempted_many(&outcomes, &now)
            .await
            .unwrap();
        assert_eq!(claims(&h.pg).await, BTreeMap::new(), "page {page}");
    }
    let every: BTreeSet<String> = ["opened", "repeated", "resolved", "reopened", "attached"]
        .map(String::from)
        .into();
    assert_eq!(kinds, every, "every kind of event was read");
    let state = "SELECT id, state, attempts, next_attempt_at, delivered_at, last_error \
                 FROM outbox ORDER BY id";
    type State = (i64, String, i64, String, Option<String>, Option<String>);
    let pg: Vec<State> = sqlx::query_as(state).fetch_all(&h.pg).await.unwrap();
    let lite: Vec<State> = sqlx::query_as(state)
        .fetch_all(&h.sqlite_pool)
        .await
        .unwrap();
    assert_eq!(pg, lite, "outbox after the attempts");
    let states: BTreeSet<&str> = pg.iter().map(|r| r.1.as_str()).collect();
    assert_eq!(
        states,
        ["delivered", "expired", "failed", "pending"].into(),
        "every outcome was exercised"
    );
}

/// Outcome `n` of a page: delivered, retried at once (due again), retried later, failed,
/// expired.
fn outcome(n: usize, now: &str) -> DeliveryOutcome {
    let error = format!("reply {n}");
    match n % 5 {
        0 => DeliveryOutcome::Delivered,
        1 => DeliveryOutcome::Retry {
            next_at: now.to_string(),
            error,
        },
        2 => DeliveryOutcome::Retry {
            next_at: at(5000),
            error,
        },
        3 => DeliveryOutcome::Failed { error },
        _ => DeliveryOutcome::Expired { error },
    }
}

/// Brief (claims): a claim lasts 10 minutes from the claimer's `now` (its end is not yet
/// "run out"); then another daemon takes the rows, in the same order. A recorded outcome
/// ends the claim at once: a retry is due to anyone at its time, a delivered or failed row is
/// never due again.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_expired_claim_is_taken_over_and_an_outcome_ends_a_claim() {
    let h = histories(&fixture()).await;
    let t = now();
    let first: Vec<i64> =
        h.a.due_outbox(&t, 100)
            .await
            .unwrap()
            .iter()
            .map(|i| i.id)
            .collect();
    assert_eq!(first.len(), 48);
    let lease_end = ms_after(&t, 10 * 60 * 1000);
    let until: BTreeSet<String> =
        sqlx::query_scalar("SELECT claimed_until FROM outbox WHERE claimed_by = 'site-a'")
            .fetch_all(&h.pg)
            .await
            .unwrap()
            .into_iter()
            .collect();
    assert_eq!(
        until,
        [lease_end.clone()].into(),
        "claimed until now + 10 min"
    );
    for later in [ms_after(&t, 5 * 60 * 1000), lease_end.clone()] {
        assert!(
            h.b.due_outbox(&later, 100).await.unwrap().is_empty(),
            "site-b at {later}: site-a's claim still holds"
        );
    }
    let after = ms_after(&lease_end, 1);
    let taken: Vec<i64> =
        h.b.due_outbox(&after, 100)
            .await
            .unwrap()
            .iter()
            .map(|i| i.id)
            .collect();
    assert_eq!(
        taken, first,
        "site-b takes the run-out claims, in due order"
    );
    assert!(claims(&h.pg).await.values().all(|by| by == "site-b"));

    let retry_at = ms_after(&after, 2 * 60 * 1000);
    let outcomes = [
        (taken[0], DeliveryOutcome::Delivered),
        (
            taken[1],
            DeliveryOutcome::Retry {
                next_at: retry_at.clone(),
                error: "451 busy".into(),
            },
        ),
        (
            taken[2],
            DeliveryOutcome::Failed {
                error: "550 no such user".into(),
            },
        ),
    ];
    h.b.outbox_attempted_many(&outcomes, &after).await.unwrap();
    let before_retry = ms_after(&retry_at, -1);
    assert!(h.a.due_outbox(&before_retry, 100).await.unwrap().is_empty());
    // site-b's claim would hold until `after` + 10 min; the outcome ended it.
    let retried = h.a.due_outbox(&retry_at, 100).await.unwrap();
    assert_eq!(retried.iter().map(|i| i.id).collect::<Vec<_>>(), [taken[1]]);
    assert_eq!(retried[0].attempts, 1);
    let next_day = at(3 * 24 * 60);
    let rest: BTreeSet<i64> =
        h.a.due_outbox(&next_day, 100)
            .await
            .unwrap()
            .iter()
            .map(|i| i.id)
            .collect();
    // site-a's claim of the retried row has run out by then too.
    let expected: BTreeSet<i64> = taken[1..2].iter().chain(&taken[3..]).copied().collect();
    assert_eq!(
        rest, expected,
        "the delivered and the failed row are never due again"
    );
}

/// Brief (digest once per day) and reference SQLite's `create_digest`, `latest_digest_date`
/// and `due_digests`: two daemons making the same date's digest at once make it once; the
/// queued messages (with the alerts they list) read as on SQLite; two daemons draining
/// digests at once never get the same message.
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn a_digest_is_made_once_per_date() {
    let h = histories(&fixture()).await;
    let messages = vec![
        NewDigestMessage {
            channel: "email".into(),
            recipient: "q0@example.org".into(),
            alert_ids: vec![2, 1],
        },
        NewDigestMessage {
            channel: "log".into(),
            recipient: "log".into(),
            alert_ids: vec![2],
        },
        NewDigestMessage {
            channel: "email".into(),
            recipient: "q1@example.org".into(),
            alert_ids: vec![],
        },
    ];
    let t = now();
    let make = |date: &'static str| {
        let messages = messages.clone();
        let t = t.clone();
        move |s: Arc<Store>| {
            let messages = messages.clone();
            let t = t.clone();
            async move {
                s.create_digest(date, &t, &t, 2, &messages)
                    .await
                    .expect("create_digest")
            }
        }
    };
    let made = race(&h.a, &h.b, make("2026-03-02")).await;
    assert!(made.0 ^ made.1, "exactly one daemon makes it: {made:?}");
    assert!(
        h.sqlite
            .create_digest("2026-03-02", &t, &t, 2, &messages)
            .await
            .unwrap()
    );
    assert!(
        !h.sqlite
            .create_digest("2026-03-02", &t, &t, 2, &messages)
            .await
            .unwrap()
    );
    assert!(
        !h.b.create_digest("2026-03-02", &t, &t, 2, &messages)
            .await
            .unwrap()
    );
    let count: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM digest")
        .fetch_one(&h.pg)
        .await
        .unwrap();
    assert_eq!(count, 1);
    assert_eq!(
        h.a.latest_digest_date().await.unwrap(),
        h.sqlite.latest_digest_date().await.unwrap()
    );

    let mut pg = h.a.due_digests(&t, 10).await.unwrap();
    let mut lite = h.sqlite.due_digests(&t, 10).await.unwrap();
    assert_eq!(pg.len(), 3);
    assert_eq!(pg[0].alerts.len(), 2);
    // The digest's id is the stored row's: on PostgreSQL the losing daemon's INSERT may
    // have drawn a number from the sequence before it found the date taken (a gap).
    let stored: i64 = sqlx::query_scalar("SELECT id FROM digest WHERE local_date = '2026-03-02'")
        .fetch_one(&h.pg)
        .await
        .unwrap();
    assert!(pg.iter().all(|d| d.digest_id == stored), "{pg:#?}");
    for d in pg.iter_mut().chain(lite.iter_mut()) {
        d.digest_id = 0;
    }
    assert_eq!(format!("{pg:#?}"), format!("{lite:#?}"));
    assert!(h.b.due_digests(&t, 10).await.unwrap().is_empty(), "claimed");

    let made = race(&h.a, &h.b, make("2026-03-03")).await;
    assert!(made.0 ^ made.1, "exactly one daemon makes it: {made:?}");
    assert_eq!(
        h.b.latest_digest_date().await.unwrap().as_deref(),
        Some("2026-03-03")
    );
    let drain = |s: Arc<Store>| {
        let t = t.clone();
        async move {
            let mut got = Vec::new();
            loop {
                let due = s.due_digests(&t, 1).await.unwrap();
                if due.is_empty() {
                    return got;
                }
                got.extend(due.iter().map(|d| (d.id, d.local_date.clone())));
            }
        }
    };
    let (got_a, got_b) = race(&h.a, &h.b, drain).await;
    let all: BTreeSet<(i64, String)> = got_a.iter().chain(&got_b).cloned().collect();
    assert_eq!(all.len(), got_a.len() + got_b.len(), "no message twice");
    assert_eq!(all.len(), 3);
    assert!(all.iter().all(|(_, date)| date == "2026-03-03"));
}

/// Reference SQLite's `silence_inputs`, `write_silences`, `due_silence_messages` and
/// `silent_sources` for the same steps; then brief (silences): two daemons resolving the same
/// silences at once resolve each once, and opening them again at once opens one per source.
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn silences_open_and_resolve_once() {
    let h = histories(&fixture()).await;
    let (sources, open) = h.a.silence_inputs(4).await.unwrap();
    let lite = h.sqlite.silence_inputs(4).await.unwrap();
    assert_eq!((sources.clone(), open.clone()), lite);
    assert!(open.is_empty());
    assert_eq!(sources.len(), 2);
    assert_eq!(
        sources[0].last.code, "L6",
        "a tie in lot time goes to the higher code"
    );
    let recipients = vec![
        ("log".to_string(), "log".to_string()),
        ("email".to_string(), "q0@example.org".to_string()),
    ];
    let news: Vec<NewSilence> = sources
        .iter()
        .map(|s| NewSilence {
            source_id: s.source_id,
            last_lot: s.last.clone(),
            threshold_days: 3.5,
            basis: "learned",
            intervals: Some(4),
            median_days: Some(1.25),
            recipients: recipients.clone(),
        })
        .collect();
    let t = now();
    assert_eq!(h.a.write_silences(&[], &news, &t).await.unwrap(), (0, 2));
    assert_eq!(
        h.sqlite.write_silences(&[], &news, &t).await.unwrap(),
        (0, 2)
    );
    assert_eq!(
        h.b.write_silences(&[], &news, &t).await.unwrap(),
        (0, 0),
        "open already"
    );
    let pg = h.a.due_silence_messages(&t, 10).await.unwrap();
    assert_eq!(pg, h.sqlite.due_silence_messages(&t, 10).await.unwrap());
    assert_eq!(pg.len(), 4);
    assert!(h.b.due_silence_messages(&t, 10).await.unwrap().is_empty());
    assert_eq!(
        format!("{:?}", h.a.silent_sources().await.unwrap()),
        format!("{:?}", h.sqlite.silent_sources().await.unwrap())
    );

    let (_, open) = h.b.silence_inputs(4).await.unwrap();
    let ends: Vec<SilenceEnd> = open
        .iter()
        .map(|o| SilenceEnd {
            silence_id: o.id,
            lot: LotTime {
                id: if o.source_id == 1 { 1 } else { 7 },
                code: "L1".into(),
                at: at(2000),
            },
            recipients: recipients.clone(),
        })
        .collect();
    let later = at(2001);
    let resolve = |s: Arc<Store>| {
        let (ends, later) = (ends.clone(), later.clone());
        async move { s.write_silences(&ends, &[], &later).await.unwrap() }
    };
    let (ra, rb) = race(&h.a, &h.b, resolve).await;
    assert_eq!(ra.0 + rb.0, 2, "each silence resolved once: {ra:?} {rb:?}");
    assert_eq!(
        h.sqlite.write_silences(&ends, &[], &later).await.unwrap(),
        (2, 0)
    );
    assert!(h.a.silent_sources().await.unwrap().is_empty());
    let events: i64 =
        sqlx::query_scalar("SELECT COUNT(*) FROM silence_event WHERE kind = 'resolved'")
            .fetch_one(&h.pg)
            .await
            .unwrap();
    assert_eq!(events, 2);

    let reopen = |s: Arc<Store>| {
        let (news, later) = (news.clone(), at(9000));
        async move { s.write_silences(&[], &news, &later).await.unwrap() }
    };
    let (oa, ob) = race(&h.a, &h.b, reopen).await;
    assert_eq!(oa.1 + ob.1, 2, "one open silence per source: {oa:?} {ob:?}");
    let open: Vec<i64> = sqlx::query_scalar(
        "SELECT COUNT(*) FROM silence WHERE resolved_at IS NULL GROUP BY source_id ORDER BY 1",
    )
    .fetch_all(&h.pg)
    .await
    .unwrap();
    assert_eq!(open, [1, 1]);
}

/// Reference: SQLite's `health_*` answers for the same steps (as in the SQLite unit test
/// `a_streak_is_noticed_once_and_its_end_once`, with real times); then brief (health shared):
/// two daemons checking one streak at once queue one "stuck" notice, and one "recovered".
#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn a_shared_streak_is_noticed_once_and_its_end_once() {
    let h = histories(&fixture()).await;
    let log = vec![("log".to_string(), "log".to_string())];
    let stores = [&*h.a, &h.sqlite];
    for s in stores {
        assert!(
            !s.health_stuck("ingest", &at(0), &at(0), &log)
                .await
                .unwrap()
        );
        s.health_failed("ingest", "disk full", &at(10))
            .await
            .unwrap();
    }
    // The other daemon's failure extends the same streak.
    h.b.health_failed("ingest", "still full", &at(11))
        .await
        .unwrap();
    h.sqlite
        .health_failed("ingest", "still full", &at(11))
        .await
        .unwrap();
    for s in stores {
        assert!(
            !s.health_stuck("ingest", &at(9), &at(12), &log)
                .await
                .unwrap()
        );
    }
    let stuck = |s: Arc<Store>| {
        let log = log.clone();
        async move {
            s.health_stuck("ingest", &at(30), &at(30), &log)
                .await
                .unwrap()
        }
    };
    let (sa, sb) = race(&h.a, &h.b, stuck).await;
    assert!(sa ^ sb, "one stuck notice per streak: {sa} {sb}");
    assert!(
        h.sqlite
            .health_stuck("ingest", &at(30), &at(30), &log)
            .await
            .unwrap()
    );
    assert_eq!(
        h.a.health().await.unwrap(),
        h.sqlite.health().await.unwrap()
    );
    let due = h.b.due_health_messages(&at(31), 10).await.unwrap();
    assert_eq!(
        due,
        h.sqlite.due_health_messages(&at(31), 10).await.unwrap()
    );
    assert_eq!((due[0].kind.as_str(), due[0].failures), ("stuck", 2));
    assert!(
        h.a.due_health_messages(&at(31), 10)
            .await
            .unwrap()
            .is_empty()
    );

    let recovered = |s: Arc<Store>| {
        let log = log.clone();
        async move { s.health_recovered("ingest", &at(60), &log).await.unwrap() }
    };
    let (ra, rb) = race(&h.a, &h.b, recovered).await;
    assert!(ra ^ rb, "one recovered notice: {ra} {rb}");
    assert!(
        h.sqlite
            .health_recovered("ingest", &at(60), &log)
            .await
            .unwrap()
    );
    for s in stores {
        s.health_failed("delivery", "refused", &at(70))
            .await
            .unwrap();
        assert!(!s.health_recovered("delivery", &at(71), &log).await.unwrap());
    }
    assert_eq!(
        h.a.health().await.unwrap(),
        h.sqlite.health().await.unwrap()
    );
    // The stuck notice's claim (site-b's, from at(31)) has run out by at(72): it is due again,
    // as on SQLite where nothing was recorded either.
    let pg = h.a.due_health_messages(&at(72), 10).await.unwrap();
    assert_eq!(pg, h.sqlite.due_health_messages(&at(72), 10).await.unwrap());
    let kinds: Vec<&str> = pg.iter().map(|i| i.kind.as_str()).collect();
    assert_eq!(kinds, ["stuck", "recovered"]);
}
