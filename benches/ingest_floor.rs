//! Ingest floor: about the least work any ingest of a lot-file inbox has to do, written
//! directly against SQLite with rusqlite (no sqlx, no async), as the yardstick of issue 10.
//!
//! What one run does, timed from opening the database to the commit:
//!
//! 1. Worker threads read and parse every `*.csv` in `$LOTDRIFT_BENCH_DIR` (long and wide
//!    layouts of the lot-file contract) and keep, per (source, lot, characteristic) of each
//!    file, a summary (n, mean, M2, min, max by Welford's update) and the earliest
//!    `sampled_at`.
//! 2. The main thread, meanwhile, inserts every value through one prepared statement inside
//!    one SQLite transaction (fresh file, page_size 65536, 64 MiB cache, WAL,
//!    synchronous=FULL as lotdrift's commits), binding a parameter again only when it differs
//!    from the previous row's, and merges the files' summaries (Chan et al.) per sample.
//! 3. In the same transaction: one row per sample (source, lot, characteristic, summary);
//!    per series (source, characteristic) the first 20 lots in sampling order are merged into
//!    a baseline and every later lot gets Welch's t test against it (statistic,
//!    Welch–Satterthwaite df, two-sided p from statrs' Student t); Benjamini–Hochberg at
//!    q = 0.05 over all tests of the run; one evaluation row per test.
//!
//! No validation beyond "is it a finite number", no duplicate detection, no archiving, and
//! units are taken as independent in the test (lotdrift's engine is more careful): this is a
//! floor for the cost of parsing, storing and testing, not a monitoring policy.
//! `benches/ingest.sh` runs it beside `lotdrift run --once` on the same files.
//!
//! Environment:
//! - `LOTDRIFT_BENCH_DIR`: folder of lot files; unset means "nothing to do" (exit 0).
//! - `LOTDRIFT_BENCH_REPEAT`: number of runs (default 1); the median is printed.
//! - `LOTDRIFT_BENCH_BATCH`: rows per execution of the INSERT (default 1, one execution per
//!   value with re-binding only of what changed; larger values bind every parameter of a
//!   multi-row statement and show what that saves, or costs).
//! - `LOTDRIFT_BENCH_LAYOUT=packed`: one row per (file, sample) holding the sample's values
//!   (and units) as JSON arrays, instead of one row per value (the layout question of issue
//!   10; the sampling time is one text when every unit shares it, else a JSON array).
//! - `LOTDRIFT_BENCH_THREADS`: parser threads (default: available cores).
//! - `LOTDRIFT_BENCH_DB_DIR`: where the scratch SQLite files go (default: temp dir).
//! - `LOTDRIFT_BENCH_KEEP_DB=1`: keep them (to inspect) instead of deleting them.
//! - `LOTDRIFT_BENCH_ARCHIVE=dir`: the floor with lotdrift's file guarantees, for comparison
//!   (not the yardstick of issue 10): each file's SHA-256, a row per file under a unique
//!   content hash (a file whose hash is stored is not stored again), a commit (synchronous,
//!   durable) every 1,024 files, and each file renamed into `dir` after the commit that
//!   stored it. This moves the files out of `LOTDRIFT_BENCH_DIR`: give it a copy, and one
//!   run per copy (`LOTDRIFT_BENCH_REPEAT=1`).
//!
//! Output: one `ingest_floor: run i/n: ...` line per run, then
//! `ingest_floor: median wall_s=... values_per_s=... runs=... values=... batch=...`
//! (the line `benches/ingest.sh` reads).

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::mpsc;
use std::time::Instant;

use anyhow::{Context, Result, bail};
use rusqlite::{Connection, Statement};
use sha2::{Digest, Sha256};
use statrs::distribution::{ContinuousCDF, StudentsT};

const BASELINE_LOTS: usize = 20;
const FDR_LEVEL: f64 = 0.05;

