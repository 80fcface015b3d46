//! A private PostgreSQL server for one test: its own cluster in a temp folder, listening on a
//! free port of 127.0.0.1 with trust authentication for the `postgres` user, stopped and
//! removed when the `PgServer` is dropped.
//!
//! The server binaries come from `LOTDRIFT_PG_BIN` or the newest Debian `postgresql` package
//! (`/usr/lib/postgresql/VERSION/bin`, which `scripts/test` installs as root). A test that
//! needs a server fails when there is none: it never passes by skipping.
//!
//! `initdb` refuses to run as root, so under root the cluster belongs to `nobody` and the
//! server programs run through `runuser -u nobody`.

use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::Instant;

const PG_ROOT: &str = "/usr/lib/postgresql";
const SERVICE_USER: &str = "nobody";

/// A running private cluster.
pub struct PgServer {
    dir: tempfile::TempDir,
    bin: PathBuf,
    port: u16,
    /// The unprivileged user the server programs run as when the test runs as root.
    run_as: Option<&'static str>,
}

impl PgServer {
    /// Makes a fresh cluster and starts it. Panics (failing the test) when the server binaries
    /// are missing or the server does not start; the panic names what failed.
    pub fn start() -> PgServer {
        let started = Instant::now();
        let bin = server_bin_dir();
        let dir = tempfile::Builder::new()
            .prefix("lotdrift-pg")
            .tempdir()
            .expect("create a temp folder for the PostgreSQL cluster");
        let run_as = if is_root() {
            hand_to_service_user(dir.path());
            Some(SERVICE_USER)
        } else {
            None
        };
        let mut server = PgServer {
            dir,
            bin,
            port: 0,
            run_as,
        };
        server.init_cluster();
        server.start_on_free_port();
        eprintln!(
            "PgServer: PostgreSQL on 127.0.0.1:{} ready in {:?}",
            server.port,
            started.elapsed()
        );
        server
    }

    /// The port the server listens on (127.0.0.1).
    pub fn port(&self) -> u16 {
        self.port
    }

    /// The URL of database `database` as the `postgres` superuser (no password).
    pub fn url(&self, database: &str) -> String {
        format!("postgres://postgres@127.0.0.1:{}/{database}", self.port)
    }

    /// Creates database `name` (letters, digits and `_`) and returns its URL.
    pub fn create_database(&self, name: &str) -> String {
        assert!(
            !name.is_empty() && name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_'),
            "database name {name:?}: use letters, digits and _ only"
        );
        self.psql("postgres", &format!("CREATE DATABASE \"{name}\""));
        self.url(name)
    }

    /// Runs `sql` in `database` with the cluster's own `psql`, panicking on any error.
    pub fn psql(&self, database: &str, sql: &str) -> String {
        let out = Command::new(self.bin.join("psql"))
            .args(["-X", "-q", "-A", "-t", "-v", "ON_ERROR_STOP=1"])
            .arg(self.url(database))
            .args(["-c", sql])
            .output()
            .expect("run psql");
        assert!(
            out.status.success(),
            "psql {sql:?} on database {database} failed: {}",
            text(&out.stderr)
        );
        text(&out.stdout)
    }

    /// Stops the server the way a power cut would (no shutdown checkpoint), for crash tests.
    pub fn stop_immediately(&self) {
        let out = self.pg_ctl_stop();
        assert!(
            out.status.success(),
            "pg_ctl stop -m immediate failed: {}",
            text(&out.stderr)
        );
    }

    /// Starts the stopped server again on the same port (crash recovery runs first).
    pub fn start_again(&self) {
        let out = self.pg_ctl_start(self.port);
        assert!(
            out.status.success(),
            "pg_ctl start (again, port {}) failed: {}\nserver log:\n{}",
            self.port,
            text(&out.stderr),
            self.server_log()
        );
    }

    /// The server's log so far (empty when it cannot be read).
    pub fn server_log(&self) -> String {
        std::fs::read_to_string(self.log_path()).unwrap_or_default()
    }

    fn data_dir(&self) -> PathBuf {
        self.dir.path().join("data")
    }

    fn log_path(&self) -> PathBuf {
        self.dir.path().join("log")
    }

    /// `initdb`: trust authentication, UTF-8, the C locale (text sorts by bytes, as in SQLite).
    fn init_cluster(&self) {
        let out = self
            .server_command("initdb")
            .arg("-D")
            .arg(self.data_dir())
            .args(["-U", "postgres", "--auth=trust", "-E", "UTF8"])
            .args(["--no-sync", "--locale=C"])
            .output()
            .expect("run initdb");
        assert!(
            out.status.success(),
            "initdb -D {} failed: {}{}",
            self.data_dir().display(),
            text(&out.stdout),
            text(&out.stderr)
        );
    }

