//! Watch: which inbox files are complete and may be taken.
//!
//! Sources of knowledge, because none is enough alone: file system events (notify; inotify on
//! Linux, or a polling watcher by config for network shares), a scan at startup, and a
//! periodic full rescan (events are lost on overflow, and never arrive for files written by
//! other machines on a share). A file is complete when it was renamed into the inbox, or when
//! its size and mtime have stayed unchanged for the settle interval. Names starting with `.`
//! or ending in `.part`/`.tmp` are never taken. This module only hands paths on; it never
//! reads a file's content.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

use notify::event::{AccessKind, AccessMode, EventKind, ModifyKind, RenameMode};
use notify::{Event, RecursiveMode};
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

use crate::config::Watch;
use crate::ingest::is_ignored_name;

#[derive(Debug, thiserror::Error)]
#[error("cannot watch {path}: {source}")]
pub struct WatchError {
    path: PathBuf,
    source: notify::Error,
}

/// What is known of a file that may still be written.
#[derive(Debug, Clone, Copy)]
struct Candidate {
    size: u64,
    mtime: Option<SystemTime>,
    /// When size and mtime were last seen to change.
    stable_since: Instant,
}

/// The decision logic, apart from the event sources so it can be tested alone.
#[derive(Debug, Default)]
pub struct Tracker {
    candidates: HashMap<PathBuf, Candidate>,
}

/// A file's size and mtime, or None when it is not a regular file (any more).
fn stat(path: &Path) -> Option<(u64, Option<SystemTime>)> {
    let meta = std::fs::metadata(path).ok()?;
    meta.is_file().then(|| (meta.len(), meta.modified().ok()))
}

impl Tracker {
    /// A file was (maybe) written: it must now stay unchanged for the settle interval.
    pub fn touched(&mut self, path: &Path, now: Instant) {
        if is_ignored_name(path) {
            return;
        }
        match stat(path) {
            Some((size, mtime)) => {
                self.candidates.insert(
                    path.to_path_buf(),
                    Candidate {
                        size,
                        mtime,
                        stable_since: now,
                    },
                );
            }
            None => {
                self.candidates.remove(path);
            }
        }
    }

    /// A file found by a scan: taken at once when its mtime is older than the settle
    /// interval, otherwise watched like a written file. Returns true when ready now.
    pub fn found(&mut self, path: &Path, settle: Duration, now: Instant) -> bool {
        if is_ignored_name(path) || self.candidates.contains_key(path) {
            return false;
        }
        let Some((size, mtime)) = stat(path) else {
            return false;
        };
        let age = mtime
            .and_then(|m| SystemTime::now().duration_since(m).ok())
            .unwrap_or_default();
        if age >= settle_for(size, settle) {
            return true;
        }
        self.candidates.insert(
            path.to_path_buf(),
            Candidate {
                size,
                mtime,
                stable_since: now,
            },
        );
        false
    }

    pub fn forget(&mut self, path: &Path) {
        self.candidates.remove(path);
    }

    /// Files whose size and mtime have not changed for `settle`; they leave the tracker.
    pub fn ready(&mut self, settle: Duration, now: Instant) -> Vec<PathBuf> {
        let mut ready = Vec::new();
        self.candidates.retain(|path, c| match stat(path) {
            None => false,
            Some((size, mtime)) => {
                if size != c.size || mtime != c.mtime {
                    c.size = size;
                    c.mtime = mtime;
                    c.stable_since = now;
                    true
                } else if now.duration_since(c.stable_since) >= settle_for(size, settle) {
                    ready.push(path.clone());
                    false
                } else {
                    true
                }
            }
        });
        ready.sort();
        ready
    }

    pub fn pending(&self) -> usize {
        self.candidates.len()
    }
}

/// How long a file must stay unchanged: an empty file is usually one whose writer has only
/// created it, so it gets much longer (and is then taken, to be quarantined as empty).
fn settle_for(size: u64, settle: Duration) -> Duration {
    if size == 0 {
        (settle * 10).max(Duration::from_secs(30))
    } else {
        settle
    }
}

