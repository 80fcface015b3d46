//! Storage: the only module that speaks SQL.
//!
//! [`Store`] is the one interface the engine, ingest, alert and report modules use; which
//! backend runs is known only here. Two backends, each with its own SQL beside it:
//! [`sqlite`] (the embedded default, one file per site) and [`postgres`] (one history shared
//! by the daemons of several sites). Both apply their embedded migrations at start
//! (`migrations/` and `migrations/postgres/`, equivalent schemas). Callers hand in typed
//! values and get typed rows back; no SQL text leaves this module.

use std::collections::{BTreeMap, HashMap};
use std::path::Path;

use sqlx::Row;
use sqlx::postgres::PgRow;
use sqlx::sqlite::SqliteRow;

mod migrate;
mod plan;
mod portable;
mod postgres;
mod sqlite;

pub use migrate::{CopyReport, TableCopy, copy_sqlite_to_postgres};
pub use sqlite::charts::{ChartEval, ChartLot, SeriesRow};
pub use sqlite::history::{HistoryLot, LotTest};
pub use sqlite::views::LotDecision;

use crate::stats::Summary;
use crate::stats::monitoring::RandomEffects;
use crate::stats::robust::{OutlierFence, SpreadBaseline};

/// A storage failure. Constraint violations that mean something to the domain are turned into
/// their own variants; everything else is the database's error with what we were doing.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("cannot open database {path}")]
    Open { path: String, source: sqlx::Error },
    #[error("cannot migrate database {path}")]
    Migrate {
        path: String,
        source: sqlx::migrate::MigrateError,
    },
    #[error("database error while {doing}")]
    Sql {
        doing: &'static str,
        source: sqlx::Error,
    },
    #[error("cannot lock {path} to migrate the database")]
    Lock {
        path: String,
        source: std::io::Error,
    },
    #[error("{0}")]
    Unsupported(&'static str),
    /// `migrate-store` refused or rolled back its copy (the message says why).
    #[error("{0}")]
    Migration(String),
    #[error("stored data is inconsistent: {0}")]
    Corrupt(String),
    #[error("cannot back up the database into {path}")]
    Backup { path: String, source: sqlx::Error },
    #[error("cannot check the backup {path}")]
    CheckCopy { path: String, source: sqlx::Error },
    #[error("database error while {doing}")]
    Bulk {
        doing: &'static str,
        source: rusqlite::Error,
    },
}

type Result<T> = std::result::Result<T, StoreError>;

trait Doing<T> {
    fn doing(self, what: &'static str) -> Result<T>;
}

impl<T> Doing<T> for std::result::Result<T, sqlx::Error> {
    fn doing(self, what: &'static str) -> Result<T> {
        self.map_err(|source| StoreError::Sql {
            doing: what,
            source,
        })
    }
}

/// Rows per multi-row INSERT: large enough to amortise the per-statement cost, small enough
/// to stay far below SQLite's bound-parameter limit (5 parameters a row here).
const ROWS_PER_INSERT: usize = 500;

/// Ids of names already stored, so a batch does not look up the same source again for every
/// file. Only committed ids enter the cache.
#[derive(Default)]
struct NameCache {
    sources: HashMap<String, i64>,
    characteristics: HashMap<String, i64>,
    series: HashMap<(i64, i64), i64>,
}

/// Where the history is kept.
#[derive(Debug, Clone, Copy)]
pub enum Location<'a> {
    /// A SQLite file (created when missing).
    Sqlite(&'a Path),
    /// A PostgreSQL database, shared by the daemons of several sites. The password, when
    /// given apart from the URL, is never shown.
    Postgres {
        url: &'a str,
        password: Option<&'a str>,
    },
}

/// The database handle. Cheap to share by reference; one per process.
pub struct Store {
    db: Backend,
}

enum Backend {
    Sqlite(sqlite::Db),
    Postgres(postgres::Db),
}

/// How long a message handed out by a `due_*` read stays with the daemon that read it, where
/// several daemons share the history (PostgreSQL): no other daemon gets it meanwhile. A
/// drain sends a batch only within the first half of this (see `alert`), so a live daemon
/// records every outcome before its claim runs out, however slow the mail server.
pub const CLAIM_LEASE: std::time::Duration = std::time::Duration::from_secs(600);

/// Held while one daemon decides lots (see [`Store::lock_engine`]).
pub struct EngineLock(Option<postgres::EngineLock>);

/// Runs the same call on whichever backend the store has.
macro_rules! on_backend {
    ($store:ident . $method:ident ( $($arg:expr),* $(,)? )) => {
        match &$store.db {
            Backend::Sqlite(db) => db.$method($($arg),*).await,
            Backend::Postgres(db) => db.$method($($arg),*).await,
        }
    };
}

impl Store {
    /// Opens (creating if needed) the SQLite database at `path` and applies migrations; the
    /// site recorded is this host's name.
    pub async fn open(path: &Path) -> Result<Store> {
        Store::connect(Location::Sqlite(path), &default_site()).await
    }

    /// Opens the history at `location` (applying migrations) for the daemon of `site`.
    pub async fn connect(location: Location<'_>, site: &str) -> Result<Store> {
        let db = match location {
            Location::Sqlite(path) => Backend::Sqlite(sqlite::Db::open(path, site).await?),
            Location::Postgres { url, password } => {
                Backend::Postgres(postgres::Db::open(url, password, site).await?)
            }
        };
        Ok(Store { db })
    }

    /// True when the history is on PostgreSQL.
    pub fn is_postgres(&self) -> bool {
        matches!(self.db, Backend::Postgres(_))
    }

    /// Closes the pool (SQLite: checkpointing the WAL).
    pub async fn close(self) {
        match self.db {
            Backend::Sqlite(db) => db.close().await,
            Backend::Postgres(db) => db.close().await,
        }
    }

    /// Writes a consistent copy of a SQLite history to `dest` (`VACUUM INTO`: one read
    /// transaction, so a daemon writing meanwhile is neither blocked nor half-copied). SQLite
    /// refuses a `dest` that exists and is not empty. A PostgreSQL history is backed up with
    /// the server's own tools.
    pub async fn backup_into(&self, dest: &Path) -> Result<()> {
        match &self.db {
            Backend::Sqlite(db) => db.backup_into(dest).await,
            Backend::Postgres(_) => Err(StoreError::Unsupported(
                "`backup` copies a SQLite history; back up a PostgreSQL history with pg_dump",
            )),
        }
    }

    /// Opens a SQLite copy read-only (no migrations), runs `PRAGMA integrity_check` and
    /// counts its lots and measurements.
    pub async fn check_copy(path: &Path) -> Result<CopyCheck> {
        sqlite::Db::check_copy(path).await
    }

    /// The name of the file a content hash was stored from, if it was.
    pub async fn file_known(&self, hash: &str) -> Result<Option<String>> {
        on_backend!(self.file_known(hash))
    }

