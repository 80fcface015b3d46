//! The HTML report and the dashboard in a real browser (headless chromium over DevTools):
//! pages load with no console error, every series has its charts, a hostile source name from
//! a lot file is shown as text, and the dashboard acknowledges an alert with the token only.
//! Screenshots are saved under `target/screenshots/`.

mod browser;
mod common;

use browser::Browser;
use std::io::{Read as _, Write as _};
use std::time::Duration;

use common::{
    Site, drop_file, long_file, lot_date, lot_values, sigterm, text, wait_exit, wait_until,
};

/// A source name that would run a script if a page inserted it unescaped.
const HOSTILE: &str = "<script>alert(1)</script>";

/// The unit of measure of one of the two characteristics (the other has none).
const UNITS: &str = "[characteristic.capacity_mah]\nunit = \"mAh\"";

/// Two sources of two characteristics, 26 lots each; alder-cells' capacity shifts by 4 unit
/// sd from lot 22 on (an open alert).
fn site(extra: &str) -> Site {
    let site = Site::new(extra);
    for (si, source) in ["alder-cells", HOSTILE].iter().enumerate() {
        for lot in 0..26 {
            let code = format!("L{si}-{:03}", lot + 1);
            let shift = if si == 0 && lot >= 21 { 4.0 } else { 0.0 };
            let chars = [
                ("capacity_mah", lot_values(12, 3000.0 + shift, 1.0, lot * 3)),
                ("mass_g", lot_values(12, 45.0, 0.2, lot * 3 + 1)),
            ];
            let file = long_file(source, &code, &lot_date(lot), &chars);
            drop_file(&site.inbox(), &format!("s{si}_{code}.csv"), &file);
        }
    }
    let out = site.once();
    assert!(out.status.success(), "run --once: {}", text(&out.stderr));
    site
}

/// The hostile name is in the page as text, no script element exists, and the page's markup
/// holds it only escaped.
fn assert_shown_as_text(b: &mut Browser) {
    let shown = b.eval(&format!(
        "document.body.innerText.includes({})",
        serde_json::to_string(HOSTILE).unwrap()
    ));
    assert_eq!(shown, true, "the hostile source name is not shown as text");
    assert_eq!(
        b.eval("document.scripts.length"),
        0,
        "the page has a script"
    );
    assert_eq!(
        b.eval("document.documentElement.outerHTML.includes('<script>alert(1)')"),
        false
    );
}

/// Every series of capacity_mah shows its unit of measure on its heading, its lot-mean axis,
/// its lot table and its facts; mass_g's (no unit configured) nowhere; the open alert (of
/// capacity) gives its means in mAh.
fn assert_units_shown(b: &mut Browser) {
    let per_series = b.eval(
        "[...document.querySelectorAll('section.series')].map(s => [\
         s.querySelector('h2').innerText.includes('capacity_mah'), \
         s.querySelector('h2').innerText.includes('(mAh)'), \
         s.querySelector('svg.chart').textContent.includes('lot mean (mAh)'), \
         s.querySelector('table.lots thead').innerText.includes('mean (mAh)'), \
         s.querySelector('dl.facts').innerText.includes(' mAh')])",
    );
    let rows = per_series.as_array().unwrap();
    assert_eq!(rows.len(), 4, "{per_series}");
    for row in rows {
        let capacity = &row[0];
        assert!(
            row.as_array().unwrap().iter().all(|v| v == capacity),
            "unit shown where it should not be, or missing: {per_series}"
        );
    }
    let card = b.eval("document.querySelector('.alert-card.open').innerText");
    let card = card.as_str().unwrap();
    assert!(
        card.contains(" mAh (n = 12) against baseline ") && card.contains("mAh;"),
        "{card}"
    );
}

