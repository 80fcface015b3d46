//! Shared helpers of the integration tests: a fresh folder per test, the real `lotdrift`
//! binary run in it with a clean environment, and lot files written the way a lab PC would.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

use pg::PgServer;

pub const BIN: &str = env!("CARGO_BIN_EXE_lotdrift");

/// Where a site keeps its history.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Backend {
    /// The SQLite file `lotdrift.db` of the site folder (the starter config's default).
    Sqlite,
    /// A database of a private PostgreSQL server owned by the site (`[database] url`).
    Postgres,
}

/// The name PostgreSQL sites record (`[site] name`).
pub const SITE_NAME: &str = "test-plant";

/// A private PostgreSQL history: the server (stopped when dropped) and the URL of its
/// `lotdrift` database.
pub struct PgHistory {
    pub server: PgServer,
    pub url: String,
}

impl PgHistory {
    /// Starts a private server and creates the (empty) `lotdrift` database in it.
    pub fn start() -> PgHistory {
        let server = PgServer::start();
        let url = server.create_database("lotdrift");
        PgHistory { server, url }
    }

    /// The config sections that select this history: `[database] url` and `[site] name`.
    pub fn config_sections(&self) -> String {
        format!(
            "[database]\nurl = \"{}\"\n[site]\nname = \"{SITE_NAME}\"\n",
            self.url
        )
    }
}

/// A temp folder with `lotdrift init` done in it, and on PostgreSQL the private server that
/// keeps its history (declared after `dir`: dropped, and so stopped, after the folder).
pub struct Site {
    pub dir: tempfile::TempDir,
    pub pg: Option<PgHistory>,
}

impl Site {
    /// `lotdrift init`, then `extra` appended to the config (TOML sections), with the silence
    /// watch off: the scenarios' fixed sampling dates lie months behind the clock, so every
    /// source would be silent and send a notice the test is not about. SQLite history.
    pub fn new(extra: &str) -> Site {
        Site::on(Backend::Sqlite, extra)
    }

    /// [`Site::new`] with the history on `backend`.
    pub fn on(backend: Backend, extra: &str) -> Site {
        let site = Site::watching_silence_on(backend, extra);
        let cfg = site.config();
        let text = std::fs::read_to_string(&cfg).unwrap();
        std::fs::write(&cfg, silence_off(&text)).unwrap();
        site
    }

    /// `lotdrift init`, then `extra` appended to the config (TOML sections). SQLite history.
    pub fn watching_silence(extra: &str) -> Site {
        Site::watching_silence_on(Backend::Sqlite, extra)
    }

    /// [`Site::watching_silence`] with the history on `backend`: on PostgreSQL a private
    /// server is started and its `[database]` and `[site]` sections follow `extra`.
    pub fn watching_silence_on(backend: Backend, extra: &str) -> Site {
        let pg = (backend == Backend::Postgres).then(PgHistory::start);
        let extra = match &pg {
            Some(pg) => format!("{extra}\n{}", pg.config_sections()),
            None => extra.to_string(),
        };
        let mut site = Site::init(&extra);
        site.pg = pg;
        site
    }

    /// `lotdrift init`, then `extra` appended to the config (TOML sections).
    fn init(extra: &str) -> Site {
        let dir = tempfile::tempdir().unwrap();
        let out = cmd(dir.path()).args(["init", "."]).output().unwrap();
        assert!(out.status.success(), "init failed: {}", text(&out.stderr));
        if !extra.is_empty() {
            let cfg = dir.path().join("lotdrift.toml");
            // Replace sections the starter file has with the test's own.
            let mut starter = std::fs::read_to_string(&cfg).unwrap();
            for section in extra.lines().filter(|l| l.starts_with('[')) {
                starter = remove_section(&starter, section.trim());
            }
            std::fs::write(&cfg, format!("{starter}\n{extra}\n")).unwrap();
        }
        Site { dir, pg: None }
    }

    pub fn backend(&self) -> Backend {
        match self.pg {
            Some(_) => Backend::Postgres,
            None => Backend::Sqlite,
        }
    }

    pub fn path(&self) -> &Path {
        self.dir.path()
    }

    pub fn inbox(&self) -> PathBuf {
        self.path().join("inbox")
    }

    pub fn config(&self) -> PathBuf {
        self.path().join("lotdrift.toml")
    }

    /// Runs `lotdrift ARGS --config <site config>` to completion.
    pub fn run(&self, args: &[&str]) -> Output {
        let mut c = cmd(self.path());
        c.args(args).arg("--config").arg(self.config());
        c.output().unwrap()
    }

    /// `run --once`, asserting success.
    pub fn once(&self) -> Output {
        let out = self.run(&["run", "--once"]);
        assert!(
            out.status.success(),
            "run --once failed: {}",
            text(&out.stderr)
        );
        out
    }