    /// Stores a batch of files in one transaction. Each file is all or nothing: a file is
    /// either stored whole, recognised as a duplicate, or refused with its conflicts; the
    /// decision is made before anything of it is written. With `replace` set, values that
    /// differ from stored ones replace them (kept in `sample_replacement` with the reason)
    /// instead of refusing the file.
    pub async fn ingest_batch(
        &self,
        files: &[NewFile],
        received_at: &str,
        replace: Option<&Replacement<'_>>,
    ) -> Result<Vec<FileOutcome>> {
        on_backend!(self.ingest_batch(files, received_at, replace))
    }

    /// Records a refused file (idempotent on its content hash).
    pub async fn record_quarantine(
        &self,
        hash: &str,
        file_name: &str,
        at: &str,
        reason: &str,
    ) -> Result<()> {
        on_backend!(self.record_quarantine(hash, file_name, at, reason))
    }

    /// Makes this daemon the only one deciding lots until [`Store::unlock_engine`] (or until
    /// the returned lock is dropped). On SQLite, where one daemon writes, it holds nothing.
    pub async fn lock_engine(&self) -> Result<EngineLock> {
        Ok(EngineLock(match &self.db {
            Backend::Sqlite(_) => None,
            Backend::Postgres(db) => Some(db.lock_engine().await?),
        }))
    }

    /// Lets other daemons decide lots again.
    pub async fn unlock_engine(&self, lock: EngineLock) -> Result<()> {
        match (&self.db, lock.0) {
            (Backend::Postgres(db), Some(lock)) => db.unlock_engine(lock).await,
            _ => Ok(()),
        }
    }

    /// Everything the engine needs for the series that have undecided samples, or no frozen
    /// baseline yet. Series are returned by source, then characteristic.
    pub async fn pending_work(&self) -> Result<Vec<SeriesWork>> {
        on_backend!(self.pending_work())
    }

    /// (seq, value) of every unit of the given pending samples, in seq order, as
    /// [`Store::unit_values`] reads them. On SQLite, values this process stored since the
    /// last read come from memory when the sample still comes from the same file.
    pub async fn pending_values(
        &self,
        samples: &[SeriesSample],
    ) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
        match &self.db {
            Backend::Sqlite(db) => db.pending_values(samples).await,
            Backend::Postgres(db) => {
                let ids: Vec<i64> = samples.iter().map(|s| s.sample_id).collect();
                db.unit_values(&ids).await
            }
        }
    }

