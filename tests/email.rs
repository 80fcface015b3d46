//! Email delivery end to end: the real `lotdrift` binary against a real SMTP server
//! (mailin-embedded) on 127.0.0.1, started by each test on its own port.

mod common;

use common::smtp::{Received, SmtpServer, TlsFiles, free_port, test_pki};
use common::*;
use mail_parser::{MessageParser, MimeHeaders};

both_backends!(
    an_alert_reaches_every_recipient_once_with_headers_both_parts_and_the_chart,
    server_down_the_alert_waits_in_the_outbox_and_is_delivered_exactly_once_later,
    a_message_undeliverable_past_expire_hours_is_marked_expired_not_dropped,
    a_4xx_reply_is_retried_and_the_retry_delivers,
    a_5xx_reply_is_recorded_as_failed_with_the_reply_and_not_retried,
    a_server_that_stops_answering_times_out_and_the_message_waits,
    starttls_with_a_private_ca_and_auth_delivers_and_the_password_stays_out_of_the_log,
    a_source_name_with_cr_lf_is_refused_at_ingest_so_it_never_reaches_a_header,
    test_email_prints_the_server_reply_and_exits_1_when_refused,
    an_alert_goes_to_the_default_list_plus_its_source_and_characteristic_lists_once_each,
    opening_a_grown_shift_and_resolution_each_send_exactly_their_email_and_ack_stops_the_repeat,
    the_daily_digest_lists_each_recipients_open_alerts_once_a_day_at_local_time,
    with_when_empty_the_digest_is_sent_even_with_nothing_open_and_not_before_its_time,
    a_backfill_whose_shift_grows_sends_one_message_not_an_opening_and_a_repeat,
);

const FROM: &str = "lotdrift@plant.example";
const QUALITY: &str = "quality@plant.example";
const INCOMING: &str = "incoming@plant.example";

/// Site config: the given channels, an [alerts.email] section for 127.0.0.1:`port`, retries
/// due at once (so a second `--once` retries), and `extra` lines for [alerts.email]
/// (`tls = "none"` unless `extra` sets `tls`).
fn email_site(backend: Backend, port: u16, channels: &str, to: &[&str], extra: &str) -> Site {
    let to: Vec<String> = to.iter().map(|t| format!("\"{t}\"")).collect();
    let tls = if extra.contains("tls =") {
        ""
    } else {
        "tls = \"none\"\n"
    };
    Site::on(
        backend,
        &format!(
            "[watch]\nsettle_seconds = 0.0\n\
         [alerts]\nchannels = {channels}\nretry_initial_seconds = 0\n\
         [alerts.email]\nsmtp_host = \"127.0.0.1\"\nsmtp_port = {port}\n{tls}\
         from = \"lotdrift <{FROM}>\"\nto = [{}]\ntimeout_seconds = 5\n{extra}",
            to.join(", ")
        ),
    )
}

/// One source, one characteristic, 26 lots of 12 units; the mean rises by 3 sd from lot 23
/// on: one alert (opened by AL-023, the later shifted lots attach to it).
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

fn parse(r: &Received) -> mail_parser::Message<'_> {
    MessageParser::default()
        .parse(&r.data)
        .expect("the received message parses as MIME")
}

fn address(a: Option<&mail_parser::Address<'_>>) -> String {
    a.and_then(|a| a.first())
        .and_then(|a| a.address())
        .unwrap_or_default()
        .to_string()
}

/// (type, subtype) of every MIME part, in order.
fn structure(m: &mail_parser::Message<'_>) -> Vec<(String, String)> {
    m.parts
        .iter()
        .map(|p| {
            let ct = p.content_type().expect("every part has a Content-Type");
            (
                ct.ctype().to_string(),
                ct.subtype().unwrap_or_default().to_string(),
            )
        })
        .collect()
}

fn png_size(bytes: &[u8]) -> (u32, u32) {
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "PNG signature");
    let decoder = png::Decoder::new(std::io::Cursor::new(bytes));
    let mut reader = decoder.read_info().expect("PNG header decodes");
    let mut buf = vec![0; reader.output_buffer_size().unwrap()];
    let info = reader.next_frame(&mut buf).expect("PNG image data decodes");
    (info.width, info.height)
}

