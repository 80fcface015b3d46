//! The daemon says when it is stuck: the real binary, a real SQLite file and a real SMTP server
//! (mailin-embedded) on 127.0.0.1. `health.notice_after_minutes = 0.02` (1.2 s) keeps the
//! tests short; every wait polls for what the binary does (a message received, a stored
//! count), none asserts how long something took.

mod common;

use std::path::PathBuf;
use std::time::Duration;

use common::smtp::{Received, SmtpServer, free_port};
use common::*;

const QUALITY: &str = "quality@plant.example";

/// How long a poll waits for the daemon before the test fails (generous: a busy machine).
const LIMIT: Duration = Duration::from_secs(90);

/// Log and email channels, email to 127.0.0.1:`port`, retries due at once, scans every
/// 0.2 s, and a notice after 1.2 s of failing.
fn health_site(port: u16) -> Site {
    Site::new(&format!(
        "[watch]\nsettle_seconds = 0.0\nrescan_seconds = 0.2\n\
         [alerts]\nchannels = [\"log\", \"email\"]\nretry_initial_seconds = 0\n\
         [alerts.email]\nsmtp_host = \"127.0.0.1\"\nsmtp_port = {port}\ntls = \"none\"\n\
         from = \"lotdrift <lotdrift@plant.example>\"\nto = [\"{QUALITY}\"]\n\
         timeout_seconds = 5\n\
         [health]\nnotice_after_minutes = 0.02\n"
    ))
}

fn subject(r: &Received) -> String {
    let m = mail_parser::MessageParser::default()
        .parse(&r.data)
        .unwrap();
    m.subject().unwrap_or_default().to_string()
}

fn message_id(r: &Received) -> String {
    let m = mail_parser::MessageParser::default()
        .parse(&r.data)
        .unwrap();
    m.message_id().unwrap_or_default().to_string()
}

/// Messages received whose subject contains `needle`.
fn received_with(server: &SmtpServer, needle: &str) -> usize {
    server
        .received()
        .iter()
        .filter(|r| subject(r).contains(needle))
        .count()
}

fn log_of(site: &Site) -> String {
    std::fs::read_to_string(site.path().join("daemon.log")).unwrap_or_default()
}

fn failures(site: &Site, component: &str) -> i64 {
    site.status()["health"][component]["failures"]
        .as_i64()
        .unwrap()
}

/// Makes the archive's month folders (this month and the next, in case the test runs over a
/// month's end) regular files: a batch commits, then moving its files fails, and every later
/// scan fails the same way. Root ignores permission bits; a file where a folder must be
/// stops root too.
fn block_archive(site: &Site) -> Vec<PathBuf> {
    let now = chrono::Utc::now();
    let next = now + chrono::Duration::days(32);
    let blocked: Vec<PathBuf> = [now, next]
        .iter()
        .map(|t| {
            site.path()
                .join("archive")
                .join(t.format("%Y-%m").to_string())
        })
        .collect();
    for b in &blocked {
        std::fs::write(b, "not a folder").unwrap();
    }
    blocked
}

fn one_lot(site: &Site) {
    let values = lot_values(12, 100.0, 1.0, 1);
    let text = long_file(
        "alder-cells",
        "AL-001",
        "2026-01-05",
        &[("capacity_mah", values)],
    );
    drop_file(&site.inbox(), "alder-cells_AL-001.csv", &text);
}

/// The daemon of a test, killed when dropped, so a failing test leaves no process behind
/// (nor a busy tmpfs).
struct Daemon(std::process::Child);

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

fn start(site: &Site) -> Daemon {
    Daemon(site.spawn_daemon())
}

fn stop(mut daemon: Daemon) {
    sigterm(&daemon.0);
    let status = wait_exit(&mut daemon.0, LIMIT);
    assert!(status.success(), "daemon exit {status:?}");
}

fn assert_distinct_message_ids(server: &SmtpServer) {
    let ids: Vec<String> = server.received().iter().map(message_id).collect();
    let mut unique = ids.clone();
    unique.sort();
    unique.dedup();
    assert_eq!(unique.len(), ids.len(), "{ids:?}");
}