const SCHEMA: &str = "
CREATE TABLE sample (
    id INTEGER PRIMARY KEY,
    source TEXT NOT NULL,
    lot TEXT NOT NULL,
    characteristic TEXT NOT NULL,
    sampled_at TEXT,
    n INTEGER NOT NULL,
    mean REAL NOT NULL,
    m2 REAL NOT NULL,
    min REAL NOT NULL,
    max REAL NOT NULL
);
CREATE TABLE measurement (
    sample INTEGER NOT NULL,
    unit TEXT,
    sampled_at TEXT,
    value REAL NOT NULL
);
CREATE TABLE measurement_packed (
    sample INTEGER NOT NULL,
    units TEXT,
    sampled_at TEXT,
    vals TEXT NOT NULL
);
CREATE TABLE ingested_file (
    id INTEGER PRIMARY KEY,
    content_hash TEXT NOT NULL UNIQUE,
    name TEXT NOT NULL
);
CREATE TABLE evaluation (
    sample INTEGER PRIMARY KEY,
    t REAL NOT NULL,
    df REAL NOT NULL,
    p REAL NOT NULL,
    p_adjusted REAL NOT NULL,
    reject INTEGER NOT NULL
);
";
const INSERT_SAMPLE: &str = "INSERT INTO sample \
     (id, source, lot, characteristic, sampled_at, n, mean, m2, min, max) \
     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)";
const INSERT_EVALUATION: &str = "INSERT INTO evaluation \
     (sample, t, df, p, p_adjusted, reject) VALUES (?1, ?2, ?3, ?4, ?5, ?6)";
const INSERT_PACKED: &str = "INSERT INTO measurement_packed (sample, units, sampled_at, vals) \
     VALUES (?1, ?2, ?3, ?4)";
const MEASUREMENT_COLUMNS: &str =
    "INSERT INTO measurement (sample, unit, sampled_at, value) VALUES ";

/// Summary of some values: n, mean, M2 (sum of squared deviations), min, max.
#[derive(Clone, Copy, Debug)]
struct Summary {
    n: u64,
    mean: f64,
    m2: f64,
    min: f64,
    max: f64,
}

impl Summary {
    const EMPTY: Summary = Summary {
        n: 0,
        mean: 0.0,
        m2: 0.0,
        min: f64::INFINITY,
        max: f64::NEG_INFINITY,
    };

    /// Welford's update.
    fn push(&mut self, x: f64) {
        self.n += 1;
        let delta = x - self.mean;
        self.mean += delta / self.n as f64;
        self.m2 += delta * (x - self.mean);
        self.min = self.min.min(x);
        self.max = self.max.max(x);
    }

    /// Chan et al.'s pairwise merge.
    fn merge(&mut self, other: &Summary) {
        if other.n == 0 {
            return;
        }
        if self.n == 0 {
            *self = *other;
            return;
        }
        let n = self.n + other.n;
        let delta = other.mean - self.mean;
        let (na, nb) = (self.n as f64, other.n as f64);
        self.mean += delta * nb / n as f64;
        self.m2 += other.m2 + delta * delta * na * nb / n as f64;
        self.n = n;
        self.min = self.min.min(other.min);
        self.max = self.max.max(other.max);
    }

    fn variance(&self) -> f64 {
        if self.n > 1 {
            self.m2 / (self.n - 1) as f64
        } else {
            0.0
        }
    }
}

/// A piece of a file's text buffer; `None` for a missing field.
type Span = Option<(u32, u32)>;

/// One (source, lot, characteristic) found in one file.
struct Group {
    source: String,
    lot: String,
    characteristic: String,
    summary: Summary,
    first_sampled: Option<String>,
}

struct Row {
    group: u32,
    unit: Span,
    sampled_at: Span,
    value: f64,
}

/// One parsed file: its groups, its rows, and the text the rows' spans point into.
struct ParsedFile {
    groups: Vec<Group>,
    rows: Vec<Row>,
    text: String,
    path: PathBuf,
    /// SHA-256 of the file's bytes as hex, when files are kept (`LOTDRIFT_BENCH_ARCHIVE`).
    hash: Option<String>,
}

impl ParsedFile {
    fn span(&self, span: Span) -> Option<&str> {
        span.map(|(start, len)| &self.text[start as usize..(start + len) as usize])
    }

    fn push_text(&mut self, text: &str) -> Span {
        let start = u32::try_from(self.text.len()).ok()?;
        self.text.push_str(text);
        Some((start, text.len() as u32))
    }

    fn group(&mut self, source: &str, lot: &str, characteristic: &str) -> u32 {
        // Files hold one lot of a few characteristics: a linear search is enough.
        if let Some(i) = self
            .groups
            .iter()
            .rposition(|g| g.characteristic == characteristic && g.lot == lot && g.source == source)
        {
            return i as u32;
        }
        self.groups.push(Group {
            source: source.to_string(),
            lot: lot.to_string(),
            characteristic: characteristic.to_string(),
            summary: Summary::EMPTY,
            first_sampled: None,
        });
        (self.groups.len() - 1) as u32
    }