/// Every regular file below `dir` (recursively), sorted, skipping ignored names.
pub fn scan(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&d) else {
            continue;
        };
        for entry in entries.flatten() {
            let path = entry.path();
            let Ok(kind) = entry.file_type() else {
                continue;
            };
            if kind.is_dir() {
                if !path
                    .file_name()
                    .is_some_and(|n| n.to_string_lossy().starts_with('.'))
                {
                    stack.push(path);
                }
            } else if kind.is_file() && !is_ignored_name(&path) {
                out.push(path);
            }
        }
    }
    out.sort();
    out
}

/// For `run --once`: the files in the inbox now, waiting (at most `limit`) for files still
/// being written to settle.
pub async fn settled_files(inbox: &Path, settle: Duration, limit: Duration) -> Vec<PathBuf> {
    let start = Instant::now();
    let mut tracker = Tracker::default();
    let mut ready = Vec::new();
    for path in scan(inbox) {
        if tracker.found(&path, settle, start) {
            ready.push(path);
        }
    }
    while tracker.pending() > 0 && start.elapsed() < limit {
        tokio::time::sleep(tick(settle)).await;
        ready.extend(tracker.ready(settle, Instant::now()));
    }
    ready.sort();
    ready
}

fn tick(settle: Duration) -> Duration {
    (settle / 4).clamp(Duration::from_millis(20), Duration::from_millis(500))
}

/// Runs until cancelled, sending batches of complete files to `ready`.
pub async fn run(
    inbox: PathBuf,
    cfg: Watch,
    ready: mpsc::Sender<Vec<PathBuf>>,
    cancel: CancellationToken,
) -> Result<(), WatchError> {
    let (ev_tx, mut ev_rx) = mpsc::unbounded_channel::<notify::Result<Event>>();
    let handler = move |res: notify::Result<Event>| {
        let _ = ev_tx.send(res);
    };
    let werr = |source| WatchError {
        path: inbox.clone(),
        source,
    };
    // Keep the watcher alive for the whole loop.
    let mut _watcher: Box<dyn notify::Watcher + Send> = if cfg.poll {
        let config = notify::Config::default().with_poll_interval(cfg.poll_interval);
        Box::new(notify::PollWatcher::new(handler, config).map_err(werr)?)
    } else {
        Box::new(notify::recommended_watcher(handler).map_err(werr)?)
    };
    _watcher
        .watch(&inbox, RecursiveMode::Recursive)
        .map_err(werr)?;

    let mut tracker = Tracker::default();
    let mut out: Vec<PathBuf> = Vec::new();
    let full_scan = |tracker: &mut Tracker, out: &mut Vec<PathBuf>| {
        let now = Instant::now();
        for path in scan(&inbox) {
            if tracker.found(&path, cfg.settle, now) {
                out.push(path);
            }
        }
    };
    full_scan(&mut tracker, &mut out);
    tracing::debug!(files = out.len(), "startup scan");
    let mut ticker = tokio::time::interval(tick(cfg.settle));
    ticker.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let mut rescan = tokio::time::interval(cfg.rescan);
    rescan.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    rescan.tick().await;

    loop {
        if !out.is_empty() {
            out.sort();
            out.dedup();
            tracing::debug!(files = out.len(), "files ready");
            tokio::select! {
                _ = cancel.cancelled() => return Ok(()),
                sent = ready.send(std::mem::take(&mut out)) => {
                    if sent.is_err() { return Ok(()); }
                }
            }
        }
        tokio::select! {
            _ = cancel.cancelled() => return Ok(()),
            ev = ev_rx.recv() => {
                let Some(ev) = ev else { return Ok(()) };
                tracing::trace!(?ev, "file event");
                let now = Instant::now();
                match ev {
                    Ok(ev) => {
                        if ev.need_rescan() {
                            tracing::info!("file events were lost; rescanning the inbox");
                            full_scan(&mut tracker, &mut out);
                        }
                        handle_event(&mut tracker, &mut out, &ev, now);
                    }
                    Err(e) => {
                        tracing::warn!(error = %e, "file watcher error; rescanning the inbox");
                        full_scan(&mut tracker, &mut out);
                    }
                }
            }
            _ = ticker.tick() => out.extend(tracker.ready(cfg.settle, Instant::now())),
            _ = rescan.tick() => full_scan(&mut tracker, &mut out),
        }
    }
}