#[test]
fn stuck_ingest_is_noticed_once_by_log_and_email_across_a_restart_and_its_recovery_once() {
    let server = SmtpServer::start();
    let site = health_site(server.port);
    let blocked = block_archive(&site);
    one_lot(&site);
    let daemon = start(&site);
    assert!(
        wait_until(LIMIT, || received_with(&server, "ingest stuck") >= 1),
        "{}",
        log_of(&site)
    );
    // `status` is another process reading the database while the daemon runs.
    let status = site.status();
    let h = &status["health"]["ingest"];
    assert_eq!(h["state"], "stuck", "{status:#}");
    assert_eq!(h["notice_sent"], true);
    let since = h["failing_since"].as_str().unwrap().to_string();
    let error = h["last_error"].as_str().unwrap();
    assert!(error.contains("cannot move"), "{error}");
    assert_eq!(
        status["lots"], 1,
        "stored once, however often the move fails"
    );
    // More failed scans, each waking the notifier: no second notice.
    let f = failures(&site, "ingest");
    assert!(wait_until(LIMIT, || failures(&site, "ingest") >= f + 5));
    stop(daemon);
    let first_log = log_of(&site);
    assert_eq!(
        first_log.matches("lotdrift: ingest stuck for").count(),
        1,
        "{first_log}"
    );

    // The streak is stored: a new daemon goes on failing in the same streak, without a notice.
    let stopped = site.status();
    assert_eq!(stopped["health"]["ingest"]["failing_since"], since.as_str());
    let daemon = start(&site);
    let f = failures(&site, "ingest");
    assert!(wait_until(LIMIT, || failures(&site, "ingest") >= f + 5));

    // Repaired: the waiting file is archived (its values are stored already) and one
    // recovery notice goes out.
    for b in &blocked {
        std::fs::remove_file(b).unwrap();
    }
    assert!(
        wait_until(LIMIT, || received_with(&server, "ingest working again")
            >= 1),
        "{}",
        log_of(&site)
    );
    assert!(wait_until(LIMIT, || site.files_in("inbox").is_empty()));
    stop(daemon);
    let second_log = log_of(&site);
    assert!(
        !second_log.contains("lotdrift: ingest stuck for"),
        "{second_log}"
    );
    assert_eq!(
        second_log.matches("lotdrift: ingest working again").count(),
        1,
        "{second_log}"
    );
    assert_eq!(received_with(&server, "ingest stuck"), 1);
    assert_eq!(received_with(&server, "ingest working again"), 1);
    assert_eq!(server.received().len(), 2);
    assert_distinct_message_ids(&server);
    let status = site.status();
    let h = &status["health"]["ingest"];
    assert_eq!(h["state"], "ok", "{status:#}");
    assert_eq!(h["failing_since"], serde_json::Value::Null);
    assert!(h["recovered_at"].is_string());
    assert!(h["last_error"].as_str().unwrap().contains("cannot move"));
    assert!(h["last_success_at"].is_string());
    assert_eq!(
        (status["lots"].clone(), status["files"].clone()),
        (1.into(), 1.into())
    );
    assert_eq!(status["outbox_pending"], 0);
}

/// One source, one characteristic, 26 lots; the mean rises from lot 23: one alert to email.
fn drifting_series(site: &Site) {
    let scenario = Scenario {
        sources: vec!["alder-cells".into()],
        chars: vec!["capacity_mah".into()],
        lots: 26,
        n: 12,
        shift: Some((0, 0, 22, 3.0)),
    };
    for (name, text, _) in scenario.files() {
        drop_file(&site.inbox(), &name, &text);
    }
}

fn once_log(site: &Site) -> String {
    text(&site.once().stderr)
}

#[test]
fn failing_delivery_is_noticed_once_in_the_log_only_and_its_recovery_by_log_and_email() {
    let port = free_port();
    let site = health_site(port);
    drifting_series(&site);
    // Each `run --once` is a new process: the streak lives in the database.
    let first = once_log(&site);
    assert!(first.contains("will retry"), "{first}");
    let h = site.status()["health"]["delivery"].clone();
    assert!(h["failing_since"].is_string(), "{h:#}");
    assert_eq!(h["notice_sent"], false);
    let error = h["last_error"].as_str().unwrap().to_lowercase();
    assert!(error.contains("connection"), "{error}");
    assert!(wait_until(
        LIMIT,
        || site.status()["health"]["delivery"]["state"] == "stuck"
    ));

    let second = once_log(&site);
    assert_eq!(
        second
            .matches("lotdrift: email delivery failing for")
            .count(),
        1,
        "{second}"
    );
    let third = once_log(&site);
    assert!(
        !third.contains("lotdrift: email delivery failing for"),
        "{third}"
    );
    let status = site.status();
    assert_eq!(status["health"]["delivery"]["notice_sent"], true);
    assert_eq!(status["outbox_pending"], 1, "only the alert's email waits");

    let server = SmtpServer::start_on(port);
    let fourth = once_log(&site);
    assert_eq!(
        fourth
            .matches("lotdrift: email delivery working again")
            .count(),
        1,
        "{fourth}"
    );
    let got = server.received();
    assert_eq!(got.len(), 2, "the alert and the recovery notice");
    assert_eq!(received_with(&server, "mean shifted up"), 1);
    assert_eq!(received_with(&server, "email delivery working again"), 1);
    assert_eq!(received_with(&server, "failing for"), 0);
    assert_distinct_message_ids(&server);

    let fifth = once_log(&site);
    assert!(!fifth.contains("email delivery"), "{fifth}");
    assert_eq!(server.received().len(), 2);
    let status = site.status();
    let h = &status["health"]["delivery"];
    assert_eq!(h["state"], "ok", "{status:#}");
    assert_eq!(h["failures"], 0);
    assert!(status["health"]["last_email_delivered_at"].is_string());
    assert_eq!(status["outbox_pending"], 0);
}

