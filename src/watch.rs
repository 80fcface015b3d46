//! Watch: which inbox files are complete and may be taken.
//!
//! Sources of knowledge, because none is enough alone: file system events (notify; inotify on
//! Linux, or a polling watcher by config for network shares), a scan at startup, and a
//! periodic full rescan (events are lost on overflow, and never arrive for files written by
//! other machines on a share). A file is complete when it was renamed into the inbox, or when
//! its size and mtime have stayed unchanged for the settle interval. Names starting with `.`
//! or ending in `.part`/`.tmp` are never taken. A symbolic link, pipe, socket or device is
//! handed on at once, for ingest to quarantine; a folder named like a lot file is reported
//! once. This module only hands paths on; it never reads a file's content or follows a link.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

use notify::event::{AccessKind, AccessMode, EventKind, ModifyKind, RenameMode};
use notify::{Event, RecursiveMode};
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

use crate::config::Watch;
use crate::ingest::is_ignored_name;

#[derive(Debug, thiserror::Error)]
#[error("cannot watch {path}")]
pub struct WatchError {
    path: PathBuf,
    source: notify::Error,
}

/// What is known of a file that may still be written.
#[derive(Debug, Clone, Copy)]
struct Candidate {
    size: u64,
    mtime: Option<SystemTime>,
    /// False for a symbolic link, pipe, socket or device: handed on without settling, so that
    /// ingest quarantines it (it is never followed or read).
    regular: bool,
    /// When size and mtime were last seen to change.
    stable_since: Instant,
}

/// The decision logic, apart from the event sources so it can be tested alone.
#[derive(Debug, Default)]
pub struct Tracker {
    candidates: HashMap<PathBuf, Candidate>,
    /// Empty files settle like others (`run --once`) instead of waiting much longer.
    empty_files_settle_alike: bool,
    /// Folders named like lot files, already reported in the log.
    folders_reported: HashSet<PathBuf>,
}

/// An inbox entry's size, mtime and whether it is a regular file, without following a
/// symbolic link; None for a folder or when it is gone.
fn stat(path: &Path) -> Option<(u64, Option<SystemTime>, bool)> {
    let meta = std::fs::symlink_metadata(path).ok()?;
    (!meta.is_dir()).then(|| (meta.len(), meta.modified().ok(), meta.is_file()))
}

/// True for a folder itself (a symbolic link to a folder is not one).
fn is_real_dir(path: &Path) -> bool {
    std::fs::symlink_metadata(path).is_ok_and(|m| m.is_dir())
}

/// True for names a lot file would have (`.csv`, `.tsv`, `.txt`, workbooks).
fn lot_file_name(path: &Path) -> bool {
    path.extension().and_then(|e| e.to_str()).is_some_and(|e| {
        ["csv", "tsv", "txt", "xlsx", "xlsm", "xlsb", "xls", "ods"]
            .iter()
            .any(|x| e.eq_ignore_ascii_case(x))
    })
}

impl Tracker {
    /// For `run --once`: an empty file settles in the same interval as any other.
    pub fn for_once() -> Tracker {
        Tracker {
            empty_files_settle_alike: true,
            ..Tracker::default()
        }
    }

    /// Scans the inbox (see [`scan`]): entries ready now are returned, others watched; a folder
    /// named like a lot file is reported once.
    pub fn scan(&mut self, dir: &Path, settle: Duration, now: Instant) -> Vec<PathBuf> {
        let found = scan(dir);
        self.note_folders(&found.lot_named_folders);
        found
            .entries
            .into_iter()
            .filter(|p| self.found(p, settle, now))
            .collect()
    }

    /// Warns once per folder that is named like a lot file (its files are taken, not it).
    fn note_folders(&mut self, folders: &[PathBuf]) {
        for f in folders {
            if self.folders_reported.insert(f.clone()) {
                tracing::warn!(
                    folder = %f.display(),
                    "a folder named like a lot file is in the inbox; it is left where it is \
                     (lot files must be regular files; files inside it are taken)"
                );
            }
        }
    }