fn stderr_of(out: &std::process::Output) -> String {
    text(&out.stderr)
}

fn an_alert_reaches_every_recipient_once_with_headers_both_parts_and_the_chart(backend: Backend) {
    let server = SmtpServer::start();
    let site = email_site(
        backend,
        server.port,
        "[\"email\", \"log\"]",
        &[QUALITY, INCOMING],
        "[characteristic.capacity_mah]\nunit = \"mAh\"",
    );
    drifting_series(&site);
    site.once();

    let status = site.status();
    assert_eq!(status["open_alerts"], 1);
    assert_eq!(status["outbox_pending"], 0, "{status:#}");
    assert_eq!(status["outbox_failed"], 0, "{status:#}");
    let alert = site.alerts().remove(0);

    let got = server.received();
    assert_eq!(
        got.len(),
        2,
        "one message per recipient for the one alert event"
    );
    let mut envelope_to: Vec<String> = got.iter().flat_map(|r| r.to.clone()).collect();
    envelope_to.sort();
    assert_eq!(envelope_to, vec![INCOMING.to_string(), QUALITY.to_string()]);

    let mut ids = Vec::new();
    for r in &got {
        assert_eq!(r.from, FROM);
        let m = parse(r);
        assert_eq!(address(m.from()), FROM);
        assert_eq!(
            address(m.to()),
            r.to[0],
            "header To is the envelope recipient"
        );
        let subject = m.subject().unwrap();
        for word in ["alder-cells", "capacity_mah", "shifted up", "AL-023"] {
            assert!(
                subject.contains(word),
                "{word:?} missing in subject {subject:?}"
            );
        }
        let id = m.message_id().expect("Message-ID present").to_string();
        assert!(
            id.starts_with("lotdrift.event-") && id.ends_with("@plant.example"),
            "{id}"
        );
        ids.push(id);

        // multipart/mixed [ multipart/alternative [ text/plain, text/html ], image/png ]
        assert_eq!(
            structure(&m),
            vec![
                ("multipart".into(), "mixed".into()),
                ("multipart".into(), "alternative".into()),
                ("text".into(), "plain".into()),
                ("text".into(), "html".into()),
                ("image".into(), "png".into()),
            ]
        );
        let plain = m.body_text(0).unwrap();
        let html = m.body_html(0).unwrap();
        // Numbers as people write them: 5 significant digits in the unit of measure, p as
        // 0.0012 or < 1e-9.
        let lot_mean = format!(
            "mean = {} mAh",
            lotdrift::page::fmt::sig(alert["lot_mean"].as_f64().unwrap(), 5)
        );
        let p = format!("p {}", lotdrift::numbers::p_is(alert["p_value"].as_f64()));
        for needle in [
            lot_mean.as_str(),
            p.as_str(),
            alert["test"].as_str().unwrap(),
            "holm",
            "AL-023",
        ] {
            assert!(
                plain.contains(needle),
                "{needle:?} missing in text part:\n{plain}"
            );
            assert!(
                html.contains(&needle.replace('<', "&lt;")),
                "{needle:?} missing in HTML part:\n{html}"
            );
        }
        assert!(html.contains("<table"), "{html}");
        assert!(html.contains("<th align=\"left\""), "{html}");

        let attachments: Vec<_> = m.attachments().collect();
        assert_eq!(attachments.len(), 1);
        let chart = attachments[0];
        assert!(
            chart.attachment_name().unwrap().ends_with(".png"),
            "{:?}",
            chart.attachment_name()
        );
        assert_eq!(png_size(chart.contents()), (800, 400));
        let shots = std::path::Path::new(env!("CARGO_TARGET_TMPDIR"))
            .parent()
            .unwrap()
            .join("screenshots");
        std::fs::create_dir_all(&shots).unwrap();
        std::fs::write(shots.join("email-chart-mean.png"), chart.contents()).unwrap();
    }
    assert_eq!(
        ids[0], ids[1],
        "the same event has one Message-ID for all recipients"
    );

    // A second run finds nothing due: no message is sent twice.
    site.once();
    assert_eq!(server.received().len(), 2);
}

