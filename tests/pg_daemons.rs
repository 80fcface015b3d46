//! Several daemons (real `lotdrift run` processes, one per plant, each with its own inbox) on
//! one PostgreSQL history, with a real SMTP server: each file stored once, each lot decided
//! once and as one daemon alone decides it (the reference is a SQLite history fed the same
//! files), one email per announced alert event; a daemon killed (SIGKILL) during a backfill
//! and restarted loses and doubles nothing.

mod common;

use std::collections::HashSet;
use std::time::Duration;

use common::pg::PgServer;
use common::smtp::SmtpServer;
use common::*;
use sqlx::Row;

const LIMIT: Duration = Duration::from_secs(120);

/// A daemon process that is killed when the test ends, passed or failed (a failed assertion
/// must not leave daemons running against a removed folder).
struct Daemon(std::process::Child);

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// One plant's site: the shared database, its own name and inbox, email alerts to `smtp`.
fn plant(url: &str, name: &str, smtp: u16) -> Site {
    Site::new(&format!(
        "[database]\nurl = \"{url}\"\n\
         [site]\nname = \"{name}\"\n\
         [watch]\nsettle_seconds = 0.2\nrescan_seconds = 0.3\n\
         [alerts]\nchannels = [\"email\"]\nretry_initial_seconds = 0\n\
         [alerts.email]\nsmtp_host = \"127.0.0.1\"\nsmtp_port = {smtp}\ntls = \"none\"\n\
         from = \"lotdrift <qa@lotdrift.test>\"\nto = [\"sqe@plant.test\"]\ntimeout_seconds = 5\n"
    ))
}

/// Two sources, one characteristic, 30 lots of 8 units; birchworks' mean rises by 3 sd from
/// lot 24 on. (file name, text) in sampling order.
fn lot_files() -> Vec<(String, String)> {
    let scenario = Scenario {
        sources: vec!["alder-cells".into(), "birchworks".into()],
        chars: vec!["capacity_mah".into()],
        lots: 30,
        n: 8,
        shift: Some((1, 0, 23, 3.0)),
    };
    let mut files = scenario.files();
    files.sort_by_key(|(name, _, order)| (*order, name.clone()));
    files.into_iter().map(|(n, t, _)| (n, t)).collect()
}

/// Runs `sql` (one row of integers) on the shared database.
fn counts(url: &str, sql: &str) -> Vec<i64> {
    try_counts(url, sql).unwrap()
}

/// [`counts`], or the database's error (before the first daemon made the tables, say).
fn try_counts(url: &str, sql: &str) -> Result<Vec<i64>, sqlx::Error> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let pool = sqlx::PgPool::connect(url).await?;
        let row = sqlx::query(sql).fetch_one(&pool).await;
        pool.close().await;
        let row = row?;
        Ok((0..row.len()).map(|i| row.get::<i64, _>(i)).collect())
    })
}

/// The decisions of a history, one text line per decision, in series order.
fn decisions_pg(url: &str) -> Vec<String> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let pool = sqlx::PgPool::connect(url).await.unwrap();
        let rows = sqlx::query(DECISIONS).fetch_all(&pool).await.unwrap();
        rows.iter().map(decision_pg).collect()
    })
}

const DECISIONS: &str = "SELECT source, characteristic, lot, kind, test, p_value, p_adjusted, \
     significant, cusum_upper, estimate, alert_id FROM decision_view \
     ORDER BY source, characteristic, sampled_at, lot, kind";

fn decision_pg(r: &sqlx::postgres::PgRow) -> String {
    format!(
        "{} {} {} {} {} {:?} {:?} {} {:?} {:?} {:?}",
        r.get::<String, _>(0),
        r.get::<String, _>(1),
        r.get::<String, _>(2),
        r.get::<String, _>(3),
        r.get::<String, _>(4),
        r.get::<Option<f64>, _>(5),
        r.get::<Option<f64>, _>(6),
        r.get::<i64, _>(7),
        r.get::<Option<f64>, _>(8),
        r.get::<Option<f64>, _>(9),
        r.get::<Option<i64>, _>(10),
    )
}

