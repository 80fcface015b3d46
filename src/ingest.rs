//! Ingest: files from the inbox into the store, end to end.
//!
//! For each file: read the bytes, hash them, parse them (`intake`: with the input profile that
//! applies to the file, else the built-in `lotfile` dialect), summarise every sample
//! (`stats::Summary`), store them (`store`), and only after the transaction has committed move
//! the file to `archive/<yyyy-mm>/` (or `archive/<yyyy-mm>/duplicates/`). A file that cannot be
//! parsed, or that would change values already stored, goes to `quarantine/` with a
//! `<file>.reason.txt` beside it; so does an entry that is not a regular file (a symbolic link,
//! pipe, socket or device), moved as it is and never followed or read. Moves work across file
//! systems (copy, fsync, rename, then remove). A file is all or nothing, and a crash at any point loses
//! nothing and doubles nothing: an unmoved file is simply taken again, and a file whose hash is
//! stored is archived as a duplicate.
//!
//! Parsing runs on a blocking thread, one batch ahead of the single writer. This module never
//! decides anything about drift; that is `engine`.

use std::collections::HashSet;
use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

use crate::config::{Input, Paths, Profile};
use crate::intake;
use crate::lotfile::{Layout, LotFile, Serials};
use crate::numbers::hex;
use crate::stats::Summary;
use crate::store::{FileOutcome, NewFile, NewSample, Replacement, SampleDigest, Store, StoreError};
use crate::time::now_rfc3339;

mod moves;
use moves::{Mover, free_name, move_entry};

/// Files per store transaction, and values per transaction, whichever is reached first. A
/// batch costs a commit (an fsync and a WAL checkpoint now and then), the plan's lookups and
/// partly filled multi-row inserts; 1,024 small files hold about 100,000 values, a few MB.
const BATCH_FILES: usize = 1024;
const BATCH_VALUES: usize = 160_000;
/// A batch at least this large (a year exported as one file) hands its freed memory back to
/// the system once it is stored (see [`release_freed_memory`]).
const LARGE_BATCH_VALUES: usize = 1_000_000;

/// A failure that stops ingest (the database); a bad file never does.
#[derive(Debug, thiserror::Error)]
pub enum IngestError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("cannot move {from} to {to}")]
    Move {
        from: PathBuf,
        to: PathBuf,
        source: std::io::Error,
    },
}

/// What happened to one file.
#[derive(Debug, Clone, PartialEq)]
pub enum FileResult {
    Stored {
        samples: usize,
        already_stored: usize,
        archived_to: PathBuf,
    },
    Duplicate {
        first_name: String,
        archived_to: PathBuf,
    },
    Quarantined {
        reason: String,
        moved_to: PathBuf,
    },
    /// The file disappeared before it could be read (taken by someone else, or already done).
    Gone,
    /// Could not be read now (permissions, I/O); left in the inbox to be tried again.
    Unreadable {
        error: String,
    },
}

/// The results of one ingest run, in the order the files were taken.
#[derive(Debug, Default)]
pub struct IngestReport {
    pub files: Vec<(PathBuf, FileResult)>,
}

impl IngestReport {
    pub fn stored(&self) -> usize {
        self.count(|r| matches!(r, FileResult::Stored { .. }))
    }
    pub fn duplicates(&self) -> usize {
        self.count(|r| matches!(r, FileResult::Duplicate { .. }))
    }
    pub fn quarantined(&self) -> usize {
        self.count(|r| matches!(r, FileResult::Quarantined { .. }))
    }
    fn count(&self, f: impl Fn(&FileResult) -> bool) -> usize {
        self.files.iter().filter(|(_, r)| f(r)).count()
    }
}

/// A file read and parsed, waiting for the writer.
enum Prepared {
    Good(PathBuf, NewFile),
    Bad {
        path: PathBuf,
        hash: String,
        reason: String,
    },
    Gone(PathBuf),
    Unreadable(PathBuf, String),
}

/// True for names the inbox never takes: hidden files, files still being written under a
/// temporary name, and a spreadsheet program's owner files (`~$book.xlsx`).
pub fn is_ignored_name(path: &Path) -> bool {
    let Some(name) = path.file_name().and_then(|n| n.to_str()) else {
        return true;
    };
    // `~$name.xlsx`: the owner file a spreadsheet program keeps beside a workbook it has open.
    name.starts_with('.')
        || name.starts_with("~$")
        || name.ends_with(".part")
        || name.ends_with(".tmp")
        || name.ends_with(".reason.txt")
}