#[test]
fn the_report_shows_every_series_with_its_charts_and_names_as_text() {
    let site = site(UNITS);
    let out_file = site.path().join("report.html");
    let out = site.run(&["report", "--out", out_file.to_str().unwrap()]);
    assert!(out.status.success(), "report: {}", text(&out.stderr));
    let html = std::fs::read_to_string(&out_file).unwrap();
    assert!(
        !html.contains("http://") && !html.contains("https://"),
        "the report refers to the network"
    );

    let mut b = Browser::launch();
    b.goto(&format!("file://{}", out_file.display()));
    let shot = b.screenshot("report");
    assert!(b.problems().is_empty(), "problems: {:?}", b.problems());
    // Every series: a section with the lot-mean chart, the spread chart and the CUSUM chart.
    let per_series = b.eval(
        "[...document.querySelectorAll('section.series')].map(s => \
         s.querySelectorAll('svg.chart').length)",
    );
    assert_eq!(
        per_series,
        serde_json::json!([3, 3, 3, 3]),
        "charts per series"
    );
    // The spread chart has every lot (26 points) and the spread test's limit.
    let spread = b.eval(
        "[...document.querySelectorAll('svg[id$=\"-spread\"]')].map(c => \
         [c.querySelectorAll('g > title').length, c.querySelectorAll('path.limit').length > 0])",
    );
    assert_eq!(
        spread,
        serde_json::json!([[26, true], [26, true], [26, true], [26, true]]),
        "spread charts"
    );
    // The alert is listed with its numbers, and its lots are flagged on the chart.
    assert!(
        b.eval("document.querySelectorAll('.alert-card.open').length")
            .as_u64()
            >= Some(1)
    );
    assert!(
        b.eval("document.querySelectorAll('svg .m-flagged').length")
            .as_u64()
            >= Some(1)
    );
    assert_eq!(
        b.eval("document.querySelectorAll('#cannot-know').length"),
        1
    );
    assert_shown_as_text(&mut b);
    assert_units_shown(&mut b);
    eprintln!("screenshot: {}", shot.display());
    // It prints: a PDF with a page of its own for each series after the summary pages.
    let pdf = b.call(
        "Page.printToPDF",
        serde_json::json!({"preferCSSPageSize": true}),
    );
    let pdf = base64::Engine::decode(
        &base64::engine::general_purpose::STANDARD,
        pdf["data"].as_str().unwrap(),
    )
    .unwrap();
    assert!(pdf.starts_with(b"%PDF"));
    let pages = pdf
        .windows(12)
        .filter(|w| w.starts_with(b"/Type /Page") && w[11] != b's')
        .count();
    assert!(pages >= 5, "{pages} PDF pages for 4 series");
    std::fs::write(browser::screenshot_dir().join("report.pdf"), &pdf).unwrap();

    // One source, a date range: only that source's series and the lots in range.
    let one = site.path().join("one.html");
    let out = site.run(&[
        "report",
        "--out",
        one.to_str().unwrap(),
        "--source",
        "alder-cells",
        "--from",
        &lot_date(20),
        "--to",
        &lot_date(25),
    ]);
    assert!(out.status.success(), "report: {}", text(&out.stderr));
    b.goto(&format!("file://{}", one.display()));
    b.screenshot("report-one-source");
    assert_eq!(
        b.eval("document.querySelectorAll('section.series').length"),
        2
    );
    assert_eq!(
        b.eval("document.querySelector('section.series table.lots tbody').rows.length"),
        6
    );
    assert!(b.problems().is_empty(), "problems: {:?}", b.problems());
}

#[test]
fn report_flags_are_checked() {
    let site = site("");
    let bad = site.run(&["report", "--out", "x.html", "--from", "March"]);
    assert_eq!(bad.status.code(), Some(2));
    assert!(
        text(&bad.stderr).contains("--from"),
        "{}",
        text(&bad.stderr)
    );
    let none = site.run(&["report", "--out", "x.html", "--source", "nobody"]);
    assert_eq!(none.status.code(), Some(2));
    assert!(
        text(&none.stderr).contains("--source"),
        "{}",
        text(&none.stderr)
    );
}

/// A port free on 127.0.0.1 a moment ago.
fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

const TOKEN: &str = "token-for-the-page-tests-0123456789";

/// The daemon with the dashboard on `port`, the site's lots already stored; killed when
/// dropped.
struct Dashboard {
    site: Site,
    daemon: std::process::Child,
    port: u16,
}

impl Drop for Dashboard {
    fn drop(&mut self) {
        let _ = self.daemon.kill();
        let _ = self.daemon.wait();
    }
}

impl Dashboard {
    fn start() -> Dashboard {
        let site = site(UNITS);
        let port = free_port();
        std::fs::write(site.path().join("web-token.txt"), format!("{TOKEN}\n")).unwrap();
        let mut cfg = std::fs::read_to_string(site.config()).unwrap();
        cfg.push_str(&format!(
            "\n[web]\nlisten = \"127.0.0.1:{port}\"\ntoken_file = \"web-token.txt\"\n"
        ));
        std::fs::write(site.config(), cfg).unwrap();
        let daemon = site.spawn_daemon();
        let up = wait_until(Duration::from_secs(30), || {
            std::net::TcpStream::connect(("127.0.0.1", port)).is_ok()
        });
        let log = std::fs::read_to_string(site.path().join("daemon.log")).unwrap_or_default();
        assert!(up, "the dashboard did not listen within 30 s: {log}");
        Dashboard { site, daemon, port }
    }