    fn push_row(&mut self, group: u32, unit: Option<&str>, sampled_at: Option<&str>, value: f64) {
        let g = &mut self.groups[group as usize];
        g.summary.push(value);
        if let Some(at) = sampled_at.filter(|s| !s.is_empty())
            && g.first_sampled.as_deref().is_none_or(|first| at < first)
        {
            g.first_sampled = Some(at.to_string());
        }
        // Consecutive rows of a wide file (and of a long file's characteristics) share the
        // unit and time: reuse the previous span instead of copying the text again.
        let previous = self.rows.last().map(|r| (r.unit, r.sampled_at));
        let unit = match (unit, previous) {
            (None, _) => None,
            (Some(u), Some((pu, _))) if self.span(pu) == Some(u) => pu,
            (Some(u), _) => self.push_text(u),
        };
        let sampled_at = match (sampled_at, previous) {
            (None, _) => None,
            (Some(s), Some((_, ps))) if self.span(ps) == Some(s) => ps,
            (Some(s), _) => self.push_text(s),
        };
        self.rows.push(Row {
            group,
            unit,
            sampled_at,
            value,
        });
    }
}

fn column(headers: &csv::StringRecord, name: &str) -> Option<usize> {
    headers.iter().position(|h| h.trim() == name)
}

fn parse_value(text: &str) -> Result<f64> {
    let text = text.trim();
    let value: f64 = text
        .parse()
        .with_context(|| format!("not a number: {text:?}"))?;
    if !value.is_finite() {
        bail!("not a finite number: {text:?}");
    }
    Ok(value)
}

fn parse_file(path: &Path, hash: bool) -> Result<ParsedFile> {
    let bytes = std::fs::read(path)?;
    let hash = hash.then(|| {
        const HEX: &[u8; 16] = b"0123456789abcdef";
        let mut text = String::with_capacity(64);
        for b in Sha256::digest(&bytes) {
            text.push(HEX[usize::from(b >> 4)] as char);
            text.push(HEX[usize::from(b & 15)] as char);
        }
        text
    });
    let mut reader = csv::ReaderBuilder::new()
        .comment(Some(b'#'))
        .has_headers(true)
        .from_reader(bytes.as_slice());
    let headers = reader.headers()?.clone();
    let need =
        |name: &str| column(&headers, name).with_context(|| format!("missing column {name:?}"));
    let source_col = need("source")?;
    let lot_col = need("lot")?;
    let sampled_col = column(&headers, "sampled_at");
    let unit_col = column(&headers, "unit");
    let long = column(&headers, "characteristic").zip(column(&headers, "value"));

    let mut file = ParsedFile {
        groups: Vec::new(),
        rows: Vec::new(),
        text: String::new(),
        path: path.to_owned(),
        hash,
    };
    let mut record = csv::StringRecord::new();
    fn field(record: &csv::StringRecord, col: Option<usize>) -> Option<&str> {
        col.and_then(|i| record.get(i)).map(str::trim)
    }
    match long {
        Some((char_col, value_col)) => {
            while reader.read_record(&mut record)? {
                let get = |i: usize| record.get(i).unwrap_or_default().trim();
                let value = parse_value(get(value_col))?;
                let group = file.group(get(source_col), get(lot_col), get(char_col));
                file.push_row(
                    group,
                    field(&record, unit_col),
                    field(&record, sampled_col),
                    value,
                );
            }
        }
        None => {
            let fixed = [Some(source_col), Some(lot_col), sampled_col, unit_col];
            let char_cols: Vec<(usize, String)> = headers
                .iter()
                .enumerate()
                .filter(|(i, _)| !fixed.contains(&Some(*i)))
                .map(|(i, name)| (i, name.trim().to_string()))
                .collect();
            if char_cols.is_empty() {
                bail!("wide layout without characteristic columns");
            }
            let mut groups: Vec<u32> = Vec::with_capacity(char_cols.len());
            while reader.read_record(&mut record)? {
                let source = record.get(source_col).unwrap_or_default().trim();
                let lot = record.get(lot_col).unwrap_or_default().trim();
                groups.clear();
                for (_, characteristic) in &char_cols {
                    groups.push(file.group(source, lot, characteristic));
                }
                let unit = field(&record, unit_col);
                let sampled_at = field(&record, sampled_col);
                for ((i, _), &group) in char_cols.iter().zip(&groups) {
                    let cell = record.get(*i).unwrap_or_default();
                    if cell.trim().is_empty() {
                        continue;
                    }
                    let value = parse_value(cell)?;
                    file.push_row(group, unit, sampled_at, value);
                }
            }
        }
    }
    Ok(file)
}

