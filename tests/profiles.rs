//! Input profiles end to end: the real binary on station files written by real encoders and a
//! spreadsheet library (`tests/data/profiles/make_fixtures.py`), each with a malformed twin.

mod common;

use std::path::{Path, PathBuf};
use std::time::Duration;

use common::*;

/// The profiles of the fixtures, in the keys of the scripting contract.
const PROFILES: &str = r#"
[[input.profile]]
name = "birchworks-lab"
match = "birchworks_*.csv"
delimiter = ";"
decimal = ","
timezone = "Europe/Berlin"
date_format = "%d.%m.%Y %H:%M"
header_row = 3
ignore = ["Operator"]
[input.profile.columns]
source = "Supplier"
lot = "Batch No."
unit = "Serial"
sampled_at = "Date"
[input.profile.characteristics]
"Capacity [mAh]" = "capacity_mah"
"Mass [g]" = "mass_g"

[[input.profile]]
name = "alder-unicode"
match = "alder_*.txt"
delimiter = "auto"
encoding = "auto"
timezone = "Europe/Berlin"
[input.profile.columns]
source = "Lieferant"
characteristic = "Merkmal"
lot = "Charge"
value = "Messwert"
sampled_at = "Zeitpunkt"
unit = "Zelle"
[input.profile.characteristics]
"Kapazität" = "capacity_mah"
"Innenwiderstand" = "resistance_mohm"

[[input.profile]]
name = "cedar-ansi"
folder = "cedar"
encoding = "windows-1252"
timezone = "Europe/Berlin"
[input.profile.characteristics]
"Kapazität [mAh]" = "capacity_mah"
"Dicke [mm]" = "thickness_mm"

[[input.profile]]
name = "alder-workbook"
match = "alder_cells*.xlsx"
sheet = "Messwerte"
header_row = 3
source = "alder-cells"
timezone = "Europe/Berlin"
[input.profile.columns]
lot = "Batch No."
unit = "Serial"
sampled_at = "Date"
[input.profile.characteristics]
"Capacity [mAh]" = "capacity_mah"
"Mass [g]" = "mass_g"
"#;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/profiles")
        .join(name)
}

/// Copies a fixture into the inbox (or a subfolder of it).
fn drop_fixture(site: &Site, folder: Option<&str>, name: &str) {
    let dir = match folder {
        Some(f) => site.inbox().join(f),
        None => site.inbox(),
    };
    std::fs::create_dir_all(&dir).unwrap();
    std::fs::copy(fixture(name), dir.join(name)).unwrap();
}

fn reason(site: &Site, name: &str) -> String {
    let path = site.path().join(format!("quarantine/{name}.reason.txt"));
    std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

fn check_file(site: &Site, file: &Path, extra: &[&str]) -> (Option<i32>, serde_json::Value) {
    let mut args = vec!["check-file", file.to_str().unwrap(), "--json"];
    args.extend_from_slice(extra);
    let out = site.run(&args);
    let json = serde_json::from_slice(&out.stdout)
        .unwrap_or_else(|e| panic!("{e}: {}{}", text(&out.stdout), text(&out.stderr)));
    (out.status.code(), json)
}

#[test]
fn station_files_and_workbooks_are_stored_through_their_profiles() {
    let site = Site::new(PROFILES);
    drop_fixture(&site, None, "birchworks_2026-03-29.csv");
    drop_fixture(&site, None, "alder_unicode.txt");
    drop_fixture(&site, Some("cedar"), "cedar_ansi.csv");
    drop_fixture(&site, None, "alder_cells.xlsx");
    site.once();
    let status = site.status();
    assert_eq!(status["quarantined"], 0, "{status}");
    assert_eq!(status["lots"], 1 + 1 + 1 + 2, "{status}");
    assert_eq!(status["measurements"], 8 + 6 + 6 + 32, "{status}");
    assert!(
        site.files_in("inbox").is_empty(),
        "the subfolder's file was taken too"
    );
    assert_eq!(site.files_in("archive").len(), 4);

    // Decimal commas, renamed columns and local times (CET before the clock change).
    let hist = site.json(&["history", "birchworks", "capacity_mah"]);
    assert_eq!(hist[0]["lot"], "BW-0007", "{hist}");
    assert_eq!(hist[0]["n"], 4, "{hist}");
    let mean = hist[0]["mean"].as_f64().unwrap();
    assert!((mean - 3010.75).abs() < 1e-9, "{hist}");
    assert_eq!(hist[0]["sampled_at"], "2026-03-28T22:50:00.000Z", "{hist}");
    // UTF-16 long layout with mapped characteristic names.
    let hist = site.json(&["history", "alder-cells", "resistance_mohm"]);
    assert_eq!(hist[0]["n"], 3, "{hist}");
    // Workbook: numeric batch numbers are lot names, the formula's cached value is read.
    let hist = site.json(&["history", "alder-cells", "mass_g"]);
    let lots: Vec<&str> = hist
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["lot"].as_str().unwrap())
        .collect();
    assert_eq!(lots, ["4711", "4712"], "{hist}");
    let first_mean = (0..8).map(|i| 3005.5 + i as f64 * 0.25).sum::<f64>() / 800.0 + 15.0;
    let mean = hist[0]["mean"].as_f64().unwrap();
    assert!((mean - first_mean).abs() < 1e-6, "{hist}");
    // windows-1252 headers through the subfolder's profile.
    let hist = site.json(&["history", "cedar-energy", "thickness_mm"]);
    assert_eq!(hist[0]["n"], 3, "{hist}");
}