    /// (seq, value) of every unit of the given samples, in seq order.
    pub async fn unit_values(&self, sample_ids: &[i64]) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
        on_backend!(self.unit_values(sample_ids))
    }

    /// The unit values of the given samples, by sample id, in file order.
    pub async fn values(&self, sample_ids: &[i64]) -> Result<HashMap<i64, Vec<f64>>> {
        Ok(self
            .unit_values(sample_ids)
            .await?
            .into_iter()
            .map(|(id, units)| (id, units.into_iter().map(|(_, v)| v).collect()))
            .collect())
    }

    /// Within-lot residuals (value − its lot's mean) of the given samples, at most `limit`
    /// of them (taken evenly through the samples when there are more).
    pub async fn residuals(&self, sample_ids: &[i64], limit: usize) -> Result<Vec<f64>> {
        let mut out = on_backend!(self.residuals(sample_ids))?;
        if out.len() > limit {
            let step = out.len() as f64 / limit as f64;
            out = (0..limit)
                .map(|i| out[(i as f64 * step) as usize])
                .collect();
        }
        Ok(out)
    }

    /// Writes one engine pass (baselines, decisions, alert changes, outbox rows, CUSUM state)
    /// in one transaction, so an alert is never decided without its message queued.
    pub async fn write_pass(&self, pass: &EnginePass, at: &str) -> Result<PassCounts> {
        if pass.baselines.is_empty() && pass.decisions.is_empty() && pass.outliers.is_empty() {
            return Ok(PassCounts::default());
        }
        on_backend!(self.write_pass(pass, at))
    }

    /// Frees the messages this site's daemon had claimed before it (re)started: a daemon that
    /// died while sending leaves them to its successor at once rather than after the claim
    /// runs out. Called when a daemon starts; a site runs one daemon (names are unique).
    pub async fn release_claims(&self) -> Result<u64> {
        match &self.db {
            Backend::Sqlite(_) => Ok(0),
            Backend::Postgres(db) => db.release_claims().await,
        }
    }

    /// Alert messages due at `now`, oldest first.
    pub async fn due_outbox(&self, now: &str, limit: i64) -> Result<Vec<OutboxItem>> {
        on_backend!(self.due_outbox(now, limit))
    }

    /// Records the outcome of one delivery attempt.
    pub async fn outbox_attempted(
        &self,
        id: i64,
        outcome: &DeliveryOutcome,
        now: &str,
    ) -> Result<()> {
        self.outbox_attempted_many(&[(id, outcome.clone())], now)
            .await
    }

    /// Records the outcomes of several delivery attempts in one transaction.
    pub async fn outbox_attempted_many(
        &self,
        outcomes: &[(i64, DeliveryOutcome)],
        now: &str,
    ) -> Result<()> {
        if outcomes.is_empty() {
            return Ok(());
        }
        on_backend!(self.outbox_attempted_many(outcomes, now))
    }

    /// Alerts, newest first.
    pub async fn alerts(&self, open_only: bool) -> Result<Vec<AlertRow>> {
        on_backend!(self.alerts(open_only))
    }

    /// Records the digest of `local_date` and queues its messages, in one transaction.
    /// Returns false, writing nothing, when that day's digest exists already.
    pub async fn create_digest(
        &self,
        local_date: &str,
        scheduled_at: &str,
        now: &str,
        open_alerts: i64,
        messages: &[NewDigestMessage],
    ) -> Result<bool> {
        on_backend!(self.create_digest(local_date, scheduled_at, now, open_alerts, messages))
    }

    /// Digest messages due at `now`, oldest first, each with the alerts it lists.
    pub async fn due_digests(&self, now: &str, limit: i64) -> Result<Vec<DigestItem>> {
        on_backend!(self.due_digests(now, limit))
    }

    /// Every source's most recent `recent` lots (by lot time, read through an index, so the
    /// cost does not grow with the history) for the silence watch, and the open silences.
    pub async fn silence_inputs(
        &self,
        recent: usize,
    ) -> Result<(Vec<SourceLots>, Vec<OpenSilence>)> {
        on_backend!(self.silence_inputs(recent))
    }

    /// Resolves and opens silences with their events and outbox rows, in one transaction
    /// (resolutions first, so a source may go silent again at once). A silence resolved or
    /// opened meanwhile by another process is left alone. Returns (resolved, opened).
    pub async fn write_silences(
        &self,
        resolved: &[SilenceEnd],
        opened: &[NewSilence],
        at: &str,
    ) -> Result<(usize, usize)> {
        on_backend!(self.write_silences(resolved, opened, at))
    }

    /// Messages about silences due at `now`, oldest first.
    pub async fn due_silence_messages(&self, now: &str, limit: i64) -> Result<Vec<SilenceItem>> {
        on_backend!(self.due_silence_messages(now, limit))
    }

    /// Records a failure of `component`: starts a failing streak at `at` unless one runs.
    pub async fn health_failed(&self, component: &str, error: &str, at: &str) -> Result<()> {
        on_backend!(self.health_failed(component, error, at))
    }

    /// Ends the failing streak of `component` (if one runs) at `at`; when its "stuck" notice
    /// was queued, queues the "recovered" notice to `recipients` in the same transaction.
    /// Returns whether a notice was queued.
    pub async fn health_recovered(
        &self,
        component: &str,
        at: &str,
        recipients: &[(String, String)],
    ) -> Result<bool> {
        on_backend!(self.health_recovered(component, at, recipients))
    }

    /// Queues the "stuck" notice of `component` to `recipients` when it has been failing since
    /// `failing_before` or earlier and its streak has no notice yet (once per streak).
    /// Returns whether a notice was queued.
    pub async fn health_stuck(
        &self,
        component: &str,
        failing_before: &str,
        at: &str,
        recipients: &[(String, String)],
    ) -> Result<bool> {
        on_backend!(self.health_stuck(component, failing_before, at, recipients))
    }

    /// Operational notices due at `now`, oldest first.
    pub async fn due_health_messages(&self, now: &str, limit: i64) -> Result<Vec<HealthItem>> {
        on_backend!(self.due_health_messages(now, limit))
    }

    /// Counts of what is stored, for `status`.
    pub async fn status(&self) -> Result<StatusCounts> {
        on_backend!(self.status())
    }

    /// Records an acknowledgement; false when no alert has that id.
    pub async fn acknowledge(&self, alert_id: i64, by: &str, at: &str, note: &str) -> Result<bool> {
        on_backend!(self.acknowledge(alert_id, by, at, note))
    }

    /// Every sample of a series in series order, with whether it was decided (kind mean).
    pub async fn series_samples(&self, series_id: i64) -> Result<Vec<SeriesSample>> {
        on_backend!(self.series_samples(series_id))
    }

    /// The current baseline of a series: its definition, design note, frozen time and lots.
    pub async fn baseline_of(
        &self,
        series_id: i64,
    ) -> Result<Option<(String, String, String, Vec<String>)>> {
        on_backend!(self.baseline_of(series_id))
    }

    /// Retires the current baseline of a series (decisions made against it stay as they
    /// are), records the change, restarts the CUSUM, and freezes `new` if given. Without a new
    /// baseline the next undecided lots of the series form one (first N in order).
    pub async fn change_baseline(
        &self,
        series_id: i64,
        new: Option<&NewBaseline>,
        new_definition: &str,
        by: &str,
        reason: &str,
        at: &str,
    ) -> Result<()> {
        on_backend!(self.change_baseline(series_id, new, new_definition, by, reason, at))
    }

    /// One row per lot of a source (optionally one characteristic), in series order.
    pub async fn history(
        &self,
        source: &str,
        characteristic: Option<&str>,
    ) -> Result<Vec<HistoryRow>> {
        let mut out = Vec::new();
        let done: std::result::Result<(), std::convert::Infallible> = self
            .history_each(source, characteristic, |lot| {
                out.push(lot.to_owned_row());
                Ok(())
            })
            .await?;
        let Ok(()) = done;
        Ok(out)
    }

    /// Hands every lot of a source (optionally one characteristic) to `each` in series order,
    /// one at a time and without copying: a 100,000-lot series is written out as it is read.
    /// The first error of `each` stops the read and is returned in `Ok`.
    pub async fn history_each<E>(
        &self,
        source: &str,
        characteristic: Option<&str>,
        each: impl FnMut(&HistoryLot<'_>) -> std::result::Result<(), E>,
    ) -> Result<std::result::Result<(), E>> {
        on_backend!(self.history_each(source, characteristic, each))
    }

    /// The last `limit` lots of the series `source` × `characteristic`, oldest first, in
    /// series order (sampling time, else arrival, then lot code).
    pub async fn recent_lot_means(
        &self,
        source: &str,
        characteristic: &str,
        limit: i64,
    ) -> Result<Vec<LotMeanRow>> {
        on_backend!(self.recent_lot_means(source, characteristic, limit))
    }

    /// Every series (optionally of one source) with its lot count, for the pages.
    pub async fn series_list(&self, source: Option<&str>) -> Result<Vec<SeriesRow>> {
        on_backend!(self.series_list(source))
    }

    /// The frozen design of one series, if it has a baseline.
    pub async fn series_design(&self, series_id: i64) -> Result<Option<Design>> {
        on_backend!(self.series_design(series_id))
    }

    /// The lots of a series for a chart, within the given lot times, at most `limit`.
    pub async fn chart_lots(
        &self,
        series_id: i64,
        from: Option<&str>,
        to: Option<&str>,
        limit: i64,
    ) -> Result<Vec<ChartLot>> {
        on_backend!(self.chart_lots(series_id, from, to, limit))
    }

    /// Replaces the table `characteristic_unit` with the config's units of measure, so that
    /// the views show them.
    pub async fn set_units(&self, units: &BTreeMap<String, String>) -> Result<()> {
        on_backend!(self.set_units(units))
    }

    /// Every decision of every lot of a source (optionally one characteristic).
    pub async fn lot_decisions(
        &self,
        source: &str,
        characteristic: Option<&str>,
    ) -> Result<Vec<LotDecision>> {
        on_backend!(self.lot_decisions(source, characteristic))
    }
}

/// The site name when the config names none: this host's name, else "local".
pub fn default_site() -> String {
    let mut buf = [0u8; 256];
    // SAFETY: the buffer is writable for its length; gethostname writes at most that many
    // bytes and the result is read only up to the first NUL.
    let ok = unsafe { libc::gethostname(buf.as_mut_ptr().cast(), buf.len()) } == 0;
    let name = ok
        .then(|| {
            let end = buf.iter().position(|b| *b == 0).unwrap_or(buf.len());
            String::from_utf8_lossy(&buf[..end]).trim().to_string()
        })
        .filter(|n| !n.is_empty());
    name.unwrap_or_else(|| "local".to_string())
}

/// The sample standard deviation from n and m2 (sum of squared deviations); None for one unit.
fn sd(n: i64, m2: f64) -> Option<f64> {
    (n > 1).then(|| (m2 / (n - 1) as f64).sqrt())
}

/// One typed cell of a result row, read the same way from either backend (so the row
/// readers below serve both). PostgreSQL's booleans (`EXISTS`, `IS NOT NULL`) and the 0/1
/// integers both backends store for flags read as `bool`.
trait Cell: Sized {
    fn sqlite(row: &SqliteRow, i: usize) -> Self;
    fn pg(row: &PgRow, i: usize) -> Self;
}

macro_rules! plain_cell {
    ($($t:ty),*) => {$(
        impl Cell for $t {
            fn sqlite(row: &SqliteRow, i: usize) -> Self {
                row.get(i)
            }
            fn pg(row: &PgRow, i: usize) -> Self {
                row.get(i)
            }
        }
    )*};
}

plain_cell!(i64, f64, String, Option<i64>, Option<f64>, Option<String>);