#[test]
fn the_daemon_notices_failing_delivery_once_and_its_recovery_once() {
    let port = free_port();
    let site = health_site(port);
    drifting_series(&site);
    let daemon = start(&site);
    assert!(
        wait_until(LIMIT, || log_of(&site)
            .contains("lotdrift: email delivery failing for")),
        "{}",
        log_of(&site)
    );
    let f = failures(&site, "delivery");
    assert!(wait_until(LIMIT, || failures(&site, "delivery") >= f + 2));
    let server = SmtpServer::start_on(port);
    assert!(
        wait_until(LIMIT, || received_with(
            &server,
            "email delivery working again"
        ) >= 1),
        "{}",
        log_of(&site)
    );
    stop(daemon);
    let log = log_of(&site);
    assert_eq!(
        log.matches("lotdrift: email delivery failing for").count(),
        1,
        "{log}"
    );
    assert_eq!(
        log.matches("lotdrift: email delivery working again")
            .count(),
        1,
        "{log}"
    );
    assert_eq!(received_with(&server, "mean shifted up"), 1);
    assert_eq!(server.received().len(), 2);
    assert_distinct_message_ids(&server);
}

#[test]
fn check_config_names_a_bad_notice_after_minutes() {
    let site = Site::new("[health]\nnotice_after_minutes = 0\n");
    let out = site.run(&["check-config"]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("health.notice_after_minutes"), "{err}");
}

/// A tmpfs of `size` mounted on `dir` for one test, unmounted when dropped; None (and a
/// SKIPPED line) without root.
struct SmallDisk {
    dir: PathBuf,
}

impl SmallDisk {
    fn mount(dir: &std::path::Path, size: &str) -> Option<SmallDisk> {
        std::fs::create_dir_all(dir).unwrap();
        let out = std::process::Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(dir)
            .output();
        match out {
            Ok(o) if o.status.success() => Some(SmallDisk { dir: dir.into() }),
            other => {
                eprintln!(
                    "SKIPPED: cannot mount a tmpfs on {} ({other:?}); the full disk is not \
                     checked by this run (it needs root or CAP_SYS_ADMIN)",
                    dir.display()
                );
                None
            }
        }
    }
}

impl Drop for SmallDisk {
    fn drop(&mut self) {
        let _ = std::process::Command::new("umount").arg(&self.dir).status();
    }
}

/// Writes `path` until the file system is full.
fn fill(path: &std::path::Path) {
    use std::io::Write;
    let mut f = std::fs::File::create(path).unwrap();
    let chunk = vec![0u8; 64 * 1024];
    while f.write_all(&chunk).is_ok() {}
    let _ = f.sync_all();
}

#[test]
fn a_full_disk_under_the_database_is_noticed_once_in_the_log_and_its_end_once() {
    let site = Site::new(
        "[paths]\ndatabase = \"db/lotdrift.db\"\n\
         [watch]\nsettle_seconds = 0.0\nrescan_seconds = 0.2\n\
         [health]\nnotice_after_minutes = 0.02\n",
    );
    let Some(_disk) = SmallDisk::mount(&site.path().join("db"), "8m") else {
        return;
    };
    let daemon = start(&site);
    assert!(wait_until(LIMIT, || log_of(&site).contains("watching")));
    let filler = site.path().join("db").join("filler");
    fill(&filler);
    // A lot large enough (2 × 15,000 values) that its pages cannot fit in the space left.
    let chars = [
        ("capacity_mah", lot_values(15_000, 100.0, 1.0, 1)),
        ("mass_g", lot_values(15_000, 50.0, 1.0, 2)),
    ];
    let text = long_file("alder-cells", "AL-001", "2026-01-05", &chars);
    drop_file(&site.inbox(), "alder-cells_AL-001.csv", &text);
    assert!(
        wait_until(LIMIT, || log_of(&site)
            .contains("lotdrift: ingest stuck for")),
        "{}",
        log_of(&site)
    );
    let log = log_of(&site);
    assert!(log.contains("full"), "{log}");
    // More failed scans: no second notice.
    let failed_scans = |log: &str| {
        log.matches("ingest failed; files left in the inbox")
            .count()
    };
    let seen = failed_scans(&log);
    assert!(wait_until(LIMIT, || failed_scans(&log_of(&site)) >= seen + 5));
    std::fs::remove_file(&filler).unwrap();
    assert!(
        wait_until(LIMIT, || log_of(&site)
            .contains("lotdrift: ingest working again")),
        "{}",
        log_of(&site)
    );
    stop(daemon);
    let log = log_of(&site);
    // Regression: a failed COMMIT left pooled connections that refused every later BEGIN, so
    // ingest and the health record never recovered once space was freed.
    assert!(!log.contains("non-zero transaction depth"), "{log}");
    assert_eq!(
        log.matches("lotdrift: ingest stuck for").count(),
        1,
        "{log}"
    );
    assert_eq!(
        log.matches("lotdrift: ingest working again").count(),
        1,
        "{log}"
    );
    let status = site.status();
    assert_eq!(status["lots"], 1, "{status:#}");
    assert_eq!(status["measurements"], 30_000);
    assert_eq!(
        status["health"]["ingest"]["state"], "ok",
        "{status:#}\n{log}"
    );
}