/// Ingests `files` (paths inside the inbox). Bad files are quarantined and reported; only a
/// store or file-move failure is an error, and then nothing of the failing batch is lost (its
/// files stay in the inbox). Cancellation stops taking new files; the batch in flight
/// completes.
pub async fn ingest_files(
    store: &Store,
    paths: &Paths,
    input: &Input,
    files: Vec<PathBuf>,
    replace: Option<&Replacement<'_>>,
    cancel: &CancellationToken,
) -> Result<IngestReport, IngestError> {
    let mut seen = HashSet::new();
    let files: Vec<PathBuf> = files
        .into_iter()
        .filter(|p| !is_ignored_name(p) && seen.insert(p.clone()))
        .collect();
    let mut report = IngestReport::default();
    if files.is_empty() {
        return Ok(report);
    }
    let (tx, mut rx) = mpsc::channel::<Vec<Prepared>>(2);
    let parse_cancel = cancel.clone();
    let (inbox, input) = (paths.inbox.clone(), input.clone());
    let parser = tokio::task::spawn_blocking(move || {
        let mut batch = Vec::new();
        let mut values = 0usize;
        for path in files {
            if parse_cancel.is_cancelled() {
                break;
            }
            let prepared = prepare(&path, &inbox, &input);
            if let Prepared::Good(_, f) = &prepared {
                values += f.samples.iter().map(|s| s.values.len()).sum::<usize>();
            }
            batch.push(prepared);
            if batch.len() >= BATCH_FILES || values >= BATCH_VALUES {
                if tx.blocking_send(std::mem::take(&mut batch)).is_err() {
                    return;
                }
                values = 0;
            }
        }
        if !batch.is_empty() {
            let _ = tx.blocking_send(batch);
        }
    });

    let mut failure = None;
    while let Some(batch) = rx.recv().await {
        match write_batch(store, paths, batch, replace, &mut report).await {
            Ok(values) if values >= LARGE_BATCH_VALUES => release_freed_memory(),
            Ok(_) => {}
            Err(e) => {
                failure = Some(e);
                break;
            }
        }
    }
    drop(rx);
    let _ = parser.await;
    match failure {
        Some(e) => Err(e),
        None => Ok(report),
    }
}

/// Stores one batch and moves its files; returns the number of unit values stored.
async fn write_batch(
    store: &Store,
    paths: &Paths,
    batch: Vec<Prepared>,
    replace: Option<&Replacement<'_>>,
    report: &mut IngestReport,
) -> Result<usize, IngestError> {
    let mut good_paths = Vec::new();
    let mut good = Vec::new();
    let taken = batch.len();
    for p in batch {
        match p {
            Prepared::Good(path, f) => {
                good_paths.push(path);
                good.push(f);
            }
            Prepared::Bad { path, hash, reason } => {
                let result = quarantine(store, paths, &path, &hash, &reason).await?;
                report.files.push((path, result));
            }
            Prepared::Gone(path) => report.files.push((path, FileResult::Gone)),
            Prepared::Unreadable(path, error) => {
                report.files.push((path, FileResult::Unreadable { error }));
            }
        }
    }
    if good.is_empty() {
        tracing::info!(files = 0, taken, values = 0, "batch stored");
        return Ok(0);
    }
    let values: usize = good
        .iter()
        .flat_map(|f| &f.samples)
        .map(|s| s.values.len())
        .sum();
    let received_at = now_rfc3339();
    let outcomes = store.ingest_batch(&good, &received_at, replace).await?;
    // Fault injection for the crash tests: die between commit and move, the window that
    // exactly-once handling exists for.
    if std::env::var_os("LOTDRIFT_FAULT_ABORT_AFTER_COMMIT").is_some() {
        std::process::abort();
    }
    let month = &received_at[..7];
    let mut mover = Mover::default();
    for ((path, file), outcome) in good_paths.into_iter().zip(&good).zip(outcomes) {
        let result = match outcome {
            FileOutcome::Stored {
                samples,
                already_stored,
                ..
            } => {
                let dest = mover.move_into(&path, &paths.archive.join(month))?;
                tracing::debug!(file = %path.display(), samples, already_stored, "stored");
                FileResult::Stored {
                    samples,
                    already_stored,
                    archived_to: dest,
                }
            }
            FileOutcome::Duplicate { first_name } => {
                let dest = mover.move_into(&path, &paths.archive.join(month).join("duplicates"))?;
                tracing::info!(file = %path.display(), first = %first_name, "duplicate of a stored file; archived, not stored again");
                FileResult::Duplicate {
                    first_name,
                    archived_to: dest,
                }
            }
            FileOutcome::Conflict(conflicts) => {
                let mut reason = String::from(
                    "values for lots already stored differ from the stored values; nothing of \
                     this file was stored.\n",
                );
                for c in &conflicts {
                    reason.push_str(&format!(
                        "  source {:?}, lot {:?}, characteristic {:?}: stored from {}\n",
                        c.source, c.lot, c.characteristic, c.stored_from
                    ));
                }
                reason.push_str(
                    "To replace the stored values on purpose, run:\n  lotdrift replace \
                     <this file> --reason \"<why the values changed>\"\n\
                     (the old values are kept in the audit table sample_replacement; decisions \
                     already made are not rewritten). To add other characteristics of the same \
                     lot, send a file with only those characteristics.\n",
                );
                quarantine(store, paths, &path, &file.hash, &reason).await?
            }
        };
        report.files.push((path, result));
    }
    // `taken` (files of the batch, refused ones included) and `values` feed the progress line
    // of `run --once` on a terminal (cli::progress).
    tracing::info!(files = good.len(), taken, values, "batch stored");
    Ok(values)
}

