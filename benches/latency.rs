//! Drop-to-alert latency of the daemon, the timing half of `benches/latency.sh`.
//!
//! Starts `lotdrift run --config FILE` (the config must ask for JSON logs) with its log on a
//! pipe, waits for the `watching` event, then feeds the inbox at a steady rate from a folder
//! of lot files (each written as `NAME.part`, then renamed to `NAME`: the watcher ignores
//! `.part` names and takes a renamed-in file at once) and every `interval` seconds drops one
//! lot of a probe source the same way, on a fixed schedule (open loop: the next drop does not
//! wait for the previous alert, so a daemon that falls behind shows growing latencies rather
//! than a lighter load). A drop's latency runs from just before its rename to
//! the moment the first `lotdrift::alert` log event naming the probe's source is read from
//! the pipe (a thread reads the log line by line, so nothing is polled). The log's own
//! timestamp of that event, against the wall clock of the rename, is printed beside it as a
//! cross-check. Prints one line per drop and a summary; asserts nothing.
//!
//! Environment (all set by `benches/latency.sh`; without `LATENCY_DAEMON` it does nothing):
//! - `LATENCY_DAEMON`: the lotdrift binary; `LATENCY_CONFIG`: its config file;
//!   `LATENCY_INBOX`: the config's inbox folder.
//! - `LATENCY_DROP_DIR`: one lot file per probe, taken in name order.
//! - `LATENCY_DROPS` (50): drops; `LATENCY_DROP_INTERVAL` (1.0): seconds between drops.
//! - `LATENCY_FEED_DIR`, `LATENCY_FEED_RATE` (20 files per second; 0 = no feed): the stream
//!   of other lot files, sent in order of their lot code (the part of the name after its
//!   last `_`), then name.
//! - `LATENCY_WARMUP` (2.0): seconds of feed before the first drop.
//! - `LATENCY_TIMEOUT` (10): seconds to wait for one drop's alert (then it counts as missed);
//!   the feed goes on until the last drop has its alert or times out.
//! - `LATENCY_START_TIMEOUT` (300): seconds to wait for the daemon's `watching` event.
//! - `LATENCY_LOG`: where to copy the daemon's log (default: not kept).

use std::ffi::OsString;
use std::fs::File;
use std::io::{BufRead, BufReader, BufWriter, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, ChildStderr, Command, Stdio};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError, Sender};
use std::time::{Duration, Instant, SystemTime};

use anyhow::{Context, Result, bail};

/// What the log reader passes on.
enum LogEvent {
    /// The daemon logged `watching`: its startup pass is done.
    Ready,
    /// A `lotdrift::alert` event: its source, when it was read, and the log's own timestamp.
    Alert {
        source: String,
        read_at: Instant,
        logged_at: Option<SystemTime>,
    },
    /// The log closed: the daemon exited.
    Closed,
}

struct Settings {
    daemon: PathBuf,
    config: PathBuf,
    inbox: PathBuf,
    drops: Vec<Probe>,
    interval: Duration,
    feed: Vec<PathBuf>,
    feed_rate: f64,
    warmup: Duration,
    timeout: Duration,
    start_timeout: Duration,
    log: Option<PathBuf>,
}

/// One probe lot file and the source it names.
struct Probe {
    path: PathBuf,
    source: String,
}

fn env_path(name: &str) -> Result<PathBuf> {
    std::env::var_os(name)
        .map(PathBuf::from)
        .with_context(|| format!("{name} is not set"))
}

fn env_number<T: std::str::FromStr>(name: &str, default: T) -> Result<T> {
    match std::env::var(name) {
        Ok(text) => text
            .trim()
            .parse()
            .ok()
            .with_context(|| format!("{name}={text:?} is not a number")),
        Err(_) => Ok(default),
    }
}