fn handle_event(tracker: &mut Tracker, out: &mut Vec<PathBuf>, ev: &Event, now: Instant) {
    match &ev.kind {
        // Renamed into the inbox: complete by the writer's own declaration.
        EventKind::Modify(ModifyKind::Name(RenameMode::To)) => {
            for p in &ev.paths {
                renamed_in(tracker, out, p, now);
            }
        }
        EventKind::Modify(ModifyKind::Name(RenameMode::Both)) => {
            if let Some(from) = ev.paths.first() {
                tracker.forget(from);
            }
            if let Some(to) = ev.paths.get(1) {
                renamed_in(tracker, out, to, now);
            }
        }
        EventKind::Modify(ModifyKind::Name(RenameMode::From)) | EventKind::Remove(_) => {
            for p in &ev.paths {
                tracker.forget(p);
            }
        }
        // Reading a folder or a file opens it too: only writes count, or every scan of ours
        // would report itself.
        EventKind::Access(AccessKind::Close(AccessMode::Write)) => {
            for p in &ev.paths {
                tracker.touched(p, now);
            }
        }
        EventKind::Access(_) => {}
        EventKind::Create(_) => {
            for p in &ev.paths {
                if p.is_dir() {
                    // A folder created in the inbox: files written before its watch was added
                    // have no events of their own.
                    for f in scan(p) {
                        tracker.touched(&f, now);
                    }
                } else {
                    tracker.touched(p, now);
                }
            }
        }
        EventKind::Modify(_) | EventKind::Any => {
            for p in &ev.paths {
                if !p.is_dir() {
                    tracker.touched(p, now);
                }
            }
        }
        EventKind::Other => {}
    }
}

fn renamed_in(tracker: &mut Tracker, out: &mut Vec<PathBuf>, path: &Path, now: Instant) {
    if path.is_dir() {
        for f in scan(path) {
            tracker.touched(&f, now);
        }
    } else if !is_ignored_name(path) && path.is_file() {
        tracker.forget(path);
        out.push(path.to_path_buf());
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_written_file_waits_for_the_settle_interval() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("lot.csv");
        std::fs::write(&f, "source,lot\n").unwrap();
        let mut t = Tracker::default();
        let t0 = Instant::now();
        let settle = Duration::from_secs(2);
        t.touched(&f, t0);
        assert!(t.ready(settle, t0 + Duration::from_secs(1)).is_empty());
        // Growing resets the clock.
        std::fs::write(&f, "source,lot,x\nalder,1,2\n").unwrap();
        assert!(t.ready(settle, t0 + Duration::from_millis(1900)).is_empty());
        assert!(t.ready(settle, t0 + Duration::from_millis(3000)).is_empty());
        assert_eq!(t.ready(settle, t0 + Duration::from_millis(4000)), vec![f]);
        assert_eq!(t.pending(), 0);
    }

    #[test]
    fn scans_skip_temporary_and_hidden_names() {
        let dir = tempfile::tempdir().unwrap();
        for n in ["a.csv", ".b.csv", "c.csv.part", "d.tmp"] {
            std::fs::write(dir.path().join(n), "x").unwrap();
        }
        std::fs::create_dir(dir.path().join("sub")).unwrap();
        std::fs::write(dir.path().join("sub/e.csv"), "x").unwrap();
        let found = scan(dir.path());
        assert_eq!(
            found,
            vec![dir.path().join("a.csv"), dir.path().join("sub/e.csv")]
        );
    }

    #[test]
    fn old_files_found_by_a_scan_are_ready_at_once() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("lot.csv");
        std::fs::write(&f, "x").unwrap();
        let mut t = Tracker::default();
        assert!(t.found(&f, Duration::ZERO, Instant::now()));
        assert!(!t.found(&f, Duration::from_secs(3600), Instant::now()));
        assert_eq!(t.pending(), 1);
    }
}