/// Returns the memory a large batch freed to the system. glibc keeps freed memory in the
/// arena of the thread that allocated it: the parser thread's arena held a large file's
/// values after they were stored, and the engine pass, on another thread, then grew its own
/// on top (a peak of 1.1x the file's size where the values alone are 0.3x).
fn release_freed_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: malloc_trim only walks glibc's own arenas under their locks; it takes no
    // pointers from us.
    unsafe {
        libc::malloc_trim(0);
    }
}

/// Unreadable files already reported in the log: a file that stays unreadable (permission
/// denied) is reported once, not at every rescan, and is tried again at each scan.
#[derive(Debug, Default)]
pub struct UnreadableLog {
    reported: HashSet<PathBuf>,
}

impl UnreadableLog {
    /// Logs the unreadable files of `report` not reported before and returns how many that
    /// were; forgets files that were taken (so a later failure of the path is reported again).
    pub fn note(&mut self, report: &IngestReport) -> usize {
        let mut logged = 0;
        for (path, result) in &report.files {
            match result {
                FileResult::Unreadable { error } => {
                    if self.reported.insert(path.clone()) {
                        logged += 1;
                        tracing::warn!(file = %path.display(), %error, "cannot read lot file; left in the inbox, tried again at each scan");
                    }
                }
                _ => {
                    self.reported.remove(path);
                }
            }
        }
        logged
    }
}

/// Why an inbox entry that is not a regular file is refused; None for a regular file.
fn not_a_regular_file(kind: std::fs::FileType) -> Option<&'static str> {
    use std::os::unix::fs::FileTypeExt;
    let what = if kind.is_file() {
        return None;
    } else if kind.is_symlink() {
        "a symbolic link; lot files must be regular files, links are not followed"
    } else if kind.is_fifo() {
        "a named pipe (FIFO); lot files must be regular files, pipes are not read"
    } else if kind.is_socket() {
        "a socket; lot files must be regular files, sockets are not read"
    } else if kind.is_block_device() || kind.is_char_device() {
        "a device; lot files must be regular files, devices are not read"
    } else {
        "not a regular file; lot files must be regular files"
    };
    Some(what)
}

/// Why reading an inbox entry failed.
enum ReadFailure {
    NotRegular(&'static str),
    Io(std::io::Error),
}

/// A regular file opened for reading, never following a symbolic link and never blocking on
/// a pipe or device (opened without following and without blocking, then checked again).
fn open_regular(path: &Path) -> Result<std::fs::File, ReadFailure> {
    use std::os::unix::fs::OpenOptionsExt;
    let kind = std::fs::symlink_metadata(path).map_err(ReadFailure::Io)?;
    if kind.is_dir() {
        // Only a race brings a folder here; it is left where it is.
        return Err(ReadFailure::Io(std::io::ErrorKind::IsADirectory.into()));
    }
    if let Some(what) = not_a_regular_file(kind.file_type()) {
        return Err(ReadFailure::NotRegular(what));
    }
    let file = std::fs::OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_NOFOLLOW | libc::O_NONBLOCK | libc::O_NOCTTY)
        .open(path)
        .map_err(ReadFailure::Io)?;
    // Replaced between the check and the open.
    let meta = file.metadata().map_err(ReadFailure::Io)?;
    if let Some(what) = not_a_regular_file(meta.file_type()) {
        return Err(ReadFailure::NotRegular(what));
    }
    Ok(file)
}

