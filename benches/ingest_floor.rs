//! Ingest floor: about the least work any ingest of a lot-file inbox has to do.
//!
//! Reads every `*.csv` in `$LOTDRIFT_BENCH_DIR` (long and wide layouts of the
//! lot-file contract), parses every value, inserts each one with a single prepared
//! INSERT inside one transaction into a fresh SQLite file (WAL, synchronous=NORMAL),
//! keeps per-(source, lot, characteristic) summaries (n, mean, M2, min, max by
//! Welford's update) and stores those summaries in the same transaction.
//! No validation beyond "is it a number", no duplicate detection, no archiving,
//! no statistics beyond the summaries: `lotdrift run --once` on the same files is
//! compared against this by `benches/ingest.sh`.
//!
//! Environment:
//! - `LOTDRIFT_BENCH_DIR`: folder of lot files; unset means "nothing to do" (exit 0).
//! - `LOTDRIFT_BENCH_REPEAT`: number of runs (default 1); the median is printed.
//! - `LOTDRIFT_BENCH_BATCH`: rows per execution of the INSERT (default 1, one
//!   execution per value; larger values show what multi-row statements save).
//! - `LOTDRIFT_BENCH_DB_DIR`: where the scratch SQLite files go (default: temp dir).
//! - `LOTDRIFT_BENCH_KEEP_DB=1`: keep them (to inspect) instead of deleting them.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{Context, Result, bail};
use sqlx::sqlite::{SqliteConnectOptions, SqliteJournalMode, SqliteSynchronous};
use sqlx::{ConnectOptions, Connection, Executor, SqliteConnection};

const INSERT_MEASUREMENT: &str = "INSERT INTO measurement \
     (source, lot, characteristic, unit, sampled_at, value) VALUES (?1, ?2, ?3, ?4, ?5, ?6)";
const INSERT_SUMMARY: &str = "INSERT INTO lot_summary \
     (source, lot, characteristic, n, mean, m2, min, max) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)";
const SCHEMA: &str = "
CREATE TABLE measurement (
    id INTEGER PRIMARY KEY,
    source TEXT NOT NULL,
    lot TEXT NOT NULL,
    characteristic TEXT NOT NULL,
    unit TEXT,
    sampled_at TEXT,
    value REAL NOT NULL
);
CREATE TABLE lot_summary (
    source TEXT NOT NULL,
    lot TEXT NOT NULL,
    characteristic TEXT NOT NULL,
    n INTEGER NOT NULL,
    mean REAL NOT NULL,
    m2 REAL NOT NULL,
    min REAL NOT NULL,
    max REAL NOT NULL,
    PRIMARY KEY (source, lot, characteristic)
);
";

/// Running summary of one (source, lot, characteristic).
#[derive(Clone, Copy)]
struct Welford {
    n: u64,
    mean: f64,
    m2: f64,
    min: f64,
    max: f64,
}

impl Welford {
    fn new() -> Self {
        Welford {
            n: 0,
            mean: 0.0,
            m2: 0.0,
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
        }
    }

    fn push(&mut self, x: f64) {
        self.n += 1;
        let delta = x - self.mean;
        self.mean += delta / self.n as f64;
        self.m2 += delta * (x - self.mean);
        self.min = self.min.min(x);
        self.max = self.max.max(x);
    }
}

/// Maps names to small integers so summary keys are cheap to hash.
#[derive(Default)]
struct Interner {
    ids: HashMap<String, u32>,
    names: Vec<String>,
}

impl Interner {
    fn id(&mut self, name: &str) -> u32 {
        if let Some(&id) = self.ids.get(name) {
            return id;
        }
        let id = self.names.len() as u32;
        self.names.push(name.to_string());
        self.ids.insert(name.to_string(), id);
        id
    }
}

#[derive(Default)]
struct Summaries {
    sources: Interner,
    lots: Interner,
    characteristics: Interner,
    groups: HashMap<(u32, u32, u32), Welford>,
}

impl Summaries {
    fn push(&mut self, source: &str, lot: &str, characteristic: &str, value: f64) {
        let key = (
            self.sources.id(source),
            self.lots.id(lot),
            self.characteristics.id(characteristic),
        );
        self.groups
            .entry(key)
            .or_insert_with(Welford::new)
            .push(value);
    }
}

