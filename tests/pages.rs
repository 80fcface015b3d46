//! The HTML report and the dashboard in a real browser (headless chromium over DevTools):
//! pages load with no console error, every series has its charts, a hostile source name from
//! a lot file is shown as text, and the dashboard acknowledges an alert with the token only.
//! Screenshots are saved under `target/screenshots/`.

mod browser;
mod common;

use browser::Browser;
use common::{Site, drop_file, long_file, lot_date, lot_values, text};

/// A source name that would run a script if a page inserted it unescaped.
const HOSTILE: &str = "<script>alert(1)</script>";

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

#[test]
fn the_report_shows_every_series_with_its_charts_and_names_as_text() {
    let site = site("");
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
    eprintln!("screenshot: {}", shot.display());

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