    fn url(&self, path: &str) -> String {
        format!("http://127.0.0.1:{}{path}", self.port)
    }

    /// The acknowledgements of the site's alerts, as `alerts --json` lists them.
    fn acks(&self) -> usize {
        self.site
            .alerts()
            .iter()
            .map(|a| a["acknowledgements"].as_array().map_or(0, Vec::len))
            .sum()
    }

    /// A raw POST (no browser, so no cookie), returning the status line.
    fn post(&self, path: &str, body: &str) -> String {
        self.raw("POST", path, &format!("127.0.0.1:{}", self.port), body)
    }

    /// A raw request naming `host`, returning the status line.
    fn raw(&self, method: &str, path: &str, host: &str, body: &str) -> String {
        let mut s = std::net::TcpStream::connect(("127.0.0.1", self.port)).unwrap();
        write!(
            s,
            "{method} {path} HTTP/1.1\r\nHost: {host}\r\nContent-Type: \
             application/x-www-form-urlencoded\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
            body.len()
        )
        .unwrap();
        let mut out = String::new();
        s.read_to_string(&mut out).unwrap();
        out.lines().next().unwrap_or_default().to_string()
    }
}

#[test]
fn the_dashboard_shows_every_series_and_acknowledges_with_the_token_only() {
    let mut d = Dashboard::start();
    let mut b = Browser::launch();
    b.goto(&d.url("/"));
    b.screenshot("dashboard-overview");
    assert_eq!(
        b.eval("document.querySelectorAll('table.overview tbody tr').length"),
        4
    );
    assert_shown_as_text(&mut b);
    let overview = b.eval("document.querySelector('table.overview').innerText");
    assert!(
        overview.as_str().unwrap().contains("capacity_mah (mAh)"),
        "{overview}"
    );
    let links = b.eval("[...document.querySelectorAll('table.overview a')].map(a => a.href)");
    for (i, link) in links.as_array().unwrap().iter().enumerate() {
        b.goto(link.as_str().unwrap());
        let charts = b.eval("document.querySelectorAll('section.series svg.chart').length");
        assert_eq!(charts, 3, "charts on {link}");
        assert!(
            b.eval("document.querySelectorAll('table.lots tbody tr').length")
                .as_u64()
                >= Some(26)
        );
        b.screenshot(&format!("dashboard-series-{i}"));
    }
    // The series are listed by source name: the first is the hostile source's.
    b.goto(links[0].as_str().unwrap());
    assert_shown_as_text(&mut b);
    assert!(b.problems().is_empty(), "problems: {:?}", b.problems());

    // Without the token: refused, nothing recorded.
    b.goto(&d.url("/alerts"));
    let fill = |token: &str| {
        format!(
            "(() => {{ const f = document.querySelector('.alert-card.open form'); \
             f.by.value = 'Test Engineer'; f.note.value = 'supplier informed'; \
             f.token.value = {}; f.submit(); }})()",
            serde_json::to_string(token).unwrap()
        )
    };
    b.navigating(&fill(""));
    let msg = b.eval("document.querySelector('.message').innerText");
    assert!(msg.as_str().unwrap().contains("not acknowledged"), "{msg}");
    assert_eq!(d.acks(), 0);
    b.screenshot("dashboard-ack-refused");

    // With the token but without the page's cookie (a cross-site form): refused as well.
    let status = d.post(
        "/alerts/1/ack",
        &format!("csrf=0123456789abcdef0123456789abcdef&token={TOKEN}&by=x&note=y"),
    );
    assert!(status.contains("403"), "{status}");
    assert_eq!(d.acks(), 0);
    // A page of another site whose name resolves to 127.0.0.1 cannot read the dashboard.
    let status = d.raw("GET", "/", "evil.example:80", "");
    assert!(status.contains("421"), "{status}");

    // With the token: acknowledged, shown, and in `alerts --json`.
    b.navigating(&fill(TOKEN));
    let msg = b.eval("document.querySelector('.message').innerText");
    assert!(
        msg.as_str()
            .unwrap()
            .contains("acknowledged by Test Engineer"),
        "{msg}"
    );
    assert_eq!(d.acks(), 1);
    b.screenshot("dashboard-ack-done");
    // The browser logs the refusal's 403 as a failed load; nothing else may be logged.
    let (refused, other): (Vec<String>, Vec<String>) = b
        .problems()
        .into_iter()
        .partition(|p| p.contains("403") && p.contains("/ack"));
    assert_eq!(refused.len(), 1, "{refused:?}");
    assert!(other.is_empty(), "problems: {other:?}");

    sigterm(&d.daemon);
    assert!(wait_exit(&mut d.daemon, Duration::from_secs(30)).success());
}