fn server_down_the_alert_waits_in_the_outbox_and_is_delivered_exactly_once_later(backend: Backend) {
    let port = free_port();
    let site = email_site(backend, port, "[\"email\"]", &[QUALITY], "");
    drifting_series(&site);
    let first = site.once();
    let status = site.status();
    assert_eq!(status["lots"], 26, "ingest went on without the mail server");
    assert_eq!(status["open_alerts"], 1);
    assert_eq!(status["outbox_pending"], 1, "{status:#}");
    assert_eq!(status["undelivered"], serde_json::json!([]), "{status:#}");
    let log = stderr_of(&first);
    assert!(log.contains("will retry"), "{log}");

    let server = SmtpServer::start_on(port);
    site.once();
    let got = server.received();
    assert_eq!(got.len(), 1);
    assert_eq!(got[0].to, vec![QUALITY.to_string()]);
    let status = site.status();
    assert_eq!(status["outbox_pending"], 0, "{status:#}");

    site.once();
    assert_eq!(server.received().len(), 1, "nothing new on a third run");
    assert_eq!(server.attempts(), 1);
}

fn a_message_undeliverable_past_expire_hours_is_marked_expired_not_dropped(backend: Backend) {
    // expire_hours = 0.0003 is about 1.1 s: the binary compares the message's age with the
    // wall clock, so the test waits that long between the two runs.
    let port = free_port();
    let site = email_site(backend, port, "[\"email\"]", &[QUALITY], "");
    let cfg = std::fs::read_to_string(site.config()).unwrap();
    std::fs::write(
        site.config(),
        cfg.replace(
            "retry_initial_seconds = 0\n",
            "retry_initial_seconds = 0\nexpire_hours = 0.0003\n",
        ),
    )
    .unwrap();
    drifting_series(&site);
    site.once();
    assert_eq!(site.status()["outbox_pending"], 1);
    std::thread::sleep(std::time::Duration::from_millis(1300));
    site.once();
    let status = site.status();
    assert_eq!(status["outbox_pending"], 0, "{status:#}");
    assert_eq!(status["outbox_expired"], 1, "{status:#}");
    let undelivered = status["undelivered"].as_array().unwrap();
    assert_eq!(undelivered[0]["state"], "expired");
    assert_eq!(undelivered[0]["attempts"], 2);
    let error = undelivered[0]["last_error"].as_str().unwrap();
    assert!(error.to_lowercase().contains("connection"), "{error}");
}

fn a_4xx_reply_is_retried_and_the_retry_delivers(backend: Backend) {
    let server = SmtpServer::start();
    server.reply_next(451, "4.3.0 mailbox busy, try again later");
    let site = email_site(backend, server.port, "[\"email\"]", &[QUALITY], "");
    drifting_series(&site);
    let first = site.once();
    assert_eq!(server.attempts(), 1);
    assert!(server.received().is_empty());
    let status = site.status();
    assert_eq!(status["outbox_pending"], 1, "{status:#}");
    assert_eq!(status["outbox_failed"], 0, "{status:#}");
    assert!(
        stderr_of(&first).contains("4.3.0 mailbox busy"),
        "the transient reply is logged: {}",
        stderr_of(&first)
    );

    site.once();
    assert_eq!(server.attempts(), 2);
    assert_eq!(server.received().len(), 1);
    let status = site.status();
    assert_eq!(status["outbox_pending"], 0, "{status:#}");
    assert_eq!(status["outbox_failed"], 0, "{status:#}");
}