/// One (source, lot, characteristic) across all files; its id is its index + 1.
struct Sample {
    source: String,
    lot: String,
    characteristic: String,
    summary: Summary,
    first_sampled: Option<String>,
}

/// Inserts measurements through one prepared statement.
struct Inserter<'c> {
    batch: usize,
    single: Statement<'c>,
    multi: Option<Statement<'c>>,
    /// What the single-row statement has bound now; `None` = bind everything next time.
    bound: Option<BoundRow>,
    pending: Vec<OwnedRow>,
    values: u64,
}

struct BoundRow {
    sample: i64,
    unit: Option<String>,
    sampled_at: Option<String>,
}

struct OwnedRow {
    sample: i64,
    unit: Option<String>,
    sampled_at: Option<String>,
    value: f64,
}

fn measurement_sql(rows: usize) -> String {
    let mut sql = String::from(MEASUREMENT_COLUMNS);
    for i in 0..rows {
        sql.push_str(if i == 0 { "(?,?,?,?)" } else { ",(?,?,?,?)" });
    }
    sql
}

/// Sets `slot` to `new` (reusing its buffer); true when it changed.
fn changed(slot: &mut Option<String>, new: Option<&str>) -> bool {
    if slot.as_deref() == new {
        return false;
    }
    match (slot.as_mut(), new) {
        (Some(s), Some(n)) => {
            s.clear();
            s.push_str(n);
        }
        _ => *slot = new.map(str::to_string),
    }
    true
}

impl<'c> Inserter<'c> {
    fn new(conn: &'c Connection, batch: usize) -> Result<Self> {
        let single = conn.prepare(&measurement_sql(1))?;
        let multi = if batch > 1 {
            Some(conn.prepare(&measurement_sql(batch))?)
        } else {
            None
        };
        Ok(Inserter {
            batch,
            single,
            multi,
            bound: None,
            pending: Vec::with_capacity(if batch > 1 { batch } else { 0 }),
            values: 0,
        })
    }

    fn insert(
        &mut self,
        sample: i64,
        unit: Option<&str>,
        sampled_at: Option<&str>,
        value: f64,
    ) -> Result<()> {
        self.values += 1;
        if self.batch == 1 {
            return self.insert_one(sample, unit, sampled_at, value);
        }
        self.pending.push(OwnedRow {
            sample,
            unit: unit.map(str::to_string),
            sampled_at: sampled_at.map(str::to_string),
            value,
        });
        if self.pending.len() == self.batch {
            self.flush_batch()?;
        }
        Ok(())
    }

    /// One row through the single-row statement, re-binding only what changed.
    fn insert_one(
        &mut self,
        sample: i64,
        unit: Option<&str>,
        sampled_at: Option<&str>,
        value: f64,
    ) -> Result<()> {
        let stmt = &mut self.single;
        match &mut self.bound {
            Some(b) => {
                if b.sample != sample {
                    b.sample = sample;
                    stmt.raw_bind_parameter(1, sample)?;
                }
                if changed(&mut b.unit, unit) {
                    stmt.raw_bind_parameter(2, unit)?;
                }
                if changed(&mut b.sampled_at, sampled_at) {
                    stmt.raw_bind_parameter(3, sampled_at)?;
                }
            }
            None => {
                stmt.raw_bind_parameter(1, sample)?;
                stmt.raw_bind_parameter(2, unit)?;
                stmt.raw_bind_parameter(3, sampled_at)?;
                self.bound = Some(BoundRow {
                    sample,
                    unit: unit.map(str::to_string),
                    sampled_at: sampled_at.map(str::to_string),
                });
            }
        }
        // The value changes on (almost) every row.
        stmt.raw_bind_parameter(4, value)?;
        stmt.raw_execute()?;
        Ok(())
    }

    fn flush_batch(&mut self) -> Result<()> {
        let Some(stmt) = self.multi.as_mut() else {
            return Ok(());
        };
        for (i, row) in self.pending.iter().enumerate() {
            let at = i * 4;
            stmt.raw_bind_parameter(at + 1, row.sample)?;
            stmt.raw_bind_parameter(at + 2, row.unit.as_deref())?;
            stmt.raw_bind_parameter(at + 3, row.sampled_at.as_deref())?;
            stmt.raw_bind_parameter(at + 4, row.value)?;
        }
        stmt.raw_execute()?;
        self.pending.clear();
        Ok(())
    }

    /// Writes what a multi-row batch left over, one row per execution.
    fn finish(&mut self) -> Result<()> {
        for row in std::mem::take(&mut self.pending) {
            self.insert_one(
                row.sample,
                row.unit.as_deref(),
                row.sampled_at.as_deref(),
                row.value,
            )?;
        }
        Ok(())
    }
}