impl Cell for bool {
    fn sqlite(row: &SqliteRow, i: usize) -> Self {
        row.get(i)
    }
    fn pg(row: &PgRow, i: usize) -> Self {
        row.try_get::<bool, _>(i)
            .unwrap_or_else(|_| row.get::<i64, _>(i) != 0)
    }
}

impl Cell for Option<bool> {
    fn sqlite(row: &SqliteRow, i: usize) -> Self {
        row.get(i)
    }
    fn pg(row: &PgRow, i: usize) -> Self {
        row.try_get::<Option<bool>, _>(i)
            .unwrap_or_else(|_| row.get::<Option<i64>, _>(i).map(|v| v != 0))
    }
}

/// A result row of either backend.
trait Cells {
    fn cell<T: Cell>(&self, i: usize) -> T;
}

impl Cells for SqliteRow {
    fn cell<T: Cell>(&self, i: usize) -> T {
        T::sqlite(self, i)
    }
}

impl Cells for PgRow {
    fn cell<T: Cell>(&self, i: usize) -> T {
        T::pg(self, i)
    }
}

/// One parsed file, ready to be stored.
#[derive(Debug, Clone)]
pub struct NewFile {
    pub name: String,
    /// SHA-256 of the file's bytes, lower-case hex.
    pub hash: String,
    pub layout: &'static str,
    pub rows: usize,
    pub samples: Vec<NewSample>,
}

/// The values of one (source, lot, characteristic) in a file.
#[derive(Debug, Clone)]
pub struct NewSample {
    pub source: String,
    pub lot: String,
    pub characteristic: String,
    pub values: Vec<f64>,
    /// Per value, the id of its unit serial in `serials` ([`crate::lotfile::NO_UNIT`]: none)
    /// and its sampling time (stored as fixed-width RFC 3339 UTC text) or none.
    pub track: std::sync::Arc<crate::lotfile::Track>,
    /// The serials of the file the sample came from.
    pub serials: std::sync::Arc<crate::lotfile::Serials>,
    pub summary: Summary,
    /// Order-independent digest of (unit, value) pairs: equal digests mean equal content.
    pub digest: SampleDigest,
    /// Earliest sampling time of the values.
    pub earliest: Option<String>,
}

/// A sample's content digest (SHA-256), held as bytes and stored as lower-case hex text (a
/// year's export holds a hundred thousand samples; as text each cost 88 more bytes).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SampleDigest(pub [u8; 32]);

impl SampleDigest {
    /// The stored form: 64 lower-case hex digits.
    pub fn hex(&self) -> String {
        crate::numbers::hex(&self.0)
    }
}

/// What became of one file of a batch.
#[derive(Debug, Clone, PartialEq)]
pub enum FileOutcome {
    /// Stored: `samples` new samples; `already_stored` samples were identical to stored ones.
    Stored {
        file_id: i64,
        samples: usize,
        already_stored: usize,
    },
    /// The same bytes were stored before, from `first_name`.
    Duplicate { first_name: String },
    /// Values for lots already stored differ from what is stored; nothing of the file stored.
    Conflict(Vec<Conflict>),
}

#[derive(Debug, Clone, PartialEq)]
pub struct Conflict {
    pub source: String,
    pub lot: String,
    pub characteristic: String,
    /// The file the stored values came from ("this batch" when an earlier file of the same
    /// batch sent them).
    pub stored_from: String,
}

/// A stored sample of a series, in the order the engine uses.
#[derive(Debug, Clone)]
pub struct SeriesSample {
    pub sample_id: i64,
    pub lot_id: i64,
    pub lot: String,
    /// `COALESCE(lot.sampled_at, lot.first_seen_at)`, RFC 3339 text.
    pub order_time: String,
    pub summary: Summary,
    pub evaluated: bool,
    /// The stored file its values came from: a replacement changes it, so (sample id, file
    /// id) names one set of unit values.
    pub file_id: i64,
}

/// The monitoring design of a series, fixed when its baseline is frozen (built by `engine`,
/// stored with the baseline).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Design {
    pub re: RandomEffects,
    /// Per-lot level of the mean test (before the family adjustment).
    pub level_mean: f64,
    /// Per-lot level of the spread test; 0 when spread is not tested.
    pub level_spread: f64,
    /// CUSUM reference value and decision interval in z units; None when disabled.
    pub cusum: Option<(f64, f64)>,
    /// Shapiro–Wilk p of the baseline's within-lot residuals.
    pub normality_p: Option<f64>,
    /// How units of a lot are recognised as outliers; None: lots are not screened.
    pub outliers: Option<OutlierFence>,
    /// The baseline lots' spread statistics; None: spread is tested by the F test.
    pub spread_base: Option<SpreadBaseline>,
    /// Lots are screened and tested as ln(value) (`engine::screen`); the random-effects
    /// analysis and the spread statistics are then of ln(value) too.
    pub log_scale: bool,
    /// Mean, sd and count of the baseline's stored values (all units): capability of a
    /// log-scale series is of these.
    pub natural: Option<(f64, f64, u64)>,
}

/// A frozen baseline.
#[derive(Debug, Clone)]
pub struct BaselineRow {
    pub id: i64,
    pub lot_count: usize,
    pub summary: Summary,
    pub definition: String,
    pub design: Design,
}

/// An open alert's state as the engine needs it.
#[derive(Debug, Clone, Copy)]
pub struct OpenAlert {
    pub id: i64,
    pub in_control_run: i64,
    /// When the last message about it was queued, and the shift it reported.
    pub notified_at: Option<chrono::DateTime<chrono::Utc>>,
    pub notified_estimate: Option<f64>,
    pub acknowledged: bool,
}

/// Everything the engine needs to decide one series.
#[derive(Debug, Clone)]
pub struct SeriesWork {
    pub series_id: i64,
    pub source: String,
    pub characteristic: String,
    pub baseline: Option<BaselineRow>,
    /// Samples not in the baseline and not yet evaluated, in order (when no baseline is frozen
    /// yet: every sample of the series, in order).
    pub pending: Vec<SeriesSample>,
    pub open_mean: Option<OpenAlert>,
    pub open_spread: Option<OpenAlert>,
    /// CUSUM sums (upper, lower) after the latest decided lot.
    pub cusum: (f64, f64),
    /// Online FDR state: lot tests so far and the 1-based indices of the rejected ones.
    pub online: (u64, Vec<u64>),
    /// Within-lot residuals of the lots about to form the baseline (filled by the engine's
    /// caller when a baseline is to be frozen).
    pub baseline_residuals: Option<Vec<f64>>,
    /// Unit values, for series tested distribution-free (filled by the engine's caller).
    pub units: Option<UnitValues>,
    /// (seq, value) of every unit of the pending samples, by sample id, in seq order (filled
    /// by the engine's caller; a sample missing here is tested on its summary alone).
    pub values: HashMap<i64, Vec<(i64, f64)>>,
    /// Alert lifecycle state after the latest decided lot.
    pub lifecycle: Lifecycle,
}

