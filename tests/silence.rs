//! Silent sources end to end: the real binary, lots sampled relative to the clock, the notice in
//! the log channel and by email (a real SMTP server on 127.0.0.1), `status --json`.

mod common;

use chrono::{TimeDelta, Utc};
use common::smtp::SmtpServer;
use common::*;
use mail_parser::MessageParser;

/// A lot file of `source`: lot `lot` (0-based), 5 units, sampled `days_ago` days before now.
fn drop_lot(site: &Site, source: &str, lot: usize, days_ago: i64) {
    let code = format!("{}-{:03}", source[..2].to_uppercase(), lot + 1);
    let at = (Utc::now() - TimeDelta::days(days_ago))
        .format("%Y-%m-%dT%H:%M:%SZ")
        .to_string();
    let values = lot_values(5, 100.0, 1.0, lot);
    drop_file(
        &site.inbox(),
        &format!("{source}_{code}.csv"),
        &long_file(source, &code, &at, &[("capacity_mah", values)]),
    );
}

/// Lots sampled daily, the last `last_days_ago` days ago: lot i is `count - 1 - i` days older.
fn daily_lots(site: &Site, source: &str, count: usize, last_days_ago: i64) {
    for lot in 0..count {
        drop_lot(site, source, lot, last_days_ago + (count - 1 - lot) as i64);
    }
}

fn once_log(site: &Site) -> String {
    text(&site.once().stderr)
}

fn silent_sources(site: &Site) -> Vec<serde_json::Value> {
    site.status()["silent_sources"].as_array().unwrap().clone()
}

const SETTLE: &str = "[watch]\nsettle_seconds = 0.0\n";

#[test]
fn a_source_silent_for_twenty_days_is_noticed_once_and_resolved_by_its_next_lot() {
    let site = Site::watching_silence(SETTLE);
    daily_lots(&site, "alder-cells", 10, 20);
    let log = once_log(&site);
    let notice = "no lots from alder-cells for 20 days (usually every 1 day)";
    assert_eq!(log.matches(notice).count(), 1, "{log}");
    let status = site.status();
    assert_eq!(status["outbox_pending"], 0, "the log channel delivered");
    let silent = status["silent_sources"].as_array().unwrap();
    assert_eq!(silent.len(), 1, "{status:#}");
    assert_eq!(silent[0]["source"], "alder-cells");
    assert_eq!(silent[0]["threshold_days"], 3.0);
    assert!(silent[0]["last_lot_at"].as_str().unwrap().ends_with('Z'));
    assert!(silent[0]["since"].as_str().unwrap() > silent[0]["last_lot_at"].as_str().unwrap());
    let text_status = text(&site.run(&["status"]).stdout);
    assert!(text_status.contains("Silent sources"), "{text_status}");

    // Once per silence: a second run sends nothing.
    let log = once_log(&site);
    assert!(!log.contains("no lots from"), "{log}");
    assert_eq!(silent_sources(&site).len(), 1);

    // A new lot: one resolution naming it, and the source is no longer silent.
    drop_lot(&site, "alder-cells", 10, 0);
    let log = once_log(&site);
    assert_eq!(
        log.matches("lots from alder-cells again (lot AL-011)")
            .count(),
        1,
        "{log}"
    );
    assert!(!log.contains("no lots from"), "{log}");
    assert!(silent_sources(&site).is_empty());
    let log = once_log(&site);
    assert!(!log.contains("alder-cells"), "{log}");
}

#[test]
fn a_configured_gap_watches_a_source_with_too_few_lots_to_learn() {
    let site = Site::watching_silence(&format!("{SETTLE}[monitor]\nsilence_days = 2\n"));
    daily_lots(&site, "birchworks", 3, 3);
    let log = once_log(&site);
    assert_eq!(
        log.matches("no lots from birchworks for 3 days (expected within 2 days)")
            .count(),
        1,
        "{log}"
    );
    let silent = silent_sources(&site);
    assert_eq!(silent.len(), 1);
    assert_eq!(silent[0]["threshold_days"], 2.0);
}

#[test]
fn a_source_that_sent_a_lot_today_or_too_few_to_learn_from_gets_nothing() {
    let site = Site::watching_silence(SETTLE);
    daily_lots(&site, "alder-cells", 10, 0);
    daily_lots(&site, "birchworks", 3, 30);
    let log = once_log(&site);
    assert!(!log.contains("no lots from"), "{log}");
    assert!(silent_sources(&site).is_empty());
}

const QUALITY: &str = "quality@plant.example";
const ALDER: &str = "alder-buyer@plant.example";

#[test]
fn the_notice_and_the_resolution_reach_the_default_and_the_source_recipients_by_email() {
    let server = SmtpServer::start();
    let site = Site::watching_silence(&format!(
        "{SETTLE}[alerts]\nchannels = [\"email\"]\n\
         [alerts.email]\nsmtp_host = \"127.0.0.1\"\nsmtp_port = {}\ntls = \"none\"\n\
         from = \"lotdrift@plant.example\"\nto = [\"{QUALITY}\"]\ntimeout_seconds = 5\n\
         [alerts.email.by_source]\n\"alder-cells\" = [\"{ALDER}\"]\n\
         birchworks = [\"birch-buyer@plant.example\"]\n\
         [alerts.email.by_characteristic]\ncapacity_mah = [\"cell-lab@plant.example\"]\n",
        server.port
    ));
    daily_lots(&site, "alder-cells", 10, 20);
    daily_lots(&site, "birchworks", 10, 0);
    site.once();
    let got = server.received();
    let mut to: Vec<String> = got.iter().flat_map(|r| r.to.clone()).collect();
    to.sort();
    assert_eq!(to, vec![ALDER.to_string(), QUALITY.to_string()]);
    for r in &got {
        let m = MessageParser::default().parse(&r.data).unwrap();
        let subject = m.subject().unwrap();
        assert!(
            subject.contains("no lots from alder-cells for 20 days"),
            "{subject}"
        );
        let body = m.body_text(0).unwrap();
        assert!(body.contains("Last lot:     AL-010"), "{body}");
        assert!(
            body.contains("learned from the source's last 9 intervals"),
            "{body}"
        );
    }
    site.once();
    assert_eq!(server.received().len(), 2, "not sent again");

    drop_lot(&site, "alder-cells", 10, 0);
    site.once();
    let got = server.received();
    assert_eq!(got.len(), 4);
    for r in &got[2..] {
        let m = MessageParser::default().parse(&r.data).unwrap();
        assert_eq!(
            m.subject().unwrap(),
            "lotdrift: lots from alder-cells again (lot AL-011)"
        );
    }
}