/// The main thread's side: samples by key, and the inserter.
struct Writer<'c> {
    inserter: Inserter<'c>,
    /// `Some` with `LOTDRIFT_BENCH_LAYOUT=packed`.
    packer: Option<Packer<'c>>,
    ids: HashMap<(String, String, String), usize>,
    samples: Vec<Sample>,
    /// This file's group index -> sample id, reused between files.
    group_ids: Vec<i64>,
}

impl Writer<'_> {
    fn write(&mut self, file: &ParsedFile) -> Result<()> {
        self.group_ids.clear();
        for g in &file.groups {
            let key = (g.source.clone(), g.lot.clone(), g.characteristic.clone());
            let index = *self.ids.entry(key).or_insert_with(|| {
                self.samples.push(Sample {
                    source: g.source.clone(),
                    lot: g.lot.clone(),
                    characteristic: g.characteristic.clone(),
                    summary: Summary::EMPTY,
                    first_sampled: None,
                });
                self.samples.len() - 1
            });
            let sample = &mut self.samples[index];
            sample.summary.merge(&g.summary);
            if let Some(at) = &g.first_sampled
                && sample.first_sampled.as_ref().is_none_or(|first| at < first)
            {
                sample.first_sampled = Some(at.clone());
            }
            self.group_ids.push(index as i64 + 1);
        }
        if let Some(packer) = &mut self.packer {
            self.inserter.values += file.rows.len() as u64;
            return packer.write(file, &self.group_ids);
        }
        for row in &file.rows {
            self.inserter.insert(
                self.group_ids[row.group as usize],
                file.span(row.unit),
                file.span(row.sampled_at),
                row.value,
            )?;
        }
        Ok(())
    }
}

/// The packed layout: one row per (file, sample) with JSON arrays of values and units.
struct Packer<'c> {
    stmt: Statement<'c>,
    vals: String,
    units: Vec<u8>,
    times: Vec<u8>,
}

impl<'c> Packer<'c> {
    fn new(conn: &'c Connection) -> Result<Self> {
        Ok(Packer {
            stmt: conn.prepare(INSERT_PACKED)?,
            vals: String::new(),
            units: Vec::new(),
            times: Vec::new(),
        })
    }

    fn write(&mut self, file: &ParsedFile, group_ids: &[i64]) -> Result<()> {
        use std::fmt::Write as _;
        for (g, id) in group_ids.iter().enumerate() {
            self.vals.clear();
            self.units.clear();
            self.times.clear();
            let (mut any_unit, mut first_time, mut one_time) = (false, None, true);
            for row in file.rows.iter().filter(|r| r.group as usize == g) {
                let sep = if self.vals.is_empty() { '[' } else { ',' };
                let _ = write!(self.vals, "{sep}{}", row.value);
                self.units.push(sep as u8);
                self.times.push(sep as u8);
                let unit = file.span(row.unit);
                any_unit |= unit.is_some();
                serde_json::to_writer(&mut self.units, &unit)?;
                let time = file.span(row.sampled_at);
                serde_json::to_writer(&mut self.times, &time)?;
                match first_time {
                    None => first_time = Some(time),
                    Some(t) => one_time &= t == time,
                }
            }
            if self.vals.is_empty() {
                continue;
            }
            self.vals.push(']');
            self.units.push(b']');
            self.times.push(b']');
            let units = any_unit
                .then(|| std::str::from_utf8(&self.units))
                .transpose()?;
            let times = match first_time.flatten() {
                Some(t) if one_time => Some(t),
                None if one_time => None,
                _ => Some(std::str::from_utf8(&self.times)?),
            };
            self.stmt
                .execute(rusqlite::params![id, units, times, self.vals])?;
        }
        Ok(())
    }
}

/// Files per commit when files are kept (lotdrift's batch).
const KEPT_BATCH_FILES: usize = 1024;

/// lotdrift's file guarantees (`LOTDRIFT_BENCH_ARCHIVE`): a row per content hash, a durable
/// commit per batch of files, each file renamed into the archive after its commit.
struct Keeper<'c> {
    conn: &'c Connection,
    known: Statement<'c>,
    insert: Statement<'c>,
    archive: PathBuf,
    /// Files of the open transaction, to archive once it commits.
    pending: Vec<PathBuf>,
}

