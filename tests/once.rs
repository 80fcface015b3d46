//! `lotdrift run --once` end to end: the real binary against a temp folder.

mod common;

use common::*;

both_backends!(
    a_drifting_series_alerts_and_no_other_does,
    malformed_files_are_quarantined_with_a_reason_and_nothing_is_stored,
    duplicates_are_archived_and_conflicting_resends_quarantined_until_replaced,
    a_backfill_decides_like_files_arriving_one_by_one,
    config_and_usage_errors_exit_2_naming_the_key_or_flag,
    init_writes_a_config_that_accepts_anything,
    a_rebaseline_is_audited_and_later_lots_are_judged_against_it,
    compare_two_stored_sources_on_their_lot_means,
    a_clearly_non_normal_baseline_is_tested_distribution_free_and_cpk_is_reported,
    an_open_alert_is_announced_again_when_its_shift_grows_unless_acknowledged,
    processes_opening_a_new_database_at_once_all_succeed,
);

fn scenario(shift: Option<(usize, usize, usize, f64)>) -> Scenario {
    Scenario {
        sources: vec!["alder-cells".into(), "birchworks".into()],
        chars: vec!["capacity_mah".into(), "mass_g".into()],
        lots: 26,
        n: 12,
        shift,
    }
}

fn a_drifting_series_alerts_and_no_other_does(backend: Backend) {
    let site = Site::on(backend, "");
    // birchworks mass_g shifts by 3 sd from lot 23 on.
    for (name, text, _) in scenario(Some((1, 1, 22, 3.0))).files() {
        drop_file(&site.inbox(), &name, &text);
    }
    site.once();
    let status = site.status();
    assert_eq!(status["lots"], 52);
    assert_eq!(status["measurements"], 52 * 2 * 12);
    assert_eq!(status["quarantined"], 0);
    assert_eq!(status["open_alerts"], 1);
    assert_eq!(status["outbox_pending"], 0, "the log channel delivered");
    let alerts = site.alerts();
    assert_eq!(alerts.len(), 1, "{alerts:#?}");
    let a = &alerts[0];
    assert_eq!(a["source"], "birchworks");
    assert_eq!(a["characteristic"], "mass_g");
    assert_eq!(a["state"], "open");
    assert_eq!(a["lot"], "BI-023");
    assert_eq!(a["test"], "lot-mean-t");
    assert_eq!(a["kind"], "mean");
    assert_eq!(
        a["model"], "units",
        "lot means differ less than their units explain: no between-lot component"
    );
    assert!(a["p_value"].as_f64().unwrap() < 1e-6);
    assert!(a["p_adjusted"].as_f64().unwrap() >= a["p_value"].as_f64().unwrap());
    assert!(a["id"].is_i64());
    assert!(a["opened_at"].as_str().unwrap().ends_with('Z'));
    // Every later shifted lot attached to the same alert.
    assert_eq!(a["lots"], 4);
    assert!(a["acknowledged"].is_null());
    // Acknowledging is recorded with who, when and the note; unknown ids and empty notes fail.
    let id = a["id"].as_i64().unwrap().to_string();
    let out = site.run(&[
        "alerts",
        "ack",
        &id,
        "--note",
        "supplier informed, 8D requested",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let acked = &site.alerts()[0]["acknowledged"];
    assert_eq!(acked["note"], "supplier informed, 8D requested", "{acked}");
    assert!(acked["at"].as_str().unwrap().ends_with('Z'));
    assert_eq!(
        site.run(&["alerts", "ack", "999", "--note", "x"])
            .status
            .code(),
        Some(1)
    );
    assert_eq!(
        site.run(&["alerts", "ack", &id, "--note", " "])
            .status
            .code(),
        Some(2)
    );
    // Inbox emptied into the archive.
    assert!(site.files_in("inbox").is_empty());
    assert_eq!(site.files_in("archive").len(), 52);
}

fn malformed_files_are_quarantined_with_a_reason_and_nothing_is_stored(backend: Backend) {
    let site = Site::on(backend, "");
    let good = long_file(
        "alder-cells",
        "AC-1",
        "2026-02-01",
        &[("mass_g", vec![46.5, 46.6])],
    );
    drop_file(&site.inbox(), "good.csv", &good);
    let bad = "source,characteristic,lot,value\nalder-cells,mass_g,AC-2,46.5\nalder-cells,mass_g,AC-2,\"46,7\"\n";
    drop_file(&site.inbox(), "bad-number.csv", bad);
    drop_file(
        &site.inbox(),
        "no-rows.csv",
        "source,characteristic,lot,value\n# nothing yet\n",
    );
    site.once();
    let status = site.status();
    assert_eq!(status["lots"], 1);
    assert_eq!(
        status["measurements"], 2,
        "no partial lot from the bad file"
    );
    assert_eq!(status["quarantined"], 2);
    let reason =
        std::fs::read_to_string(site.path().join("quarantine/bad-number.csv.reason.txt")).unwrap();
    assert!(reason.contains("bad-number.csv:3:4"), "{reason}");
    assert!(reason.contains("column value"), "{reason}");
    assert!(site.path().join("quarantine/bad-number.csv").exists());
    assert!(
        site.path()
            .join("quarantine/no-rows.csv.reason.txt")
            .exists()
    );
    // The daemon went on: the good file was archived.
    assert!(site.files_in("inbox").is_empty());
}

fn duplicates_are_archived_and_conflicting_resends_quarantined_until_replaced(backend: Backend) {
    let site = Site::on(backend, "");
    let first = long_file(
        "cedar-energy",
        "CE-7",
        "2026-02-01",
        &[("mass_g", vec![46.5, 46.6, 46.4])],
    );
    drop_file(&site.inbox(), "ce-7.csv", &first);
    site.once();
    // Same bytes again under another name, and a conflicting re-send, and a second station's
    // file that adds a characteristic to the same lot.
    drop_file(&site.inbox(), "ce-7-again.csv", &first);
    let changed = first.replace("46.600000", "46.900000");
    drop_file(&site.inbox(), "ce-7-corrected.csv", &changed);
    let station2 = long_file(
        "cedar-energy",
        "CE-7",
        "2026-02-01",
        &[("capacity_mah", vec![3001.0, 2999.5])],
    );
    drop_file(&site.inbox(), "ce-7-capacity.csv", &station2);
    site.once();

    let status = site.status();
    assert_eq!(status["lots"], 1);
    assert_eq!(status["measurements"], 5);
    assert_eq!(status["quarantined"], 1);
    let dups: Vec<_> = site
        .files_in("archive")
        .into_iter()
        .filter(|p| p.parent().unwrap().ends_with("duplicates"))
        .collect();
    assert_eq!(dups.len(), 1, "{dups:?}");
    let reason =
        std::fs::read_to_string(site.path().join("quarantine/ce-7-corrected.csv.reason.txt"))
            .unwrap();
    assert!(reason.contains("lotdrift replace"), "{reason}");
    assert!(reason.contains("\"CE-7\""), "{reason}");

    // Replacing on purpose: audited, and the stored values change.
    let out = site.run(&[
        "replace",
        site.path()
            .join("quarantine/ce-7-corrected.csv")
            .to_str()
            .unwrap(),
        "--reason",
        "typing error in unit 2",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let hist = site.json(&["history", "cedar-energy", "mass_g"]);
    let mean = hist[0]["mean"].as_f64().unwrap();
    assert!((mean - (46.5 + 46.9 + 46.4) / 3.0).abs() < 1e-9, "{hist}");
    assert_eq!(site.status()["measurements"], 5);
    // Regression: the replaced values themselves stay in the audit trail (they were deleted,
    // only n, mean and m2 were kept).
    let kept: Vec<f64> = site.db_column(
        "SELECT m.value FROM replaced_measurement m \
         JOIN sample_replacement r ON r.id = m.replacement_id \
         WHERE r.reason = 'typing error in unit 2' ORDER BY m.seq",
    );
    let kept: Vec<String> = kept.iter().map(|v| format!("{v:.1}")).collect();
    let kept = kept.join(" ");
    assert_eq!(kept, "46.5 46.6 46.4");
}

fn a_backfill_decides_like_files_arriving_one_by_one(backend: Backend) {
    let files = scenario(Some((0, 0, 21, 2.5))).files();
    // All at once, with file names in an order unrelated to sampling order.
    let fast = "[watch]\nsettle_seconds = 0.0\n";
    let all = Site::on(backend, fast);
    for (name, text, _) in &files {
        drop_file(
            &all.inbox(),
            &format!("z{}", name.chars().rev().collect::<String>()),
            text,
        );
    }
    all.once();
    // One by one, in sampling order.
    let single = Site::on(backend, fast);
    let mut ordered = files.clone();
    ordered.sort_by_key(|f| f.2);
    for (name, text, _) in &ordered {
        drop_file(&single.inbox(), name, text);
        single.once();
    }
    let key = |site: &Site| {
        let mut rows = Vec::new();
        for s in ["alder-cells", "birchworks"] {
            for r in site.json(&["history", s]).as_array().unwrap() {
                rows.push((
                    r["characteristic"].to_string(),
                    r["lot"].to_string(),
                    r["role"].to_string(),
                    r["p_value"].to_string(),
                    r["p_adjusted"].to_string(),
                    r["significant"].to_string(),
                ));
            }
        }
        rows
    };
    assert_eq!(key(&all), key(&single));
    let strip = |site: &Site| {
        site.alerts()
            .iter()
            .map(|a| {
                (
                    a["source"].to_string(),
                    a["characteristic"].to_string(),
                    a["lot"].to_string(),
                    a["lots"].to_string(),
                )
            })
            .collect::<Vec<_>>()
    };
    assert_eq!(strip(&all), strip(&single));
    assert_eq!(strip(&all).len(), 1);
}

fn config_and_usage_errors_exit_2_naming_the_key_or_flag(backend: Backend) {
    let site = Site::on(backend, "[monitor]\nbaseline_lotz = 5\n");
    let out = site.run(&["run", "--once"]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("baseline_lotz"), "{err}");

    let site = Site::on(backend, "[monitor]\nbaseline_lots = 1\n");
    let out = site.run(&["status"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("monitor.baseline_lots"));

    let out = cmd(site.path()).args(["run", "--bogus"]).output().unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("--bogus"));

    let out = cmd(site.path())
        .args(["status", "--config", "missing.toml"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("missing.toml"));
}

fn init_writes_a_config_that_accepts_anything(backend: Backend) {
    let dir = tempfile::tempdir().unwrap();
    let out = cmd(dir.path()).args(["init", "site"]).output().unwrap();
    assert!(out.status.success());
    for sub in ["inbox", "archive", "quarantine"] {
        assert!(dir.path().join("site").join(sub).is_dir());
    }
    // On PostgreSQL the written config gets the history's sections, as an operator adds them.
    let pg = (backend == Backend::Postgres).then(PgHistory::start);
    if let Some(pg) = &pg {
        let cfg = dir.path().join("site/lotdrift.toml");
        let text = std::fs::read_to_string(&cfg).unwrap();
        std::fs::write(&cfg, format!("{text}\n{}", pg.config_sections())).unwrap();
    }
    // Running from another folder: paths resolve against the config file.
    let out = cmd(dir.path())
        .args(["run", "--once", "--config", "site/lotdrift.toml"])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", text(&out.stderr));
    let sqlite_file = dir.path().join("site/lotdrift.db");
    match &pg {
        None => assert!(sqlite_file.exists()),
        Some(pg) => {
            assert!(pg_has_tables(&pg.url), "the history was made in PostgreSQL");
            assert!(
                !sqlite_file.exists(),
                "no SQLite file beside a PostgreSQL history"
            );
        }
    }
    let out = cmd(dir.path()).args(["init", "site"]).output().unwrap();
    assert_eq!(out.status.code(), Some(2), "init does not overwrite");
}

fn a_rebaseline_is_audited_and_later_lots_are_judged_against_it(backend: Backend) {
    let site = Site::on(backend, "[watch]\nsettle_seconds = 0.0\n");
    // alder-cells capacity shifts up by 3 sd from lot 23 (after a 20-lot baseline).
    let sc = Scenario {
        sources: vec!["alder-cells".into()],
        chars: vec!["capacity_mah".into()],
        lots: 40,
        n: 12,
        shift: Some((0, 0, 22, 3.0)),
    };
    let files = sc.files();
    for (name, text, lot) in &files {
        if *lot < 26 {
            drop_file(&site.inbox(), name, text);
        }
    }
    site.once();
    assert_eq!(site.alerts().len(), 1);
    // The supplier changed its process on purpose: the shifted lots are the new normal.
    let lots: Vec<String> = (23..=26).map(|i| format!("AL-{i:03}")).collect();
    let out = site.run(&[
        "baseline",
        "set",
        "alder-cells",
        "capacity_mah",
        "--lots",
        &lots.join(","),
        "--reason",
        "new electrode supplier qualified (PPAP 2026-07)",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    for (name, text, lot) in &files {
        if *lot >= 26 {
            drop_file(&site.inbox(), name, text);
        }
    }
    site.once();
    // No new alert: later lots match the new baseline. The old alert stays as decided.
    let alerts = site.alerts();
    assert_eq!(alerts.len(), 1, "{alerts:#?}");
    let show = site.run(&["baseline", "show", "alder-cells", "capacity_mah"]);
    let shown = text(&show.stdout);
    assert!(
        shown.contains("lots AL-023,AL-024,AL-025,AL-026"),
        "{shown}"
    );
    assert!(shown.contains("new electrode supplier"), "{shown}");
    assert!(shown.contains("first 20 lots ->"), "{shown}");
    // Unknown series and missing reason are refused.
    let out = site.run(&[
        "baseline",
        "reset",
        "alder-cells",
        "mass_g",
        "--reason",
        "x",
    ]);
    assert_eq!(out.status.code(), Some(1));
    let out = site.run(&[
        "baseline",
        "reset",
        "alder-cells",
        "capacity_mah",
        "--reason",
        " ",
    ]);
    assert_eq!(out.status.code(), Some(2));
}

fn compare_two_stored_sources_on_their_lot_means(backend: Backend) {
    let site = Site::on(backend, "[watch]\nsettle_seconds = 0.0\n");
    // birchworks mass_g is 3 units higher from lot 23 on; lot means wobble by a fixed,
    // source-independent pattern. Compare the latest 4 lots of each (lot means as observations).
    for (si, source) in ["alder-cells", "birchworks"].iter().enumerate() {
        for lot in 0..26 {
            let wobble = 0.1 * ((lot * 7 % 5) as f64 - 2.0);
            let shift = if si == 1 && lot >= 22 { 3.0 } else { 0.0 };
            let code = format!("{}-{:03}", &source[..2].to_uppercase(), lot + 1);
            let values = lot_values(12, 46.5 + wobble + shift, 1.0, lot);
            let text = long_file(source, &code, &lot_date(lot), &[("mass_g", values)]);
            drop_file(&site.inbox(), &format!("{code}.csv"), &text);
        }
    }
    site.once();
    let out = site.run(&[
        "compare",
        "birchworks",
        "alder-cells",
        "--characteristic",
        "mass_g",
        "--lots",
        "4",
        "--json",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["n_a"], 4);
    assert_eq!(v["n_b"], 4);
    let est = v["estimate"].as_f64().unwrap();
    assert!((est - 3.0).abs() < 1e-6, "{v}");
    // Over the whole history the shift is diluted but the estimate is exact: 4 of 26 lots.
    let out = site.run(&[
        "compare",
        "birchworks",
        "alder-cells",
        "--characteristic",
        "mass_g",
        "--json",
    ]);
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert!(
        (v["estimate"].as_f64().unwrap() - 3.0 * 4.0 / 26.0).abs() < 1e-6,
        "{v}"
    );
    let out = site.run(&[
        "compare",
        "birchworks",
        "nobody",
        "--characteristic",
        "mass_g",
    ]);
    assert_eq!(out.status.code(), Some(1));
}

fn a_clearly_non_normal_baseline_is_tested_distribution_free_and_cpk_is_reported(backend: Backend) {
    let site = Site::on(
        backend,
        "[watch]\nsettle_seconds = 0.0\n[characteristic.leak_rate]\ndirection = \"lower-is-better\"\nusl = 30.0\n",
    );
    // Leak rate: a skewed (exponential-shaped) pattern of units, the same in every lot, so the
    // baseline has no between-lot component and its residuals are far from normal. From lot
    // 23 on the whole distribution moves up by 3.
    for lot in 0..26 {
        let shift = if lot >= 22 { 3.0 } else { 0.0 };
        let values: Vec<f64> = (0..24)
            .map(|i| {
                let u = (((i + lot) % 24) as f64 + 0.5) / 24.0;
                2.0 + shift - 2.0 * (1.0 - u).ln()
            })
            .collect();
        let code = format!("CE-{:03}", lot + 1);
        let text = long_file(
            "cedar-energy",
            &code,
            &lot_date(lot),
            &[("leak_rate", values)],
        );
        drop_file(&site.inbox(), &format!("{code}.csv"), &text);
    }
    site.once();
    let alerts = site.alerts();
    assert_eq!(alerts.len(), 1, "{alerts:#?}");
    let a = &alerts[0];
    assert_eq!(a["test"], "mann-whitney", "{a}");
    assert_eq!(a["model"], "units, distribution-free");
    assert!(a["note"].as_str().unwrap().contains("Shapiro–Wilk"));
    assert_eq!(a["lot"], "CE-023");
    let cpk = a["cpk"].as_array().expect("Cpk with usl configured");
    assert!(cpk[1].as_f64().unwrap() < cpk[0].as_f64().unwrap());
    let status = site.status();
    let series = &status["series"][0];
    assert_eq!(series["test"], "mann-whitney");
    assert!(series["baseline_cpk"][0].as_f64().unwrap() > cpk[0].as_f64().unwrap());
}

fn an_open_alert_is_announced_again_when_its_shift_grows_unless_acknowledged(backend: Backend) {
    let run = |ack: bool| {
        let site = Site::on(backend, "[watch]\nsettle_seconds = 0.0\n");
        // Lots 23-24 are 3 units high, lots 25-26 are 7 units high (the shift more than
        // doubled); every unit sd is 1.
        let file = |lot: usize| {
            let shift = match lot {
                0..=21 => 0.0,
                22 | 23 => 3.0,
                _ => 7.0,
            };
            let code = format!("AL-{:03}", lot + 1);
            let values = lot_values(12, 100.0 + shift, 1.0, lot);
            (
                format!("{code}.csv"),
                long_file(
                    "alder-cells",
                    &code,
                    &lot_date(lot),
                    &[("capacity_mah", values)],
                ),
            )
        };
        for lot in 0..24 {
            let (name, text) = file(lot);
            drop_file(&site.inbox(), &name, &text);
        }
        site.once();
        let alerts = site.alerts();
        assert_eq!(alerts.len(), 1);
        if ack {
            let id = alerts[0]["id"].as_i64().unwrap().to_string();
            assert!(
                site.run(&[
                    "alerts",
                    "ack",
                    &id,
                    "--note",
                    "known, supplier contained lots"
                ])
                .status
                .success()
            );
        }
        for lot in 24..26 {
            let (name, text) = file(lot);
            drop_file(&site.inbox(), &name, &text);
        }
        let out = site.once();
        assert_eq!(site.alerts().len(), 1, "still one alert");
        text(&out.stderr)
    };
    let log = run(false);
    assert!(log.contains("still shifted up"), "{log}");
    let log = run(true);
    assert!(!log.contains("still shifted"), "{log}");
}

fn processes_opening_a_new_database_at_once_all_succeed(backend: Backend) {
    // Regression: the daemon starting and `status` run beside it both applied the first
    // migration of a new database, and one failed with "table source already exists". Six
    // `run --once` on a new site create and migrate the database at the same moment.
    let site = Site::on(backend, "");
    let children: Vec<_> = (0..6)
        .map(|_| {
            common::cmd(site.path())
                .args(["run", "--once", "--config"])
                .arg(site.config())
                .stdout(std::process::Stdio::null())
                .stderr(std::process::Stdio::piped())
                .spawn()
                .unwrap()
        })
        .collect();
    for child in children {
        let out = child.wait_with_output().unwrap();
        assert!(out.status.success(), "{}", text(&out.stderr));
    }
}