fn a_5xx_reply_is_recorded_as_failed_with_the_reply_and_not_retried(backend: Backend) {
    let server = SmtpServer::start();
    server.reply_next(550, "5.7.1 refused by the test policy");
    let site = email_site(backend, server.port, "[\"email\"]", &[QUALITY], "");
    drifting_series(&site);
    site.once();
    assert_eq!(server.attempts(), 1);
    let status = site.status();
    assert_eq!(status["outbox_pending"], 0, "{status:#}");
    assert_eq!(status["outbox_failed"], 1, "{status:#}");
    let undelivered = status["undelivered"].as_array().unwrap();
    assert_eq!(undelivered.len(), 1);
    assert_eq!(undelivered[0]["state"], "failed");
    assert_eq!(undelivered[0]["recipient"], QUALITY);
    let error = undelivered[0]["last_error"].as_str().unwrap();
    assert!(error.contains("550"), "{error}");
    assert!(
        error.contains("5.7.1 refused by the test policy"),
        "{error}"
    );

    site.once();
    assert_eq!(server.attempts(), 1, "a permanent failure is not retried");
    assert!(server.received().is_empty());
}

fn a_server_that_stops_answering_times_out_and_the_message_waits(backend: Backend) {
    // Accepts connections and never says a word (not even the greeting): a hung server.
    let listener = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let port = listener.local_addr().unwrap().port();
    std::thread::spawn(move || {
        let mut held = Vec::new();
        for conn in listener.incoming().flatten() {
            held.push(conn);
        }
    });
    let site = email_site(backend, port, "[\"email\"]", &[QUALITY], "");
    let cfg = std::fs::read_to_string(site.config()).unwrap();
    std::fs::write(
        site.config(),
        cfg.replace("timeout_seconds = 5\n", "timeout_seconds = 1\n"),
    )
    .unwrap();
    drifting_series(&site);
    let started = std::time::Instant::now();
    let out = site.once();
    assert!(
        started.elapsed() < std::time::Duration::from_secs(30),
        "run --once took {:?}",
        started.elapsed()
    );
    let log = stderr_of(&out);
    assert!(log.contains("no complete SMTP exchange within"), "{log}");
    let status = site.status();
    assert_eq!(status["lots"], 26);
    assert_eq!(status["outbox_pending"], 1, "{status:#}");
}

fn starttls_with_a_private_ca_and_auth_delivers_and_the_password_stays_out_of_the_log(
    backend: Backend,
) {
    let pki = tempfile::tempdir().unwrap();
    let (ca, cert, key) = test_pki(pki.path());
    let password = "s3cret-Pa55-for-the-test";
    let server = SmtpServer::start_tls(
        TlsFiles {
            cert: &cert,
            key: &key,
        },
        Some(password),
    );
    let port = server.port;
    let tls_section =
        |ca_line: &str| format!("{ca_line}tls = \"starttls\"\nusername = \"lotdrift\"\n");
    let run_once = |site: &Site| {
        let out = cmd(site.path())
            .args(["run", "--once", "--config"])
            .arg(site.config())
            .env("LOTDRIFT_SMTP_PASSWORD", password)
            .env("LOTDRIFT_LOG", "lotdrift=trace")
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", stderr_of(&out));
        stderr_of(&out)
    };

    // Without the CA the certificate is not trusted: nothing is sent, the message waits.
    let untrusting = email_site(backend, port, "[\"email\"]", &[QUALITY], &tls_section(""));
    drifting_series(&untrusting);
    let log = run_once(&untrusting);
    assert!(server.received().is_empty());
    assert_eq!(untrusting.status()["outbox_pending"], 1);
    assert!(log.to_lowercase().contains("certificate"), "{log}");

    // With the CA: STARTTLS, AUTH, delivered.
    let ca_line = format!("ca_file = \"{}\"\n", ca.display());
    let site = email_site(
        backend,
        port,
        "[\"email\"]",
        &[QUALITY],
        &tls_section(&ca_line),
    );
    drifting_series(&site);
    let log = run_once(&site);
    let got = server.received();
    assert_eq!(got.len(), 1, "{log}");
    assert_eq!(got[0].hellos, 2, "EHLO again after STARTTLS");
    assert_eq!(server.auth_ok(), 1);
    assert_eq!(site.status()["outbox_pending"], 0);
    assert!(!log.contains(password), "the password reached the log");
    let config_dump = site.run(&["check-config"]);
    assert!(!text(&config_dump.stdout).contains(password));
}