impl<'c> Keeper<'c> {
    fn new(conn: &'c Connection, archive: PathBuf) -> Result<Self> {
        std::fs::create_dir_all(&archive)?;
        Ok(Keeper {
            conn,
            known: conn.prepare("SELECT 1 FROM ingested_file WHERE content_hash = ?1")?,
            insert: conn
                .prepare("INSERT INTO ingested_file (content_hash, name) VALUES (?1, ?2)")?,
            archive,
            pending: Vec::new(),
        })
    }

    /// Records the file; false when its content is stored already (archived, not stored).
    fn record(&mut self, file: &ParsedFile) -> Result<bool> {
        let hash = file
            .hash
            .as_deref()
            .context("files are kept but were not hashed")?;
        let new = !self.known.exists([hash])?;
        if new {
            let name = file.path.file_name().map(|n| n.to_string_lossy());
            self.insert.execute(rusqlite::params![hash, name])?;
        }
        self.pending.push(file.path.clone());
        if self.pending.len() >= KEPT_BATCH_FILES {
            self.conn.execute_batch("COMMIT; BEGIN")?;
            self.archive_pending()?;
        }
        Ok(new)
    }

    /// Renames the files of the last committed transaction into the archive.
    fn archive_pending(&mut self) -> Result<()> {
        for path in self.pending.drain(..) {
            let name = path.file_name().context("a lot file without a name")?;
            std::fs::rename(&path, self.archive.join(name))?;
        }
        Ok(())
    }
}

/// The writer's loop: every parsed file into the store, in arrival order.
fn write_all(
    conn: &Connection,
    batch: usize,
    receiver: mpsc::Receiver<Result<ParsedFile>>,
    files: usize,
    keeper: &mut Option<Keeper<'_>>,
) -> Result<(Vec<Sample>, u64)> {
    let mut writer = Writer {
        inserter: Inserter::new(conn, batch)?,
        packer: match std::env::var("LOTDRIFT_BENCH_LAYOUT").as_deref() {
            Ok("packed") => Some(Packer::new(conn)?),
            _ => None,
        },
        ids: HashMap::new(),
        samples: Vec::new(),
        group_ids: Vec::new(),
    };
    let mut received = 0;
    for parsed in receiver {
        let parsed = parsed?;
        received += 1;
        if let Some(keeper) = keeper.as_mut()
            && !keeper.record(&parsed)?
        {
            continue;
        }
        writer.write(&parsed)?;
    }
    if received != files {
        bail!("only {received} of {files} files were parsed");
    }
    writer.inserter.finish()?;
    Ok((writer.samples, writer.inserter.values))
}

/// One test of a lot against its series' baseline.
struct Test {
    sample: i64,
    t: f64,
    df: f64,
    p: f64,
}

/// Welch's t test of `lot` against `baseline`: statistic, Welch–Satterthwaite df, two-sided p.
fn welch(baseline: &Summary, lot: &Summary) -> Option<(f64, f64, f64)> {
    if baseline.n < 2 || lot.n < 2 {
        return None;
    }
    let va = baseline.variance() / baseline.n as f64;
    let vb = lot.variance() / lot.n as f64;
    let se2 = va + vb;
    if se2 <= 0.0 {
        return None;
    }
    let t = (lot.mean - baseline.mean) / se2.sqrt();
    let df = se2 * se2 / (va * va / (baseline.n - 1) as f64 + vb * vb / (lot.n - 1) as f64);
    let dist = StudentsT::new(0.0, 1.0, df).ok()?;
    Some((t, df, (2.0 * dist.sf(t.abs())).min(1.0)))
}

/// Per series: the first `BASELINE_LOTS` lots in sampling order (then lot code) form the
/// baseline; every later lot is tested against it.
fn test_series(samples: &[Sample]) -> Vec<Test> {
    let mut series: HashMap<(&str, &str), Vec<usize>> = HashMap::new();
    for (i, s) in samples.iter().enumerate() {
        series
            .entry((s.source.as_str(), s.characteristic.as_str()))
            .or_default()
            .push(i);
    }
    let mut tests = Vec::new();
    for lots in series.values_mut() {
        lots.sort_by(|&a, &b| {
            let (a, b) = (&samples[a], &samples[b]);
            (a.first_sampled.as_deref(), &a.lot).cmp(&(b.first_sampled.as_deref(), &b.lot))
        });
        if lots.len() <= BASELINE_LOTS {
            continue;
        }
        let mut baseline = Summary::EMPTY;
        for &i in &lots[..BASELINE_LOTS] {
            baseline.merge(&samples[i].summary);
        }
        for &i in &lots[BASELINE_LOTS..] {
            if let Some((t, df, p)) = welch(&baseline, &samples[i].summary) {
                tests.push(Test {
                    sample: i as i64 + 1,
                    t,
                    df,
                    p,
                });
            }
        }
    }
    tests
}