#[test]
fn a_dashboard_beyond_loopback_needs_a_token_file() {
    let site = Site::new("[web]\nlisten = \"0.0.0.0:8421\"\n");
    let out = site.run(&["check-config"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("web.token_file"),
        "{}",
        text(&out.stderr)
    );
    let bad = Site::new("[web]\nlisten = \"localhost\"\n");
    let out = bad.run(&["check-config"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("web.listen"),
        "{}",
        text(&out.stderr)
    );
}

#[test]
fn on_loopback_without_a_token_file_the_daemon_writes_a_private_token() {
    let site = Site::new("");
    let port = free_port();
    let mut cfg = std::fs::read_to_string(site.config()).unwrap();
    cfg.push_str(&format!("\n[web]\nlisten = \"127.0.0.1:{port}\"\n"));
    std::fs::write(site.config(), cfg).unwrap();
    let mut daemon = site.spawn_daemon();
    let up = wait_until(Duration::from_secs(30), || {
        std::net::TcpStream::connect(("127.0.0.1", port)).is_ok()
    });
    let token = site.path().join("lotdrift-web.token");
    let written = wait_until(Duration::from_secs(10), || token.exists());
    sigterm(&daemon);
    let stopped = wait_exit(&mut daemon, Duration::from_secs(30));
    assert!(up && written, "dashboard up {up}, token written {written}");
    assert!(stopped.success());
    let text = std::fs::read_to_string(&token).unwrap();
    let t = text.trim();
    assert!(
        t.len() == 32 && t.bytes().all(|b| b.is_ascii_hexdigit()),
        "{t:?}"
    );
    use std::os::unix::fs::PermissionsExt as _;
    let mode = std::fs::metadata(&token).unwrap().permissions().mode() & 0o777;
    assert_eq!(mode, 0o600);
}

/// A series of positive, right-skewed values (log-normal units, sd 0.8 of ln(value)) is tested
/// on the log scale: its report shows geometric lot means for every lot, every lot's
/// within-lot sd, says that the series is tested on the log scale, and gives the design's
/// numbers (of ln(value)) without the unit of measure.
#[test]
fn a_log_scale_series_shows_every_lot_on_its_charts() {
    let site = Site::new("[characteristic.leakage_ua]\nunit = \"uA\"");
    for lot in 0..26 {
        let code = format!("LK-{:03}", lot + 1);
        let values: Vec<f64> = lot_values(12, 0.0, 0.8, lot)
            .iter()
            .map(|v| v.exp())
            .collect();
        let file = long_file(
            "alder-cells",
            &code,
            &lot_date(lot),
            &[("leakage_ua", values)],
        );
        drop_file(&site.inbox(), &format!("{code}.csv"), &file);
    }
    let out = site.once();
    assert!(out.status.success(), "run --once: {}", text(&out.stderr));
    let out_file = site.path().join("log.html");
    let out = site.run(&["report", "--out", out_file.to_str().unwrap()]);
    assert!(out.status.success(), "report: {}", text(&out.stderr));

    let mut b = Browser::launch();
    b.goto(&format!("file://{}", out_file.display()));
    b.screenshot("report-log-scale");
    assert!(b.problems().is_empty(), "problems: {:?}", b.problems());
    let notes = b.eval("document.querySelector('ul.notes').innerText");
    assert!(
        notes.as_str().unwrap().contains("Tested on the log scale"),
        "{notes}"
    );
    let mut chart = |kind: &str| {
        b.eval(&format!(
            "(() => {{ const c = document.querySelector('svg[id$=\"-{kind}\"]'); \
             return [[...c.querySelectorAll('text.axis')].pop().textContent, \
             c.querySelectorAll('g > title').length]; }})()"
        ))
    };
    assert_eq!(
        chart("mean"),
        serde_json::json!(["geometric lot mean (uA)", 26])
    );
    assert_eq!(
        chart("spread"),
        serde_json::json!(["within-lot sd (uA)", 26])
    );
    let ln_facts = b.eval(
        "[...document.querySelectorAll('dl.facts dt')].filter(dt => \
         dt.innerText.includes('of ln(value)')).map(dt => dt.nextElementSibling.innerText)",
    );
    let ln_facts = ln_facts.as_array().unwrap();
    assert_eq!(ln_facts.len(), 3, "{ln_facts:?}");
    assert!(
        ln_facts.iter().all(|v| !v.as_str().unwrap().contains("uA")),
        "{ln_facts:?}"
    );
}