    /// Starts the server on a free port; a port taken between the probe and the server's bind
    /// gets one more try on another port.
    fn start_on_free_port(&mut self) {
        for attempt in 1..=2 {
            self.port = free_port();
            let out = self.pg_ctl_start(self.port);
            if out.status.success() {
                return;
            }
            let log = self.server_log();
            if attempt == 1 && port_was_taken(&log) {
                continue;
            }
            panic!(
                "pg_ctl start (port {}) failed: {}{}\nserver log:\n{log}",
                self.port,
                text(&out.stdout),
                text(&out.stderr)
            );
        }
    }

    fn pg_ctl_start(&self, port: u16) -> Output {
        let options = format!(
            "-p {port} -k {} -c listen_addresses=127.0.0.1 -c fsync=off -c max_connections=200",
            self.dir.path().display()
        );
        self.server_command("pg_ctl")
            .arg("-D")
            .arg(self.data_dir())
            .args(["-w", "-l"])
            .arg(self.log_path())
            .args(["-o", &options, "start"])
            .output()
            .expect("run pg_ctl start")
    }

    fn pg_ctl_stop(&self) -> Output {
        self.server_command("pg_ctl")
            .arg("-D")
            .arg(self.data_dir())
            .args(["-w", "-m", "immediate", "stop"])
            .output()
            .expect("run pg_ctl stop")
    }

    /// A server program of the bin folder, run as the service user under root.
    fn server_command(&self, program: &str) -> Command {
        let path = self.bin.join(program);
        let mut command = match self.run_as {
            Some(user) => {
                let mut c = Command::new("runuser");
                c.args(["-u", user, "--"]).arg(path);
                c
            }
            None => Command::new(path),
        };
        // The service user may not be allowed into the test's working folder.
        command.current_dir(self.dir.path());
        command
    }
}

impl Drop for PgServer {
    fn drop(&mut self) {
        // Errors are ignored: the server may already be stopped (stop_immediately, or a
        // start that failed). The temp folder is removed after this.
        let _ = self.pg_ctl_stop();
    }
}

/// `LOTDRIFT_PG_BIN`, else the bin folder of the newest `/usr/lib/postgresql/VERSION` that has
/// `initdb`.
pub fn server_bin_dir() -> PathBuf {
    if let Some(dir) = std::env::var_os("LOTDRIFT_PG_BIN") {
        let dir = PathBuf::from(dir);
        assert!(
            dir.join("initdb").is_file(),
            "LOTDRIFT_PG_BIN={} has no initdb",
            dir.display()
        );
        return dir;
    }
    newest_installed_bin_dir().unwrap_or_else(|| {
        panic!(
            "PostgreSQL server binaries not found (initdb under {PG_ROOT}/*/bin, or \
             LOTDRIFT_PG_BIN); scripts/test installs Debian's postgresql package as root"
        )
    })
}

fn newest_installed_bin_dir() -> Option<PathBuf> {
    let entries = std::fs::read_dir(PG_ROOT).ok()?;
    entries
        .flatten()
        .map(|e| e.path().join("bin"))
        .filter(|bin| bin.join("initdb").is_file())
        .max_by_key(|bin| version_key(bin))
}

/// "15" or "9.6" (the folder above `bin`) as numbers, for picking the newest.
fn version_key(bin: &Path) -> Vec<u32> {
    let version = bin
        .parent()
        .and_then(Path::file_name)
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    version
        .split('.')
        .map(|part| part.parse().unwrap_or(0))
        .collect()
}

fn is_root() -> bool {
    // SAFETY: geteuid has no preconditions and cannot fail.
    unsafe { libc::geteuid() == 0 }
}

/// Gives the cluster's temp folder to the service user, so initdb (run as that user) can
/// create the data folder and the log in it. (`chown USER:` is the user and its login group.)
fn hand_to_service_user(dir: &Path) {
    check_service_user();
    let out = Command::new("chown")
        .arg(format!("{SERVICE_USER}:"))
        .arg(dir)
        .output()
        .expect("run chown");
    assert!(
        out.status.success(),
        "chown {SERVICE_USER}: {} failed: {}",
        dir.display(),
        text(&out.stderr)
    );
}

/// Panics when the service user does not exist (`id` looks it up as libc would, without
/// getpwnam's buffer shared between the test threads).
fn check_service_user() {
    let found = Command::new("id")
        .args(["-u", SERVICE_USER])
        .output()
        .is_ok_and(|out| out.status.success());
    assert!(
        found,
        "user {SERVICE_USER} not found: as root, the PostgreSQL test servers run as \
         {SERVICE_USER} because initdb refuses to run as root"
    );
}

/// A port that was free a moment ago (the listener is dropped before the server binds it).
fn free_port() -> u16 {
    let listener = TcpListener::bind("127.0.0.1:0").expect("bind 127.0.0.1:0 to find a port");
    listener.local_addr().expect("local address").port()
}

fn port_was_taken(server_log: &str) -> bool {
    server_log.contains("could not bind") || server_log.contains("Address already in use")
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}