/// What becomes of an inbox entry that could not be read.
fn read_failed(path: &Path, failure: ReadFailure) -> Prepared {
    match failure {
        ReadFailure::NotRegular(what) => {
            // No content to hash: the quarantine record is keyed by what and where it was.
            let hash = content_hash(format!("{what}\n{}", path.display()).as_bytes());
            Prepared::Bad {
                path: path.into(),
                hash,
                reason: what.to_string(),
            }
        }
        ReadFailure::Io(e) if e.kind() == std::io::ErrorKind::NotFound => {
            Prepared::Gone(path.into())
        }
        // A symbolic link put in place after the check (O_NOFOLLOW): taken at the next scan.
        ReadFailure::Io(e) => Prepared::Unreadable(path.into(), e.to_string()),
    }
}

/// A reader that hashes and counts the bytes it passes on, and notes the end of its input.
struct Hashing<R> {
    inner: R,
    sha: Sha256,
    len: u64,
    at_end: bool,
}

impl<R: std::io::Read> std::io::Read for Hashing<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.sha.update(&buf[..n]);
        self.len += n as u64;
        self.at_end |= n == 0 && !buf.is_empty();
        Ok(n)
    }
}

/// Reads, hashes and parses one inbox file, with the input profile that applies to it.
fn prepare(path: &Path, inbox: &Path, input: &Input) -> Prepared {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let file = match open_regular(path) {
        Ok(f) => f,
        Err(failure) => return read_failed(path, failure),
    };
    let profile = input.choose(inbox, path);
    let (hash, parsed) = if profile.is_none() && !intake::is_workbook(&name) {
        match parse_stream(&name, file) {
            Ok(hashed) => hashed,
            Err(e) => return Prepared::Unreadable(path.into(), e.to_string()),
        }
    } else {
        let mut bytes = Vec::new();
        if let Err(e) = std::io::Read::read_to_end(&mut { file }, &mut bytes) {
            return read_failed(path, ReadFailure::Io(e));
        }
        let parsed = parse(&name, &bytes, profile);
        (content_hash(&bytes), parsed)
    };
    match parsed.and_then(|p| summarise(&name, &hash, p)) {
        Ok(f) => Prepared::Good(path.into(), f),
        Err(reason) => Prepared::Bad {
            path: path.into(),
            hash,
            reason,
        },
    }
}

/// Hashes and parses a file in the built-in dialect as one stream, holding a small window of
/// it (a year's export costs its values, not its bytes). The hash covers every byte, also
/// when parsing stopped at an error.
fn parse_stream(
    name: &str,
    file: std::fs::File,
) -> std::io::Result<(String, Result<LotFile, String>)> {
    let mut src = Hashing {
        inner: file,
        sha: Sha256::new(),
        len: 0,
        at_end: false,
    };
    let parsed = match intake::read_stream(name, &mut src) {
        Ok(f) => Ok(f),
        Err(intake::StreamFailure::Io(e)) => return Err(e),
        Err(intake::StreamFailure::Refused(r)) => Err(r.to_string()),
    };
    // The rest of a file the parser stopped reading early (a refusal) is hashed too; a file
    // read to its end costs no further read.
    if !src.at_end {
        std::io::copy(&mut src, &mut std::io::sink())?;
    }
    let parsed = if src.len == 0 {
        Err(EMPTY_FILE.to_string())
    } else {
        parsed
    };
    Ok((hex(&src.sha.finalize()), parsed))
}

const EMPTY_FILE: &str = "empty file: no header, no data";

/// Parses and summarises one file's bytes (built-in dialect, or a workbook).
pub fn build_file(name: &str, hash: &str, bytes: &[u8]) -> Result<NewFile, String> {
    build_file_as(name, hash, bytes, None)
}

/// Parses (with `profile`, see [`intake::read`]) and summarises one file's bytes.
pub fn build_file_as(
    name: &str,
    hash: &str,
    bytes: &[u8],
    profile: Option<&Profile>,
) -> Result<NewFile, String> {
    summarise(name, hash, parse(name, bytes, profile)?)
}