fn decisions_sqlite(site: &Site) -> Vec<String> {
    let db = site.path().join("lotdrift.db");
    let conn = rusqlite::Connection::open(db).unwrap();
    let mut stmt = conn.prepare(DECISIONS).unwrap();
    stmt.query_map([], |r| {
        Ok(format!(
            "{} {} {} {} {} {:?} {:?} {} {:?} {:?} {:?}",
            r.get::<_, String>(0)?,
            r.get::<_, String>(1)?,
            r.get::<_, String>(2)?,
            r.get::<_, String>(3)?,
            r.get::<_, String>(4)?,
            r.get::<_, Option<f64>>(5)?,
            r.get::<_, Option<f64>>(6)?,
            r.get::<_, i64>(7)?,
            r.get::<_, Option<f64>>(8)?,
            r.get::<_, Option<f64>>(9)?,
            r.get::<_, Option<i64>>(10)?,
        ))
    })
    .unwrap()
    .map(Result::unwrap)
    .collect()
}

/// Nothing left to do anywhere: inboxes empty, every sample decided, no message pending.
fn settled(url: &str, plants: &[&Site], samples: i64) -> bool {
    let inboxes_empty = plants
        .iter()
        .all(|p| std::fs::read_dir(p.inbox()).unwrap().next().is_none());
    inboxes_empty
        && counts(
            url,
            "SELECT (SELECT COUNT(*) FROM sample), (SELECT COUNT(*) FROM pending_sample), \
             (SELECT COUNT(*) FROM outbox WHERE state = 'pending')",
        ) == [samples, 0, 0]
}

fn message_ids(smtp: &SmtpServer) -> Vec<String> {
    smtp.received()
        .iter()
        .map(|m| {
            let text = String::from_utf8_lossy(&m.data).to_string();
            text.lines()
                .find(|l| l.to_ascii_lowercase().starts_with("message-id:"))
                .map(|l| l[11..].trim().to_string())
                .expect("every message has a Message-ID")
        })
        .collect()
}

/// Alert events that are announced (opening, repeating, resolving; attaching a lot is not).
const ANNOUNCED: &str =
    "SELECT COUNT(*) FROM alert_event WHERE kind IN ('opened', 'repeated', 'resolved')";

#[test]
fn three_plants_share_one_history_store_once_decide_once_and_email_once() {
    let server = PgServer::start();
    let url = server.create_database("plants");
    let smtp = SmtpServer::start();
    let plants = [
        plant(&url, "north", smtp.port),
        plant(&url, "south", smtp.port),
        plant(&url, "east", smtp.port),
    ];
    let files = lot_files();
    // The baseline lots (the first 20 of each source) arrive at north only.
    for (name, text) in &files[..40] {
        drop_file(&plants[0].inbox(), name, text);
    }
    let mut daemons: Vec<Daemon> = plants.iter().map(|p| Daemon(p.spawn_daemon())).collect();
    assert!(wait_until(LIMIT, || settled(&url, &[&plants[0]], 40)));
    // Then every later lot reaches all three plants at once (one lab result forwarded to
    // every plant that uses the part), one sampling date after the other.
    for (k, pair) in files[40..].chunks(2).enumerate() {
        for p in &plants {
            for (name, text) in pair {
                drop_file(&p.inbox(), name, text);
            }
        }
        let samples = 42 + 2 * k as i64;
        assert!(
            wait_until(LIMIT, || settled(&url, &plants.each_ref(), samples)),
            "lots {pair:?} not settled"
        );
    }
    for d in &daemons {
        sigterm(&d.0);
    }
    for d in &mut daemons {
        assert!(wait_exit(&mut d.0, Duration::from_secs(20)).success());
    }

    // Each file stored once, by one of the plants; the others archived it as a duplicate.
    let stored = counts(
        &url,
        "SELECT COUNT(*), COUNT(DISTINCT content_hash) FROM ingested_file",
    );
    assert_eq!(stored, [60, 60]);
    let by_site = counts(
        &url,
        "SELECT COUNT(*) FILTER (WHERE site = 'north'), COUNT(*) FILTER (WHERE site = 'south'), \
         COUNT(*) FILTER (WHERE site = 'east') FROM ingested_file",
    );
    assert_eq!(by_site.iter().sum::<i64>(), 60, "{by_site:?}");
    for p in &plants {
        assert!(p.files_in("quarantine").is_empty());
    }
    let archived: usize = plants.iter().map(|p| p.files_in("archive").len()).sum();
    assert_eq!(
        archived,
        40 + 3 * 20,
        "every received file archived, stored or duplicate"
    );

    // Decided once each, as one daemon decides the same files (SQLite, `run --once`).
    let reference = Site::new("");
    for (name, text) in &files {
        drop_file(&reference.inbox(), name, text);
    }
    reference.once();
    let expected = decisions_sqlite(&reference);
    assert!(
        expected
            .iter()
            .any(|d| d.starts_with("birchworks capacity_mah") && d.contains(" 1 "))
    );
    assert_eq!(decisions_pg(&url), expected);

    // One email per announced alert event and recipient, whoever sent it.
    let announced = counts(&url, ANNOUNCED)[0];
    assert!(announced >= 1);
    let ids = message_ids(&smtp);
    assert_eq!(ids.len() as i64, announced, "{ids:?}");
    assert_eq!(
        ids.iter().collect::<HashSet<_>>().len(),
        ids.len(),
        "{ids:?}"
    );
}