/// The alert lifecycle state of one kind (mean or spread) of a series, kept between passes.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct KindLifecycle {
    /// Standardised shifts, signed in the open alert's direction, of the lots since its last
    /// significant lot (oldest first, at most `monitor.resolve_after_lots`).
    pub recent: Vec<f64>,
    /// The open alert resolves when the upper confidence bound of the mean of `recent` is
    /// below this margin.
    pub margin: f64,
    /// +1 or −1: the direction of the open alert's shift.
    pub direction: f64,
    /// Lots decided since this kind's last alert of the series resolved (None: none has).
    pub since_resolved: Option<u64>,
}

/// The alert lifecycle state of a series (stored as JSON in `series_state.lifecycle`).
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Lifecycle {
    pub mean: KindLifecycle,
    pub spread: KindLifecycle,
}

/// A unit found outside the pattern of its lot and baseline.
#[derive(Debug, Clone, PartialEq)]
pub struct NewOutlier {
    pub sample_id: i64,
    pub seq: i64,
    pub value: f64,
    pub lot_median: f64,
    /// |value − lot median| in robust sds.
    pub distance: f64,
    pub fence: f64,
    pub rule: &'static str,
    pub set_aside: bool,
}

/// The unit values of a series' baseline and of its pending lots (by sample id).
#[derive(Debug, Clone, Default)]
pub struct UnitValues {
    pub baseline: Vec<f64>,
    pub lots: HashMap<i64, Vec<f64>>,
}

/// A series' running state after a pass (CUSUM sums, online FDR state).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SeriesState {
    pub series_id: i64,
    pub cusum_upper: f64,
    pub cusum_lower: f64,
    pub online_tests: u64,
    pub online_rejected: Vec<u64>,
    pub lifecycle: Lifecycle,
}

/// A baseline to freeze.
#[derive(Debug, Clone)]
pub struct NewBaseline {
    pub series_id: i64,
    pub definition: String,
    pub sample_ids: Vec<i64>,
    pub summary: Summary,
    pub last_order_time: String,
    pub design: Design,
    pub note: String,
}

/// One decision to record.
#[derive(Debug, Clone)]
pub struct NewEvaluation {
    pub sample_id: i64,
    pub series_id: i64,
    /// "mean" or "spread".
    pub kind: &'static str,
    pub test: &'static str,
    /// The variance model of the test ("lot-means", "units", "within-lot").
    pub model: Option<&'static str>,
    pub alternative: &'static str,
    pub delta: f64,
    pub statistic: Option<f64>,
    pub df: Option<f64>,
    pub df2: Option<f64>,
    pub p_value: Option<f64>,
    pub p_adjusted: Option<f64>,
    pub method: &'static str,
    pub family_size: i64,
    pub level: f64,
    pub significant: bool,
    pub baseline: Summary,
    /// The baseline mean the test compares with (the mean of the baseline lot means).
    pub baseline_mean: f64,
    pub lot: Summary,
    pub estimate: Option<f64>,
    pub ci: Option<(f64, f64)>,
    pub std_error: Option<f64>,
    /// CUSUM sums after this lot and the decision interval: (upper, lower, h).
    pub cusum: Option<(f64, f64, f64)>,
    pub cusum_signal: bool,
    /// Cpk of the lot with its interval, when specification limits are configured.
    pub cpk: Option<(f64, f64, f64)>,
    pub note: Option<String>,
}

/// What an evaluation does to its series' alert.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
/// The alert concerned is always the open alert of the evaluation's series (opened earlier or
/// in the same pass).
pub enum AlertAction {
    None,
    Open,
    Attach,
    /// Attach and announce again (repeat interval passed, or the shift grew).
    Repeat,
    /// In control while an alert is open; `run` is the new count of consecutive such lots.
    InControl {
        run: i64,
    },
    Resolve,
    /// The same kind signals again soon after its last alert of the series resolved: that
    /// alert is opened again (one problem, one alert).
    Reopen,
}

/// A decision and its consequence, written together.
#[derive(Debug, Clone)]
pub struct Decision {
    pub evaluation: NewEvaluation,
    pub action: AlertAction,
}

/// All the writes of one engine pass.
#[derive(Debug, Clone, Default)]
pub struct EnginePass {
    pub baselines: Vec<NewBaseline>,
    /// In decision order.
    pub decisions: Vec<Decision>,
    /// (channel, recipient) pairs by series id: one outbox row each for every alert event
    /// that is announced (opened, repeated, resolved).
    pub recipients: HashMap<i64, Vec<(String, String)>>,
    /// Running state per series after the pass.
    pub states: Vec<SeriesState>,
    /// Outliers found (in baseline lots when a baseline is frozen, and in tested lots).
    pub outliers: Vec<NewOutlier>,
}

/// Counts of what one engine pass wrote.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct PassCounts {
    pub baselines: usize,
    pub evaluations: usize,
    pub opened: usize,
    pub resolved: usize,
    pub reopened: usize,
    pub outliers: usize,
}

/// One message to deliver, with everything a channel needs to render it.
#[derive(Debug, Clone)]
pub struct OutboxItem {
    pub id: i64,
    pub channel: String,
    pub recipient: String,
    pub attempts: i64,
    pub created_at: String,
    pub event_id: i64,
    pub event_kind: String,
    pub event_at: String,
    /// The alert with the numbers of the event's own evaluation (for a repeat: the lot that
    /// was still shifted; for a resolution: the lot that completed the in-control run).
    pub alert: AlertRow,
    /// The lot that opened the alert.
    pub opening_lot: String,
}

/// One digest message to deliver: the open alerts its recipient receives.
#[derive(Debug, Clone)]
pub struct DigestItem {
    pub id: i64,
    pub channel: String,
    pub recipient: String,
    pub attempts: i64,
    pub created_at: String,
    pub digest_id: i64,
    /// Local date (YYYY-MM-DD) the digest is for.
    pub local_date: String,
    /// Alerts listed, with the numbers of their opening evaluation, oldest first.
    pub alerts: Vec<AlertRow>,
}

/// One digest message to queue: channel, recipient, and the ids of the alerts it lists.
#[derive(Debug, Clone, PartialEq)]
pub struct NewDigestMessage {
    pub channel: String,
    pub recipient: String,
    pub alert_ids: Vec<i64>,
}

/// A lot of a source as the silence watch sees it: id, code and lot time
/// (`COALESCE(sampled_at, first_seen_at)`).
#[derive(Debug, Clone, PartialEq)]
pub struct LotTime {
    pub id: i64,
    pub code: String,
    pub at: String,
}

/// The lots of one source for the silence watch: its distinct lot times, oldest first, and
/// its last lot (latest lot time, then highest code).
#[derive(Debug, Clone, PartialEq)]
pub struct SourceLots {
    pub source_id: i64,
    pub source: String,
    pub times: Vec<String>,
    pub last: LotTime,
}

/// An open silence: the source and the lot time of the last lot before it.
#[derive(Debug, Clone, PartialEq)]
pub struct OpenSilence {
    pub id: i64,
    pub source_id: i64,
    pub last_lot_at: String,
}

/// A silence to open, with the (channel, recipient) pairs that announce it.
#[derive(Debug, Clone, PartialEq)]
pub struct NewSilence {
    pub source_id: i64,
    pub last_lot: LotTime,
    pub threshold_days: f64,
    /// "learned", "configured" or "configured_for_source".
    pub basis: &'static str,
    /// For a learned threshold: the intervals it was learned from and their median (days).
    pub intervals: Option<i64>,
    pub median_days: Option<f64>,
    pub recipients: Vec<(String, String)>,
}