/// Parses one file's bytes with `profile` (see [`intake::read`]); an empty file is refused.
fn parse(name: &str, bytes: &[u8], profile: Option<&Profile>) -> Result<LotFile, String> {
    if bytes.is_empty() {
        return Err(EMPTY_FILE.to_string());
    }
    intake::read(name, bytes, profile).map_err(|e| e.to_string())
}

/// Summarises a parsed file's groups into samples, moving the values (not copying them).
fn summarise(name: &str, hash: &str, parsed: LotFile) -> Result<NewFile, String> {
    let layout = match parsed.layout {
        Layout::Long => "long",
        Layout::Wide => "wide",
    };
    let mut samples = Vec::with_capacity(parsed.groups.len());
    for g in parsed.groups {
        let summary = Summary::from_slice(&g.values).map_err(|e| {
            format!(
                "{name}:{}: source {:?}, lot {:?}, characteristic {:?}: {e}",
                g.first_line, g.source, g.lot, g.characteristic
            )
        })?;
        let earliest = g
            .sampled_at()
            .iter()
            .filter_map(|t| t.get())
            .min()
            .map(|t| t.to_rfc3339());
        let digest = sample_digest(&g.values, g.units(), &parsed.serials);
        samples.push(NewSample {
            source: g.source,
            lot: g.lot,
            characteristic: g.characteristic,
            values: g.values,
            track: g.track,
            serials: parsed.serials.clone(),
            summary,
            digest,
            earliest,
        });
    }
    Ok(NewFile {
        name: name.to_string(),
        hash: hash.to_string(),
        layout,
        rows: parsed.rows,
        samples,
    })
}

/// Order-independent digest of a sample's (unit, value) pairs: a re-export that only reorders
/// rows or changes comments is recognised as the same content.
fn sample_digest(values: &[f64], units: &[u32], serials: &Serials) -> SampleDigest {
    let mut pairs: Vec<(Option<&str>, u64)> = values
        .iter()
        .zip(units)
        .map(|(v, u)| {
            let v = if *v == 0.0 { 0.0 } else { *v };
            (serials.get(*u), v.to_bits())
        })
        .collect();
    pairs.sort_unstable();
    let mut h = Sha256::new();
    for (u, v) in pairs {
        match u {
            Some(u) => {
                h.update([1u8]);
                h.update((u.len() as u64).to_le_bytes());
                h.update(u.as_bytes());
            }
            None => h.update([0u8]),
        }
        h.update(v.to_le_bytes());
    }
    SampleDigest(h.finalize().into())
}

/// Hash of a file's bytes, as stored (for the CLI).
pub fn content_hash(bytes: &[u8]) -> String {
    hex(&Sha256::digest(bytes))
}

async fn quarantine(
    store: &Store,
    paths: &Paths,
    path: &Path,
    hash: &str,
    reason: &str,
) -> Result<FileResult, IngestError> {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let at = now_rfc3339();
    store.record_quarantine(hash, &name, &at, reason).await?;
    std::fs::create_dir_all(&paths.quarantine).map_err(|source| IngestError::Move {
        from: path.into(),
        to: paths.quarantine.clone(),
        source,
    })?;
    let dest = free_name(&paths.quarantine, &name);
    let reason_path = reason_path_for(&dest);
    let text = format!("{name} was refused at {at}:\n{reason}\n");
    write_atomically(&reason_path, text.as_bytes()).map_err(|source| IngestError::Move {
        from: path.into(),
        to: reason_path.clone(),
        source,
    })?;
    match move_entry(path, &dest) {
        Ok(()) => {}
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(FileResult::Gone),
        Err(source) => {
            return Err(IngestError::Move {
                from: path.into(),
                to: dest,
                source,
            });
        }
    }
    tracing::warn!(file = %path.display(), reason = %reason.lines().next().unwrap_or(""), "quarantined");
    Ok(FileResult::Quarantined {
        reason: reason.to_string(),
        moved_to: dest,
    })
}

/// `<file>.reason.txt` beside a quarantined file.
pub fn reason_path_for(file: &Path) -> PathBuf {
    let mut s = file.as_os_str().to_owned();
    s.push(".reason.txt");
    PathBuf::from(s)
}