struct RunResult {
    files: u64,
    values: u64,
    groups: usize,
    wall_s: f64,
    commit_s: f64,
    db_bytes: u64,
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
    let repeat: usize = match std::env::var("LOTDRIFT_BENCH_REPEAT") {
        Ok(text) => text
            .parse()
            .with_context(|| format!("LOTDRIFT_BENCH_REPEAT={text:?} is not a count"))?,
        Err(_) => 1,
    };
    let batch: usize = match std::env::var("LOTDRIFT_BENCH_BATCH") {
        Ok(text) => text
            .parse()
            .ok()
            .filter(|&b| (1..=1000).contains(&b))
            .with_context(|| format!("LOTDRIFT_BENCH_BATCH={text:?}: expected 1..=1000"))?,
        Err(_) => 1,
    };
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

    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    let mut walls = Vec::with_capacity(repeat);
    let mut values = 0;
    for run in 1..=repeat.max(1) {
        let db_path = db_dir.join(format!(
            "lotdrift-ingest-floor-{}-{run}.sqlite",
            std::process::id()
        ));
        remove_db(&db_path);
        let result = runtime.block_on(ingest(&files, &db_path, batch));
        if keep_db {
            println!("ingest_floor: kept {}", db_path.display());
        } else {
            remove_db(&db_path);
        }
        let r = result?;
        println!(
            "ingest_floor: run {run}/{}: files={} values={} groups={} wall_s={:.3} \
             values_per_s={:.0} commit_s={:.3} db_mib={:.1} batch={batch}",
            repeat.max(1),
            r.files,
            r.values,
            r.groups,
            r.wall_s,
            r.values as f64 / r.wall_s,
            r.commit_s,
            r.db_bytes as f64 / (1024.0 * 1024.0)
        );
        values = r.values;
        walls.push(r.wall_s);
    }
    walls.sort_by(f64::total_cmp);
    let mid = walls.len() / 2;
    let median = if walls.len() % 2 == 1 {
        walls[mid]
    } else {
        (walls[mid - 1] + walls[mid]) / 2.0
    };
    println!(
        "ingest_floor: median wall_s={median:.3} values_per_s={:.0} runs={} values={values} batch={batch}",
        values as f64 / median,
        walls.len()
    );
    Ok(())
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

async fn ingest(files: &[PathBuf], db_path: &Path, batch: usize) -> Result<RunResult> {
    let started = Instant::now();
    let mut conn = SqliteConnectOptions::new()
        .filename(db_path)
        .create_if_missing(true)
        .journal_mode(SqliteJournalMode::Wal)
        .synchronous(SqliteSynchronous::Normal)
        .connect()
        .await
        .with_context(|| format!("opening {}", db_path.display()))?;
    conn.execute(SCHEMA).await?;

    let mut summaries = Summaries::default();
    let mut inserter = Inserter::new(batch);
    let mut values = 0u64;
    let mut tx = conn.begin().await?;
    for path in files {
        values += ingest_file(path, &mut tx, &mut inserter, &mut summaries)
            .await
            .with_context(|| format!("ingesting {}", path.display()))?;
    }
    inserter.flush(&mut tx).await?;
    for (&(s, l, c), w) in &summaries.groups {
        sqlx::query(INSERT_SUMMARY)
            .bind(summaries.sources.names[s as usize].as_str())
            .bind(summaries.lots.names[l as usize].as_str())
            .bind(summaries.characteristics.names[c as usize].as_str())
            .bind(w.n as i64)
            .bind(w.mean)
            .bind(w.m2)
            .bind(w.min)
            .bind(w.max)
            .execute(&mut *tx)
            .await?;
    }
    let commit_started = Instant::now();
    tx.commit().await?;
    let commit_s = commit_started.elapsed().as_secs_f64();
    let wall_s = started.elapsed().as_secs_f64();
    let db_bytes = db_size(db_path);
    conn.close().await?;
    Ok(RunResult {
        files: files.len() as u64,
        values,
        groups: summaries.groups.len(),
        wall_s,
        commit_s,
        db_bytes,
    })
}

/// Inserts measurements with one prepared statement: one row per execution
/// (`batch` = 1, the default and the floor proper) or `batch` rows per execution.
struct Inserter {
    batch: usize,
    batch_sql: String,
    pending: Vec<PendingRow>,
}

struct PendingRow {
    names: [String; 3],
    unit: Option<String>,
    sampled_at: Option<String>,
    value: f64,
}

impl Inserter {
    fn new(batch: usize) -> Self {
        let mut batch_sql = String::from(
            "INSERT INTO measurement (source, lot, characteristic, unit, sampled_at, value) VALUES ",
        );
        for i in 0..batch {
            batch_sql.push_str(if i == 0 {
                "(?,?,?,?,?,?)"
            } else {
                ",(?,?,?,?,?,?)"
            });
        }
        Inserter {
            batch,
            batch_sql,
            pending: Vec::with_capacity(batch),
        }
    }

