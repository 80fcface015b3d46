//! What a command-line user expects of any tool, run on the real binary: completions, a man
//! page, LOTDRIFT_CONFIG, RUST_LOG, NO_COLOR, --json on every read command, possible values
//! in --help, --by on audited actions, and a progress line on a terminal only.

mod common;

use common::*;

/// Runs the binary with `args` in `dir` and a clean environment plus `env`.
fn run_env(dir: &std::path::Path, env: &[(&str, &str)], args: &[&str]) -> std::process::Output {
    let mut c = cmd(dir);
    for (k, v) in env {
        c.env(k, v);
    }
    c.args(args).output().unwrap()
}

fn small_site(extra: &str) -> Site {
    let site = Site::new(extra);
    let scenario = Scenario {
        sources: vec!["alder-cells".into()],
        chars: vec!["capacity_mah".into()],
        lots: 26,
        n: 8,
        shift: Some((0, 0, 22, 4.0)),
    };
    for (name, text, _) in scenario.files() {
        drop_file(&site.inbox(), &name, &text);
    }
    site
}

#[test]
fn completions_and_man_page() {
    let dir = tempfile::tempdir().unwrap();
    for shell in ["bash", "zsh", "fish"] {
        let out = run_env(dir.path(), &[], &["completions", shell]);
        assert!(out.status.success(), "{shell}: {}", text(&out.stderr));
        let script = text(&out.stdout);
        assert!(
            script.contains("lotdrift") && script.contains("baseline"),
            "{shell}"
        );
    }
    assert_eq!(
        run_env(dir.path(), &[], &["completions", "cmd"])
            .status
            .code(),
        Some(2)
    );
    let out = run_env(dir.path(), &[], &["man"]);
    assert!(out.status.success());
    let page = text(&out.stdout);
    assert!(
        page.starts_with(".ie") || page.contains(".TH lotdrift"),
        "{page}"
    );
    let pages = dir.path().join("man");
    let out = run_env(dir.path(), &[], &["man", "--out", pages.to_str().unwrap()]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(pages.join("lotdrift.1").exists());
    assert!(pages.join("lotdrift-run.1").exists());
}

#[test]
fn possible_values_are_listed_and_checked() {
    let dir = tempfile::tempdir().unwrap();
    let help = text(&run_env(dir.path(), &[], &["compare", "--help"]).stdout);
    for v in [
        "welch",
        "pooled",
        "mann-whitney",
        "brown-forsythe",
        "two-sided",
        "greater",
    ] {
        assert!(help.contains(v), "{v} missing from compare --help:\n{help}");
    }
    let help = text(&run_env(dir.path(), &[], &["adjust", "--help"]).stdout);
    for v in ["bonferroni", "holm", "hochberg", "bh", "by"] {
        assert!(help.contains(v), "{v} missing from adjust --help:\n{help}");
    }
    let out = run_env(dir.path(), &[], &["adjust", "--method", "sidak", "-"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("--method"));
    // Former spellings still work; the JSON names the method as before.
    std::fs::write(dir.path().join("p.txt"), "0.01 0.04 0.03").unwrap();
    let out = run_env(
        dir.path(),
        &[],
        &["adjust", "--method", "HOLM", "p.txt", "--json"],
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["method"], "holm");
    std::fs::write(dir.path().join("a.txt"), "1 2 3 4 5").unwrap();
    std::fs::write(dir.path().join("b.txt"), "2 3 4 5 6 7").unwrap();
    let out = run_env(
        dir.path(),
        &[],
        &[
            "compare", "--a", "a.txt", "--b", "b.txt", "--test", "student", "--json",
        ],
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["test"], "pooled");
    assert!(
        v["df"].is_f64() && v["p_value"].is_f64() && v["ci"].is_array(),
        "{v}"
    );
}

#[test]
fn config_from_the_environment_logs_and_colour() {
    let site = small_site("");
    let cfg = site.config();
    let cfg = cfg.to_str().unwrap();
    // LOTDRIFT_CONFIG stands for --config; RUST_LOG steers the log when LOTDRIFT_LOG is unset.
    let mut c = std::process::Command::new(BIN);
    c.current_dir(site.path().parent().unwrap())
        .env_clear()
        .env("LOTDRIFT_CONFIG", cfg)
        .env("RUST_LOG", "lotdrift=debug")
        .args(["run", "--once"]);
    let out = c.output().unwrap();
    assert!(out.status.success(), "{}", text(&out.stderr));
    let log = text(&out.stderr);
    assert!(
        log.contains("DEBUG"),
        "RUST_LOG=lotdrift=debug ignored:\n{log}"
    );
    assert!(
        !log.contains('\x1b'),
        "colour in a log that is not a terminal"
    );
    assert!(
        !log.contains("values/s"),
        "progress line without a terminal"
    );
    assert!(
        log.contains("batch stored"),
        "plain log lines without a terminal"
    );
    let out = run_env(
        site.path().parent().unwrap(),
        &[("LOTDRIFT_CONFIG", cfg)],
        &["status", "--json"],
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
    // --config wins over LOTDRIFT_CONFIG.
    let out = run_env(
        site.path(),
        &[("LOTDRIFT_CONFIG", "/nonexistent/lotdrift.toml")],
        &["status", "--config", cfg],
    );
    assert!(out.status.success(), "{}", text(&out.stderr));
}

/// `script` (util-linux) gives the binary a terminal on stderr.
fn on_terminal(site: &Site, env: &str) -> String {
    let command = format!(
        "{env} {BIN} run --once --config {}",
        site.config().display()
    );
    let log = site.path().join("pty.log");
    let out = std::process::Command::new("script")
        .args(["-qec", &command, log.to_str().unwrap()])
        .env_clear()
        .env("PATH", std::env::var("PATH").unwrap_or_default())
        .env("LOTDRIFT_LOG", "lotdrift=info")
        .output()
        .expect("script (util-linux) runs");
    assert!(out.status.success(), "{}", text(&out.stderr));
    std::fs::read_to_string(log).unwrap()
}

#[test]
fn a_terminal_gets_a_progress_line_and_colour_unless_no_color() {
    let site = small_site("");
    let screen = on_terminal(&site, "");
    assert!(screen.contains("files 26/26 (100 %)"), "{screen}");
    assert!(screen.contains("values/s"), "{screen}");
    assert!(
        screen.contains("\x1b[32m"),
        "colour on a terminal: {screen}"
    );
    let site = small_site("");
    let screen = on_terminal(&site, "NO_COLOR=1");
    assert!(screen.contains("files 26/26"), "{screen}");
    assert!(!screen.contains("\x1b[32m"), "NO_COLOR ignored: {screen}");
}

#[test]
fn json_on_every_read_command_and_by_on_audited_actions() {
    let site = small_site("");
    site.once();
    let alert = &site.alerts()[0];
    let id = alert["id"].as_i64().unwrap().to_string();
    let out = site.run(&[
        "alerts",
        "ack",
        &id,
        "--note",
        "8D requested",
        "--by",
        "R. Quality",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert_eq!(site.alerts()[0]["acknowledged"]["by"], "R. Quality");
    assert_eq!(
        site.run(&["alerts", "ack", &id, "--note", "x", "--by", " "])
            .status
            .code(),
        Some(2)
    );
    let out = site.run(&[
        "baseline",
        "reset",
        "alder-cells",
        "capacity_mah",
        "--reason",
        "new cell chemistry",
        "--by",
        "J. Engineer",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let show = site.json(&["baseline", "show", "alder-cells", "capacity_mah"]);
    assert_eq!(show["changes"][0]["by"], "J. Engineer", "{show}");
    assert_eq!(show["changes"][0]["reason"], "new cell chemistry");

    let checked = site.json(&["check-config"]);
    assert_eq!(checked["ok"], true);
    assert!(checked["problems"].as_array().unwrap().is_empty());
    assert_eq!(checked["baseline_lots"], 20);
    let bad = Site::new("[monitor]\nbaseline_lots = 1\n");
    let out = bad.run(&["check-config", "--json"]);
    assert_eq!(out.status.code(), Some(2));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["ok"], false);
    assert!(
        v["problems"][0]
            .as_str()
            .unwrap()
            .contains("monitor.baseline_lots"),
        "{v}"
    );
}

#[test]
fn test_email_json_says_what_each_server_replied() {
    let server = common::smtp::SmtpServer::start();
    let site = Site::new(&format!(
        "[alerts.email]\nsmtp_host = \"127.0.0.1\"\nsmtp_port = {}\ntls = \"none\"\n\
         from = \"lotdrift <lotdrift@example.org>\"\nto = [\"quality@example.org\"]\n\
         timeout_seconds = 5\n",
        server.port
    ));
    let sent = site.json(&["alerts", "test-email"]);
    let sent = sent.as_array().unwrap();
    assert_eq!(sent.len(), 1, "{sent:?}");
    assert_eq!(sent[0]["recipient"], "quality@example.org");
    assert_eq!(sent[0]["accepted"], true);
    assert!(
        sent[0]["reply"].as_str().unwrap().starts_with("250"),
        "{sent:?}"
    );
}

#[test]
fn replace_records_who_replaced() {
    let site = small_site("");
    site.once();
    let corrected = dir_file(
        &site,
        "corrected.csv",
        &long_file(
            "alder-cells",
            "AL-003",
            &lot_date(2),
            &[("capacity_mah", vec![100.5; 8])],
        ),
    );
    let out = site.run(&[
        "replace",
        &corrected,
        "--reason",
        "gauge re-zeroed",
        "--by",
        "K. Lab",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let db = rusqlite::Connection::open(site.path().join("lotdrift.db")).unwrap();
    let (by, why): (String, String) = db
        .query_row(
            "SELECT replaced_by, reason FROM sample_replacement",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!((by.as_str(), why.as_str()), ("K. Lab", "gauge re-zeroed"));
}

fn dir_file(site: &Site, name: &str, content: &str) -> String {
    let p = site.path().join(name);
    std::fs::write(&p, content).unwrap();
    p.to_str().unwrap().to_string()
}

/// The demo is read by a person: at 100 columns (no terminal, so the tour's own width) none of
/// its lines, printed or logged, is cut, and the log lines keep their fields.
#[test]
fn the_demo_fits_a_100_column_terminal() {
    let dir = tempfile::tempdir().unwrap();
    let out = run_env(dir.path(), &[], &["demo", "--dir", "demo"]);
    assert!(out.status.success(), "demo: {}", text(&out.stderr));
    let (stdout, stderr) = (text(&out.stdout), text(&out.stderr));
    assert!(stdout.contains("Alerts (2 opened)"), "{stdout}");
    assert!(stderr.contains("WARN alert: "), "{stderr}");
    assert!(stderr.contains(" p_adjusted="), "{stderr}");
    for line in stdout.lines().chain(stderr.lines()) {
        assert!(
            line.chars().count() <= 100,
            "{} columns: {line}",
            line.chars().count()
        );
    }
}