fn write_atomically(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let mut tmp = path.as_os_str().to_owned();
    tmp.push(".tmp");
    let tmp = PathBuf::from(tmp);
    std::fs::write(&tmp, bytes)?;
    std::fs::rename(&tmp, path)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ignored_names() {
        for n in [
            ".hidden.csv",
            "a.csv.part",
            "a.csv.tmp",
            "x.csv.reason.txt",
            "~$alder_cells.xlsx",
        ] {
            assert!(is_ignored_name(Path::new(n)), "{n}");
        }
        assert!(!is_ignored_name(Path::new("inbox/lot-17.csv")));
    }

    #[test]
    fn digest_ignores_row_order_but_not_values() {
        let mut serials = Serials::default();
        let (a, b) = (serials.intern("a"), serials.intern("b"));
        // The same serials interned in another order (another file) give the same digest.
        let mut other = Serials::default();
        let (b2, a2) = (other.intern("b"), other.intern("a"));
        let (u, ur) = (vec![a, b], vec![b2, a2]);
        assert_eq!(
            sample_digest(&[1.0, 2.0], &u, &serials),
            sample_digest(&[2.0, 1.0], &ur, &other)
        );
        assert_ne!(
            sample_digest(&[1.0, 2.0], &u, &serials),
            sample_digest(&[1.0, 2.5], &u, &serials)
        );
        assert_ne!(
            sample_digest(&[1.0, 2.0], &u, &serials),
            sample_digest(&[2.0, 1.0], &u, &serials)
        );
    }

    #[test]
    fn sample_digests_are_stored_as_the_hex_text_of_earlier_versions() {
        // Databases written before the digest was held as bytes compare against this text.
        // SHA-256 of no input (FIPS 180-4; the value is from memory, and `content_hash` checks it).
        let empty = SampleDigest(Sha256::digest(b"").into());
        let want = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855";
        assert_eq!(empty.hex(), want);
        assert_eq!(content_hash(b""), want);
    }

    #[test]
    fn an_unreadable_file_is_logged_once_until_it_is_taken() {
        let unreadable = |p: &str| IngestReport {
            files: vec![(
                PathBuf::from(p),
                FileResult::Unreadable {
                    error: "Permission denied".into(),
                },
            )],
        };
        let mut log = UnreadableLog::default();
        assert_eq!(log.note(&unreadable("a.csv")), 1);
        assert_eq!(log.note(&unreadable("a.csv")), 0, "not at every rescan");
        assert_eq!(log.note(&unreadable("b.csv")), 1);
        let taken = IngestReport {
            files: vec![(PathBuf::from("a.csv"), FileResult::Gone)],
        };
        assert_eq!(log.note(&taken), 0);
        assert_eq!(
            log.note(&unreadable("a.csv")),
            1,
            "a new failure is reported"
        );
    }

    #[test]
    fn links_and_pipes_are_never_read() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("t.csv");
        std::fs::write(&target, "source,lot,mass\na,1,2\n").unwrap();
        let link = dir.path().join("l.csv");
        std::os::unix::fs::symlink(&target, &link).unwrap();
        match prepare(&link, dir.path(), &Input::default()) {
            Prepared::Bad { reason, .. } => assert!(reason.contains("symbolic link"), "{reason}"),
            _ => panic!("a link must be refused"),
        }
        assert!(matches!(
            prepare(dir.path(), dir.path(), &Input::default()),
            Prepared::Unreadable(..)
        ));
    }

    /// The hash of a streamed file covers every byte, whether the parser read it to its end
    /// (no read after the end) or refused it early (the rest is read for the hash).
    #[test]
    fn streamed_hashes_cover_every_byte() {
        let dir = tempfile::tempdir().unwrap();
        let mut good = String::from("source,characteristic,lot,value\n");
        for k in 0..20_000 {
            good.push_str(&format!("acme,mass_g,L{},{k}.5\n", k / 50));
        }
        let mut bad = String::from("source,characteristic,lot,value\nacme,mass_g,L1,oops\n");
        bad.push_str(&good[good.len() / 2..]);
        for (name, text, stored) in [("good.csv", &good, true), ("bad.csv", &bad, false)] {
            let path = dir.path().join(name);
            std::fs::write(&path, text).unwrap();
            let file = std::fs::File::open(&path).unwrap();
            let (hash, parsed) = parse_stream(name, file).unwrap();
            assert_eq!(parsed.is_ok(), stored, "{name}");
            assert_eq!(hash, content_hash(text.as_bytes()), "{name}");
        }
    }
}