/// An open silence to resolve by the arrival of `lot`, with the pairs that announce it.
#[derive(Debug, Clone, PartialEq)]
pub struct SilenceEnd {
    pub silence_id: i64,
    pub lot: LotTime,
    pub recipients: Vec<(String, String)>,
}

/// A silence as its messages tell it.
#[derive(Debug, Clone, PartialEq)]
pub struct SilenceRow {
    pub id: i64,
    pub source: String,
    pub opened_at: String,
    pub last_lot: String,
    pub last_lot_at: String,
    pub threshold_days: f64,
    pub basis: String,
    pub intervals: Option<i64>,
    pub median_days: Option<f64>,
    pub resolved_at: Option<String>,
    pub resolving_lot: Option<String>,
    pub resolving_lot_at: Option<String>,
}

/// One message about a silence to deliver.
#[derive(Debug, Clone, PartialEq)]
pub struct SilenceItem {
    pub id: i64,
    pub channel: String,
    pub recipient: String,
    pub attempts: i64,
    pub created_at: String,
    pub event_id: i64,
    /// "opened" or "resolved".
    pub event_kind: String,
    pub event_at: String,
    pub silence: SilenceRow,
}

/// A source with an open silence, for `status`.
#[derive(Debug, Clone, serde::Serialize)]
pub struct SilentSource {
    pub source: String,
    /// When the silence was noticed.
    pub since: String,
    pub last_lot_at: String,
    pub threshold_days: f64,
}

/// The health of one component ("ingest" or "delivery") as stored: the current failing streak
/// (none while the latest attempt succeeded) and the latest error, kept after a recovery.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize)]
pub struct HealthRow {
    #[serde(skip)]
    pub component: String,
    /// The first failure not followed by a success.
    pub failing_since: Option<String>,
    /// Failures in the current streak.
    pub failures: i64,
    pub last_error: Option<String>,
    pub last_error_at: Option<String>,
    /// When the latest failing streak ended.
    pub recovered_at: Option<String>,
    /// The "stuck" notice of the current streak is queued (it is sent once per streak).
    pub notice_sent: bool,
}

/// One operational notice to deliver: a component stuck, or recovered.
#[derive(Debug, Clone, PartialEq)]
pub struct HealthItem {
    pub id: i64,
    pub channel: String,
    pub recipient: String,
    pub attempts: i64,
    pub created_at: String,
    pub event_id: i64,
    /// "ingest" or "delivery".
    pub component: String,
    /// "stuck" or "recovered".
    pub kind: String,
    pub at: String,
    pub failing_since: String,
    pub failures: i64,
    pub last_error: String,
}

/// An alert with the numbers of the evaluation that opened it.
#[derive(Debug, Clone, serde::Serialize)]
pub struct AlertRow {
    pub id: i64,
    pub source: String,
    pub characteristic: String,
    /// "mean" or "spread".
    pub kind: String,
    pub state: String,
    pub opened_at: String,
    pub resolved_at: Option<String>,
    pub lot: String,
    pub lot_sampled_at: Option<String>,
    pub test: String,
    pub alternative: String,
    pub statistic: Option<f64>,
    pub df: Option<f64>,
    /// The second df of an F test (the baseline's), else None.
    pub df2: Option<f64>,
    pub p_value: Option<f64>,
    pub p_adjusted: Option<f64>,
    pub method: String,
    pub level: f64,
    pub family_size: i64,
    pub baseline_n: i64,
    pub baseline_mean: f64,
    pub baseline_sd: Option<f64>,
    pub lot_n: i64,
    pub lot_mean: f64,
    pub lot_sd: Option<f64>,
    pub estimate: Option<f64>,
    pub ci: Option<[f64; 2]>,
    /// Significant lots attached to the alert, the opening one included.
    pub lots: i64,
    /// The variance model of the opening test ("lot-means", "units", "within-lot").
    pub model: Option<String>,
    /// What the opening decision recorded beside the numbers (normality).
    pub note: Option<String>,
    /// Cpk of the opening lot [value, low, high], when specification limits are configured.
    pub cpk: Option<[f64; 3]>,
    /// Latest acknowledgement: who, when, and the note.
    pub acknowledged: Option<AckRow>,
    /// The opening decision's CUSUM sums (upper, lower) after its lot and the decision
    /// interval h, in standardised units (None where the series has no CUSUM).
    pub cusum_upper: Option<f64>,
    pub cusum_lower: Option<f64>,
    pub cusum_h: Option<f64>,
    /// Every state change, oldest first (filled by [`Store::alerts`]; empty elsewhere).
    pub events: Vec<EventRow>,
    /// Every acknowledgement, oldest first (filled by [`Store::alerts`]; empty elsewhere).
    pub acknowledgements: Vec<AckRow>,
}

#[cfg(test)]
impl AlertRow {
    /// An open mean alert of `source`'s mass_g opened by `lot` (a Welch test, p 1.5e-6),
    /// for the tests of what formats alerts.
    pub fn example(source: &str, lot: &str) -> AlertRow {
        AlertRow {
            df2: None,
            id: 4,
            source: source.into(),
            characteristic: "mass_g".into(),
            state: "open".into(),
            opened_at: "2026-03-01T08:30:00.000Z".into(),
            resolved_at: None,
            lot: lot.into(),
            lot_sampled_at: Some("2026-02-27".into()),
            test: "welch".into(),
            alternative: "two-sided".into(),
            statistic: Some(-7.25),
            df: Some(13.5),
            p_value: Some(1.5e-6),
            p_adjusted: Some(3.0e-6),
            method: "holm".into(),
            level: 0.01,
            family_size: 2,
            baseline_n: 240,
            baseline_mean: 200.0,
            baseline_sd: Some(1.0),
            lot_n: 12,
            lot_mean: 197.0,
            lot_sd: Some(1.1),
            estimate: Some(-3.0),
            ci: Some([-3.7, -2.3]),
            lots: 1,
            kind: "mean".into(),
            model: Some("units".into()),
            note: None,
            cpk: None,
            acknowledged: None,
            cusum_upper: None,
            cusum_lower: None,
            cusum_h: None,
            events: Vec::new(),
            acknowledgements: Vec::new(),
        }
    }
}

/// One state change of an alert.
#[derive(Debug, Clone, serde::Serialize)]
pub struct EventRow {
    /// "opened", "attached", "repeated" or "resolved".
    pub kind: String,
    pub at: String,
    /// The lot whose decision made the change.
    pub lot: Option<String>,
}

/// An acknowledgement of an alert.
#[derive(Debug, Clone, serde::Serialize)]
pub struct AckRow {
    pub by: String,
    pub at: String,
    pub note: String,
}

/// What `PRAGMA integrity_check` and the counts say of a database copy.
#[derive(Debug, Clone, serde::Serialize)]
pub struct CopyCheck {
    /// "ok", or SQLite's first findings, one per line.
    pub integrity: String,
    pub lots: i64,
    pub measurements: i64,
}