fn a_source_name_with_cr_lf_is_refused_at_ingest_so_it_never_reaches_a_header(backend: Backend) {
    // The only way names enter the store is a lot file, and the parser refuses control
    // characters in them (the unit tests of `alert` check the message builder itself with
    // such names).
    let server = SmtpServer::start();
    let site = email_site(backend, server.port, "[\"email\"]", &[QUALITY], "");
    drifting_series(&site);
    let evil = "source,characteristic,lot,value\n\
                \"alder-cells\r\nBcc: victim@else.example\",capacity_mah,AL-999,100.0\n";
    drop_file(&site.inbox(), "evil.csv", evil);
    site.once();
    assert_eq!(site.status()["quarantined"], 1);
    let reason =
        std::fs::read_to_string(site.path().join("quarantine/evil.csv.reason.txt")).unwrap();
    assert!(reason.contains("control character"), "{reason}");
    let got = server.received();
    assert_eq!(got.len(), 1);
    let raw = text(&got[0].data);
    assert!(!raw.contains("victim@else.example"), "{raw}");
    assert!(!raw.to_ascii_lowercase().contains("\nbcc:"), "{raw}");
}

fn test_email_prints_the_server_reply_and_exits_1_when_refused(backend: Backend) {
    let server = SmtpServer::start();
    let site = email_site(backend, server.port, "[\"log\"]", &[QUALITY, INCOMING], "");

    let ok = site.run(&["alerts", "test-email"]);
    assert!(ok.status.success(), "{}", stderr_of(&ok));
    let out = text(&ok.stdout);
    assert!(
        out.contains(&format!("{QUALITY}: accepted; server replied: 250 OK")),
        "{out}"
    );
    assert!(out.contains(&format!("{INCOMING}: accepted")), "{out}");
    let got = server.received();
    assert_eq!(got.len(), 2);
    assert_eq!(parse(&got[0]).subject(), Some("lotdrift: test message"));

    server.reply_next(550, "5.1.1 no such mailbox here");
    let refused = site.run(&["alerts", "test-email"]);
    assert_eq!(refused.status.code(), Some(1), "{}", stderr_of(&refused));
    let out = text(&refused.stdout);
    assert!(
        out.contains(&format!("{QUALITY}: NOT accepted"))
            && out.contains("550")
            && out.contains("5.1.1 no such mailbox here"),
        "{out}"
    );
    assert!(out.contains(&format!("{INCOMING}: accepted")), "{out}");
    assert_eq!(server.received().len(), 3);

    // No server at all: the connection error is printed, exit 1.
    let down = email_site(backend, free_port(), "[\"log\"]", &[QUALITY], "");
    let out = down.run(&["alerts", "test-email"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        text(&out.stdout).to_lowercase().contains("connection"),
        "{}",
        text(&out.stdout)
    );

    // No [alerts.email] section: a config error, exit 2, naming the section.
    let plain = Site::on(backend, "");
    let out = plain.run(&["alerts", "test-email"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        stderr_of(&out).contains("alerts.email"),
        "{}",
        stderr_of(&out)
    );
}

const ALDER: &str = "alder-buyer@plant.example";
const BIRCH: &str = "birch-buyer@plant.example";
const LAB: &str = "cell-lab@plant.example";

/// Recipients by source and characteristic, besides the default list.
const ROUTING: &str = "[alerts.email.by_source]\n\"alder-cells\" = [\"alder-buyer@plant.example\"]\n\
                       birchworks = [\"birch-buyer@plant.example\", \"Quality@plant.example\"]\n\
                       [alerts.email.by_characteristic]\ncapacity_mah = [\"cell-lab@plant.example\"]\n";

/// alder-cells and birchworks, capacity_mah and ocv_mv; alder-cells' capacity rises by 3 sd
/// from lot 23 on.
fn two_sources(site: &Site) {
    let scenario = Scenario {
        sources: vec!["alder-cells".into(), "birchworks".into()],
        chars: vec!["capacity_mah".into(), "ocv_mv".into()],
        lots: 26,
        n: 12,
        shift: Some((0, 0, 22, 3.0)),
    };
    for (name, text, _) in scenario.files() {
        drop_file(&site.inbox(), &name, &text);
    }
}

fn envelope_recipients(got: &[Received]) -> Vec<String> {
    let mut to: Vec<String> = got.iter().flat_map(|r| r.to.clone()).collect();
    to.sort();
    to
}

fn an_alert_goes_to_the_default_list_plus_its_source_and_characteristic_lists_once_each(
    backend: Backend,
) {
    let server = SmtpServer::start();
    let site = email_site(backend, server.port, "[\"email\"]", &[QUALITY], ROUTING);
    two_sources(&site);
    site.once();
    let alerts = site.alerts();
    assert_eq!(alerts.len(), 1, "{alerts:#?}");
    assert_eq!(alerts[0]["source"], "alder-cells");
    let got = server.received();
    // Not birchworks' buyer (another source); the lab once (capacity_mah); quality once.
    assert_eq!(
        envelope_recipients(&got),
        vec![ALDER.to_string(), LAB.to_string(), QUALITY.to_string()]
    );
    for r in &got {
        assert!(parse(r).subject().unwrap().contains("alder-cells"));
    }

    // The test message reaches every configured address once (Quality@ is quality@).
    let out = site.run(&["alerts", "test-email"]);
    assert!(out.status.success(), "{}", stderr_of(&out));
    let listed = text(&out.stdout);
    for address in [QUALITY, ALDER, BIRCH, LAB] {
        assert_eq!(listed.matches(address).count(), 1, "{listed}");
    }
    assert_eq!(server.received().len(), 3 + 4);
}

/// One lot file of alder-cells' capacity: lot `lot` (0-based), 12 units, mean 100 + `shift`.
fn capacity_lot(site: &Site, lot: usize, shift: f64) {
    let code = format!("AL-{:03}", lot + 1);
    let values = lot_values(12, 100.0 + shift, 1.0, lot);
    drop_file(
        &site.inbox(),
        &format!("{code}.csv"),
        &long_file(
            "alder-cells",
            &code,
            &lot_date(lot),
            &[("capacity_mah", values)],
        ),
    );
}

fn subjects(server: &SmtpServer) -> Vec<String> {
    server
        .received()
        .iter()
        .map(|r| parse(r).subject().unwrap_or_default().to_string())
        .collect()
}

fn opening_a_grown_shift_and_resolution_each_send_exactly_their_email_and_ack_stops_the_repeat(
    backend: Backend,
) {
    for ack in [false, true] {
        let server = SmtpServer::start();
        let site = email_site(backend, server.port, "[\"email\"]", &[QUALITY], "");
        // 20 baseline lots, 2 in control; lots 23-24 are 3 sd high: one alert, one email.
        for lot in 0..24 {
            capacity_lot(&site, lot, if lot < 22 { 0.0 } else { 3.0 });
        }
        site.once();
        let s = subjects(&server);
        assert_eq!(s.len(), 1, "{s:?}");
        assert!(s[0].contains("mean shifted up in lot AL-023"), "{s:?}");
        let id = site.alerts()[0]["id"].as_i64().unwrap().to_string();
        if ack {
            let out = site.run(&[
                "alerts",
                "ack",
                &id,
                "--note",
                "supplier contained the lots",
            ]);
            assert!(out.status.success(), "{}", stderr_of(&out));
        }

        // Lots 25-26 are 7 sd high: the shift more than doubled, announced again (numbers of
        // lot AL-025, the one that showed it), unless acknowledged.
        for lot in 24..26 {
            capacity_lot(&site, lot, 7.0);
        }
        site.once();
        let s = subjects(&server);
        if ack {
            assert_eq!(s.len(), 1, "acknowledged: no repeat: {s:?}");
        } else {
            assert_eq!(s.len(), 2, "{s:?}");
            assert!(s[1].contains("still shifted up (lot AL-025"), "{s:?}");
            let repeat = &server.received()[1];
            let plain = parse(repeat).body_text(0).unwrap().to_string();
            let history = site.json(&["history", "alder-cells", "capacity_mah"]);
            let lot25 = history
                .as_array()
                .unwrap()
                .iter()
                .find(|r| r["lot"] == "AL-025")
                .expect("AL-025 in the history");
            let mean = format!(
                "mean = {}",
                lotdrift::page::fmt::sig(lot25["mean"].as_f64().unwrap(), 5)
            );
            assert!(plain.contains(&mean), "{mean} missing in:\n{plain}");
            assert!(plain.contains("by lot AL-023"), "{plain}");
        }

        // Five in-control lots resolve it: one resolution email.
        for lot in 26..31 {
            capacity_lot(&site, lot, 0.0);
        }
        site.once();
        let s = subjects(&server);
        let expected = if ack { 2 } else { 3 };
        assert_eq!(s.len(), expected, "{s:?}");
        assert!(
            s[expected - 1].contains(&format!("back in control (alert {id} resolved)")),
            "{s:?}"
        );
        let resolution = &server.received()[expected - 1];
        let plain = parse(resolution).body_text(0).unwrap().to_string();
        assert!(plain.contains("none: back in control"), "{plain}");
        assert!(
            plain.contains("AL-031") && plain.contains("by lot AL-023"),
            "{plain}"
        );
        let alert = site.alerts().remove(0);
        assert_eq!(alert["state"], "resolved");
        // Every state change is an event with its lot, in alerts --json and in the history.
        let events: Vec<(String, String)> = alert["events"]
            .as_array()
            .unwrap()
            .iter()
            .map(|e| {
                (
                    e["kind"].as_str().unwrap().to_string(),
                    e["lot"].as_str().unwrap().to_string(),
                )
            })
            .collect();
        let third = if ack { "attached" } else { "repeated" };
        let expected_events = [
            ("opened", "AL-023"),
            ("attached", "AL-024"),
            (third, "AL-025"),
            ("attached", "AL-026"),
            ("resolved", "AL-031"),
        ]
        .map(|(k, l)| (k.to_string(), l.to_string()));
        assert_eq!(events, expected_events.to_vec());
        assert_eq!(
            alert["acknowledgements"].as_array().unwrap().len(),
            usize::from(ack)
        );
        let history = site.json(&["history", "alder-cells", "capacity_mah"]);
        let event_of = |lot: &str| {
            history
                .as_array()
                .unwrap()
                .iter()
                .find(|r| r["lot"] == lot)
                .map(|r| r["events"].as_str().unwrap().to_string())
                .unwrap()
        };
        assert_eq!(event_of("AL-023"), format!("opened mean alert {id}"));
        assert_eq!(event_of("AL-031"), format!("resolved mean alert {id}"));
        assert_eq!(event_of("AL-027"), "");
        site.once();
        assert_eq!(subjects(&server).len(), expected, "nothing more");
    }
}

/// `run --once` with the time zone `tz` (a POSIX TZ string).
fn once_in_zone(site: &Site, tz: &str) -> std::process::Output {
    let out = cmd(site.path())
        .args(["run", "--once", "--config"])
        .arg(site.config())
        .env("TZ", tz)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", stderr_of(&out));
    out
}

fn the_daily_digest_lists_each_recipients_open_alerts_once_a_day_at_local_time(backend: Backend) {
    // A zone 3 h east of UTC (POSIX: "LDT-3"); the digest time is one minute ago there.
    let local_now = chrono::Utc::now() + chrono::Duration::hours(3);
    let at = (local_now - chrono::Duration::minutes(1))
        .format("%H:%M")
        .to_string();
    let server = SmtpServer::start();
    let site = email_site(
        backend,
        server.port,
        "[\"email\", \"log\"]",
        &[QUALITY],
        &format!("{ROUTING}[alerts.digest]\nat = \"{at}\"\n"),
    );
    two_sources(&site);
    let out = once_in_zone(&site, "LDT-3");
    let log = stderr_of(&out);
    assert!(log.contains("daily digest queued"), "{log}");
    let digests: Vec<Received> = server
        .received()
        .into_iter()
        .filter(|r| parse(r).subject().unwrap_or_default().contains("digest"))
        .collect();
    // birchworks' buyer has no open alert: no digest (when_empty = false).
    assert_eq!(
        envelope_recipients(&digests),
        vec![ALDER.to_string(), LAB.to_string(), QUALITY.to_string()]
    );
    let alert = site.alerts().remove(0);
    for r in &digests {
        let m = parse(r);
        let subject = m.subject().unwrap();
        assert!(subject.ends_with(": 1 open alert"), "{subject}");
        let plain = m.body_text(0).unwrap();
        let html = m.body_html(0).unwrap();
        for needle in ["alder-cells", "capacity_mah", "mean up", "AL-023"] {
            assert!(plain.contains(needle), "{needle} missing:\n{plain}");
            assert!(html.contains(needle), "{needle} missing:\n{html}");
        }
        assert!(
            plain.contains(alert["opened_at"].as_str().unwrap()),
            "{plain}"
        );
        assert_eq!(
            structure(&m),
            vec![
                ("multipart".into(), "alternative".into()),
                ("text".into(), "plain".into()),
                ("text".into(), "html".into()),
            ]
        );
    }
    assert!(
        log.contains("open alert"),
        "the log channel lists it: {log}"
    );

    // Once a day: another run sends no second digest.
    let before = server.received().len();
    once_in_zone(&site, "LDT-3");
    assert_eq!(server.received().len(), before);
    let status = site.status();
    assert_eq!(status["outbox_pending"], 0);
    let today = local_now.date_naive();
    let made = status["last_digest"].as_str().unwrap().to_string();
    assert!(
        [today, today.pred_opt().unwrap()]
            .iter()
            .any(|d| d.format("%Y-%m-%d").to_string() == made),
        "{made}"
    );
}

fn with_when_empty_the_digest_is_sent_even_with_nothing_open_and_not_before_its_time(
    backend: Backend,
) {
    let local_now = chrono::Utc::now() - chrono::Duration::hours(5);
    let past = (local_now - chrono::Duration::minutes(1))
        .format("%H:%M")
        .to_string();
    let future = (local_now + chrono::Duration::minutes(30))
        .format("%H:%M")
        .to_string();
    let server = SmtpServer::start();
    let digest = |at: &str| format!("[alerts.digest]\nat = \"{at}\"\nwhen_empty = true\n");
    // Not yet due today, and yesterday's would be 23.5 h late: nothing.
    let site = email_site(
        backend,
        server.port,
        "[\"email\"]",
        &[QUALITY],
        &digest(&future),
    );
    once_in_zone(&site, "LST+5");
    assert!(server.received().is_empty());
    let cfg = std::fs::read_to_string(site.config()).unwrap();
    std::fs::write(site.config(), cfg.replace(&future, &past)).unwrap();
    once_in_zone(&site, "LST+5");
    let got = server.received();
    assert_eq!(got.len(), 1);
    let m = parse(&got[0]);
    assert!(
        m.subject().unwrap().ends_with(": no open alerts"),
        "{:?}",
        m.subject()
    );
    assert!(
        m.body_text(0)
            .unwrap()
            .contains("No alert you receive is open.")
    );
}

fn a_backfill_whose_shift_grows_sends_one_message_not_an_opening_and_a_repeat(backend: Backend) {
    let server = SmtpServer::start();
    let site = email_site(backend, server.port, "[\"email\"]", &[QUALITY], "");
    for lot in 0..26 {
        let shift = match lot {
            0..=21 => 0.0,
            22 | 23 => 3.0,
            _ => 7.0,
        };
        capacity_lot(&site, lot, shift);
    }
    site.once();
    let s = subjects(&server);
    assert_eq!(s.len(), 1, "{s:?}");
    assert!(s[0].contains("mean shifted up in lot AL-023"), "{s:?}");
    assert_eq!(site.alerts()[0]["lots"], 4);
}