#[test]
fn a_plant_killed_during_a_backfill_loses_and_doubles_nothing() {
    let server = PgServer::start();
    let url = server.create_database("killed");
    let smtp = SmtpServer::start();
    let (north, south) = (
        plant(&url, "north", smtp.port),
        plant(&url, "south", smtp.port),
    );
    let files = lot_files();
    // The whole history arrives at both plants at once (overlapping backfills).
    for p in [&north, &south] {
        for (name, text) in &files {
            drop_file(&p.inbox(), name, text);
        }
    }
    // North alone first, killed at three moments: as soon as it has stored its first batch,
    // as soon as it has made its first decisions, and while it starts up.
    let count = |sql| try_counts(&url, sql).map_or(0, |c| c[0]);
    let stored_by_north = || count("SELECT COUNT(*) FROM ingested_file WHERE site = 'north'");
    let decided = || count("SELECT COUNT(*) FROM evaluation");
    let moments: [&dyn Fn() -> bool; 3] = [&|| stored_by_north() > 0, &|| decided() > 0, &|| true];
    for moment in moments {
        let mut victim = Daemon(north.spawn_daemon());
        assert!(wait_until(LIMIT, moment));
        victim.0.kill().unwrap();
        victim.0.wait().unwrap();
    }
    let (files_then, decided_then) = (stored_by_north(), decided());
    assert!(files_then > 0 && decided_then > 0);
    let mut survivor = Daemon(south.spawn_daemon());
    let mut north_daemon = Daemon(north.spawn_daemon());
    // Up (its first log line written) before it is asked to stop.
    let log = north.path().join("daemon.log");
    assert!(wait_until(LIMIT, || std::fs::metadata(&log).is_ok_and(|m| m.len() > 0)));
    let done = wait_until(LIMIT, || settled(&url, &[&north, &south], 60));
    if !done {
        for p in [&north, &south] {
            let log = std::fs::read_to_string(p.path().join("daemon.log")).unwrap_or_default();
            let inbox: Vec<_> = std::fs::read_dir(p.inbox()).unwrap().collect();
            eprintln!("inbox {} files; log:\n{log}", inbox.len());
        }
        panic!(
            "not settled: {:?}",
            counts(
                &url,
                "SELECT (SELECT COUNT(*) FROM sample), (SELECT COUNT(*) FROM pending_sample), \
                 (SELECT COUNT(*) FROM outbox WHERE state = 'pending')"
            )
        );
    }
    for d in [&north_daemon, &survivor] {
        sigterm(&d.0);
    }
    for (p, d) in [(&north, &mut north_daemon), (&south, &mut survivor)] {
        let status = wait_exit(&mut d.0, Duration::from_secs(20));
        let log = std::fs::read_to_string(p.path().join("daemon.log")).unwrap_or_default();
        assert!(status.success(), "{status:?}: {log}");
    }

    let stored = counts(
        &url,
        "SELECT (SELECT COUNT(*) FROM ingested_file), (SELECT COUNT(*) FROM sample), \
         (SELECT COUNT(*) FROM measurement_view), (SELECT measurements FROM tally), \
         (SELECT COUNT(*) FROM evaluation WHERE kind = 'mean') \
           + (SELECT COUNT(DISTINCT sample_id) FROM baseline_lot)",
    );
    assert_eq!(
        stored,
        [60, 60, 480, 480, 60],
        "files, samples, values, tally, decided"
    );
    for p in [&north, &south] {
        assert!(p.files_in("quarantine").is_empty());
        assert_eq!(p.files_in("archive").len(), 60);
    }
    // Each announced event reached the mail server under one Message-ID (a message the
    // killed daemon had handed over before its outcome was recorded may come again, under
    // the same id).
    let announced = counts(&url, ANNOUNCED)[0];
    let ids: HashSet<String> = message_ids(&smtp).into_iter().collect();
    assert_eq!(ids.len() as i64, announced);
}