fn csv_files(dir: &Path) -> Result<Vec<PathBuf>> {
    let mut files: Vec<PathBuf> = std::fs::read_dir(dir)
        .with_context(|| format!("reading {}", dir.display()))?
        .map(|entry| entry.map(|e| e.path()))
        .collect::<std::io::Result<_>>()?;
    files.retain(|p| p.extension().is_some_and(|e| e == "csv"));
    files.sort();
    Ok(files)
}

/// The `source` of a lot file's first data row.
fn source_of(path: &Path) -> Result<String> {
    let mut reader = csv::ReaderBuilder::new()
        .comment(Some(b'#'))
        .from_path(path)
        .with_context(|| format!("reading {}", path.display()))?;
    let column = reader
        .headers()?
        .iter()
        .position(|h| h.trim().eq_ignore_ascii_case("source"))
        .with_context(|| format!("{}: no source column", path.display()))?;
    let record = reader
        .records()
        .next()
        .with_context(|| format!("{}: no data row", path.display()))??;
    Ok(record.get(column).unwrap_or_default().trim().to_string())
}

/// Sort key of a feed file: its lot code (after the name's last `_`), then its name.
fn feed_key(path: &Path) -> (String, OsString) {
    let name = path.file_name().unwrap_or_default();
    let text = name.to_string_lossy();
    let lot = text.rsplit_once('_').map_or("", |(_, lot)| lot).to_string();
    (lot, name.to_os_string())
}

fn settings() -> Result<Option<Settings>> {
    let Some(daemon) = std::env::var_os("LATENCY_DAEMON") else {
        return Ok(None);
    };
    let drop_dir = env_path("LATENCY_DROP_DIR")?;
    let count: usize = env_number("LATENCY_DROPS", 50)?;
    let probes = csv_files(&drop_dir)?;
    if probes.len() < count {
        bail!(
            "{} holds {} lot files, {count} drops asked for",
            drop_dir.display(),
            probes.len()
        );
    }
    let drops = probes
        .into_iter()
        .take(count)
        .map(|path| {
            Ok(Probe {
                source: source_of(&path)?,
                path,
            })
        })
        .collect::<Result<Vec<_>>>()?;
    let feed_rate: f64 = env_number("LATENCY_FEED_RATE", 20.0)?;
    let mut feed = match std::env::var_os("LATENCY_FEED_DIR") {
        Some(dir) if feed_rate > 0.0 => csv_files(Path::new(&dir))?,
        _ => Vec::new(),
    };
    feed.sort_by_cached_key(|p| feed_key(p));
    let seconds = |name: &str, default: f64| -> Result<Duration> {
        let s: f64 = env_number(name, default)?;
        Duration::try_from_secs_f64(s).with_context(|| format!("{name}={s}: not a duration"))
    };
    Ok(Some(Settings {
        daemon: PathBuf::from(daemon),
        config: env_path("LATENCY_CONFIG")?,
        inbox: env_path("LATENCY_INBOX")?,
        drops,
        interval: seconds("LATENCY_DROP_INTERVAL", 1.0)?,
        feed,
        feed_rate,
        warmup: seconds("LATENCY_WARMUP", 2.0)?,
        timeout: seconds("LATENCY_TIMEOUT", 10.0)?,
        start_timeout: seconds("LATENCY_START_TIMEOUT", 300.0)?,
        log: std::env::var_os("LATENCY_LOG").map(PathBuf::from),
    }))
}