#[test]
fn malformed_twins_are_quarantined_naming_line_or_cell_column_and_profile() {
    let site = Site::new(PROFILES);
    drop_fixture(&site, None, "birchworks_2026-03-29_bad.csv");
    drop_fixture(&site, None, "alder_unicode_bad.txt");
    drop_fixture(&site, Some("cedar"), "cedar_ansi_bad.csv");
    drop_fixture(&site, None, "alder_cells_bad.xlsx");
    site.once();
    let status = site.status();
    assert_eq!(status["quarantined"], 4, "{status}");
    assert_eq!(status["lots"], 0, "a file is all or nothing");
    assert!(site.files_in("inbox").is_empty());

    let r = reason(&site, "birchworks_2026-03-29_bad.csv");
    assert!(
        r.contains("birchworks_2026-03-29_bad.csv:6:5 (column Capacity [mAh]): expected a number with ',' as decimal separator"),
        "{r}"
    );
    assert!(r.contains("found \"3.012,5\""), "{r}");
    // Every problem is listed: the skipped local time of the spring clock change too.
    assert!(
        r.contains("birchworks_2026-03-29_bad.csv:8:4 (column Date): expected an existing local time, found \"29.03.2026 02:30\" which never happened in Europe/Berlin"),
        "{r}"
    );
    assert!(
        r.contains("(read with input profile \"birchworks-lab\")"),
        "{r}"
    );

    let r = reason(&site, "alder_unicode_bad.txt");
    assert!(
        r.contains("alder_unicode_bad.txt:5:4 (column Messwert): expected a number"),
        "{r}"
    );
    assert!(r.contains("\"n/a\""), "{r}");

    let r = reason(&site, "cedar_ansi_bad.csv");
    assert!(
        r.contains("cedar_ansi_bad.csv:3:4 (column sampled_at): expected an unambiguous local time, found \"2026-10-25 02:30\" which happened twice in Europe/Berlin"),
        "{r}"
    );
    assert!(
        r.contains("(read with input profile \"cedar-ansi\")"),
        "{r}"
    );

    let r = reason(&site, "alder_cells_bad.xlsx");
    assert!(
        r.contains("alder_cells_bad.xlsx: Messwerte!C17 (column Capacity [mAh]): expected a numeric cell, found text \"n/a\""),
        "{r}"
    );
    assert!(
        r.contains("(read with input profile \"alder-workbook\")"),
        "{r}"
    );
}

#[test]
fn a_semicolon_file_without_a_profile_gets_a_hint_at_the_keys_it_needs() {
    let site = Site::new("");
    drop_fixture(&site, None, "birchworks_2026-03-29.csv");
    drop_fixture(&site, None, "cedar_ansi.csv");
    site.once();
    assert_eq!(site.status()["quarantined"], 2);
    let r = reason(&site, "birchworks_2026-03-29.csv");
    assert!(r.contains("birchworks_2026-03-29.csv:1:"), "{r}");
    assert!(r.contains("delimiter = \";\""), "{r}");
    assert!(r.contains("decimal = \",\""), "{r}");
    assert!(r.contains("[[input.profile]]"), "{r}");
    let r = reason(&site, "cedar_ansi.csv");
    assert!(
        r.contains("expected UTF-8 text, found invalid byte 0xE4"),
        "{r}"
    );
    assert!(r.contains("encoding = \"windows-1252\""), "{r}");
}

#[test]
fn workbook_dates_read_the_same_in_the_1900_and_1904_date_systems() {
    let site = Site::new(PROFILES);
    let (code, a) = check_file(&site, &fixture("alder_cells.xlsx"), &[]);
    assert_eq!(code, Some(0), "{a}");
    let (code, b) = check_file(&site, &fixture("alder_cells_1904.xlsx"), &[]);
    assert_eq!(code, Some(0), "{b}");
    assert_eq!(a["profile"], "alder-workbook");
    assert_eq!(a["lots"], b["lots"]);
    assert_eq!(a["first_values"], b["first_values"]);
    // 08:30 in Berlin in March is 07:30 UTC.
    assert_eq!(
        a["first_values"][0]["sampled_at"],
        "2026-03-02T07:30:00.000Z"
    );
    assert_eq!(a["lots"][1]["first_sampled_at"], "2026-03-03T07:30:00.000Z");
    assert_eq!(a["values"], 32);
}