    /// A file was (maybe) written: it must now stay unchanged for the settle interval.
    pub fn touched(&mut self, path: &Path, now: Instant) {
        if is_ignored_name(path) {
            return;
        }
        match stat(path) {
            Some((size, mtime, regular)) => {
                self.candidates.insert(
                    path.to_path_buf(),
                    Candidate {
                        size,
                        mtime,
                        regular,
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
        let Some((size, mtime, regular)) = stat(path) else {
            return false;
        };
        let age = mtime
            .and_then(|m| SystemTime::now().duration_since(m).ok())
            .unwrap_or_default();
        if age >= settle_for(size, regular, settle, self.empty_files_settle_alike) {
            return true;
        }
        self.candidates.insert(
            path.to_path_buf(),
            Candidate {
                size,
                mtime,
                regular,
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
        let alike = self.empty_files_settle_alike;
        self.candidates.retain(|path, c| match stat(path) {
            None => false,
            Some((size, mtime, regular)) => {
                if size != c.size || mtime != c.mtime || regular != c.regular {
                    c.size = size;
                    c.mtime = mtime;
                    c.regular = regular;
                    c.stable_since = now;
                    true
                } else if now.duration_since(c.stable_since)
                    >= settle_for(size, regular, settle, alike)
                {
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

/// How long an entry must stay unchanged. An entry that is not a regular file has nothing to
/// wait for. The daemon gives an empty file much longer: it is usually one whose writer has
/// only created it (it is then taken, to be quarantined as empty). `run --once`
/// (`empty_alike`) takes a settled empty file like any other, so it never waits longer than
/// the settle interval.
fn settle_for(size: u64, regular: bool, settle: Duration, empty_alike: bool) -> Duration {
    if !regular {
        Duration::ZERO
    } else if size == 0 && !empty_alike {
        (settle * 10).max(Duration::from_secs(30))
    } else {
        settle
    }
}

/// What a scan of the inbox found.
#[derive(Debug, Default)]
pub struct Scan {
    /// Every entry below the inbox that is not a folder (regular files, and symbolic links,
    /// pipes, sockets and devices for ingest to quarantine), sorted, skipping ignored names.
    pub entries: Vec<PathBuf>,
    /// Folders named like lot files (they are searched like any folder, and reported).
    pub lot_named_folders: Vec<PathBuf>,
}

/// Every entry below `dir` (recursively, never through a symbolic link); see [`Scan`].
pub fn scan(dir: &Path) -> Scan {
    let mut out = Vec::new();
    let mut folders = Vec::new();
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
                    if lot_file_name(&path) {
                        folders.push(path.clone());
                    }
                    stack.push(path);
                }
            } else if !is_ignored_name(&path) {
                out.push(path);
            }
        }
    }
    out.sort();
    folders.sort();
    Scan {
        entries: out,
        lot_named_folders: folders,
    }
}

/// For `run --once`: the files in the inbox now, waiting (at most `limit`) for files still
/// being written to settle.
pub async fn settled_files(inbox: &Path, settle: Duration, limit: Duration) -> Vec<PathBuf> {
    let start = Instant::now();
    let mut tracker = Tracker::for_once();
    let mut ready = tracker.scan(inbox, settle, start);
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
        out.extend(tracker.scan(&inbox, cfg.settle, Instant::now()));
    };
    full_scan(&mut tracker, &mut out);
    tracing::debug!(files = out.len(), "startup scan");
    let mut ticker = tokio::time::interval(tick(cfg.settle));
    ticker.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let mut rescan = tokio::time::interval(cfg.rescan);
    rescan.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    rescan.tick().await;

    // Ready files are handed on whenever the worker's queue has room; while it is full (the
    // worker is busy with a batch) they gather here, so the next batch takes all of them
    // instead of one event's worth.
    loop {
        out.sort();
        out.dedup();
        tokio::select! {
            biased;
            _ = cancel.cancelled() => return Ok(()),
            permit = ready.reserve(), if !out.is_empty() => {
                let Ok(permit) = permit else { return Ok(()) };
                tracing::debug!(files = out.len(), "files ready");
                permit.send(std::mem::take(&mut out));
            }
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
                        tracing::warn!(error = %crate::errors::chain(&e), "file watcher error; rescanning the inbox");
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
                if is_real_dir(p) {
                    // A folder created in the inbox: files written before its watch was added
                    // have no events of their own.
                    created_folder(tracker, p, now);
                } else {
                    tracker.touched(p, now);
                }
            }
        }
        EventKind::Modify(_) | EventKind::Any => {
            for p in &ev.paths {
                if !is_real_dir(p) {
                    tracker.touched(p, now);
                }
            }
        }
        EventKind::Other => {}
    }
}

fn renamed_in(tracker: &mut Tracker, out: &mut Vec<PathBuf>, path: &Path, now: Instant) {
    if is_real_dir(path) {
        created_folder(tracker, path, now);
    } else if !is_ignored_name(path) && stat(path).is_some() {
        tracker.forget(path);
        out.push(path.to_path_buf());
    }
}

/// A folder that appeared in the inbox: its entries are watched like written files.
fn created_folder(tracker: &mut Tracker, dir: &Path, now: Instant) {
    let found = scan(dir);
    if lot_file_name(dir) {
        tracker.note_folders(&[dir.to_path_buf()]);
    }
    tracker.note_folders(&found.lot_named_folders);
    for f in found.entries {
        tracker.touched(&f, now);
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
        let found = scan(dir.path()).entries;
        assert_eq!(
            found,
            vec![dir.path().join("a.csv"), dir.path().join("sub/e.csv")]
        );
    }

    #[test]
    fn empty_files_wait_longer_except_for_run_once() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("empty.csv");
        std::fs::write(&f, "").unwrap();
        let settle = Duration::from_millis(100);
        let t0 = Instant::now();
        let mut daemon = Tracker::default();
        daemon.touched(&f, t0);
        assert!(daemon.ready(settle, t0 + Duration::from_secs(1)).is_empty());
        let mut once = Tracker::for_once();
        once.touched(&f, t0);
        assert_eq!(once.ready(settle, t0 + Duration::from_secs(1)), vec![f]);
    }

    #[test]
    fn links_and_pipes_are_entries_ready_at_once() {
        let dir = tempfile::tempdir().unwrap();
        let link = dir.path().join("l.csv");
        std::os::unix::fs::symlink(dir.path().join("nowhere"), &link).unwrap();
        std::fs::create_dir(dir.path().join("x.csv")).unwrap();
        let found = scan(dir.path());
        assert_eq!(found.entries, vec![link.clone()]);
        assert_eq!(found.lot_named_folders, vec![dir.path().join("x.csv")]);
        let mut t = Tracker::default();
        assert!(t.found(&link, Duration::from_secs(3600), Instant::now()));
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