/// Reads the daemon's JSON log line by line; copies it to `copy` and reports events.
fn read_log(stderr: ChildStderr, copy: Option<PathBuf>, events: Sender<LogEvent>) -> Result<()> {
    let mut copy = match copy {
        Some(path) => Some(BufWriter::new(
            File::create(&path).with_context(|| format!("creating {}", path.display()))?,
        )),
        None => None,
    };
    let mut reader = BufReader::new(stderr);
    let mut line = String::new();
    loop {
        line.clear();
        if reader.read_line(&mut line)? == 0 {
            break;
        }
        let read_at = Instant::now();
        if let Some(c) = copy.as_mut() {
            c.write_all(line.as_bytes())?;
        }
        let is_alert = line.contains("\"lotdrift::alert\"");
        if !is_alert && !line.contains("\"watching\"") {
            continue;
        }
        let Ok(json) = serde_json::from_str::<serde_json::Value>(&line) else {
            continue;
        };
        let fields = &json["fields"];
        let event = if is_alert {
            let Some(source) = fields["source"].as_str() else {
                continue;
            };
            let logged_at = json["timestamp"]
                .as_str()
                .and_then(|t| chrono::DateTime::parse_from_rfc3339(t).ok())
                .map(SystemTime::from);
            LogEvent::Alert {
                source: source.to_string(),
                read_at,
                logged_at,
            }
        } else if fields["message"] == "watching" {
            LogEvent::Ready
        } else {
            continue;
        };
        if events.send(event).is_err() {
            break;
        }
    }
    if let Some(mut c) = copy {
        c.flush()?;
    }
    let _ = events.send(LogEvent::Closed);
    Ok(())
}

/// Writes `from` into the inbox as `NAME.part`, returning the temporary and final paths.
fn stage(from: &Path, inbox: &Path) -> Result<(PathBuf, PathBuf)> {
    let name = from.file_name().context("a lot file without a name")?;
    let target = inbox.join(name);
    let mut part = target.clone().into_os_string();
    part.push(".part");
    let part = PathBuf::from(part);
    std::fs::copy(from, &part).with_context(|| format!("writing {}", part.display()))?;
    Ok((part, target))
}

fn sleep_until(due: Instant) {
    let now = Instant::now();
    if due > now {
        std::thread::sleep(due - now);
    }
}

/// Sends the feed at `rate` files per second until stopped or out of files.
fn feed(
    files: Vec<PathBuf>,
    inbox: PathBuf,
    rate: f64,
    stop: Arc<AtomicBool>,
    sent: Arc<AtomicUsize>,
) -> Result<()> {
    let start = Instant::now();
    for (k, path) in files.iter().enumerate() {
        if stop.load(Ordering::Relaxed) {
            return Ok(());
        }
        sleep_until(start + Duration::from_secs_f64(k as f64 / rate));
        let (part, target) = stage(path, &inbox)?;
        std::fs::rename(&part, &target)?;
        sent.fetch_add(1, Ordering::Relaxed);
    }
    if !stop.load(Ordering::Relaxed) {
        eprintln!(
            "latency: warning: the feed ran out after {} files; later drops had no load",
            files.len()
        );
    }
    Ok(())
}

/// A dropped probe lot, waiting for its alert.
struct Dropped {
    /// 1-based, in drop order.
    number: usize,
    source: String,
    renamed: Instant,
    renamed_wall: SystemTime,
}

/// The drops' results so far.
#[derive(Default)]
struct Outcome {
    latencies: Vec<f64>,
    log_latencies: Vec<f64>,
    missed: usize,
}

impl Outcome {
    fn settle(&mut self, d: &Dropped, read_at: Instant, logged_at: Option<SystemTime>, n: usize) {
        let ms = (read_at - d.renamed).as_secs_f64() * 1e3;
        let log_ms = logged_at
            .and_then(|t| t.duration_since(d.renamed_wall).ok())
            .map(|l| l.as_secs_f64() * 1e3);
        self.latencies.push(ms);
        if let Some(l) = log_ms {
            self.log_latencies.push(l);
        }
        println!(
            "latency: drop {}/{n} source={} ms={ms:.3} log_ms={}",
            d.number,
            d.source,
            log_ms.map_or("-".into(), |l| format!("{l:.3}"))
        );
    }

    fn miss(&mut self, d: &Dropped, timeout: Duration, n: usize) {
        self.missed += 1;
        println!(
            "latency: drop {}/{n} source={} missed (no alert within {timeout:?})",
            d.number, d.source
        );
    }
}