    /// `CMD --json` parsed.
    pub fn json(&self, args: &[&str]) -> serde_json::Value {
        let mut a = args.to_vec();
        a.push("--json");
        let out = self.run(&a);
        assert!(
            out.status.success(),
            "{args:?} failed: {}",
            text(&out.stderr)
        );
        serde_json::from_slice(&out.stdout).unwrap()
    }

    pub fn status(&self) -> serde_json::Value {
        self.json(&["status"])
    }

    pub fn alerts(&self) -> Vec<serde_json::Value> {
        self.json(&["alerts"]).as_array().unwrap().clone()
    }

    /// Starts the daemon.
    pub fn spawn_daemon(&self) -> Child {
        cmd(self.path())
            .args(["run", "--config"])
            .arg(self.config())
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(self.path().join("daemon.log")).unwrap())
            .spawn()
            .unwrap()
    }

    /// The SQLite file of the site (the starter config's `paths.database`).
    pub fn sqlite_path(&self) -> PathBuf {
        self.path().join("lotdrift.db")
    }

    /// Whether a process has opened (made) the history: the SQLite file exists, or the
    /// PostgreSQL database has the tables (before the first migration it has none).
    pub fn history_exists(&self) -> bool {
        match &self.pg {
            None => self.sqlite_path().exists(),
            Some(pg) => pg_has_tables(&pg.url),
        }
    }

    /// Runs `sql` (written to work on both backends) on the site's history and returns the
    /// first column of every row.
    pub fn db_column<T>(&self, sql: &str) -> Vec<T>
    where
        T: for<'r> sqlx::Decode<'r, sqlx::Sqlite> + sqlx::Type<sqlx::Sqlite>,
        T: for<'r> sqlx::Decode<'r, sqlx::Postgres> + sqlx::Type<sqlx::Postgres>,
        T: Send + Unpin,
    {
        block_on(async {
            match &self.pg {
                None => {
                    let url = format!("sqlite:{}", self.sqlite_path().display());
                    let pool = sqlx::SqlitePool::connect(&url).await.unwrap();
                    let rows = sqlx::query_scalar(sql).fetch_all(&pool).await.unwrap();
                    pool.close().await;
                    rows
                }
                Some(pg) => {
                    let pool = sqlx::PgPool::connect(&pg.url).await.unwrap();
                    let rows = sqlx::query_scalar(sql).fetch_all(&pool).await.unwrap();
                    pool.close().await;
                    rows
                }
            }
        })
    }

    /// Files (recursively) below a folder of the site.
    pub fn files_in(&self, sub: &str) -> Vec<PathBuf> {
        let mut out = Vec::new();
        let mut stack = vec![self.path().join(sub)];
        while let Some(d) = stack.pop() {
            for e in std::fs::read_dir(&d).into_iter().flatten().flatten() {
                let p = e.path();
                if p.is_dir() {
                    stack.push(p);
                } else {
                    out.push(p);
                }
            }
        }
        out.sort();
        out
    }
}

/// Runs a future to completion on a runtime of its own.
fn block_on<F: std::future::Future>(f: F) -> F::Output {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap()
        .block_on(f)
}

/// Whether the PostgreSQL database at `url` answers and has lotdrift's tables.
pub fn pg_has_tables(url: &str) -> bool {
    block_on(async {
        let Ok(pool) = sqlx::PgPool::connect(url).await else {
            return false;
        };
        let made: Result<bool, _> =
            sqlx::query_scalar("SELECT to_regclass('public.ingested_file') IS NOT NULL")
                .fetch_one(&pool)
                .await;
        pool.close().await;
        made.unwrap_or(false)
    })
}

/// The config with `monitor.silence = false` (any other `silence =` line dropped).
fn silence_off(text: &str) -> String {
    let mut out = String::new();
    let mut has_monitor = false;
    for line in text.lines() {
        if line.trim_start().starts_with("silence =") {
            continue;
        }
        out.push_str(line);
        out.push('\n');
        if line.trim() == "[monitor]" {
            has_monitor = true;
            out.push_str("silence = false\n");
        }
    }
    if !has_monitor {
        out.push_str("[monitor]\nsilence = false\n");
    }
    out
}

fn remove_section(text: &str, header: &str) -> String {
    let mut out = String::new();
    let mut skipping = false;
    for line in text.lines() {
        if line.starts_with('[') {
            skipping = line.trim() == header;
        }
        if !skipping {
            out.push_str(line);
            out.push('\n');
        }
    }
    out
}

/// The binary with a clean environment, run in `dir`.
pub fn cmd(dir: &Path) -> Command {
    let mut c = Command::new(BIN);
    c.current_dir(dir)
        .env_clear()
        .env("PATH", std::env::var("PATH").unwrap_or_default())
        .env("LOTDRIFT_LOG", "lotdrift=info");
    c
}

pub fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