#[test]
fn check_file_prints_what_would_be_stored_or_every_problem_and_stores_nothing() {
    let site = Site::new(PROFILES);
    let (code, ok) = check_file(&site, &fixture("birchworks_2026-03-29.csv"), &[]);
    assert_eq!(code, Some(0), "{ok}");
    assert_eq!(ok["ok"], true);
    assert_eq!(ok["profile"], "birchworks-lab");
    assert_eq!(ok["layout"], "wide");
    assert_eq!(
        ok["characteristics"],
        serde_json::json!(["capacity_mah", "mass_g"])
    );
    let lot = &ok["lots"][0];
    assert_eq!(
        (lot["source"].as_str(), lot["lot"].as_str()),
        (Some("birchworks"), Some("BW-0007"))
    );
    assert_eq!(lot["units"], 4);
    // 01:59 CET and 03:00 CEST on the night of the spring clock change: one minute apart.
    let times: Vec<&str> = ok["first_values"]
        .as_array()
        .unwrap()
        .iter()
        .take(4)
        .map(|v| v["sampled_at"].as_str().unwrap())
        .collect();
    assert_eq!(
        times,
        [
            "2026-03-28T22:50:00.000Z",
            "2026-03-29T00:59:00.000Z",
            "2026-03-29T01:00:00.000Z",
            "2026-03-29T01:01:00.000Z"
        ]
    );
    assert_eq!(ok["first_values"][1]["value"], 3010.5);

    let (code, bad) = check_file(&site, &fixture("birchworks_2026-03-29_bad.csv"), &[]);
    assert_eq!(code, Some(1), "{bad}");
    assert_eq!(bad["ok"], false);
    let problems = bad["problems"].as_array().unwrap();
    assert_eq!(problems.len(), 2, "{bad}");
    assert_eq!(problems[0]["position"], "6:5");
    assert_eq!(problems[0]["column_name"], "Capacity [mAh]");
    assert_eq!(problems[0]["kind"], "bad_number");
    assert_eq!(problems[1]["kind"], "skipped_time");

    let (code, cell) = check_file(&site, &fixture("alder_cells_bad.xlsx"), &[]);
    assert_eq!(code, Some(1));
    assert_eq!(cell["problems"][0]["position"], "Messwerte!C17");
    assert_eq!(cell["problems"][0]["sheet"], "Messwerte");
    assert_eq!(cell["problems"][0]["row"], 17);

    // A file outside the inbox gets a folder profile only when asked for by name.
    let (code, plain) = check_file(&site, &fixture("cedar_ansi.csv"), &[]);
    assert_eq!(
        (code, plain["profile"].as_str()),
        (Some(1), Some("built-in"))
    );
    let (code, named) = check_file(
        &site,
        &fixture("cedar_ansi.csv"),
        &["--profile", "cedar-ansi"],
    );
    assert_eq!(code, Some(0), "{named}");
    assert_eq!(
        named["lots"][0]["last_sampled_at"],
        "2026-10-25T03:00:00.000Z"
    );
    let out = site.run(&[
        "check-file",
        fixture("cedar_ansi.csv").to_str().unwrap(),
        "--profile",
        "nope",
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("no input profile named \"nope\""),
        "{}",
        text(&out.stderr)
    );
    // Inside the inbox the subfolder selects the profile, however the path is written.
    std::fs::create_dir_all(site.inbox().join("cedar")).unwrap();
    std::fs::copy(fixture("cedar_ansi.csv"), site.inbox().join("cedar/c.csv")).unwrap();
    let out = site.run(&["check-file", "./inbox/../inbox/cedar/c.csv", "--json"]);
    assert!(out.status.success(), "{}", text(&out.stdout));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["profile"], "cedar-ansi");
    assert!(
        !site.path().join("lotdrift.db").exists(),
        "check-file stores nothing"
    );
}

#[test]
fn the_machine_zone_is_the_default_and_tz_is_honoured() {
    let site = Site::new("[[input.profile]]\nname = \"local\"\nmatch = \"*.csv\"\n");
    let file = site.path().join("local.csv");
    std::fs::write(
        &file,
        "source,lot,sampled_at,mass_g\nalder-cells,A1,2026-03-02 08:30,46.5\n",
    )
    .unwrap();
    let mut c = cmd(site.path());
    c.args(["check-file", file.to_str().unwrap(), "--json", "--config"])
        .arg(site.config())
        .env("TZ", "Europe/Berlin");
    let out = c.output().unwrap();
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(
        v["first_values"][0]["sampled_at"],
        "2026-03-02T07:30:00.000Z"
    );
}