    /// `names` is (source, lot, characteristic).
    async fn insert(
        &mut self,
        conn: &mut SqliteConnection,
        names: [&str; 3],
        unit: Option<&str>,
        sampled_at: Option<&str>,
        value: f64,
    ) -> Result<()> {
        if self.batch == 1 {
            sqlx::query(INSERT_MEASUREMENT)
                .bind(names[0])
                .bind(names[1])
                .bind(names[2])
                .bind(unit)
                .bind(sampled_at)
                .bind(value)
                .execute(&mut *conn)
                .await?;
            return Ok(());
        }
        self.pending.push(PendingRow {
            names: names.map(str::to_string),
            unit: unit.map(str::to_string),
            sampled_at: sampled_at.map(str::to_string),
            value,
        });
        if self.pending.len() == self.batch {
            let mut query = sqlx::query(&self.batch_sql);
            for row in &self.pending {
                query = query
                    .bind(row.names[0].as_str())
                    .bind(row.names[1].as_str())
                    .bind(row.names[2].as_str())
                    .bind(row.unit.as_deref())
                    .bind(row.sampled_at.as_deref())
                    .bind(row.value);
            }
            query.execute(&mut *conn).await?;
            self.pending.clear();
        }
        Ok(())
    }

    /// Writes what is left over, one row per execution.
    async fn flush(&mut self, conn: &mut SqliteConnection) -> Result<()> {
        for row in self.pending.drain(..) {
            sqlx::query(INSERT_MEASUREMENT)
                .bind(row.names[0].as_str())
                .bind(row.names[1].as_str())
                .bind(row.names[2].as_str())
                .bind(row.unit.as_deref())
                .bind(row.sampled_at.as_deref())
                .bind(row.value)
                .execute(&mut *conn)
                .await?;
        }
        Ok(())
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

/// Returns the number of values inserted from one file.
async fn ingest_file(
    path: &Path,
    conn: &mut SqliteConnection,
    inserter: &mut Inserter,
    summaries: &mut Summaries,
) -> Result<u64> {
    let mut reader = csv::ReaderBuilder::new()
        .comment(Some(b'#'))
        .has_headers(true)
        .from_path(path)?;
    let headers = reader.headers()?.clone();
    let need =
        |name: &str| column(&headers, name).with_context(|| format!("missing column {name:?}"));
    let source_col = need("source")?;
    let lot_col = need("lot")?;
    let sampled_col = column(&headers, "sampled_at");
    let unit_col = column(&headers, "unit");
    let long = column(&headers, "characteristic").zip(column(&headers, "value"));

    let mut record = csv::StringRecord::new();
    let mut count = 0u64;
    match long {
        Some((char_col, value_col)) => {
            while reader.read_record(&mut record)? {
                let source = record.get(source_col).unwrap_or_default().trim();
                let lot = record.get(lot_col).unwrap_or_default().trim();
                let characteristic = record.get(char_col).unwrap_or_default().trim();
                let value = parse_value(record.get(value_col).unwrap_or_default())?;
                let unit = unit_col.and_then(|i| record.get(i)).map(str::trim);
                let sampled_at = sampled_col.and_then(|i| record.get(i)).map(str::trim);
                inserter
                    .insert(conn, [source, lot, characteristic], unit, sampled_at, value)
                    .await?;
                summaries.push(source, lot, characteristic, value);
                count += 1;
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
            while reader.read_record(&mut record)? {
                let source = record.get(source_col).unwrap_or_default().trim();
                let lot = record.get(lot_col).unwrap_or_default().trim();
                let unit = unit_col.and_then(|i| record.get(i)).map(str::trim);
                let sampled_at = sampled_col.and_then(|i| record.get(i)).map(str::trim);
                for (i, characteristic) in &char_cols {
                    let cell = record.get(*i).unwrap_or_default();
                    if cell.trim().is_empty() {
                        continue;
                    }
                    let value = parse_value(cell)?;
                    inserter
                        .insert(
                            conn,
                            [source, lot, characteristic.as_str()],
                            unit,
                            sampled_at,
                            value,
                        )
                        .await?;
                    summaries.push(source, lot, characteristic, value);
                    count += 1;
                }
            }
        }
    }
    Ok(count)
}