/// Polls `f` until it returns true or `limit` passes.
pub fn wait_until(limit: Duration, mut f: impl FnMut() -> bool) -> bool {
    let start = Instant::now();
    while start.elapsed() < limit {
        if f() {
            return true;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    f()
}

/// Sends SIGTERM to a child (by the system's `kill`, to keep the tests free of libc).
pub fn sigterm(child: &Child) {
    let ok = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap()
        .success();
    assert!(ok, "kill -TERM failed");
}

/// Waits for a child to exit, at most `limit`; kills it and fails otherwise.
pub fn wait_exit(child: &mut Child, limit: Duration) -> std::process::ExitStatus {
    let start = Instant::now();
    loop {
        if let Some(status) = child.try_wait().unwrap() {
            return status;
        }
        if start.elapsed() > limit {
            let _ = child.kill();
            panic!("process did not exit within {limit:?}");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// Unit values of one lot: normal quantiles of (i + φ)/n (mean about 0, sd about 1) scaled and
/// shifted, with an offset φ in (0, 1) that differs per lot (so the baseline's units are not a
/// few values repeated, which a normality check would rightly reject) and rotated per lot.
/// Deterministic plumbing data, not a statistical fixture: the statistics are checked against
/// published values elsewhere.
pub fn lot_values(n: usize, mean: f64, sd: f64, lot: usize) -> Vec<f64> {
    let phi = 0.05 + 0.9 * ((lot as f64 * 0.618_033_988_75) % 1.0);
    let pattern: Vec<f64> = (0..n)
        .map(|i| {
            let u = (i as f64 + phi) / n as f64;
            lotdrift::stats::dist::normal_quantile(u).unwrap()
        })
        .collect();
    (0..n).map(|i| mean + sd * pattern[(i + lot) % n]).collect()
}

/// A long-layout lot file: one row per unit and characteristic.
pub fn long_file(
    source: &str,
    lot: &str,
    sampled_at: &str,
    characteristics: &[(&str, Vec<f64>)],
) -> String {
    let mut s = String::from("source,characteristic,lot,value,sampled_at,unit\n");
    for (ch, values) in characteristics {
        for (i, v) in values.iter().enumerate() {
            s.push_str(&format!(
                "{source},{ch},{lot},{v:.6},{sampled_at},{lot}-U{:03}\n",
                i + 1
            ));
        }
    }
    s
}

/// Writes `text` into `dir/name` the way a careful lab PC does: a temporary name, then rename.
pub fn drop_file(dir: &Path, name: &str, text: &str) {
    let tmp = dir.join(format!("{name}.part"));
    std::fs::write(&tmp, text).unwrap();
    std::fs::rename(&tmp, dir.join(name)).unwrap();
}

/// Sampling date of lot `i` (0-based): one lot every 3 days from 2026-01-05.
pub fn lot_date(i: usize) -> String {
    let d = chrono::NaiveDate::from_ymd_opt(2026, 1, 5).unwrap() + chrono::Days::new(3 * i as u64);
    d.format("%Y-%m-%d").to_string()
}

/// A standard scenario: `sources` x `chars` series, `lots` lots of `n` units each; `shift`
/// names (source index, characteristic index, first shifted lot, shift in sd).
pub struct Scenario {
    pub sources: Vec<String>,
    pub chars: Vec<String>,
    pub lots: usize,
    pub n: usize,
    pub shift: Option<(usize, usize, usize, f64)>,
}

impl Scenario {
    /// (file name, content, sampling order index) of every lot file.
    pub fn files(&self) -> Vec<(String, String, usize)> {
        let mut out = Vec::new();
        for (si, s) in self.sources.iter().enumerate() {
            for lot in 0..self.lots {
                let code = format!("{}-{:03}", &s[..2].to_uppercase(), lot + 1);
                let chars: Vec<(&str, Vec<f64>)> = self
                    .chars
                    .iter()
                    .enumerate()
                    .map(|(ci, c)| {
                        let mut mean = 100.0 * (ci + 1) as f64;
                        if let Some((ss, sc, from, size)) = self.shift
                            && ss == si
                            && sc == ci
                            && lot >= from
                        {
                            mean += size;
                        }
                        (c.as_str(), lot_values(self.n, mean, 1.0, lot * 7 + ci))
                    })
                    .collect();
                out.push((
                    format!("{s}_{code}.csv"),
                    long_file(s, &code, &lot_date(lot), &chars),
                    lot,
                ));
            }
        }
        out
    }
}
pub mod pg;
pub mod smtp;

/// Makes each named test function `fn(Backend)` a module of two tests, `sqlite` and
/// `postgres`, that run it on each backend.
#[macro_export]
macro_rules! both_backends {
    ($($name:ident),* $(,)?) => {
        $(
            mod $name {
                #[test]
                fn sqlite() {
                    super::$name($crate::common::Backend::Sqlite)
                }

                #[test]
                fn postgres() {
                    super::$name($crate::common::Backend::Postgres)
                }
            }
        )*
    };
}