/// Counts for `lotdrift status`.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct StatusCounts {
    pub sources: i64,
    pub series: i64,
    pub files: i64,
    pub lots: i64,
    pub measurements: i64,
    pub quarantined: i64,
    pub evaluations: i64,
    pub open_alerts: i64,
    pub alerts: i64,
    pub outbox_pending: i64,
    pub outbox_failed: i64,
    pub outbox_expired: i64,
    /// Local date of the newest daily digest made.
    pub last_digest: Option<String>,
    /// Units found as outliers.
    pub outliers: i64,
    /// When the newest stored file was received.
    pub last_stored_at: Option<String>,
    /// When the newest message was delivered (any channel), and by email.
    pub last_delivered_at: Option<String>,
    pub last_email_delivered_at: Option<String>,
}

/// A failed or expired outbox message, for `status`.
#[derive(Debug, Clone, serde::Serialize)]
pub struct UndeliveredRow {
    pub id: i64,
    pub channel: String,
    pub recipient: String,
    pub state: String,
    pub attempts: i64,
    pub last_error: Option<String>,
    /// What the message announces: "alert" (an alert event), "digest", "silence" or
    /// "health" (an operational notice).
    pub message: String,
}

/// Values replaced on purpose (`lotdrift replace`): why, and who did it.
#[derive(Debug, Clone, Copy)]
pub struct Replacement<'a> {
    pub reason: &'a str,
    pub by: &'a str,
}

/// One lot of a series, for `lotdrift history`.
#[derive(Debug, Clone, serde::Serialize)]
pub struct HistoryRow {
    pub source: String,
    pub characteristic: String,
    pub lot: String,
    pub sampled_at: Option<String>,
    pub n: i64,
    pub mean: f64,
    pub sd: Option<f64>,
    pub min: f64,
    pub max: f64,
    /// "baseline", "tested" or "pending".
    pub role: String,
    pub p_value: Option<f64>,
    pub p_adjusted: Option<f64>,
    pub significant: Option<bool>,
    pub alert_id: Option<i64>,
    /// The alert events this lot's decisions made, e.g. "opened mean alert 3; resolved spread
    /// alert 2" (empty when none).
    pub events: String,
    /// The lot's units found as outliers, e.g. "U17 = 31.5 (9.2 sd, set aside)" (empty when
    /// none).
    pub outliers: String,
}

/// The columns [`design_from_row`] reads, in its order (prefix `b.` for the baseline table).
const DESIGN_COLUMNS: &str = "b.lot_count, b.n, b.mean, b.mean_of_means, b.msb, b.msw, \
     b.df_between, b.df_within, b.n0, b.n_harmonic, b.var_between, b.var_within, b.between_p, \
     b.normality_p, b.level_mean, b.level_spread, b.cusum_k, b.cusum_h, b.outlier_scale, \
     b.outlier_fence, b.heavy_tailed, b.spread_mean, b.spread_sd, b.spread_lots, b.spread_n, \
     b.log_scale, b.m2, b.spread_kurtosis";

/// A stored baseline's design, from [`DESIGN_COLUMNS`] starting at column `o`.
fn design_from_row(r: &impl Cells, o: usize) -> Design {
    let msb: f64 = r.cell(o + 4);
    let msw: f64 = r.cell(o + 5);
    let k: Option<f64> = r.cell(o + 16);
    let h: Option<f64> = r.cell(o + 17);
    Design {
        re: RandomEffects {
            m: r.cell::<i64>(o) as usize,
            n_total: r.cell::<i64>(o + 1) as u64,
            grand_mean: r.cell(o + 2),
            mean_of_means: r.cell(o + 3),
            msb,
            msw,
            df_between: r.cell(o + 6),
            df_within: r.cell(o + 7),
            n0: r.cell(o + 8),
            n_harmonic: r.cell(o + 9),
            var_between: r.cell(o + 10),
            var_within: r.cell(o + 11),
            f_statistic: msb / msw,
            p_value: r.cell(o + 12),
        },
        level_mean: r.cell(o + 14),
        level_spread: r.cell(o + 15),
        cusum: k.zip(h),
        normality_p: r.cell(o + 13),
        outliers: match (r.cell::<Option<f64>>(o + 18), r.cell(o + 19)) {
            (Some(scale), Some(fence)) => Some(OutlierFence {
                scale,
                fence,
                heavy_tailed: r.cell::<Option<i64>>(o + 20).unwrap_or(0) != 0,
            }),
            _ => None,
        },
        spread_base: match (
            r.cell::<Option<f64>>(o + 21),
            r.cell::<Option<f64>>(o + 22),
            r.cell::<Option<i64>>(o + 23),
            r.cell::<Option<f64>>(o + 24),
        ) {
            (Some(mean), Some(sd), Some(lots), Some(n)) => Some(SpreadBaseline {
                mean,
                sd,
                lots: lots as usize,
                n,
                kurtosis: r.cell(o + 27),
            }),
            _ => None,
        },
        log_scale: r.cell::<Option<i64>>(o + 25).unwrap_or(0) != 0,
        natural: {
            let n: i64 = r.cell(o + 1);
            let m2: f64 = r.cell(o + 26);
            (n > 1).then(|| (r.cell(o + 2), (m2 / (n - 1) as f64).sqrt(), n as u64))
        },
    }
}

fn summary_from_row(row: &impl Cells, first: usize) -> Result<Summary> {
    let n: i64 = row.cell(first);
    let mean: f64 = row.cell(first + 1);
    let m2: f64 = row.cell(first + 2);
    let min: f64 = row.cell(first + 3);
    let max: f64 = row.cell(first + 4);
    stored_summary(n, mean, m2, min, max)
}

/// A sample's summary from its stored columns (n, mean, m2, min, max); a row that cannot be
/// one is corrupt.
fn stored_summary(n: i64, mean: f64, m2: f64, min: f64, max: f64) -> Result<Summary> {
    Summary::from_parts(n as u64, mean, m2, min, max)
        .map_err(|e| StoreError::Corrupt(format!("stored summary n={n} mean={mean}: {e}")))
}

/// What a channel reports for one message.
#[derive(Debug, Clone, PartialEq)]
pub enum DeliveryOutcome {
    Delivered,
    Retry { next_at: String, error: String },
    Failed { error: String },
    Expired { error: String },
}

/// A sample as stored, as far as a batch needs it to decide a file that brings its lot again.
#[derive(Debug, Clone)]
struct StoredSample {
    id: i64,
    digest: String,
    file_name: String,
    n: i64,
    mean: f64,
    m2: f64,
    file_id: i64,
}