#[test]
fn profile_config_errors_name_their_keys() {
    let site = Site::new(
        r#"[[input.profile]]
name = "birchworks-lab"
delimiter = ";;"
decimal = ","
timezone = "Europe/Berln"
encoding = "klingon"
date_format = "%H:%M"
header_row = 0
[input.profile.columns]
batch = "Batch No."
"#,
    );
    let out = site.run(&["check-config"]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    for key in [
        "input.profile[birchworks-lab].match",
        "input.profile[birchworks-lab].delimiter",
        "input.profile[birchworks-lab].timezone: \"Europe/Berln\" is not an IANA time zone",
        "input.profile[birchworks-lab].encoding: unknown encoding \"klingon\"",
        "input.profile[birchworks-lab].date_format",
        "input.profile[birchworks-lab].header_row",
        "input.profile[birchworks-lab].columns.batch: unknown column",
    ] {
        assert!(err.contains(key), "{key} missing in: {err}");
    }
    let site = Site::new("[[input.profile]]\nname = \"x\"\nmatch = \"*.csv\"\nsepartor = \";\"\n");
    let out = site.run(&["check-config"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("separtor"),
        "{}",
        text(&out.stderr)
    );
}

#[test]
fn the_daemon_takes_files_renamed_into_a_profile_subfolder() {
    let site = Site::new(&format!(
        "[watch]\nsettle_seconds = 30.0\nrescan_seconds = 3600.0\n{PROFILES}"
    ));
    std::fs::create_dir_all(site.inbox().join("cedar")).unwrap();
    let mut daemon = site.spawn_daemon();
    let lots = || {
        let out = site.run(&["status", "--json"]);
        serde_json::from_slice::<serde_json::Value>(&out.stdout)
            .ok()
            .and_then(|v| v["lots"].as_i64())
            .unwrap_or(-1)
    };
    assert!(wait_until(Duration::from_secs(20), || lots() == 0));
    std::thread::sleep(Duration::from_millis(300));
    let staged = site.path().join("staging.csv");
    std::fs::copy(fixture("cedar_ansi.csv"), &staged).unwrap();
    std::fs::rename(&staged, site.inbox().join("cedar/cedar_ansi.csv")).unwrap();
    let stored = wait_until(Duration::from_secs(20), || lots() == 1);
    sigterm(&daemon);
    let status = wait_exit(&mut daemon, Duration::from_secs(10));
    let log = std::fs::read_to_string(site.path().join("daemon.log")).unwrap_or_default();
    assert!(
        stored,
        "file in inbox/cedar/ not stored; daemon log:\n{log}"
    );
    assert!(status.success());
    assert_eq!(site.files_in("archive").len(), 1);
}

#[test]
fn an_opendocument_sheet_reads_like_a_workbook() {
    let site = Site::new(
        "[[input.profile]]\nname = \"cedar-ods\"\nmatch = \"*.ods\"\ntimezone = \"Europe/Berlin\"\n",
    );
    drop_fixture(&site, None, "cedar_sheet.ods");
    drop_fixture(&site, None, "cedar_sheet_bad.ods");
    site.once();
    let status = site.status();
    assert_eq!(
        (
            &status["lots"],
            &status["measurements"],
            &status["quarantined"]
        ),
        (
            &serde_json::json!(1),
            &serde_json::json!(4),
            &serde_json::json!(1)
        ),
        "{status}"
    );
    let hist = site.json(&["history", "cedar-energy", "capacity_mah"]);
    // 09:00 in Berlin in July (CEST) is 07:00 UTC.
    assert_eq!(hist[0]["sampled_at"], "2026-07-01T07:00:00.000Z", "{hist}");
    assert!((hist[0]["mean"].as_f64().unwrap() - 2991.5).abs() < 1e-9);
    let r = reason(&site, "cedar_sheet_bad.ods");
    assert!(
        r.contains("cedar_sheet_bad.ods: Pruefung!D4 (column value): expected a numeric cell, found text \"tbd\""),
        "{r}"
    );
}

#[test]
fn a_workbook_in_our_column_names_needs_no_profile_and_may_start_right_of_a1() {
    let site = Site::new("");
    let (code, v) = check_file(&site, &fixture("birchworks_offset.xlsx"), &[]);
    assert_eq!(code, Some(0), "{v}");
    assert_eq!(v["profile"], "built-in");
    assert_eq!(v["values"], 3);
    // A date cell without a time is a date, whatever the machine's zone.
    assert_eq!(
        v["first_values"][0]["sampled_at"],
        "2026-03-05T00:00:00.000Z"
    );
    assert_eq!(v["first_values"][2]["value"], 3003.0);
}
