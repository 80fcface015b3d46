//! The daemon (`lotdrift run`) as a process: file pickup, shutdown, half-written files, and
//! crashes in the middle of an ingest.

mod common;

use std::io::Write;
use std::time::Duration;

use common::*;

both_backends!(
    picks_up_a_renamed_file_and_exits_cleanly_on_sigterm,
    a_file_written_slowly_in_chunks_is_not_taken_half_written,
    a_killed_daemon_loses_nothing_and_doubles_nothing,
    a_crash_between_commit_and_move_archives_the_file_as_a_duplicate,
);

const LIMIT: Duration = Duration::from_secs(60);

fn lots(site: &Site) -> i64 {
    let out = site.run(&["status", "--json"]);
    if !out.status.success() {
        return -1;
    }
    serde_json::from_slice::<serde_json::Value>(&out.stdout)
        .map(|v| v["lots"].as_i64().unwrap_or(-1))
        .unwrap_or(-1)
}

fn picks_up_a_renamed_file_and_exits_cleanly_on_sigterm(backend: Backend) {
    let site = Site::on(
        backend,
        "[watch]\nsettle_seconds = 30.0\nrescan_seconds = 3600.0\n",
    );
    let mut daemon = site.spawn_daemon();
    // Up: the daemon has made the history (the SQLite file, or the PostgreSQL tables).
    assert!(wait_until(LIMIT, || site.history_exists()));
    // A rename into the inbox is complete by declaration: taken at once, well before the
    // 30 s settle interval that a written file would need.
    let outside = site.path().join("staging.csv");
    std::fs::write(
        &outside,
        long_file(
            "alder-cells",
            "AC-1",
            "2026-02-01",
            &[("mass_g", vec![46.5, 46.6])],
        ),
    )
    .unwrap();
    // Give the watcher a moment to be installed before the event happens.
    assert!(wait_until(LIMIT, || lots(&site) == 0));
    std::thread::sleep(Duration::from_millis(300));
    std::fs::rename(&outside, site.inbox().join("ac-1.csv")).unwrap();
    assert!(
        wait_until(Duration::from_secs(20), || lots(&site) == 1),
        "renamed file not stored"
    );
    sigterm(&daemon);
    let status = wait_exit(&mut daemon, Duration::from_secs(10));
    assert!(status.success(), "exit status {status:?}");
}

fn a_file_written_slowly_in_chunks_is_not_taken_half_written(backend: Backend) {
    let site = Site::on(
        backend,
        "[watch]\nsettle_seconds = 3.0\nrescan_seconds = 0.5\n",
    );
    let mut daemon = site.spawn_daemon();
    assert!(wait_until(LIMIT, || lots(&site) == 0));
    let values: Vec<f64> = (0..40).map(|i| 46.0 + i as f64 / 100.0).collect();
    let text = long_file("birchworks", "BW-9", "2026-02-01", &[("mass_g", values)]);
    // Every prefix that ends at a line end is itself a valid lot file: taking the file early
    // would store fewer values, not fail.
    let lines: Vec<&str> = text.split_inclusive('\n').collect();
    let mut f = std::fs::File::create(site.inbox().join("bw-9.csv")).unwrap();
    for chunk in lines.chunks(5) {
        for l in chunk {
            f.write_all(l.as_bytes()).unwrap();
        }
        f.flush().unwrap();
        std::thread::sleep(Duration::from_millis(100));
    }
    drop(f);
    // Archived (or quarantined) means taken; polling the folders spawns nothing.
    let taken = wait_until(Duration::from_secs(120), || {
        !site.files_in("archive").is_empty() || !site.files_in("quarantine").is_empty()
    });
    let log = std::fs::read_to_string(site.path().join("daemon.log")).unwrap_or_default();
    assert!(taken, "file never taken; daemon log:\n{log}");
    assert!(
        site.files_in("quarantine").is_empty(),
        "quarantined; daemon log:\n{log}"
    );
    let status = site.status();
    assert_eq!(status["measurements"], 40, "{status}");
    assert_eq!(status["quarantined"], 0);
    sigterm(&daemon);
    assert!(wait_exit(&mut daemon, Duration::from_secs(10)).success());
}

fn a_killed_daemon_loses_nothing_and_doubles_nothing(backend: Backend) {
    let scenario = Scenario {
        sources: (0..8).map(|i| format!("src-{i:02}")).collect(),
        chars: vec!["capacity_mah".into(), "mass_g".into(), "ir_mohm".into()],
        lots: 150,
        n: 16,
        shift: None,
    };
    let files = scenario.files();
    let total = files.len() as i64;
    // Kill at different points of the ingest: early, midway, late.
    let mut killed_midway = 0;
    for (round, kill_after) in [1i64, total / 3, (2 * total) / 3].into_iter().enumerate() {
        let site = Site::on(backend, "[watch]\nsettle_seconds = 0.0\n");
        for (name, text, _) in &files {
            drop_file(&site.inbox(), name, text);
        }
        let mut daemon = site.spawn_daemon();
        // Archived files trail stored lots by at most a batch; counting them spawns nothing,
        // so the polling does not slow the daemon down on a loaded machine.
        let reached = wait_until(Duration::from_secs(180), || {
            site.files_in("archive").len() as i64 >= kill_after
        });
        daemon.kill().unwrap(); // SIGKILL
        let _ = daemon.wait();
        assert!(
            reached,
            "round {round}: ingest never reached {kill_after} lots"
        );
        let at_kill = lots(&site);
        if at_kill < total {
            killed_midway += 1;
        }
        // Restart: --once finishes the job.
        site.once();
        let status = site.status();
        assert_eq!(status["lots"], total, "round {round}: {status}");
        assert_eq!(
            status["measurements"],
            total * 3 * 16,
            "round {round}: {status}"
        );
        assert_eq!(status["quarantined"], 0, "round {round}");
        assert!(site.files_in("inbox").is_empty(), "round {round}");
        assert_eq!(
            site.files_in("archive").len() as i64,
            total,
            "round {round}"
        );
        assert!(site.files_in("quarantine").is_empty());
    }
    assert!(
        killed_midway > 0,
        "no round was killed before the ingest finished"
    );
}

fn a_crash_between_commit_and_move_archives_the_file_as_a_duplicate(backend: Backend) {
    let site = Site::on(backend, "[watch]\nsettle_seconds = 0.0\n");
    let text = long_file(
        "alder-cells",
        "AC-3",
        "2026-02-01",
        &[("mass_g", vec![46.5, 46.6])],
    );
    drop_file(&site.inbox(), "ac-3.csv", &text);
    let out = cmd(site.path())
        .args(["run", "--once", "--config"])
        .arg(site.config())
        .env("LOTDRIFT_FAULT_ABORT_AFTER_COMMIT", "1")
        .output()
        .unwrap();
    assert!(
        !out.status.success(),
        "the fault should have aborted the run"
    );
    // Stored, but still in the inbox.
    assert_eq!(site.status()["measurements"], 2);
    assert_eq!(site.files_in("inbox").len(), 1);
    site.once();
    assert_eq!(site.status()["measurements"], 2, "not stored twice");
    assert!(site.files_in("inbox").is_empty());
    let archived = site.files_in("archive");
    assert_eq!(archived.len(), 1);
    assert!(archived[0].parent().unwrap().ends_with("duplicates"));
}
