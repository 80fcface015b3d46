//! The command line's tables and JSON as a person and a script see them: every table fits 100
//! columns, numbers are rounded (no e-notation), the unit of measure is shown, a CUSUM alert
//! shows its CUSUM, `history` shows every decision of a lot.

mod common;

use common::*;

const UNITS: &str = "[characteristic.capacity_mah]\nunit = \"mAh\"\n";

/// Two sources, two characteristics; birchworks capacity_mah shifts by 3 sd from lot 23 on.
fn site() -> Site {
    let site = Site::new(UNITS);
    let scenario = Scenario {
        sources: vec![
            "alder-cells".into(),
            "birchworks-and-sons-precision-cells".into(),
        ],
        chars: vec!["capacity_mah".into(), "internal_resistance_mohm".into()],
        lots: 26,
        n: 12,
        shift: Some((1, 0, 22, 3.0)),
    };
    for (name, text, _) in scenario.files() {
        drop_file(&site.inbox(), &name, &text);
    }
    site.once();
    site
}

fn stdout(site: &Site, args: &[&str]) -> String {
    let out = site.run(args);
    assert!(out.status.success(), "{args:?}: {}", text(&out.stderr));
    text(&out.stdout)
}

fn widest(s: &str) -> usize {
    s.lines().map(|l| l.chars().count()).max().unwrap_or(0)
}

#[test]
fn tables_fit_100_columns_and_read_as_people_write_numbers() {
    let site = site();
    let src = "birchworks-and-sons-precision-cells";
    for args in [
        vec!["status"],
        vec!["alerts"],
        vec!["history", src],
        vec!["history", src, "capacity_mah"],
        vec!["baseline", "show", src, "capacity_mah"],
    ] {
        let shown = stdout(&site, &args);
        assert!(
            widest(&shown) <= 100,
            "{args:?} is {} wide:\n{shown}",
            widest(&shown)
        );
        assert!(
            !shown.contains("e0") && !shown.contains("e1") && !shown.contains("e2"),
            "{args:?} has e-notation:\n{shown}"
        );
    }
    let status = stdout(&site, &["status"]);
    assert!(status.contains("tests (mean and spread)"), "{status}");
    assert!(!status.contains("lots tested"), "{status}");
    assert!(status.contains("capacity_mah (mAh)"), "{status}");

    let alerts = stdout(&site, &["alerts"]);
    for word in ["mean", "lot", "2026-", "ack by", "mAh"] {
        assert!(alerts.contains(word), "{word} missing:\n{alerts}");
    }

    // history: a row per lot with both decisions (mean and spread) of a tested lot.
    let history = stdout(&site, &["history", src, "capacity_mah"]);
    let tested = history.lines().filter(|l| l.contains("tested")).count();
    assert_eq!(tested, 6, "{history}");
    let row = history.lines().find(|l| l.starts_with("BI-024")).unwrap();
    assert_eq!(
        row.matches("p ").count(),
        2,
        "mean and spread decisions: {row}"
    );
    assert!(history.contains("signal"), "{history}");

    // A narrower terminal is honoured when COLUMNS says so.
    let out = cmd(site.path())
        .env("COLUMNS", "80")
        .args(["history", src, "--config"])
        .arg(site.config())
        .output()
        .unwrap();
    let narrow = text(&out.stdout);
    assert!(widest(&narrow) <= 80, "{narrow}");
}

#[test]
fn json_carries_the_unit_and_the_cusum() {
    let site = site();
    let alerts = site.alerts();
    assert_eq!(alerts.len(), 1, "{alerts:#?}");
    let a = &alerts[0];
    assert_eq!(a["unit_of_measure"], "mAh");
    assert!(a.get("unit").is_none(), "{a}");
    assert_eq!(a["kind"], "mean");
    assert!(a["cusum_h"].as_f64().unwrap() > 0.0, "{a}");
    assert!(a["cusum_upper"].is_f64(), "{a}");
    // A mean test has one df: `df2` is not the CUSUM sum read from the column beside it
    // (regression: it was, and pages and emails showed `df = 220 and 13.6`).
    assert!(a["df2"].is_null(), "{a}");
    // Characteristics without a unit have no `unit_of_measure` key (history stays
    // byte-stable); `unit` is a unit's serial in lot files and views, never this.
    let hist = site.json(&["history", "alder-cells"]);
    for r in hist.as_array().unwrap() {
        match r["characteristic"].as_str().unwrap() {
            "capacity_mah" => assert_eq!(r["unit_of_measure"], "mAh"),
            _ => assert!(r.get("unit_of_measure").is_none(), "{r}"),
        }
    }
    let status = site.status();
    let series = status["series"].as_array().unwrap();
    assert!(series.iter().any(|s| s["unit_of_measure"] == "mAh"));
    let show = site.json(&["baseline", "show", "alder-cells", "capacity_mah"]);
    assert_eq!(show["unit_of_measure"], "mAh");
    assert_eq!(show["baseline"]["lots"].as_array().unwrap().len(), 20);
    assert!(show["changes"].as_array().unwrap().is_empty());
}

#[test]
fn a_bad_unit_is_a_config_error_naming_the_key() {
    let site = Site::new("[characteristic.mass_g]\nunit = \"\"\n");
    let out = site.run(&["check-config"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("characteristic.mass_g.unit"),
        "{}",
        text(&out.stderr)
    );
}