/// Benjamini–Hochberg adjusted p-values, in the order of `p`.
fn benjamini_hochberg(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[b].total_cmp(&p[a]));
    let mut adjusted = vec![0.0; m];
    let mut running = 1.0f64;
    for (k, &i) in order.iter().enumerate() {
        let rank = (m - k) as f64;
        running = running.min(p[i] * m as f64 / rank);
        adjusted[i] = running;
    }
    adjusted
}

struct RunResult {
    files: u64,
    values: u64,
    samples: usize,
    tests: usize,
    rejected: usize,
    store_s: f64,
    stats_s: f64,
    commit_s: f64,
    wall_s: f64,
    db_bytes: u64,
}

fn open(db_path: &Path) -> Result<Connection> {
    let conn =
        Connection::open(db_path).with_context(|| format!("opening {}", db_path.display()))?;
    // page_size first: it only applies before the first table (and before WAL).
    conn.execute_batch(
        "PRAGMA page_size = 65536;
         PRAGMA cache_size = -65536;
         PRAGMA journal_mode = WAL;
         PRAGMA synchronous = FULL;",
    )?;
    conn.execute_batch(SCHEMA)?;
    Ok(conn)
}

fn ingest(
    files: &[PathBuf],
    db_path: &Path,
    (batch, threads): (usize, usize),
    archive: Option<&Path>,
) -> Result<RunResult> {
    let started = Instant::now();
    let conn = open(db_path)?;
    // Transactions by hand: the keeper commits every batch of files while the writer's
    // prepared statements stay open (statements survive a commit, a `Transaction` would not).
    conn.execute_batch("BEGIN")?;
    let mut keeper = archive
        .map(|dir| Keeper::new(&conn, dir.to_owned()))
        .transpose()?;
    let hash = keeper.is_some();
    let next = AtomicUsize::new(0);
    let (sender, receiver) = mpsc::sync_channel::<Result<ParsedFile>>(64);
    let (samples, values) = std::thread::scope(|scope| -> Result<(Vec<Sample>, u64)> {
        for _ in 0..threads {
            let sender = sender.clone();
            let next = &next;
            scope.spawn(move || {
                loop {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    let Some(path) = files.get(i) else { break };
                    let parsed = parse_file(path, hash)
                        .with_context(|| format!("parsing {}", path.display()));
                    let failed = parsed.is_err();
                    if sender.send(parsed).is_err() || failed {
                        break;
                    }
                }
            });
        }
        drop(sender);
        // The receiver moves into `write_all`: on an error it is dropped there, so the
        // parsers' sends fail and the scope can join them.
        write_all(&conn, batch, receiver, files.len(), &mut keeper)
    })?;
    {
        let mut stmt = conn.prepare(INSERT_SAMPLE)?;
        for (i, s) in samples.iter().enumerate() {
            stmt.execute(rusqlite::params![
                i as i64 + 1,
                s.source,
                s.lot,
                s.characteristic,
                s.first_sampled,
                s.summary.n as i64,
                s.summary.mean,
                s.summary.m2,
                s.summary.min,
                s.summary.max
            ])?;
        }
    }
    let store_s = started.elapsed().as_secs_f64();

    let stats_started = Instant::now();
    let tests = test_series(&samples);
    let p: Vec<f64> = tests.iter().map(|t| t.p).collect();
    let adjusted = benjamini_hochberg(&p);
    let mut rejected = 0;
    {
        let mut stmt = conn.prepare(INSERT_EVALUATION)?;
        for (test, &q) in tests.iter().zip(&adjusted) {
            let reject = q <= FDR_LEVEL;
            rejected += usize::from(reject);
            stmt.execute(rusqlite::params![
                test.sample,
                test.t,
                test.df,
                test.p,
                q,
                reject
            ])?;
        }
    }
    let stats_s = stats_started.elapsed().as_secs_f64();

    let commit_started = Instant::now();
    conn.execute_batch("COMMIT")?;
    if let Some(keeper) = keeper.as_mut() {
        keeper.archive_pending()?;
    }
    drop(keeper);
    let commit_s = commit_started.elapsed().as_secs_f64();
    let wall_s = started.elapsed().as_secs_f64();
    let db_bytes = db_size(db_path);
    drop(conn);
    Ok(RunResult {
        files: files.len() as u64,
        values,
        samples: samples.len(),
        tests: tests.len(),
        rejected,
        store_s,
        stats_s,
        commit_s,
        wall_s,
        db_bytes,
    })
}