/// A series with pending work, from the columns `s.id, src.name, ch.name, cusum_upper,
/// cusum_lower, online_tests, online_rejected, lifecycle` (the state defaulted where none is
/// stored); baselines, alerts and lots are filled in afterwards.
fn series_work_from_row(r: &impl Cells) -> SeriesWork {
    SeriesWork {
        series_id: r.cell(0),
        source: r.cell(1),
        characteristic: r.cell(2),
        baseline: None,
        pending: Vec::new(),
        open_mean: None,
        open_spread: None,
        cusum: (r.cell(3), r.cell(4)),
        online: (
            r.cell::<i64>(5) as u64,
            r.cell::<String>(6)
                .split(',')
                .filter_map(|v| v.parse().ok())
                .collect(),
        ),
        baseline_residuals: None,
        units: None,
        values: HashMap::new(),
        lifecycle: r
            .cell::<Option<String>>(7)
            .and_then(|j| serde_json::from_str(&j).ok())
            .unwrap_or_default(),
    }
}

/// Reads the columns `s.id, s.lot_id, s.series_id, s.content_digest, f.file_name, s.n,
/// s.mean, s.m2, s.file_id` of a stored sample `s` and its file `f`.
fn stored_sample_from_row(r: &impl Cells) -> StoredSample {
    StoredSample {
        id: r.cell(0),
        digest: r.cell(3),
        file_name: r.cell(4),
        n: r.cell(5),
        mean: r.cell(6),
        m2: r.cell(7),
        file_id: r.cell(8),
    }
}

const ALERT_COLUMNS: &str = "a.id, src.name, ch.name, a.state, a.opened_at, a.resolved_at, \
     l.code, l.sampled_at, e.test, e.alternative, e.statistic, e.df, e.p_value, e.p_adjusted, \
     e.method, e.level, e.family_size, e.baseline_n, e.baseline_mean, e.baseline_sd, e.lot_n, \
     e.lot_mean, e.lot_sd, e.estimate, e.ci_low, e.ci_high, \
     (SELECT COUNT(*) FROM alert_event x WHERE x.alert_id = a.id \
      AND x.kind IN ('opened', 'attached', 'repeated')), a.kind, e.model, e.note, e.cpk, e.cpk_low, \
     e.cpk_high, \
     (SELECT k.acked_by FROM alert_ack k WHERE k.alert_id = a.id ORDER BY k.id DESC LIMIT 1), \
     (SELECT k.acked_at FROM alert_ack k WHERE k.alert_id = a.id ORDER BY k.id DESC LIMIT 1), \
     (SELECT k.note FROM alert_ack k WHERE k.alert_id = a.id ORDER BY k.id DESC LIMIT 1), \
     e.cusum_upper, e.cusum_lower, e.cusum_h, e.df2";

/// The joins behind [`ALERT_COLUMNS`] for alert `a`, with the numbers of evaluation `eval`
/// (an SQL expression: the opening evaluation, or an event's own).
fn alert_joins(eval: &str) -> String {
    format!(
        "JOIN evaluation e ON e.id = {eval} \
         JOIN sample sm ON sm.id = e.sample_id JOIN lot l ON l.id = sm.lot_id \
         JOIN series se ON se.id = a.series_id JOIN source src ON src.id = se.source_id \
         JOIN characteristic ch ON ch.id = se.characteristic_id"
    )
}

fn alert_from_row(r: &impl Cells, o: usize) -> AlertRow {
    let ci_low: Option<f64> = r.cell(o + 24);
    let ci_high: Option<f64> = r.cell(o + 25);
    AlertRow {
        id: r.cell(o),
        source: r.cell(o + 1),
        characteristic: r.cell(o + 2),
        state: r.cell(o + 3),
        opened_at: r.cell(o + 4),
        resolved_at: r.cell(o + 5),
        lot: r.cell(o + 6),
        lot_sampled_at: r.cell(o + 7),
        test: r.cell(o + 8),
        alternative: r.cell(o + 9),
        statistic: r.cell(o + 10),
        df: r.cell(o + 11),
        df2: r.cell(o + 39),
        p_value: r.cell(o + 12),
        p_adjusted: r.cell(o + 13),
        method: r.cell(o + 14),
        level: r.cell(o + 15),
        family_size: r.cell(o + 16),
        baseline_n: r.cell(o + 17),
        baseline_mean: r.cell(o + 18),
        baseline_sd: r.cell(o + 19),
        lot_n: r.cell(o + 20),
        lot_mean: r.cell(o + 21),
        lot_sd: r.cell(o + 22),
        estimate: r.cell(o + 23),
        ci: match (ci_low, ci_high) {
            (Some(a), Some(b)) => Some([a, b]),
            _ => None,
        },
        lots: r.cell(o + 26),
        kind: r.cell(o + 27),
        model: r.cell(o + 28),
        note: r.cell(o + 29),
        cpk: match (
            r.cell::<Option<f64>>(o + 30),
            r.cell::<Option<f64>>(o + 31),
            r.cell::<Option<f64>>(o + 32),
        ) {
            (Some(a), Some(b), Some(c)) => Some([a, b, c]),
            _ => None,
        },
        acknowledged: match (
            r.cell::<Option<String>>(o + 33),
            r.cell::<Option<String>>(o + 34),
            r.cell::<Option<String>>(o + 35),
        ) {
            (Some(by), Some(at), Some(note)) => Some(AckRow { by, at, note }),
            _ => None,
        },
        cusum_upper: r.cell(o + 36),
        cusum_lower: r.cell(o + 37),
        cusum_h: r.cell(o + 38),
        events: Vec::new(),
        acknowledgements: Vec::new(),
    }
}

/// The columns [`silence_from_row`] reads, for a silence `si` with [`SILENCE_JOINS`].
const SILENCE_COLUMNS: &str = "si.id, src.name, si.opened_at, ll.code, si.last_lot_at, \
     si.threshold_days, si.basis, si.intervals, si.median_days, si.resolved_at, rl.code, \
     si.resolving_lot_at";

const SILENCE_JOINS: &str = "JOIN source src ON src.id = si.source_id \
     JOIN lot ll ON ll.id = si.last_lot_id LEFT JOIN lot rl ON rl.id = si.resolving_lot_id";

fn silence_from_row(r: &impl Cells, o: usize) -> SilenceRow {
    SilenceRow {
        id: r.cell(o),
        source: r.cell(o + 1),
        opened_at: r.cell(o + 2),
        last_lot: r.cell(o + 3),
        last_lot_at: r.cell(o + 4),
        threshold_days: r.cell(o + 5),
        basis: r.cell(o + 6),
        intervals: r.cell(o + 7),
        median_days: r.cell(o + 8),
        resolved_at: r.cell(o + 9),
        resolving_lot: r.cell(o + 10),
        resolving_lot_at: r.cell(o + 11),
    }
}

fn health_from_row(r: &impl Cells) -> HealthRow {
    HealthRow {
        component: r.cell(0),
        failing_since: r.cell(1),
        failures: r.cell(2),
        last_error: r.cell(3),
        last_error_at: r.cell(4),
        recovered_at: r.cell(5),
        notice_sent: r.cell(6),
    }
}

/// One lot mean of a series, for the chart of an alert message.
#[derive(Debug, Clone, PartialEq)]
pub struct LotMeanRow {
    pub lot: String,
    pub sampled_at: Option<String>,
    pub n: i64,
    pub mean: f64,
    /// The lot is one of the series' baseline lots.
    pub baseline: bool,
    /// The lot was tested and found significant.
    pub significant: bool,
}