/// Reads log events until `until` (or, with `until_empty`, until nothing is pending): the
/// first alert naming a pending probe's source settles it; a probe pending for longer than
/// `timeout` is missed.
fn collect(
    events: &Receiver<LogEvent>,
    pending: &mut Vec<Dropped>,
    out: &mut Outcome,
    until: Instant,
    until_empty: bool,
    timeout: Duration,
    n: usize,
) -> Result<()> {
    loop {
        let now = Instant::now();
        pending.retain(|d| {
            let expired = now.duration_since(d.renamed) > timeout;
            if expired {
                out.miss(d, timeout, n);
            }
            !expired
        });
        if now >= until || (until_empty && pending.is_empty()) {
            return Ok(());
        }
        // Wake at least every 100 ms to expire probes on time.
        let wait = (until - now).min(Duration::from_millis(100));
        match events.recv_timeout(wait) {
            Ok(LogEvent::Alert {
                source,
                read_at,
                logged_at,
            }) => {
                if let Some(i) = pending.iter().position(|d| d.source == source) {
                    let d = pending.remove(i);
                    if read_at.duration_since(d.renamed) > timeout {
                        out.miss(&d, timeout, n);
                    } else {
                        out.settle(&d, read_at, logged_at, n);
                    }
                }
            }
            Ok(LogEvent::Closed) => bail!("the daemon's log closed (did it exit?)"),
            Ok(LogEvent::Ready) | Err(RecvTimeoutError::Timeout) => {}
            Err(RecvTimeoutError::Disconnected) => bail!("the log reader stopped"),
        }
    }
}

/// Peak and current resident set size of a process, in MiB (Linux /proc).
fn rss_mib(pid: u32) -> (Option<f64>, Option<f64>) {
    let Ok(status) = std::fs::read_to_string(format!("/proc/{pid}/status")) else {
        return (None, None);
    };
    let field = |name: &str| {
        status
            .lines()
            .find_map(|l| l.strip_prefix(name))
            .and_then(|rest| {
                rest.trim()
                    .trim_end_matches("kB")
                    .trim()
                    .parse::<f64>()
                    .ok()
            })
            .map(|kb| kb / 1024.0)
    };
    (field("VmHWM:"), field("VmRSS:"))
}