fn remove_db(path: &Path) {
    for suffix in ["", "-wal", "-shm", "-journal"] {
        let mut name = path.as_os_str().to_owned();
        name.push(suffix);
        let _ = std::fs::remove_file(PathBuf::from(name));
    }
}

fn db_size(path: &Path) -> u64 {
    ["", "-wal"]
        .iter()
        .map(|suffix| {
            let mut name = path.as_os_str().to_owned();
            name.push(suffix);
            std::fs::metadata(PathBuf::from(name)).map_or(0, |m| m.len())
        })
        .sum()
}

fn env_count(name: &str, default: usize, range: std::ops::RangeInclusive<usize>) -> Result<usize> {
    match std::env::var(name) {
        Ok(text) => text
            .parse()
            .ok()
            .filter(|n| range.contains(n))
            .with_context(|| format!("{name}={text:?}: expected {range:?}")),
        Err(_) => Ok(default),
    }
}

fn median(values: &mut [f64]) -> f64 {
    values.sort_by(f64::total_cmp);
    let mid = values.len() / 2;
    if values.len() % 2 == 1 {
        values[mid]
    } else {
        (values[mid - 1] + values[mid]) / 2.0
    }
}

fn main() -> Result<()> {
    let Some(dir) = std::env::var_os("LOTDRIFT_BENCH_DIR") else {
        println!(
            "ingest_floor: LOTDRIFT_BENCH_DIR is not set, nothing to measure \
             (benches/ingest.sh generates a workload and sets it)"
        );
        return Ok(());
    };
    let dir = PathBuf::from(dir);
    let repeat = env_count("LOTDRIFT_BENCH_REPEAT", 1, 1..=1000)?;
    let batch = env_count("LOTDRIFT_BENCH_BATCH", 1, 1..=1000)?;
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let threads = env_count("LOTDRIFT_BENCH_THREADS", cores, 1..=256)?;
    let keep_db = std::env::var_os("LOTDRIFT_BENCH_KEEP_DB").is_some_and(|v| v == "1");
    let db_dir = std::env::var_os("LOTDRIFT_BENCH_DB_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(std::env::temp_dir);

    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .with_context(|| format!("reading {}", dir.display()))?
        .map(|entry| entry.map(|e| e.path()))
        .collect::<std::io::Result<_>>()?;
    files.retain(|p| p.extension().is_some_and(|e| e == "csv") && p.is_file());
    files.sort();
    if files.is_empty() {
        bail!("no *.csv files in {}", dir.display());
    }

    let layout = std::env::var("LOTDRIFT_BENCH_LAYOUT").unwrap_or_else(|_| "rows".into());
    let archive = std::env::var_os("LOTDRIFT_BENCH_ARCHIVE").map(PathBuf::from);
    if archive.is_some() && repeat > 1 {
        bail!("LOTDRIFT_BENCH_ARCHIVE moves the files: one run per copy (LOTDRIFT_BENCH_REPEAT=1)");
    }
    let mut walls = Vec::with_capacity(repeat);
    let mut values = 0;
    for run in 1..=repeat {
        let db_path = db_dir.join(format!(
            "lotdrift-ingest-floor-{}-{run}.sqlite",
            std::process::id()
        ));
        remove_db(&db_path);
        let result = ingest(&files, &db_path, (batch, threads), archive.as_deref());
        if keep_db {
            println!("ingest_floor: kept {}", db_path.display());
        } else {
            remove_db(&db_path);
        }
        let r = result?;
        println!(
            "ingest_floor: run {run}/{repeat}: files={} values={} samples={} tests={} \
             rejected={} wall_s={:.3} values_per_s={:.0} store_s={:.3} stats_s={:.3} \
             commit_s={:.3} db_mib={:.1} batch={batch} threads={threads} layout={layout} \
             files_kept={}",
            r.files,
            r.values,
            r.samples,
            r.tests,
            r.rejected,
            r.wall_s,
            r.values as f64 / r.wall_s,
            r.store_s,
            r.stats_s,
            r.commit_s,
            r.db_bytes as f64 / (1024.0 * 1024.0),
            archive.is_some()
        );
        values = r.values;
        walls.push(r.wall_s);
    }
    let median = median(&mut walls);
    println!(
        "ingest_floor: median wall_s={median:.3} values_per_s={:.0} runs={} values={values} batch={batch} layout={layout}",
        values as f64 / median,
        walls.len()
    );
    Ok(())
}