fn stop_daemon(child: &mut Child) -> Result<()> {
    if child.try_wait()?.is_some() {
        return Ok(());
    }
    // SAFETY: kill(2) with the pid of a child we own and have not yet reaped.
    unsafe {
        libc::kill(child.id() as libc::pid_t, libc::SIGTERM);
    }
    let deadline = Instant::now() + Duration::from_secs(30);
    while Instant::now() < deadline {
        if child.try_wait()?.is_some() {
            return Ok(());
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    eprintln!("latency: the daemon did not stop within 30 s of SIGTERM; killing it");
    child.kill()?;
    child.wait()?;
    Ok(())
}

/// Nearest-rank percentile of sorted values.
fn percentile(sorted: &[f64], q: f64) -> f64 {
    let rank = (q * sorted.len() as f64).ceil().max(1.0) as usize;
    sorted[rank.min(sorted.len()) - 1]
}

fn main() -> Result<()> {
    let Some(s) = settings()? else {
        println!(
            "latency: LATENCY_DAEMON is not set, nothing to measure (benches/latency.sh sets it)"
        );
        return Ok(());
    };
    let spawned = Instant::now();
    let mut child = Command::new(&s.daemon)
        .arg("run")
        .arg("--config")
        .arg(&s.config)
        .env_remove("LOTDRIFT_LOG")
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .with_context(|| format!("starting {}", s.daemon.display()))?;
    let result = measure(&s, &mut child, spawned);
    let stopped = stop_daemon(&mut child);
    result.and(stopped)
}

fn measure(s: &Settings, child: &mut Child, spawned: Instant) -> Result<()> {
    let stderr = child.stderr.take().context("no stderr pipe")?;
    let (tx, events) = mpsc::channel();
    let log = s.log.clone();
    let reader = std::thread::spawn(move || read_log(stderr, log, tx));

    let ready_by = spawned + s.start_timeout;
    loop {
        match events.recv_timeout(ready_by.saturating_duration_since(Instant::now())) {
            Ok(LogEvent::Ready) => break,
            Ok(LogEvent::Closed) => bail!("the daemon exited before it was watching"),
            Ok(LogEvent::Alert { .. }) => {}
            Err(_) => bail!(
                "no 'watching' event in the log within {:?} (is log.format \"json\"?)",
                s.start_timeout
            ),
        }
    }
    let start_s = spawned.elapsed().as_secs_f64();

    let stop = Arc::new(AtomicBool::new(false));
    let sent = Arc::new(AtomicUsize::new(0));
    let feeder = if s.feed.is_empty() {
        None
    } else {
        let (files, inbox, rate) = (s.feed.clone(), s.inbox.clone(), s.feed_rate);
        let (stop, sent) = (stop.clone(), sent.clone());
        Some(std::thread::spawn(move || {
            feed(files, inbox, rate, stop, sent)
        }))
    };
    let feed_started = Instant::now();
    let first_drop = feed_started
        + if feeder.is_some() {
            s.warmup
        } else {
            Duration::ZERO
        };

    // Drops follow their schedule whatever the daemon does (open loop): a daemon that falls
    // behind shows growing latencies (and misses), not a slower schedule.
    let n = s.drops.len();
    let mut out = Outcome::default();
    let mut pending = Vec::new();
    for (i, probe) in s.drops.iter().enumerate() {
        let due = first_drop + s.interval.mul_f64(i as f64);
        collect(&events, &mut pending, &mut out, due, false, s.timeout, n)?;
        let (part, target) = stage(&probe.path, &s.inbox)?;
        let renamed_wall = SystemTime::now();
        let renamed = Instant::now();
        std::fs::rename(&part, &target)?;
        pending.push(Dropped {
            number: i + 1,
            source: probe.source.clone(),
            renamed,
            renamed_wall,
        });
    }
    let last = Instant::now() + s.timeout + Duration::from_millis(200);
    collect(&events, &mut pending, &mut out, last, true, s.timeout, n)?;
    let Outcome {
        mut latencies,
        mut log_latencies,
        missed,
    } = out;
    let feed_seconds = feed_started.elapsed().as_secs_f64();
    let (peak_rss, rss) = rss_mib(child.id());
    stop.store(true, Ordering::Relaxed);
    if let Some(f) = feeder {
        f.join()
            .map_err(|_| anyhow::anyhow!("the feeder panicked"))??;
    }
    let fed = sent.load(Ordering::Relaxed);

    latencies.sort_by(f64::total_cmp);
    log_latencies.sort_by(f64::total_cmp);
    let stat = |v: &[f64], q: f64| {
        if v.is_empty() {
            "-".to_string()
        } else {
            format!("{:.3}", percentile(v, q))
        }
    };
    let mib = |v: Option<f64>| v.map_or("-".into(), |m| format!("{m:.1}"));
    println!(
        "latency: drops={n} missed={missed} p50_ms={} p99_ms={} max_ms={} log_p50_ms={} \
         log_p99_ms={} feed_files={fed} feed_per_s={:.1} start_s={start_s:.3} \
         daemon_peak_rss_mib={} daemon_rss_mib={}",
        stat(&latencies, 0.5),
        stat(&latencies, 0.99),
        stat(&latencies, 1.0),
        stat(&log_latencies, 0.5),
        stat(&log_latencies, 0.99),
        fed as f64 / feed_seconds,
        mib(peak_rss),
        mib(rss),
    );
    let list: Vec<String> = latencies.iter().map(|v| format!("{v:.3}")).collect();
    println!("latency: values_ms={}", list.join(","));
    stop_daemon(child)?;
    reader
        .join()
        .map_err(|_| anyhow::anyhow!("the log reader panicked"))??;
    Ok(())
}
