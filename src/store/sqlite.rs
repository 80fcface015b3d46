//! The SQLite backend: the embedded default, one file per site.
//!
//! SQLite runs in WAL mode with a busy timeout, and every write transaction begins
//! `IMMEDIATE`, so readers (the CLI, the user's own SQL tools) never block the daemon and a
//! second writer waits instead of failing. The bulk paths (unit values, decisions, `history`)
//! go through the connection's own SQLite handle with prepared statements (see [`bulk`]).

use std::collections::{HashMap, HashSet};
use std::path::Path;
use std::str::FromStr;
use std::sync::Mutex;
use std::time::Duration;

use futures_util::TryStreamExt;
use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use sqlx::{ConnectOptions, QueryBuilder, Row, Sqlite, Transaction};

use super::plan::{self, Lookups};
use super::*;

pub(super) mod bulk;
pub(super) mod charts;
pub(super) mod history;
pub(super) mod views;

/// Bytes of heap SQLite may hold in this process before its page caches stop growing: one
/// connection's full cache (16 MiB) and as much again for the others.
const SQLITE_HEAP_LIMIT: &str = "33554432";

/// The SQLite store: its pool and the ids of names already stored.
pub(super) struct Db {
    pool: SqlitePool,
    names: Mutex<NameCache>,
    /// The `[site] name` recorded with each stored file and decision.
    site: String,
}

impl Db {
    /// Opens (creating if needed) the SQLite database at `path` and applies migrations.
    pub async fn open(path: &Path, site: &str) -> Result<Db> {
        let shown = path.display().to_string();
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(|e| StoreError::Open {
                path: shown.clone(),
                source: sqlx::Error::Io(e),
            })?;
        }
        let options = SqliteConnectOptions::from_str("sqlite:")
            .map_err(|source| StoreError::Open {
                path: shown.clone(),
                source,
            })?
            .filename(path)
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            // FULL: a commit is on disk before ingest moves the batch's files to the archive.
            // With NORMAL a power cut could roll back the last commits of a WAL database while
            // their files already sat in the archive, never stored.
            .synchronous(SqliteSynchronous::Full)
            .busy_timeout(Duration::from_secs(30))
            .foreign_keys(true)
            // 16 MiB of page cache per connection (negative = KiB), at most four: a backfill
            // touches the indexes of lots, files and samples at random, and the default 2 MiB
            // makes it read pages back; 32 MiB each put a backfill's peak memory near 250 MiB.
            .pragma("cache_size", "-16384")
            // SQLite's heap for the whole process (the pragma is process-wide): past it, a
            // connection reuses its own least recently used pages instead of growing, so the
            // four connections' caches (up to 64 MiB) do not all fill at once.
            .pragma("soft_heap_limit", SQLITE_HEAP_LIMIT)
            // A backfill's large statements are expected; only report them at debug level.
            .log_slow_statements(tracing::log::LevelFilter::Debug, Duration::from_secs(5));
        let pool = SqlitePoolOptions::new()
            .max_connections(4)
            .after_release(|conn, _| Box::pin(async move { reusable(conn).await }))
            .connect_with(options)
            .await
            .map_err(|source| StoreError::Open {
                path: shown.clone(),
                source,
            })?;
        // Two processes opening a new database at once (the daemon starting, `status` run
        // beside it) would both apply the first migration and one would fail ("table already
        // exists"): migrations run under an exclusive lock on a file beside the database.
        let lock = migration_lock(path).await?;
        let migrated = sqlx::migrate!().run(&pool).await;
        drop(lock);
        migrated.map_err(|source| StoreError::Migrate {
            path: shown,
            source,
        })?;
        let store = Db {
            pool,
            names: Mutex::new(NameCache::default()),
            site: site.to_string(),
        };
        store.fill_missing_sd().await?;
        Ok(store)
    }

    /// Writes a consistent copy of the database to `dest` (`VACUUM INTO`: one read
    /// transaction, so a daemon writing meanwhile is neither blocked nor half-copied). SQLite
    /// refuses a `dest` that exists and is not empty.
    pub async fn backup_into(&self, dest: &Path) -> Result<()> {
        let shown = dest.display().to_string();
        sqlx::query("VACUUM INTO ?")
            .bind(dest.to_string_lossy().into_owned())
            .execute(&self.pool)
            .await
            .map_err(|source| StoreError::Backup {
                path: shown,
                source,
            })?;
        Ok(())
    }

    /// Opens a database copy read-only (no migrations), runs `PRAGMA integrity_check` and
    /// counts its lots and measurements.
    pub async fn check_copy(path: &Path) -> Result<CopyCheck> {
        let err = |source| StoreError::CheckCopy {
            path: path.display().to_string(),
            source,
        };
        let mut conn = SqliteConnectOptions::new()
            .filename(path)
            .read_only(true)
            .connect()
            .await
            .map_err(err)?;
        let findings: Vec<String> = sqlx::query_scalar("PRAGMA integrity_check")
            .fetch_all(&mut conn)
            .await
            .map_err(err)?;
        let (lots, measurements): (i64, i64) = sqlx::query_as(
            "SELECT (SELECT COUNT(*) FROM lot), \
                 (SELECT COUNT(*) FROM sample_values sv JOIN json_each(sv.values_json))",
        )
        .fetch_one(&mut conn)
        .await
        .map_err(err)?;
        let _ = sqlx::Connection::close(conn).await;
        Ok(CopyCheck {
            integrity: findings.join("\n"),
            lots,
            measurements,
        })
    }

    /// Closes the pool, checkpointing the WAL.
    pub async fn close(self) {
        self.pool.close().await;
    }

    async fn begin(&self) -> Result<Transaction<'static, Sqlite>> {
        self.pool
            .begin_with("BEGIN IMMEDIATE")
            .await
            .doing("beginning a write transaction")
    }

    /// True when a file with this content hash is stored.
    pub async fn file_known(&self, hash: &str) -> Result<Option<String>> {
        let row = sqlx::query("SELECT file_name FROM ingested_file WHERE content_hash = ?")
            .bind(hash)
            .fetch_optional(&self.pool)
            .await
            .doing("looking up a content hash")?;
        Ok(row.map(|r| r.get(0)))
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
        let mut tx = self.begin().await?;
        let mut created = NameCache::default();
        let outcomes = self
            .ingest_in(&mut tx, files, received_at, replace, &mut created)
            .await?;
        tx.commit().await.doing("committing a batch of files")?;
        let mut cache = self.names.lock().expect("name cache lock");
        cache.sources.extend(created.sources);
        cache.characteristics.extend(created.characteristics);
        cache.series.extend(created.series);
        Ok(outcomes)
    }

    async fn ingest_in(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        files: &[NewFile],
        received_at: &str,
        replace: Option<&Replacement<'_>>,
        created: &mut NameCache,
    ) -> Result<Vec<FileOutcome>> {
        let mut look = Lookups {
            known: known_hashes(tx, files).await?,
            ..Lookups::default()
        };
        for (source, characteristic) in Lookups::series_named(files) {
            let source_id = self.source_id(tx, source, created).await?;
            let ch_id = self.characteristic_id(tx, characteristic, created).await?;
            let series_id = self.series_id(tx, source_id, ch_id, created).await?;
            look.series_ids.insert((source, characteristic), series_id);
            look.source_ids.insert(source, source_id);
        }
        look.lot_ids = stored_lots(tx, look.lots_wanted(files)).await?;
        look.stored = stored_samples(tx, &look.lot_ids).await?;

        let batch = plan::decide(files, &look, replace.is_some());
        let to_store = batch.to_store();
        let file_ids = self.insert_files(tx, files, &to_store, received_at).await?;
        let lot_times = batch.lot_times(files, &look);
        insert_lots(tx, &lot_times, &mut look.lot_ids, received_at).await?;

        // Samples: replacements update in place (decisions keep the numbers they stored).
        let mut inserts: Vec<PendingSample> = Vec::new();
        let mut sample_ids: Vec<(i64, &NewSample)> = Vec::new();
        for i in &to_store {
            for (j, replaced) in &batch.plans[*i] {
                let s = &files[*i].samples[*j];
                match replaced {
                    Some(old) => {
                        self.replace_sample(tx, old, s, file_ids[i], received_at, replace)
                            .await?;
                        sample_ids.push((old.id, s));
                    }
                    None => inserts.push(PendingSample {
                        sample: s,
                        lot_id: look.lot_of(s).expect("every lot of the batch is stored"),
                        series_id: look.series_of(s),
                        file_id: file_ids[i],
                    }),
                }
            }
        }
        insert_samples(tx, &inserts, &mut sample_ids).await?;
        self.insert_measurements(tx, &sample_ids).await?;
        Ok(batch.finish(&file_ids))
    }

    /// Records the files to store; returns each one's id by its index in `files`.
    async fn insert_files(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        files: &[NewFile],
        to_store: &[usize],
        received_at: &str,
    ) -> Result<HashMap<usize, i64>> {
        let mut file_ids: HashMap<usize, i64> = HashMap::new();
        for chunk in to_store.chunks(ROWS_PER_INSERT) {
            let mut q = QueryBuilder::<Sqlite>::new(
                "INSERT INTO ingested_file (content_hash, file_name, received_at, layout, row_count, \
                 site) ",
            );
            q.push_values(chunk, |mut b, i| {
                let f = &files[*i];
                b.push_bind(&f.hash)
                    .push_bind(&f.name)
                    .push_bind(received_at)
                    .push_bind(f.layout)
                    .push_bind(f.rows as i64)
                    .push_bind(&self.site);
            });
            q.push(" RETURNING id, content_hash");
            let by_hash: HashMap<String, i64> = q
                .build()
                .fetch_all(&mut **tx)
                .await
                .doing("recording files")?
                .iter()
                .map(|r| (r.get(1), r.get(0)))
                .collect();
            for i in chunk {
                file_ids.insert(*i, by_hash[&files[*i].hash]);
            }
        }
        Ok(file_ids)
    }

    /// Writes the unit values of `samples` inside the open transaction, through the
    /// connection's own SQLite handle with one prepared statement (see [`bulk`]).
    async fn insert_measurements(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        samples: &[(i64, &NewSample)],
    ) -> Result<()> {
        let mut handle = tx
            .lock_handle()
            .await
            .doing("taking the connection for the unit values")?;
        bulk::insert_measurements(handle.as_raw_handle(), samples)
    }

    async fn replace_sample(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        old: &StoredSample,
        new: &NewSample,
        file_id: i64,
        at: &str,
        replace: Option<&Replacement<'_>>,
    ) -> Result<()> {
        let replacement_id: i64 = sqlx::query_scalar(
            "INSERT INTO sample_replacement (sample_id, replaced_at, reason, old_file_id, \
             new_file_id, old_n, old_mean, old_m2, old_digest, replaced_by) \
             VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING id",
        )
        .bind(old.id)
        .bind(at)
        .bind(replace.map_or("", |r| r.reason))
        .bind(old.file_id)
        .bind(file_id)
        .bind(old.n)
        .bind(old.mean)
        .bind(old.m2)
        .bind(&old.digest)
        .bind(replace.map(|r| r.by))
        .fetch_one(&mut **tx)
        .await
        .doing("recording a replacement")?;
        // The old values stay in the audit trail; the outliers found among them were findings
        // about values the sample no longer has.
        sqlx::query(
            "INSERT INTO replaced_measurement (replacement_id, seq, unit, value, sampled_at) \
             SELECT ?, v.key, sv.units_json ->> v.key, v.value, \
                    CASE WHEN sv.sampled_at_json IS NULL THEN sm.sampled_at \
                         ELSE sv.sampled_at_json ->> v.key END \
             FROM sample_values sv JOIN sample sm ON sm.id = sv.sample_id \
             JOIN json_each(sv.values_json) v WHERE sv.sample_id = ? ORDER BY v.key",
        )
        .bind(replacement_id)
        .bind(old.id)
        .execute(&mut **tx)
        .await
        .doing("keeping replaced values")?;
        sqlx::query("DELETE FROM outlier WHERE sample_id = ?")
            .bind(old.id)
            .execute(&mut **tx)
            .await
            .doing("removing outliers of replaced values")?;
        sqlx::query("DELETE FROM sample_values WHERE sample_id = ?")
            .bind(old.id)
            .execute(&mut **tx)
            .await
            .doing("removing replaced values")?;
        let s = &new.summary;
        sqlx::query(
            "UPDATE sample SET file_id = ?, n = ?, mean = ?, m2 = ?, min_value = ?, \
             max_value = ?, sampled_at = ?, content_digest = ?, sd = ? WHERE id = ?",
        )
        .bind(file_id)
        .bind(s.n() as i64)
        .bind(s.mean())
        .bind(s.m2())
        .bind(s.min())
        .bind(s.max())
        .bind(new.earliest.as_deref())
        .bind(new.digest.hex())
        .bind(sd(s.n() as i64, s.m2()))
        .bind(old.id)
        .execute(&mut **tx)
        .await
        .doing("replacing a sample")?;
        Ok(())
    }

    async fn source_id(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        name: &str,
        created: &mut NameCache,
    ) -> Result<i64> {
        if let Some(id) = self.names.lock().expect("name cache").sources.get(name) {
            return Ok(*id);
        }
        if let Some(id) = created.sources.get(name) {
            return Ok(*id);
        }
        let id = upsert_name(tx, "source", name).await?;
        created.sources.insert(name.to_string(), id);
        Ok(id)
    }

    async fn characteristic_id(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        name: &str,
        created: &mut NameCache,
    ) -> Result<i64> {
        if let Some(id) = self
            .names
            .lock()
            .expect("name cache")
            .characteristics
            .get(name)
        {
            return Ok(*id);
        }
        if let Some(id) = created.characteristics.get(name) {
            return Ok(*id);
        }
        let id = upsert_name(tx, "characteristic", name).await?;
        created.characteristics.insert(name.to_string(), id);
        Ok(id)
    }

    async fn series_id(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        source_id: i64,
        characteristic_id: i64,
        created: &mut NameCache,
    ) -> Result<i64> {
        let key = (source_id, characteristic_id);
        if let Some(id) = self.names.lock().expect("name cache").series.get(&key) {
            return Ok(*id);
        }
        if let Some(id) = created.series.get(&key) {
            return Ok(*id);
        }
        sqlx::query(
            "INSERT INTO series (source_id, characteristic_id) VALUES (?, ?) \
             ON CONFLICT (source_id, characteristic_id) DO NOTHING",
        )
        .bind(source_id)
        .bind(characteristic_id)
        .execute(&mut **tx)
        .await
        .doing("recording a series")?;
        let id: i64 = sqlx::query_scalar(
            "SELECT id FROM series WHERE source_id = ? AND characteristic_id = ?",
        )
        .bind(source_id)
        .bind(characteristic_id)
        .fetch_one(&mut **tx)
        .await
        .doing("looking up a series")?;
        created.series.insert(key, id);
        Ok(id)
    }

    /// Records a refused file (idempotent on its content hash).
    pub async fn record_quarantine(
        &self,
        hash: &str,
        file_name: &str,
        at: &str,
        reason: &str,
    ) -> Result<()> {
        let mut tx = self.begin().await?;
        sqlx::query(
            "INSERT INTO quarantined_file (content_hash, file_name, quarantined_at, reason) \
             VALUES (?, ?, ?, ?) ON CONFLICT (content_hash) DO UPDATE SET \
             file_name = excluded.file_name, quarantined_at = excluded.quarantined_at, \
             reason = excluded.reason",
        )
        .bind(hash)
        .bind(file_name)
        .bind(at)
        .bind(reason)
        .execute(&mut *tx)
        .await
        .doing("recording a quarantined file")?;
        tx.commit().await.doing("committing a quarantine record")
    }

    /// Everything the engine needs for the series that have undecided samples, or no frozen
    /// baseline yet. Series are returned by source, then characteristic.
    pub async fn pending_work(&self) -> Result<Vec<SeriesWork>> {
        let rows = sqlx::query(
            "SELECT s.id, src.name, ch.name, COALESCE(st.cusum_upper, 0.0), \
                    COALESCE(st.cusum_lower, 0.0), COALESCE(st.online_tests, 0), \
                    COALESCE(st.online_rejected, ''), st.lifecycle FROM series s \
             JOIN source src ON src.id = s.source_id \
             JOIN characteristic ch ON ch.id = s.characteristic_id \
             LEFT JOIN series_state st ON st.series_id = s.id \
             WHERE s.id IN (SELECT series_id FROM pending_sample) \
             ORDER BY src.name, ch.name",
        )
        .fetch_all(&self.pool)
        .await
        .doing("finding series with new lots")?;
        let mut work: Vec<SeriesWork> = rows
            .iter()
            .map(|r| SeriesWork {
                series_id: r.get(0),
                source: r.get(1),
                characteristic: r.get(2),
                baseline: None,
                pending: Vec::new(),
                open_mean: None,
                open_spread: None,
                cusum: (r.get(3), r.get(4)),
                online: (
                    r.get::<i64, _>(5) as u64,
                    r.get::<String, _>(6)
                        .split(',')
                        .filter_map(|v| v.parse().ok())
                        .collect(),
                ),
                baseline_residuals: None,
                units: None,
                values: HashMap::new(),
                lifecycle: r
                    .get::<Option<String>, _>(7)
                    .and_then(|j| serde_json::from_str(&j).ok())
                    .unwrap_or_default(),
            })
            .collect();
        if work.is_empty() {
            return Ok(work);
        }
        let index: HashMap<i64, usize> = work
            .iter()
            .enumerate()
            .map(|(i, w)| (w.series_id, i))
            .collect();

        for r in sqlx::query(&format!(
            "SELECT b.series_id, b.id, b.n, b.mean, b.m2, b.min_value, b.max_value, b.definition, \
             {DESIGN_COLUMNS} FROM baseline b WHERE b.retired_at IS NULL \
             AND b.series_id IN (SELECT series_id FROM pending_sample)"
        ))
        .fetch_all(&self.pool)
        .await
        .doing("loading baselines")?
        {
            if let Some(i) = index.get(&r.get::<i64, _>(0)) {
                let design = design_from_row(&r, 8);
                work[*i].baseline = Some(BaselineRow {
                    id: r.get(1),
                    lot_count: design.re.m,
                    summary: summary_from_row(&r, 2)?,
                    definition: r.get(7),
                    design,
                });
            }
        }
        for r in sqlx::query(
            "SELECT a.series_id, a.id, a.in_control_run, a.kind, a.notified_at, \
                    a.notified_estimate, \
                    EXISTS (SELECT 1 FROM alert_ack k WHERE k.alert_id = a.id) \
             FROM alert a WHERE a.state = 'open'",
        )
        .fetch_all(&self.pool)
        .await
        .doing("loading open alerts")?
        {
            if let Some(i) = index.get(&r.get::<i64, _>(0)) {
                let open = Some(OpenAlert {
                    id: r.get(1),
                    in_control_run: r.get(2),
                    notified_at: r
                        .get::<Option<String>, _>(4)
                        .and_then(|t| crate::time::parse_utc(&t)),
                    notified_estimate: r.get(5),
                    acknowledged: r.get::<i64, _>(6) != 0,
                });
                if r.get::<String, _>(3) == "spread" {
                    work[*i].open_spread = open;
                } else {
                    work[*i].open_mean = open;
                }
            }
        }
        // CROSS JOIN keeps SQLite from walking every sample in series order (the index that
        // would spare it the sort) and probing the queue for each: the queue leads.
        // Streamed, not collected: a backfill has every sample of every series pending, and a
        // materialised row costs far more memory than the few numbers kept from it.
        let mut rows = sqlx::query(
            "SELECT sm.series_id, sm.id, l.id, l.code, COALESCE(l.sampled_at, l.first_seen_at), \
                    sm.n, sm.mean, sm.m2, sm.min_value, sm.max_value \
             FROM pending_sample p CROSS JOIN sample sm ON sm.id = p.sample_id \
             CROSS JOIN lot l ON l.id = sm.lot_id \
             ORDER BY p.series_id, COALESCE(l.sampled_at, l.first_seen_at), l.code",
        )
        .fetch(&self.pool);
        while let Some(r) = rows.try_next().await.doing("loading new lots")? {
            if let Some(i) = index.get(&r.get::<i64, _>(0)) {
                work[*i].pending.push(SeriesSample {
                    sample_id: r.get(1),
                    lot_id: r.get(2),
                    lot: r.get(3),
                    order_time: r.get(4),
                    summary: summary_from_row(&r, 5)?,
                    evaluated: false,
                });
            }
        }
        Ok(work)
    }

    /// (seq, value) of every unit of the given samples, in seq order (see [`bulk`]).
    pub async fn unit_values(&self, sample_ids: &[i64]) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
        let mut conn = self.pool.acquire().await.doing("reading unit values")?;
        let mut handle = conn.lock_handle().await.doing("reading unit values")?;
        bulk::unit_values(handle.as_raw_handle(), sample_ids)
    }

    /// The samples of a baseline.
    pub async fn baseline_samples(&self, baseline_id: i64) -> Result<Vec<i64>> {
        sqlx::query_scalar("SELECT sample_id FROM baseline_lot WHERE baseline_id = ?")
            .bind(baseline_id)
            .fetch_all(&self.pool)
            .await
            .doing("reading baseline lots")
    }

    /// Within-lot residuals (value − its lot's mean) of the given samples, in sample and
    /// unit order.
    pub async fn residuals(&self, sample_ids: &[i64]) -> Result<Vec<f64>> {
        let mut out = Vec::new();
        for chunk in sample_ids.chunks(ROWS_PER_INSERT) {
            let mut q = in_list(
                "SELECT v.value - s.mean FROM sample_values sv \
                 JOIN sample s ON s.id = sv.sample_id JOIN json_each(sv.values_json) v \
                 WHERE sv.sample_id IN",
                chunk,
                " ORDER BY sv.sample_id, v.key",
            );
            for r in q
                .build()
                .fetch_all(&self.pool)
                .await
                .doing("reading baseline residuals")?
            {
                out.push(r.get::<f64, _>(0));
            }
        }
        Ok(out)
    }

    /// Writes one engine pass (baselines, decisions, alert changes, outbox rows, CUSUM state)
    /// in one transaction, so an alert is never decided without its message queued.
    pub async fn write_pass(&self, pass: &EnginePass, at: &str) -> Result<PassCounts> {
        let mut counts = PassCounts::default();
        if pass.baselines.is_empty() && pass.decisions.is_empty() && pass.outliers.is_empty() {
            return Ok(counts);
        }
        let mut tx = self.begin().await?;
        let mut baseline_ids: HashMap<i64, i64> = HashMap::new();
        for b in &pass.baselines {
            let id = insert_baseline(&mut tx, b, at).await?;
            baseline_ids.insert(b.series_id, id);
            counts.baselines += 1;
        }
        // Baselines frozen in earlier passes.
        let missing: Vec<i64> = pass
            .decisions
            .iter()
            .map(|d| d.evaluation.series_id)
            .filter(|s| !baseline_ids.contains_key(s))
            .collect::<HashSet<_>>()
            .into_iter()
            .collect();
        for chunk in missing.chunks(ROWS_PER_INSERT) {
            let mut q = in_list(
                "SELECT series_id, id FROM baseline WHERE retired_at IS NULL AND series_id IN",
                chunk,
                "",
            );
            for r in q
                .build()
                .fetch_all(&mut *tx)
                .await
                .doing("looking up baselines")?
            {
                baseline_ids.insert(r.get(0), r.get(1));
            }
        }

        // Evaluations, one prepared statement on the raw handle (see `bulk`).
        let eval_ids = {
            let mut handle = tx
                .lock_handle()
                .await
                .doing("taking the connection for the decisions")?;
            bulk::insert_evaluations(
                handle.as_raw_handle(),
                &pass.decisions,
                &baseline_ids,
                at,
                &self.site,
            )?
        };
        counts.evaluations += pass.decisions.len();

        // Alert changes, in decision order. The open alert of each series and kind is looked
        // up once and followed through the pass.
        let mut open: HashMap<(i64, &str), Option<i64>> = HashMap::new();
        for d in &pass.decisions {
            let kind = d.evaluation.kind;
            let eval_id = eval_ids[&(d.evaluation.sample_id, kind)];
            let series_id = d.evaluation.series_id;
            let key = (series_id, kind);
            if !matches!(
                d.action,
                AlertAction::None | AlertAction::Open | AlertAction::Reopen
            ) && !open.contains_key(&key)
            {
                let id: Option<i64> = sqlx::query_scalar(
                    "SELECT id FROM alert WHERE series_id = ? AND kind = ? AND state = 'open'",
                )
                .bind(series_id)
                .bind(kind)
                .fetch_optional(&mut *tx)
                .await
                .doing("looking up an open alert")?;
                open.insert(key, id);
            }
            let current = || {
                open.get(&key).copied().flatten().ok_or_else(|| {
                    StoreError::Corrupt(format!(
                        "series {series_id} has no open {kind} alert to update"
                    ))
                })
            };
            let event = match d.action {
                AlertAction::None => None,
                AlertAction::Open => {
                    let alert_id: i64 = sqlx::query_scalar(
                        "INSERT INTO alert (series_id, kind, state, opened_at, \
                         opening_evaluation) VALUES (?, ?, 'open', ?, ?) RETURNING id",
                    )
                    .bind(series_id)
                    .bind(kind)
                    .bind(at)
                    .bind(eval_id)
                    .fetch_one(&mut *tx)
                    .await
                    .doing("opening an alert")?;
                    counts.opened += 1;
                    open.insert(key, Some(alert_id));
                    sqlx::query(
                        "UPDATE alert SET notified_at = ?, notified_estimate = ? WHERE id = ?",
                    )
                    .bind(at)
                    .bind(d.evaluation.estimate)
                    .bind(alert_id)
                    .execute(&mut *tx)
                    .await
                    .doing("updating an alert")?;
                    Some((alert_id, "opened"))
                }
                AlertAction::Attach => {
                    let alert_id = current()?;
                    sqlx::query("UPDATE alert SET in_control_run = 0 WHERE id = ?")
                        .bind(alert_id)
                        .execute(&mut *tx)
                        .await
                        .doing("updating an alert")?;
                    Some((alert_id, "attached"))
                }
                AlertAction::Repeat => {
                    let alert_id = current()?;
                    sqlx::query(
                        "UPDATE alert SET in_control_run = 0, notified_at = ?, \
                         notified_estimate = ? WHERE id = ?",
                    )
                    .bind(at)
                    .bind(d.evaluation.estimate)
                    .bind(alert_id)
                    .execute(&mut *tx)
                    .await
                    .doing("updating an alert")?;
                    Some((alert_id, "repeated"))
                }
                AlertAction::InControl { run } => {
                    let alert_id = current()?;
                    sqlx::query("UPDATE alert SET in_control_run = ? WHERE id = ?")
                        .bind(run)
                        .bind(alert_id)
                        .execute(&mut *tx)
                        .await
                        .doing("updating an alert")?;
                    None
                }
                AlertAction::Reopen => {
                    let alert_id: i64 = sqlx::query_scalar(
                        "SELECT id FROM alert WHERE series_id = ? AND kind = ? \
                         AND state = 'resolved' ORDER BY resolved_at DESC, id DESC LIMIT 1",
                    )
                    .bind(series_id)
                    .bind(kind)
                    .fetch_optional(&mut *tx)
                    .await
                    .doing("looking up a resolved alert")?
                    .ok_or_else(|| {
                        StoreError::Corrupt(format!(
                            "series {series_id} has no resolved {kind} alert to reopen"
                        ))
                    })?;
                    sqlx::query(
                        "UPDATE alert SET state = 'open', resolved_at = NULL, in_control_run = 0, \
                         notified_at = ?, notified_estimate = ? WHERE id = ?",
                    )
                    .bind(at)
                    .bind(d.evaluation.estimate)
                    .bind(alert_id)
                    .execute(&mut *tx)
                    .await
                    .doing("reopening an alert")?;
                    counts.reopened += 1;
                    open.insert(key, Some(alert_id));
                    Some((alert_id, "opened"))
                }
                AlertAction::Resolve => {
                    let alert_id = current()?;
                    open.insert(key, None);
                    sqlx::query(
                        "UPDATE alert SET state = 'resolved', resolved_at = ?, \
                         in_control_run = 0 WHERE id = ?",
                    )
                    .bind(at)
                    .bind(alert_id)
                    .execute(&mut *tx)
                    .await
                    .doing("resolving an alert")?;
                    counts.resolved += 1;
                    Some((alert_id, "resolved"))
                }
            };
            if let Some((alert_id, event_kind)) = event {
                let event_id: i64 = sqlx::query_scalar(
                    "INSERT INTO alert_event (alert_id, kind, at, evaluation_id) \
                     VALUES (?, ?, ?, ?) RETURNING id",
                )
                .bind(alert_id)
                .bind(event_kind)
                .bind(at)
                .bind(eval_id)
                .fetch_one(&mut *tx)
                .await
                .doing("recording an alert event")?;
                if event_kind != "attached" {
                    let series_recipients = pass
                        .recipients
                        .get(&d.evaluation.series_id)
                        .map(Vec::as_slice)
                        .unwrap_or_default();
                    for (channel, recipient) in series_recipients {
                        sqlx::query(
                            "INSERT INTO outbox (alert_event_id, channel, recipient, state, \
                             created_at, next_attempt_at) VALUES (?, ?, ?, 'pending', ?, ?)",
                        )
                        .bind(event_id)
                        .bind(channel)
                        .bind(recipient)
                        .bind(at)
                        .bind(at)
                        .execute(&mut *tx)
                        .await
                        .doing("queueing a message")?;
                    }
                }
            }
        }
        for chunk in pass.states.chunks(ROWS_PER_INSERT / 5) {
            let mut q = QueryBuilder::<Sqlite>::new(
                "INSERT INTO series_state (series_id, cusum_upper, cusum_lower, online_tests, \
                 online_rejected, lifecycle) ",
            );
            q.push_values(chunk, |mut r, st| {
                r.push_bind(st.series_id)
                    .push_bind(st.cusum_upper)
                    .push_bind(st.cusum_lower)
                    .push_bind(st.online_tests as i64)
                    .push_bind(
                        st.online_rejected
                            .iter()
                            .map(u64::to_string)
                            .collect::<Vec<_>>()
                            .join(","),
                    )
                    .push_bind(serde_json::to_string(&st.lifecycle).ok());
            });
            q.push(
                " ON CONFLICT (series_id) DO UPDATE SET cusum_upper = excluded.cusum_upper, \
                 cusum_lower = excluded.cusum_lower, online_tests = excluded.online_tests, \
                 online_rejected = excluded.online_rejected, lifecycle = excluded.lifecycle",
            );
            q.build()
                .execute(&mut *tx)
                .await
                .doing("recording series state")?;
        }
        counts.outliers = insert_outliers(&mut tx, &pass.outliers, at).await?;
        tx.commit().await.doing("committing decisions")?;
        Ok(counts)
    }

    /// Outbox messages due at `now`, oldest first.
    pub async fn due_outbox(&self, now: &str, limit: i64) -> Result<Vec<OutboxItem>> {
        let rows = sqlx::query(&format!(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, ev.id, \
             CASE WHEN ev.kind = 'opened' AND EXISTS (SELECT 1 FROM alert_event pe \
                  WHERE pe.alert_id = ev.alert_id AND pe.kind = 'resolved' AND pe.id < ev.id) \
                  THEN 'reopened' ELSE ev.kind END, ev.at, \
             (SELECT ol.code FROM evaluation oe JOIN sample os ON os.id = oe.sample_id \
              JOIN lot ol ON ol.id = os.lot_id WHERE oe.id = a.opening_evaluation), \
             {ALERT_COLUMNS} FROM outbox o \
             JOIN alert_event ev ON ev.id = o.alert_event_id \
             JOIN alert a ON a.id = ev.alert_id {joins} \
             WHERE o.state = 'pending' AND o.next_attempt_at <= ? \
             ORDER BY o.next_attempt_at, o.id LIMIT ?",
            joins = alert_joins("COALESCE(ev.evaluation_id, a.opening_evaluation)")
        ))
        .bind(now)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        rows.iter()
            .map(|r| {
                Ok(OutboxItem {
                    id: r.get(0),
                    channel: r.get(1),
                    recipient: r.get(2),
                    attempts: r.get(3),
                    created_at: r.get(4),
                    event_id: r.get(5),
                    event_kind: r.get(6),
                    event_at: r.get(7),
                    opening_lot: r.get(8),
                    alert: alert_from_row(r, 9),
                })
            })
            .collect()
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
        let mut tx = self.begin().await?;
        for (id, outcome) in outcomes {
            let (state, next, error) = match outcome {
                DeliveryOutcome::Delivered => ("delivered", None, None),
                DeliveryOutcome::Retry { next_at, error } => {
                    ("pending", Some(next_at.as_str()), Some(error.as_str()))
                }
                DeliveryOutcome::Failed { error } => ("failed", None, Some(error.as_str())),
                DeliveryOutcome::Expired { error } => ("expired", None, Some(error.as_str())),
            };
            sqlx::query(
                "UPDATE outbox SET state = ?, attempts = attempts + 1, \
                 next_attempt_at = COALESCE(?, next_attempt_at), \
                 delivered_at = CASE WHEN ? = 'delivered' THEN ? ELSE delivered_at END, \
                 last_error = COALESCE(?, last_error) WHERE id = ?",
            )
            .bind(state)
            .bind(next)
            .bind(state)
            .bind(now)
            .bind(error)
            .bind(id)
            .execute(&mut *tx)
            .await
            .doing("recording a delivery attempt")?;
        }
        tx.commit().await.doing("committing delivery attempts")
    }

    /// Alerts, newest first.
    pub async fn alerts(&self, open_only: bool) -> Result<Vec<AlertRow>> {
        let filter = if open_only {
            "WHERE a.state = 'open'"
        } else {
            ""
        };
        let rows = sqlx::query(&format!(
            "SELECT {ALERT_COLUMNS} FROM alert a {joins} {filter} ORDER BY a.id DESC",
            joins = alert_joins("a.opening_evaluation")
        ))
        .fetch_all(&self.pool)
        .await
        .doing("listing alerts")?;
        let mut alerts: Vec<AlertRow> = rows.iter().map(|r| alert_from_row(r, 0)).collect();
        let ids: Vec<i64> = alerts.iter().map(|a| a.id).collect();
        let mut events: HashMap<i64, Vec<EventRow>> = HashMap::new();
        let mut acks: HashMap<i64, Vec<AckRow>> = HashMap::new();
        for chunk in ids.chunks(ROWS_PER_INSERT) {
            let rows = in_list(
                "SELECT ev.alert_id, ev.kind, ev.at, l.code FROM alert_event ev \
                 LEFT JOIN evaluation e ON e.id = ev.evaluation_id \
                 LEFT JOIN sample sm ON sm.id = e.sample_id LEFT JOIN lot l ON l.id = sm.lot_id \
                 WHERE ev.alert_id IN",
                chunk,
                " ORDER BY ev.id",
            )
            .build()
            .fetch_all(&self.pool)
            .await
            .doing("listing alert events")?;
            for r in &rows {
                events.entry(r.get(0)).or_default().push(EventRow {
                    kind: r.get(1),
                    at: r.get(2),
                    lot: r.get(3),
                });
            }
            let rows = in_list(
                "SELECT alert_id, acked_by, acked_at, note FROM alert_ack WHERE alert_id IN",
                chunk,
                " ORDER BY id",
            )
            .build()
            .fetch_all(&self.pool)
            .await
            .doing("listing acknowledgements")?;
            for r in &rows {
                acks.entry(r.get(0)).or_default().push(AckRow {
                    by: r.get(1),
                    at: r.get(2),
                    note: r.get(3),
                });
            }
        }
        for a in &mut alerts {
            a.events = events.remove(&a.id).unwrap_or_default();
            a.acknowledgements = acks.remove(&a.id).unwrap_or_default();
        }
        Ok(alerts)
    }

    /// The local date of the newest digest made, if any.
    pub async fn latest_digest_date(&self) -> Result<Option<String>> {
        sqlx::query_scalar("SELECT MAX(local_date) FROM digest")
            .fetch_one(&self.pool)
            .await
            .doing("reading digests")
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
        let mut tx = self.begin().await?;
        let digest_id: Option<i64> = sqlx::query_scalar(
            "INSERT INTO digest (local_date, scheduled_at, created_at, open_alerts) \
             VALUES (?, ?, ?, ?) ON CONFLICT (local_date) DO NOTHING RETURNING id",
        )
        .bind(local_date)
        .bind(scheduled_at)
        .bind(now)
        .bind(open_alerts)
        .fetch_optional(&mut *tx)
        .await
        .doing("recording a digest")?;
        let Some(digest_id) = digest_id else {
            return Ok(false);
        };
        for m in messages {
            let outbox_id: i64 = sqlx::query_scalar(
                "INSERT INTO outbox (digest_id, channel, recipient, state, created_at, \
                 next_attempt_at) VALUES (?, ?, ?, 'pending', ?, ?) RETURNING id",
            )
            .bind(digest_id)
            .bind(&m.channel)
            .bind(&m.recipient)
            .bind(now)
            .bind(now)
            .fetch_one(&mut *tx)
            .await
            .doing("queueing a digest message")?;
            for chunk in m.alert_ids.chunks(ROWS_PER_INSERT / 2) {
                let mut q =
                    QueryBuilder::<Sqlite>::new("INSERT INTO digest_item (outbox_id, alert_id) ");
                q.push_values(chunk, |mut r, id| {
                    r.push_bind(outbox_id).push_bind(*id);
                });
                q.build()
                    .execute(&mut *tx)
                    .await
                    .doing("listing the alerts of a digest")?;
            }
        }
        tx.commit().await.doing("committing a digest")?;
        Ok(true)
    }

    /// Digest messages due at `now`, oldest first, each with the alerts it lists.
    pub async fn due_digests(&self, now: &str, limit: i64) -> Result<Vec<DigestItem>> {
        let rows = sqlx::query(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, d.id, d.local_date \
             FROM outbox o JOIN digest d ON d.id = o.digest_id \
             WHERE o.state = 'pending' AND o.next_attempt_at <= ? \
             ORDER BY o.next_attempt_at, o.id LIMIT ?",
        )
        .bind(now)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        let mut items: Vec<DigestItem> = rows
            .iter()
            .map(|r| DigestItem {
                id: r.get(0),
                channel: r.get(1),
                recipient: r.get(2),
                attempts: r.get(3),
                created_at: r.get(4),
                digest_id: r.get(5),
                local_date: r.get(6),
                alerts: Vec::new(),
            })
            .collect();
        let ids: Vec<i64> = items.iter().map(|i| i.id).collect();
        let mut listed: HashMap<i64, Vec<AlertRow>> = HashMap::new();
        for chunk in ids.chunks(ROWS_PER_INSERT) {
            let prefix = format!(
                "SELECT di.outbox_id, {ALERT_COLUMNS} FROM digest_item di \
                 JOIN alert a ON a.id = di.alert_id {joins} WHERE di.outbox_id IN",
                joins = alert_joins("a.opening_evaluation")
            );
            let rows = in_list(&prefix, chunk, " ORDER BY a.opened_at, a.id")
                .build()
                .fetch_all(&self.pool)
                .await
                .doing("reading the alerts of a digest")?;
            for r in &rows {
                listed
                    .entry(r.get(0))
                    .or_default()
                    .push(alert_from_row(r, 1));
            }
        }
        for item in &mut items {
            item.alerts = listed.remove(&item.id).unwrap_or_default();
        }
        Ok(items)
    }

    /// Every source's most recent `recent` lots (by lot time, read through an index, so the
    /// cost does not grow with the history) for the silence watch, and the open silences.
    pub async fn silence_inputs(
        &self,
        recent: usize,
    ) -> Result<(Vec<SourceLots>, Vec<OpenSilence>)> {
        let rows = sqlx::query(
            "SELECT s.id, s.name, l.id, l.code, COALESCE(l.sampled_at, l.first_seen_at) t \
             FROM source s JOIN lot l ON l.id IN ( \
                 SELECT r.id FROM lot r WHERE r.source_id = s.id \
                 ORDER BY COALESCE(r.sampled_at, r.first_seen_at) DESC, r.code DESC LIMIT ?) \
             ORDER BY s.id, t, l.code",
        )
        .bind(recent as i64)
        .fetch_all(&self.pool)
        .await
        .doing("reading lot times")?;
        let mut sources: Vec<SourceLots> = Vec::new();
        for r in &rows {
            let lot = LotTime {
                id: r.get(2),
                code: r.get(3),
                at: r.get(4),
            };
            let source_id: i64 = r.get(0);
            match sources.last_mut() {
                Some(s) if s.source_id == source_id => {
                    if s.times.last() != Some(&lot.at) {
                        s.times.push(lot.at.clone());
                    }
                    s.last = lot;
                }
                _ => sources.push(SourceLots {
                    source_id,
                    source: r.get(1),
                    times: vec![lot.at.clone()],
                    last: lot,
                }),
            }
        }
        let open = sqlx::query(
            "SELECT id, source_id, last_lot_at FROM silence WHERE resolved_at IS NULL ORDER BY id",
        )
        .fetch_all(&self.pool)
        .await
        .doing("reading open silences")?
        .iter()
        .map(|r| OpenSilence {
            id: r.get(0),
            source_id: r.get(1),
            last_lot_at: r.get(2),
        })
        .collect();
        Ok((sources, open))
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
        let mut tx = self.begin().await?;
        let mut counts = (0, 0);
        for end in resolved {
            let done = sqlx::query(
                "UPDATE silence SET resolved_at = ?, resolving_lot_id = ?, resolving_lot_at = ? \
                 WHERE id = ? AND resolved_at IS NULL",
            )
            .bind(at)
            .bind(end.lot.id)
            .bind(&end.lot.at)
            .bind(end.silence_id)
            .execute(&mut *tx)
            .await
            .doing("resolving a silence")?;
            if done.rows_affected() == 1 {
                silence_event(&mut tx, end.silence_id, "resolved", at, &end.recipients).await?;
                counts.0 += 1;
            }
        }
        for s in opened {
            let id: Option<i64> = sqlx::query_scalar(
                "INSERT INTO silence (source_id, opened_at, last_lot_id, last_lot_at, \
                 threshold_days, basis, intervals, median_days) VALUES (?, ?, ?, ?, ?, ?, ?, ?) \
                 ON CONFLICT (source_id) WHERE resolved_at IS NULL DO NOTHING RETURNING id",
            )
            .bind(s.source_id)
            .bind(at)
            .bind(s.last_lot.id)
            .bind(&s.last_lot.at)
            .bind(s.threshold_days)
            .bind(s.basis)
            .bind(s.intervals)
            .bind(s.median_days)
            .fetch_optional(&mut *tx)
            .await
            .doing("opening a silence")?;
            if let Some(id) = id {
                silence_event(&mut tx, id, "opened", at, &s.recipients).await?;
                counts.1 += 1;
            }
        }
        tx.commit().await.doing("committing silences")?;
        Ok(counts)
    }

    /// Messages about silences due at `now`, oldest first.
    pub async fn due_silence_messages(&self, now: &str, limit: i64) -> Result<Vec<SilenceItem>> {
        let rows = sqlx::query(&format!(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, ev.id, ev.kind, ev.at, \
             {SILENCE_COLUMNS} FROM outbox o \
             JOIN silence_event ev ON ev.id = o.silence_event_id \
             JOIN silence si ON si.id = ev.silence_id {SILENCE_JOINS} \
             WHERE o.state = 'pending' AND o.next_attempt_at <= ? \
             ORDER BY o.next_attempt_at, o.id LIMIT ?"
        ))
        .bind(now)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        Ok(rows
            .iter()
            .map(|r| SilenceItem {
                id: r.get(0),
                channel: r.get(1),
                recipient: r.get(2),
                attempts: r.get(3),
                created_at: r.get(4),
                event_id: r.get(5),
                event_kind: r.get(6),
                event_at: r.get(7),
                silence: silence_from_row(r, 8),
            })
            .collect())
    }

    /// Sources with an open silence, longest silent first.
    pub async fn silent_sources(&self) -> Result<Vec<SilentSource>> {
        let rows = sqlx::query(
            "SELECT s.name, si.opened_at, si.last_lot_at, si.threshold_days FROM silence si \
             JOIN source s ON s.id = si.source_id WHERE si.resolved_at IS NULL \
             ORDER BY si.last_lot_at, s.name",
        )
        .fetch_all(&self.pool)
        .await
        .doing("listing silent sources")?;
        Ok(rows
            .iter()
            .map(|r| SilentSource {
                source: r.get(0),
                since: r.get(1),
                last_lot_at: r.get(2),
                threshold_days: r.get(3),
            })
            .collect())
    }

    /// The health of every component, "ingest" first.
    pub async fn health(&self) -> Result<Vec<HealthRow>> {
        let rows = sqlx::query(
            "SELECT component, failing_since, failures, last_error, last_error_at, \
             recovered_at, notice_event_id IS NOT NULL FROM health \
             ORDER BY component = 'delivery', component",
        )
        .fetch_all(&self.pool)
        .await
        .doing("reading the health of ingest and delivery")?;
        Ok(rows.iter().map(health_from_row).collect())
    }

    /// Records a failure of `component`: starts a failing streak at `at` unless one runs.
    pub async fn health_failed(&self, component: &str, error: &str, at: &str) -> Result<()> {
        sqlx::query(
            "UPDATE health SET failing_since = COALESCE(failing_since, ?), \
             failures = failures + 1, last_error = ?, last_error_at = ? WHERE component = ?",
        )
        .bind(at)
        .bind(error)
        .bind(at)
        .bind(component)
        .execute(&self.pool)
        .await
        .doing("recording a failure")?;
        Ok(())
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
        let mut tx = self.begin().await?;
        let row = health_of(&mut tx, component).await?;
        if row.failing_since.is_none() {
            return Ok(false);
        }
        if row.notice_sent {
            health_event(&mut tx, &row, "recovered", at, recipients).await?;
        }
        sqlx::query(
            "UPDATE health SET failing_since = NULL, failures = 0, notice_event_id = NULL, \
             recovered_at = ? WHERE component = ?",
        )
        .bind(at)
        .bind(component)
        .execute(&mut *tx)
        .await
        .doing("recording a recovery")?;
        tx.commit().await.doing("committing a recovery")?;
        Ok(row.notice_sent)
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
        let mut tx = self.begin().await?;
        let row = health_of(&mut tx, component).await?;
        let due = row
            .failing_since
            .as_deref()
            .is_some_and(|since| since <= failing_before);
        if !due || row.notice_sent {
            return Ok(false);
        }
        let event = health_event(&mut tx, &row, "stuck", at, recipients).await?;
        sqlx::query("UPDATE health SET notice_event_id = ? WHERE component = ?")
            .bind(event)
            .bind(component)
            .execute(&mut *tx)
            .await
            .doing("recording a notice")?;
        tx.commit().await.doing("committing a notice")?;
        Ok(true)
    }

    /// Operational notices due at `now`, oldest first.
    pub async fn due_health_messages(&self, now: &str, limit: i64) -> Result<Vec<HealthItem>> {
        let rows = sqlx::query(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, ev.id, \
             ev.component, ev.kind, ev.at, ev.failing_since, ev.failures, ev.last_error \
             FROM outbox o JOIN health_event ev ON ev.id = o.health_event_id \
             WHERE o.state = 'pending' AND o.next_attempt_at <= ? \
             ORDER BY o.next_attempt_at, o.id LIMIT ?",
        )
        .bind(now)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        Ok(rows
            .iter()
            .map(|r| HealthItem {
                id: r.get(0),
                channel: r.get(1),
                recipient: r.get(2),
                attempts: r.get(3),
                created_at: r.get(4),
                event_id: r.get(5),
                component: r.get(6),
                kind: r.get(7),
                at: r.get(8),
                failing_since: r.get(9),
                failures: r.get(10),
                last_error: r.get(11),
            })
            .collect())
    }

    pub async fn status(&self) -> Result<StatusCounts> {
        let r = sqlx::query(
            "SELECT (SELECT COUNT(*) FROM source), (SELECT COUNT(*) FROM series), \
             t.files, t.lots, t.measurements, (SELECT COUNT(*) FROM quarantined_file), \
             t.evaluations, \
             (SELECT COUNT(*) FROM alert WHERE state = 'open'), (SELECT COUNT(*) FROM alert), \
             (SELECT COUNT(*) FROM outbox WHERE state = 'pending'), \
             (SELECT COUNT(*) FROM outbox WHERE state = 'failed'), \
             (SELECT COUNT(*) FROM outbox WHERE state = 'expired'), \
             (SELECT MAX(local_date) FROM digest), t.outliers, \
             (SELECT received_at FROM ingested_file ORDER BY id DESC LIMIT 1), \
             (SELECT MAX(delivered_at) FROM outbox WHERE state = 'delivered'), \
             (SELECT MAX(delivered_at) FROM outbox WHERE state = 'delivered' \
              AND channel = 'email') FROM tally t WHERE t.id = 1",
        )
        .fetch_one(&self.pool)
        .await
        .doing("counting")?;
        Ok(StatusCounts {
            sources: r.get(0),
            series: r.get(1),
            files: r.get(2),
            lots: r.get(3),
            measurements: r.get(4),
            quarantined: r.get(5),
            evaluations: r.get(6),
            open_alerts: r.get(7),
            alerts: r.get(8),
            outbox_pending: r.get(9),
            outbox_failed: r.get(10),
            outbox_expired: r.get(11),
            last_digest: r.get(12),
            outliers: r.get(13),
            last_stored_at: r.get(14),
            last_delivered_at: r.get(15),
            last_email_delivered_at: r.get(16),
        })
    }

    /// Records an acknowledgement; false when no alert has that id.
    pub async fn acknowledge(&self, alert_id: i64, by: &str, at: &str, note: &str) -> Result<bool> {
        let mut tx = self.begin().await?;
        let exists: Option<i64> = sqlx::query_scalar("SELECT id FROM alert WHERE id = ?")
            .bind(alert_id)
            .fetch_optional(&mut *tx)
            .await
            .doing("looking up an alert")?;
        if exists.is_none() {
            return Ok(false);
        }
        sqlx::query(
            "INSERT INTO alert_ack (alert_id, acked_at, acked_by, note) VALUES (?, ?, ?, ?)",
        )
        .bind(alert_id)
        .bind(at)
        .bind(by)
        .bind(note)
        .execute(&mut *tx)
        .await
        .doing("recording an acknowledgement")?;
        tx.commit().await.doing("committing an acknowledgement")?;
        Ok(true)
    }

    /// The series of a source and characteristic, if stored.
    pub async fn series_named(&self, source: &str, characteristic: &str) -> Result<Option<i64>> {
        sqlx::query_scalar(
            "SELECT se.id FROM series se JOIN source src ON src.id = se.source_id \
             JOIN characteristic ch ON ch.id = se.characteristic_id \
             WHERE src.name = ? AND ch.name = ?",
        )
        .bind(source)
        .bind(characteristic)
        .fetch_optional(&self.pool)
        .await
        .doing("looking up a series")
    }

    /// Every sample of a series in series order, with whether it was decided (kind mean).
    pub async fn series_samples(&self, series_id: i64) -> Result<Vec<SeriesSample>> {
        let rows = sqlx::query(
            "SELECT sm.id, l.id, l.code, COALESCE(l.sampled_at, l.first_seen_at), \
                    sm.n, sm.mean, sm.m2, sm.min_value, sm.max_value, \
                    EXISTS (SELECT 1 FROM evaluation e WHERE e.sample_id = sm.id) \
             FROM sample sm JOIN lot l ON l.id = sm.lot_id WHERE sm.series_id = ? \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at), l.code",
        )
        .bind(series_id)
        .fetch_all(&self.pool)
        .await
        .doing("reading a series")?;
        rows.iter()
            .map(|r| {
                Ok(SeriesSample {
                    sample_id: r.get(0),
                    lot_id: r.get(1),
                    lot: r.get(2),
                    order_time: r.get(3),
                    summary: summary_from_row(r, 4)?,
                    evaluated: r.get::<i64, _>(9) != 0,
                })
            })
            .collect()
    }

    /// The current baseline of a series: its definition, design note, frozen time and lots.
    pub async fn baseline_of(
        &self,
        series_id: i64,
    ) -> Result<Option<(String, String, String, Vec<String>)>> {
        let Some(row) = sqlx::query(
            "SELECT id, definition, design_note, frozen_at FROM baseline \
             WHERE series_id = ? AND retired_at IS NULL",
        )
        .bind(series_id)
        .fetch_optional(&self.pool)
        .await
        .doing("reading a baseline")?
        else {
            return Ok(None);
        };
        let id: i64 = row.get(0);
        let lots: Vec<String> = sqlx::query_scalar(
            "SELECT l.code FROM baseline_lot bl JOIN sample sm ON sm.id = bl.sample_id \
             JOIN lot l ON l.id = sm.lot_id WHERE bl.baseline_id = ? \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at), l.code",
        )
        .bind(id)
        .fetch_all(&self.pool)
        .await
        .doing("reading baseline lots")?;
        Ok(Some((row.get(1), row.get(2), row.get(3), lots)))
    }

    /// The audit trail of a series' baseline changes: (when, who, why, old, new).
    pub async fn baseline_changes(
        &self,
        series_id: i64,
    ) -> Result<Vec<(String, String, String, Option<String>, String)>> {
        let rows = sqlx::query(
            "SELECT changed_at, changed_by, reason, old_definition, new_definition \
             FROM baseline_change WHERE series_id = ? ORDER BY id",
        )
        .bind(series_id)
        .fetch_all(&self.pool)
        .await
        .doing("reading baseline changes")?;
        Ok(rows
            .iter()
            .map(|r| (r.get(0), r.get(1), r.get(2), r.get(3), r.get(4)))
            .collect())
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
        let mut tx = self.begin().await?;
        let old: Option<String> = sqlx::query_scalar(
            "SELECT definition FROM baseline WHERE series_id = ? AND retired_at IS NULL",
        )
        .bind(series_id)
        .fetch_optional(&mut *tx)
        .await
        .doing("reading a baseline")?;
        sqlx::query(
            "UPDATE baseline SET retired_at = ? WHERE series_id = ? AND retired_at IS NULL",
        )
        .bind(at)
        .bind(series_id)
        .execute(&mut *tx)
        .await
        .doing("retiring a baseline")?;
        sqlx::query(
            "INSERT INTO baseline_change (series_id, changed_at, changed_by, reason, \
             old_definition, new_definition) VALUES (?, ?, ?, ?, ?, ?)",
        )
        .bind(series_id)
        .bind(at)
        .bind(by)
        .bind(reason)
        .bind(old)
        .bind(new_definition)
        .execute(&mut *tx)
        .await
        .doing("recording a baseline change")?;
        sqlx::query(
            "INSERT INTO series_state (series_id, cusum_upper, cusum_lower) VALUES (?, 0.0, 0.0) \
             ON CONFLICT (series_id) DO UPDATE SET cusum_upper = 0.0, cusum_lower = 0.0",
        )
        .bind(series_id)
        .execute(&mut *tx)
        .await
        .doing("restarting the CUSUM")?;
        if let Some(b) = new {
            insert_baseline(&mut tx, b, at).await?;
        }
        tx.commit().await.doing("committing a baseline change")
    }

    /// The frozen design of every series that has one, by source and characteristic.
    pub async fn series_designs(&self) -> Result<Vec<(String, String, Design)>> {
        let rows = sqlx::query(&format!(
            "SELECT src.name, ch.name, {DESIGN_COLUMNS} \
             FROM baseline b JOIN series se ON se.id = b.series_id AND b.retired_at IS NULL \
             JOIN source src ON src.id = se.source_id \
             JOIN characteristic ch ON ch.id = se.characteristic_id ORDER BY src.name, ch.name"
        ))
        .fetch_all(&self.pool)
        .await
        .doing("reading series designs")?;
        Ok(rows
            .iter()
            .map(|r| (r.get(0), r.get(1), design_from_row(r, 2)))
            .collect())
    }

    /// Messages that could not be delivered (failed permanently or expired).
    pub async fn undelivered(&self) -> Result<Vec<UndeliveredRow>> {
        let rows = sqlx::query(
            "SELECT id, channel, recipient, state, attempts, last_error, \
             CASE WHEN digest_id IS NOT NULL THEN 'digest' \
             WHEN silence_event_id IS NOT NULL THEN 'silence' \
             WHEN health_event_id IS NOT NULL THEN 'health' ELSE 'alert' END FROM outbox \
             WHERE state IN ('failed', 'expired') ORDER BY id",
        )
        .fetch_all(&self.pool)
        .await
        .doing("listing undelivered messages")?;
        Ok(rows
            .iter()
            .map(|r| UndeliveredRow {
                id: r.get(0),
                channel: r.get(1),
                recipient: r.get(2),
                state: r.get(3),
                attempts: r.get(4),
                last_error: r.get(5),
                message: r.get(6),
            })
            .collect())
    }

    /// Lots stored per source (for summaries).
    pub async fn lots_per_source(&self) -> Result<Vec<(String, i64)>> {
        let rows = sqlx::query(
            "SELECT s.name, COUNT(l.id) FROM source s LEFT JOIN lot l ON l.source_id = s.id \
             GROUP BY s.name ORDER BY s.name",
        )
        .fetch_all(&self.pool)
        .await
        .doing("counting lots per source")?;
        Ok(rows.iter().map(|r| (r.get(0), r.get(1))).collect())
    }

    /// Quarantined files with their reasons, oldest first.
    pub async fn quarantined(&self) -> Result<Vec<(String, String)>> {
        let rows = sqlx::query(
            "SELECT file_name, reason FROM quarantined_file ORDER BY quarantined_at, id",
        )
        .fetch_all(&self.pool)
        .await
        .doing("listing quarantined files")?;
        Ok(rows.iter().map(|r| (r.get(0), r.get(1))).collect())
    }

    /// Hands every lot of a source (optionally one characteristic) to `each` in series order,
    /// one at a time and without copying (see [`history`]): a 100,000-lot series is written
    /// out as it is read. The first error of `each` stops the read and is returned in `Ok`.
    pub async fn history_each<E>(
        &self,
        source: &str,
        characteristic: Option<&str>,
        mut each: impl FnMut(&HistoryLot<'_>) -> std::result::Result<(), E>,
    ) -> Result<std::result::Result<(), E>> {
        let mut conn = self.pool.acquire().await.doing("reading history")?;
        let mut handle = conn.lock_handle().await.doing("reading history")?;
        history::each_lot(handle.as_raw_handle(), source, characteristic, &mut each)
    }

    /// True when a source of that name is stored.
    pub async fn source_exists(&self, name: &str) -> Result<bool> {
        let n: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM source WHERE name = ?")
            .bind(name)
            .fetch_one(&self.pool)
            .await
            .doing("looking up a source")?;
        Ok(n > 0)
    }
}

/// `prefix (?, ?, …)suffix` with `ids` bound: the chunked `IN` lists of id queries.
fn in_list<'a>(prefix: &str, ids: &'a [i64], suffix: &str) -> QueryBuilder<'a, Sqlite> {
    let mut q = QueryBuilder::new(prefix);
    q.push(" (");
    let mut sep = q.separated(", ");
    for id in ids {
        sep.push_bind(*id);
    }
    q.push(")");
    q.push(suffix);
    q
}

/// Records a silence event and queues one outbox row per (channel, recipient).
async fn silence_event(
    tx: &mut Transaction<'static, Sqlite>,
    silence_id: i64,
    kind: &str,
    at: &str,
    recipients: &[(String, String)],
) -> Result<()> {
    let event_id: i64 = sqlx::query_scalar(
        "INSERT INTO silence_event (silence_id, kind, at) VALUES (?, ?, ?) RETURNING id",
    )
    .bind(silence_id)
    .bind(kind)
    .bind(at)
    .fetch_one(&mut **tx)
    .await
    .doing("recording a silence event")?;
    for (channel, recipient) in recipients {
        sqlx::query(
            "INSERT INTO outbox (silence_event_id, channel, recipient, state, created_at, \
             next_attempt_at) VALUES (?, ?, ?, 'pending', ?, ?)",
        )
        .bind(event_id)
        .bind(channel)
        .bind(recipient)
        .bind(at)
        .bind(at)
        .execute(&mut **tx)
        .await
        .doing("queueing a silence message")?;
    }
    Ok(())
}

/// The health row of `component`, read inside a write transaction.
async fn health_of(tx: &mut Transaction<'static, Sqlite>, component: &str) -> Result<HealthRow> {
    let row = sqlx::query(
        "SELECT component, failing_since, failures, last_error, last_error_at, recovered_at, \
         notice_event_id IS NOT NULL FROM health WHERE component = ?",
    )
    .bind(component)
    .fetch_optional(&mut **tx)
    .await
    .doing("reading the health of a component")?;
    row.as_ref()
        .map(health_from_row)
        .ok_or_else(|| StoreError::Corrupt(format!("no health row for {component:?}")))
}

/// Records a notice about the streak of `row` and queues one outbox row per (channel,
/// recipient); returns the event's id.
async fn health_event(
    tx: &mut Transaction<'static, Sqlite>,
    row: &HealthRow,
    kind: &str,
    at: &str,
    recipients: &[(String, String)],
) -> Result<i64> {
    let event_id: i64 = sqlx::query_scalar(
        "INSERT INTO health_event (component, kind, at, failing_since, failures, last_error) \
         VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
    )
    .bind(&row.component)
    .bind(kind)
    .bind(at)
    .bind(&row.failing_since)
    .bind(row.failures)
    .bind(row.last_error.as_deref().unwrap_or("-"))
    .fetch_one(&mut **tx)
    .await
    .doing("recording a notice")?;
    for (channel, recipient) in recipients {
        sqlx::query(
            "INSERT INTO outbox (health_event_id, channel, recipient, state, created_at, \
             next_attempt_at) VALUES (?, ?, ?, 'pending', ?, ?)",
        )
        .bind(event_id)
        .bind(channel)
        .bind(recipient)
        .bind(at)
        .bind(at)
        .execute(&mut **tx)
        .await
        .doing("queueing a notice")?;
    }
    Ok(event_id)
}

async fn upsert_name(
    tx: &mut Transaction<'static, Sqlite>,
    table: &'static str,
    name: &str,
) -> Result<i64> {
    sqlx::query(&format!(
        "INSERT INTO {table} (name) VALUES (?) ON CONFLICT (name) DO NOTHING"
    ))
    .bind(name)
    .execute(&mut **tx)
    .await
    .doing("recording a name")?;
    sqlx::query_scalar(&format!("SELECT id FROM {table} WHERE name = ?"))
        .bind(name)
        .fetch_one(&mut **tx)
        .await
        .doing("looking up a name")
}

/// Whether a connection handed back to the pool can be used again. A COMMIT that fails
/// (database or disk full) leaves the transaction rolled back by SQLite but still counted by
/// sqlx; the ROLLBACK sqlx then sends fails as well ("no transaction is active"), and every
/// later BEGIN on that connection would fail with "non-zero transaction depth", so ingest
/// would never recover once space is freed. Such a connection is closed instead (the pool
/// opens a new one). The ping first lets the connection's worker finish a queued rollback.
async fn reusable(conn: &mut sqlx::SqliteConnection) -> std::result::Result<bool, sqlx::Error> {
    use sqlx::Connection as _;
    conn.ping().await?;
    if conn.is_in_transaction() {
        tracing::warn!("a database connection was left inside a failed transaction; closing it");
        return Ok(false);
    }
    Ok(true)
}

/// An exclusive lock on `<database>.migrate-lock`, held while migrations run (blocking on
/// another process's migration, which takes well under a second).
async fn migration_lock(db: &Path) -> Result<std::fs::File> {
    let mut name = db.file_name().unwrap_or_default().to_os_string();
    name.push(".migrate-lock");
    let path = db.with_file_name(name);
    let shown = path.display().to_string();
    tokio::task::spawn_blocking(move || {
        let file = std::fs::OpenOptions::new()
            .create(true)
            .truncate(false)
            .write(true)
            .open(&path)?;
        file.lock()?;
        Ok(file)
    })
    .await
    .map_err(|e| std::io::Error::other(e.to_string()))
    .and_then(|r| r)
    .map_err(|source| StoreError::Lock {
        path: shown,
        source,
    })
}

/// Records outliers (a unit already recorded is left as it is).
async fn insert_outliers(
    tx: &mut Transaction<'static, Sqlite>,
    outliers: &[NewOutlier],
    at: &str,
) -> Result<usize> {
    for chunk in outliers.chunks(ROWS_PER_INSERT / 10) {
        let mut q = QueryBuilder::<Sqlite>::new(
            "INSERT INTO outlier (sample_id, seq, value, lot_median, distance, fence, rule, \
             set_aside, found_at) ",
        );
        q.push_values(chunk, |mut r, o| {
            r.push_bind(o.sample_id)
                .push_bind(o.seq)
                .push_bind(o.value)
                .push_bind(o.lot_median)
                .push_bind(o.distance)
                .push_bind(o.fence)
                .push_bind(o.rule)
                .push_bind(o.set_aside as i64)
                .push_bind(at);
        });
        q.push(" ON CONFLICT (sample_id, seq) DO NOTHING");
        q.build()
            .execute(&mut **tx)
            .await
            .doing("recording outliers")?;
    }
    Ok(outliers.len())
}

/// Inserts a frozen baseline and its lots; returns its id.
async fn insert_baseline(
    tx: &mut Transaction<'static, Sqlite>,
    b: &NewBaseline,
    at: &str,
) -> Result<i64> {
    let s = &b.summary;
    let d = &b.design;
    let id: i64 = sqlx::query_scalar(
        "INSERT INTO baseline (series_id, frozen_at, definition, lot_count, n, mean, m2, \
                 min_value, max_value, last_order_key, mean_of_means, msb, msw, df_between, \
                 df_within, n0, n_harmonic, var_between, var_within, between_p, normality_p, \
                 level_mean, level_spread, cusum_k, cusum_h, design_note, outlier_scale, \
                 outlier_fence, heavy_tailed, spread_mean, spread_sd, spread_lots, spread_n, \
                 log_scale, spread_kurtosis) \
                 VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, \
                 ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING id",
    )
    .bind(b.series_id)
    .bind(at)
    .bind(&b.definition)
    .bind(b.sample_ids.len() as i64)
    .bind(s.n() as i64)
    .bind(s.mean())
    .bind(s.m2())
    .bind(s.min())
    .bind(s.max())
    .bind(&b.last_order_time)
    .bind(d.re.mean_of_means)
    .bind(d.re.msb)
    .bind(d.re.msw)
    .bind(d.re.df_between)
    .bind(d.re.df_within)
    .bind(d.re.n0)
    .bind(d.re.n_harmonic)
    .bind(d.re.var_between)
    .bind(d.re.var_within)
    .bind(d.re.p_value)
    .bind(d.normality_p)
    .bind(d.level_mean)
    .bind(d.level_spread)
    .bind(d.cusum.map(|c| c.0))
    .bind(d.cusum.map(|c| c.1))
    .bind(&b.note)
    .bind(d.outliers.map(|o| o.scale))
    .bind(d.outliers.map(|o| o.fence))
    .bind(d.outliers.map(|o| o.heavy_tailed as i64))
    .bind(d.spread_base.map(|b| b.mean))
    .bind(d.spread_base.map(|b| b.sd))
    .bind(d.spread_base.map(|b| b.lots as i64))
    .bind(d.spread_base.map(|b| b.n))
    .bind(d.log_scale as i64)
    .bind(d.spread_base.and_then(|b| b.kurtosis))
    .fetch_one(&mut **tx)
    .await
    .doing("freezing a baseline")?;
    for chunk in b.sample_ids.chunks(ROWS_PER_INSERT) {
        let mut q =
            QueryBuilder::<Sqlite>::new("INSERT INTO baseline_lot (baseline_id, sample_id) ");
        q.push_values(chunk, |mut r, sid| {
            r.push_bind(id).push_bind(*sid);
        });
        q.build()
            .execute(&mut **tx)
            .await
            .doing("recording baseline lots")?;
    }
    Ok(id)
}

impl Db {
    /// The last `limit` lots of the series `source` × `characteristic`, oldest first, in
    /// series order (sampling time, else arrival, then lot code).
    pub async fn recent_lot_means(
        &self,
        source: &str,
        characteristic: &str,
        limit: i64,
    ) -> Result<Vec<LotMeanRow>> {
        let rows = sqlx::query(
            "SELECT l.code, l.sampled_at, sm.n, sm.mean, \
                    EXISTS (SELECT 1 FROM baseline_lot bl WHERE bl.sample_id = sm.id), \
                    COALESCE((SELECT e.significant FROM evaluation e WHERE e.sample_id = sm.id), 0) \
             FROM sample sm JOIN lot l ON l.id = sm.lot_id \
             JOIN series se ON se.id = sm.series_id \
             JOIN source src ON src.id = se.source_id \
             JOIN characteristic ch ON ch.id = se.characteristic_id \
             WHERE src.name = ? AND ch.name = ? \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at) DESC, l.code DESC LIMIT ?",
        )
        .bind(source)
        .bind(characteristic)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading recent lot means")?;
        let mut out: Vec<LotMeanRow> = rows
            .iter()
            .map(|r| LotMeanRow {
                lot: r.get(0),
                sampled_at: r.get(1),
                n: r.get(2),
                mean: r.get(3),
                baseline: r.get::<i64, _>(4) != 0,
                significant: r.get::<i64, _>(5) != 0,
            })
            .collect();
        out.reverse();
        Ok(out)
    }
}

/// The content hashes of `files` stored before, with the name each was stored from.
async fn known_hashes(
    tx: &mut Transaction<'static, Sqlite>,
    files: &[NewFile],
) -> Result<HashMap<String, String>> {
    let mut known = HashMap::new();
    for chunk in files.chunks(ROWS_PER_INSERT) {
        let mut q = QueryBuilder::<Sqlite>::new(
            "SELECT content_hash, file_name FROM ingested_file WHERE content_hash IN (",
        );
        let mut sep = q.separated(", ");
        for f in chunk {
            sep.push_bind(&f.hash);
        }
        q.push(")");
        for row in q
            .build()
            .fetch_all(&mut **tx)
            .await
            .doing("looking up content hashes")?
        {
            known.insert(row.get(0), row.get(1));
        }
    }
    Ok(known)
}

/// Stored lots among `wanted` (lot codes by source id): (source id, code) → lot id. One
/// query per source and chunk, so the (source_id, code) index serves it.
async fn stored_lots(
    tx: &mut Transaction<'static, Sqlite>,
    wanted: HashMap<i64, Vec<&str>>,
) -> Result<HashMap<(i64, String), i64>> {
    let mut lot_ids = HashMap::new();
    for (source_id, codes) in &wanted {
        for chunk in codes.chunks(ROWS_PER_INSERT) {
            let mut q = QueryBuilder::<Sqlite>::new("SELECT id, code FROM lot WHERE source_id = ");
            q.push_bind(*source_id).push(" AND code IN (");
            let mut sep = q.separated(", ");
            for code in chunk {
                sep.push_bind(*code);
            }
            q.push(")");
            for row in q
                .build()
                .fetch_all(&mut **tx)
                .await
                .doing("looking up lots")?
            {
                lot_ids.insert((*source_id, row.get(1)), row.get(0));
            }
        }
    }
    Ok(lot_ids)
}

/// The stored samples of the given lots, by (lot id, series id).
async fn stored_samples(
    tx: &mut Transaction<'static, Sqlite>,
    lot_ids: &HashMap<(i64, String), i64>,
) -> Result<HashMap<(i64, i64), StoredSample>> {
    let mut stored = HashMap::new();
    let existing: Vec<i64> = lot_ids.values().copied().collect();
    for chunk in existing.chunks(ROWS_PER_INSERT) {
        let mut q = in_list(
            "SELECT s.id, s.lot_id, s.series_id, s.content_digest, f.file_name, s.n, s.mean, \
             s.m2, s.file_id FROM sample s JOIN ingested_file f ON f.id = s.file_id \
             WHERE s.lot_id IN",
            chunk,
            "",
        );
        for row in q
            .build()
            .fetch_all(&mut **tx)
            .await
            .doing("looking up stored samples")?
        {
            stored.insert((row.get(1), row.get(2)), stored_sample_from_row(&row));
        }
    }
    Ok(stored)
}

/// New lots inserted (their ids added to `lot_ids`); stored lots get an earlier sampling
/// time if the batch brings one.
async fn insert_lots(
    tx: &mut Transaction<'static, Sqlite>,
    lot_times: &HashMap<(i64, &str), Option<&str>>,
    lot_ids: &mut HashMap<(i64, String), i64>,
    received_at: &str,
) -> Result<()> {
    let mut new_lots: Vec<((i64, &str), Option<&str>)> = Vec::new();
    for (key, time) in lot_times {
        match lot_ids.get(&(key.0, key.1.to_string())) {
            Some(id) => {
                if let Some(t) = time {
                    sqlx::query(
                        "UPDATE lot SET sampled_at = ? WHERE id = ? \
                         AND (sampled_at IS NULL OR sampled_at > ?)",
                    )
                    .bind(*t)
                    .bind(id)
                    .bind(*t)
                    .execute(&mut **tx)
                    .await
                    .doing("updating a lot's sampling time")?;
                }
            }
            None => new_lots.push((*key, *time)),
        }
    }
    new_lots.sort();
    for chunk in new_lots.chunks(ROWS_PER_INSERT) {
        let mut q = QueryBuilder::<Sqlite>::new(
            "INSERT INTO lot (source_id, code, sampled_at, first_seen_at) ",
        );
        q.push_values(chunk, |mut b, ((source_id, code), time)| {
            b.push_bind(*source_id)
                .push_bind(*code)
                .push_bind(*time)
                .push_bind(received_at);
        });
        q.push(" RETURNING id, source_id, code");
        for row in q
            .build()
            .fetch_all(&mut **tx)
            .await
            .doing("recording lots")?
        {
            lot_ids.insert((row.get(1), row.get(2)), row.get(0));
        }
    }
    Ok(())
}

/// A new sample with the ids it is stored under.
struct PendingSample<'a> {
    sample: &'a NewSample,
    lot_id: i64,
    series_id: i64,
    file_id: i64,
}

/// Inserts new samples; appends (id, sample) of each to `sample_ids`.
async fn insert_samples<'a>(
    tx: &mut Transaction<'static, Sqlite>,
    inserts: &[PendingSample<'a>],
    sample_ids: &mut Vec<(i64, &'a NewSample)>,
) -> Result<()> {
    for chunk in inserts.chunks(ROWS_PER_INSERT / 2) {
        let mut q = QueryBuilder::<Sqlite>::new(
            "INSERT INTO sample (lot_id, series_id, file_id, n, mean, m2, min_value, \
             max_value, sampled_at, content_digest, sd) ",
        );
        q.push_values(chunk, |mut b, p| {
            let s = &p.sample.summary;
            b.push_bind(p.lot_id)
                .push_bind(p.series_id)
                .push_bind(p.file_id)
                .push_bind(s.n() as i64)
                .push_bind(s.mean())
                .push_bind(s.m2())
                .push_bind(s.min())
                .push_bind(s.max())
                .push_bind(p.sample.earliest.as_deref())
                .push_bind(p.sample.digest.hex())
                .push_bind(sd(s.n() as i64, s.m2()));
        });
        q.push(" RETURNING id, lot_id, series_id");
        let ids: HashMap<(i64, i64), i64> = q
            .build()
            .fetch_all(&mut **tx)
            .await
            .doing("recording samples")?
            .iter()
            .map(|r| ((r.get(1), r.get(2)), r.get(0)))
            .collect();
        for p in chunk {
            sample_ids.push((ids[&(p.lot_id, p.series_id)], p.sample));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A database with the migrations whose file names sort before `next`, without foreign
    /// keys (rows can be added in any order).
    async fn database_before(dir: &Path, next: &str) -> SqlitePool {
        let migrations = dir.join(format!("m-{next}"));
        std::fs::create_dir(&migrations).unwrap();
        let all = concat!(env!("CARGO_MANIFEST_DIR"), "/migrations");
        for entry in std::fs::read_dir(all).unwrap() {
            let path = entry.unwrap().path();
            let name = path.file_name().unwrap().to_str().unwrap().to_string();
            if name.as_str() < next {
                std::fs::copy(&path, migrations.join(&name)).unwrap();
            }
        }
        let options = SqliteConnectOptions::new()
            .filename(dir.join("old.db"))
            .create_if_missing(true)
            .foreign_keys(false);
        let pool = SqlitePoolOptions::new()
            .max_connections(1)
            .connect_with(options)
            .await
            .unwrap();
        sqlx::migrate::Migrator::new(migrations.as_path())
            .await
            .unwrap()
            .run(&pool)
            .await
            .unwrap();
        pool
    }

    async fn count(pool: &SqlitePool, sql: &str) -> i64 {
        sqlx::query_scalar(sql).fetch_one(pool).await.unwrap()
    }

    #[tokio::test]
    async fn the_flat_cost_migration_finds_pending_samples_and_keeps_counts() {
        let dir = tempfile::tempdir().unwrap();
        let pool = database_before(dir.path(), "0007").await;
        // Sample 1 is a baseline lot, sample 2 was decided, sample 3 waits.
        sqlx::raw_sql(
            "INSERT INTO ingested_file VALUES (1, 'h', 'f.csv', 't', 'long', 7); \
             INSERT INTO lot VALUES (1, 1, 'L1', NULL, 't'), (2, 1, 'L2', NULL, 't'), \
                                    (3, 1, 'L3', NULL, 't'); \
             INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, content_digest) VALUES (1, 1, 5, 1, 2, 1, 0, 1, 1, 'a'), \
                 (2, 2, 5, 1, 3, 1, 0, 1, 1, 'b'), (3, 3, 5, 1, 2, 1, 0, 1, 1, 'c'); \
             INSERT INTO measurement (sample_id, seq, unit, value, sampled_at) VALUES \
                 (1, 0, 'u1', 1.5, NULL), (1, 1, 'u2', 2.5, NULL), (2, 0, NULL, 3.5, 'x'), \
                 (2, 1, NULL, 4.5, NULL), (2, 2, NULL, 5.5, NULL), (3, 0, NULL, 6.5, NULL), \
                 (3, 1, NULL, 7.5, NULL); \
             INSERT INTO baseline_lot VALUES (9, 1); \
             INSERT INTO evaluation (sample_id, series_id, baseline_id, kind, decided_at, test, \
                 alternative, method, family_size, level, significant, baseline_n, \
                 baseline_mean, lot_n, lot_mean) VALUES \
                 (2, 5, 9, 'mean', 't', 'welch', 'two-sided', 'holm', 1, 0.01, 0, 2, 1, 3, 1), \
                 (3, 5, 9, 'spread', 't', 'f', 'two-sided', 'holm', 1, 0.01, 0, 2, 1, 2, 1);",
        )
        .execute(&pool)
        .await
        .unwrap();
        sqlx::migrate!().run(&pool).await.unwrap();

        let pending = "SELECT group_concat(sample_id) FROM pending_sample";
        let one: Option<String> = sqlx::query_scalar(pending).fetch_one(&pool).await.unwrap();
        assert_eq!(one.as_deref(), Some("3"));
        let tally = "SELECT files || ' ' || lots || ' ' || measurements || ' ' || evaluations \
                     || ' ' || outliers FROM tally";
        let t: String = sqlx::query_scalar(tally).fetch_one(&pool).await.unwrap();
        assert_eq!(t, "1 3 7 2 0");
        // Every unit value came across, in (sample, seq) order.
        let values: Vec<f64> = sqlx::query_scalar(
            "SELECT v.value FROM sample_values sv JOIN json_each(sv.values_json) v \
                 ORDER BY sv.sample_id, v.key",
        )
        .fetch_all(&pool)
        .await
        .unwrap();
        assert_eq!(values, [1.5, 2.5, 3.5, 4.5, 5.5, 6.5, 7.5]);

        // The triggers keep both as rows come and go.
        sqlx::raw_sql(
            "INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, content_digest) VALUES (4, 3, 6, 1, 4, 1, 0, 1, 1, 'd'); \
             INSERT INTO baseline_lot VALUES (10, 3); \
             UPDATE sample SET n = 5 WHERE id = 2; \
             INSERT INTO lot VALUES (4, 1, 'L4', NULL, 't');",
        )
        .execute(&pool)
        .await
        .unwrap();
        let one: Option<String> = sqlx::query_scalar(pending).fetch_one(&pool).await.unwrap();
        assert_eq!(one.as_deref(), Some("4"));
        let t: String = sqlx::query_scalar(tally).fetch_one(&pool).await.unwrap();
        assert_eq!(t, "1 4 13 2 0");
        sqlx::raw_sql("DELETE FROM baseline_lot WHERE sample_id = 3")
            .execute(&pool)
            .await
            .unwrap();
        assert_eq!(count(&pool, "SELECT COUNT(*) FROM pending_sample").await, 2);
    }

    /// Samples stored before migration 0008 get their sd when the database is next opened,
    /// and the views read them.
    #[tokio::test]
    async fn the_views_migration_fills_in_older_samples_sd() {
        let dir = tempfile::tempdir().unwrap();
        let pool = database_before(dir.path(), "0008").await;
        sqlx::raw_sql(
            "INSERT INTO source VALUES (1, 'alder-cells'); \
             INSERT INTO characteristic VALUES (1, 'mass_g'); \
             INSERT INTO series VALUES (5, 1, 1); \
             INSERT INTO ingested_file VALUES (1, 'h', 'f.csv', 't', 'long', 4); \
             INSERT INTO lot VALUES (1, 1, 'L1', NULL, 't'), (2, 1, 'L2', NULL, 't'); \
             INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, content_digest) VALUES (1, 1, 5, 1, 3, 2, 8, 0, 4, 'a'), \
                 (2, 2, 5, 1, 1, 1, 0, 1, 1, 'b');",
        )
        .execute(&pool)
        .await
        .unwrap();
        pool.close().await;
        let store = Db::open(&dir.path().join("old.db"), "test").await.unwrap();
        let sds: Vec<Option<f64>> = sqlx::query_scalar("SELECT sd FROM lot_view ORDER BY lot")
            .fetch_all(&store.pool)
            .await
            .unwrap();
        assert_eq!(sds, [Some(2.0), None]);
        let mut units = std::collections::BTreeMap::new();
        units.insert("mass_g".to_string(), "g".to_string());
        store.set_units(&units).await.unwrap();
        let unit: Option<String> =
            sqlx::query_scalar("SELECT unit_of_measure FROM lot_view LIMIT 1")
                .fetch_one(&store.pool)
                .await
                .unwrap();
        assert_eq!(unit.as_deref(), Some("g"));
    }

    /// A database with one row per unit value (before migration 0009) keeps every value bit
    /// for bit, its serial and its time, in the view and in the store's readers.
    // More digits than a double holds, on purpose: the value a person typed.
    #[allow(clippy::excessive_precision)]
    #[tokio::test]
    async fn the_packed_values_migration_moves_every_value() {
        let dir = tempfile::tempdir().unwrap();
        let pool = database_before(dir.path(), "0009").await;
        sqlx::raw_sql(
            "INSERT INTO source VALUES (1, 'alder-cells'); \
             INSERT INTO characteristic VALUES (1, 'mass_g'); \
             INSERT INTO series VALUES (5, 1, 1); \
             INSERT INTO ingested_file VALUES (1, 'h', 'f.csv', 't', 'long', 6); \
             INSERT INTO lot VALUES (1, 1, 'L1', 'T1', 't'), (2, 1, 'L2', NULL, 't'); \
             INSERT INTO sample (id, lot_id, series_id, file_id, n, mean, m2, min_value, \
                 max_value, sampled_at, content_digest) VALUES \
                 (1, 1, 5, 1, 4, 2, 8, 0, 4, 'T1', 'a'), (2, 2, 5, 1, 2, 1, 0, 1, 1, NULL, 'b');",
        )
        .execute(&pool)
        .await
        .unwrap();
        let awkward = [0.1 + 0.2, 1e-300, 123456789.123456789, 5.0, 1e16, 7.25];
        let rows = [
            (1, 2, Some("u\"2"), "T1"),
            (1, 0, Some("u0"), "T1"),
            (1, 1, None, "T2"),
            (1, 3, None, ""),
            (2, 1, None, ""),
            (2, 0, None, ""),
        ];
        for (k, (sample, seq, unit, time)) in rows.iter().enumerate() {
            sqlx::query(
                "INSERT INTO measurement (sample_id, seq, unit, value, sampled_at) \
                 VALUES (?, ?, ?, ?, NULLIF(?, ''))",
            )
            .bind(sample)
            .bind(seq)
            .bind(unit)
            .bind(awkward[k])
            .bind(time)
            .execute(&pool)
            .await
            .unwrap();
        }
        pool.close().await;
        let store = Db::open(&dir.path().join("old.db"), "test").await.unwrap();
        type Row = (i64, i64, Option<String>, Option<String>, f64);
        let view: Vec<Row> = sqlx::query_as(
            "SELECT sample_id, seq, unit, sampled_at, value FROM measurement_view \
             ORDER BY sample_id, seq",
        )
        .fetch_all(&store.pool)
        .await
        .unwrap();
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        let in_order = [
            awkward[1], awkward[2], awkward[0], awkward[3], awkward[5], awkward[4],
        ];
        let values: Vec<f64> = view.iter().map(|r| r.4).collect();
        assert_eq!(bits(&values), bits(&in_order));
        let units: Vec<Option<&str>> = view.iter().map(|r| r.2.as_deref()).collect();
        assert_eq!(units, [Some("u0"), None, Some("u\"2"), None, None, None]);
        let times: Vec<Option<&str>> = view.iter().map(|r| r.3.as_deref()).collect();
        assert_eq!(
            times,
            [Some("T1"), Some("T2"), Some("T1"), Some("T1"), None, None]
        );
        let seqs: Vec<(i64, i64)> = view.iter().map(|r| (r.0, r.1)).collect();
        assert_eq!(seqs, [(1, 0), (1, 1), (1, 2), (1, 3), (2, 0), (2, 1)]);
        // Sample 2 had neither serials nor times of its own: NULL columns, not arrays of nulls.
        let packed: (Option<String>, Option<String>) = sqlx::query_as(
            "SELECT units_json, sampled_at_json FROM sample_values WHERE sample_id = 2",
        )
        .fetch_one(&store.pool)
        .await
        .unwrap();
        assert_eq!(packed, (None, None));
        let read = store.unit_values(&[1, 2]).await.unwrap();
        let values = |id: i64| read[&id].iter().map(|(_, v)| *v).collect::<Vec<f64>>();
        assert_eq!(bits(&values(1)), bits(&in_order[..4]));
        assert_eq!(bits(&values(2)), bits(&in_order[4..]));
        let status = store.status().await.unwrap();
        assert_eq!(status.measurements, 6);
        assert_eq!(
            Db::check_copy(&dir.path().join("old.db"))
                .await
                .unwrap()
                .measurements,
            6
        );
        store.close().await;
    }

    /// A database made before the digest (migration 0001 only) keeps its outbox rows when
    /// migration 0002 rebuilds the table.
    #[tokio::test]
    async fn the_digest_migration_keeps_queued_messages() {
        let dir = tempfile::tempdir().unwrap();
        let pool = database_before(dir.path(), "0002").await;
        sqlx::query(
            "INSERT INTO outbox (id, alert_event_id, channel, recipient, state, attempts, \
             created_at, next_attempt_at, last_error) VALUES \
             (7, 3, 'email', 'q@x.org', 'pending', 2, '2026-01-01T00:00:00Z', \
              '2026-01-01T00:05:00Z', '451 busy')",
        )
        .execute(&pool)
        .await
        .unwrap();
        sqlx::migrate!().run(&pool).await.unwrap();
        let row = sqlx::query(
            "SELECT id, alert_event_id, digest_id, recipient, state, attempts, last_error \
             FROM outbox",
        )
        .fetch_one(&pool)
        .await
        .unwrap();
        assert_eq!(row.get::<i64, _>(0), 7);
        assert_eq!(row.get::<i64, _>(1), 3);
        assert_eq!(row.get::<Option<i64>, _>(2), None);
        assert_eq!(row.get::<String, _>(3), "q@x.org");
        assert_eq!(row.get::<String, _>(4), "pending");
        assert_eq!(row.get::<i64, _>(5), 2);
        assert_eq!(row.get::<String, _>(6), "451 busy");
        // A row must announce exactly one thing.
        let neither = sqlx::query(
            "INSERT INTO outbox (channel, recipient, state, created_at, next_attempt_at) \
             VALUES ('log', 'log', 'pending', 'x', 'x')",
        )
        .execute(&pool)
        .await;
        assert!(neither.is_err());
    }

    /// A database of migrations 0001 and 0002 with queued alert and digest messages keeps
    /// them, and the digest's listed alerts, when migration 0004 rebuilds the outbox with
    /// foreign keys on.
    #[tokio::test]
    async fn the_silence_migration_keeps_queued_alert_and_digest_messages() {
        let dir = tempfile::tempdir().unwrap();
        let old = dir.path().join("m2");
        std::fs::create_dir(&old).unwrap();
        for f in ["0001_initial.sql", "0002_digest.sql"] {
            let from = Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("migrations")
                .join(f);
            std::fs::copy(from, old.join(f)).unwrap();
        }
        let db = dir.path().join("old.db");
        let connect = |fk: bool| {
            SqlitePoolOptions::new().max_connections(1).connect_with(
                SqliteConnectOptions::new()
                    .filename(&db)
                    .create_if_missing(true)
                    .foreign_keys(fk),
            )
        };
        // Rows are written without their upstream parents (not needed to move the outbox).
        let pool = connect(false).await.unwrap();
        let migrator = sqlx::migrate::Migrator::new(old.as_path()).await.unwrap();
        migrator.run(&pool).await.unwrap();
        sqlx::query(
            "INSERT INTO alert (id, series_id, kind, state, opened_at, opening_evaluation) \
             VALUES (4, 1, 'mean', 'open', 't', 1); \
             INSERT INTO alert_event (id, alert_id, kind, at) VALUES (3, 4, 'opened', 't'); \
             INSERT INTO digest (id, local_date, scheduled_at, created_at, open_alerts) \
             VALUES (2, '2026-01-01', 't', 't', 1); \
             INSERT INTO outbox (id, alert_event_id, digest_id, channel, recipient, state, \
             attempts, created_at, next_attempt_at, last_error) VALUES \
             (7, 3, NULL, 'email', 'q@x.org', 'pending', 2, 't', 'u', '451 busy'), \
             (8, NULL, 2, 'email', 'q@x.org', 'pending', 0, 't', 't', NULL); \
             INSERT INTO digest_item (outbox_id, alert_id) VALUES (8, 4);",
        )
        .execute(&pool)
        .await
        .unwrap();
        pool.close().await;
        let pool = connect(true).await.unwrap();
        sqlx::migrate!().run(&pool).await.unwrap();
        // (id, alert event, digest, silence event, attempts, last error) of each row.
        type Row = (
            i64,
            Option<i64>,
            Option<i64>,
            Option<i64>,
            i64,
            Option<String>,
        );
        let rows: Vec<Row> = sqlx::query_as(
            "SELECT id, alert_event_id, digest_id, silence_event_id, attempts, last_error \
             FROM outbox ORDER BY id",
        )
        .fetch_all(&pool)
        .await
        .unwrap();
        assert_eq!(
            rows,
            vec![
                (7, Some(3), None, None, 2, Some("451 busy".into())),
                (8, None, Some(2), None, 0, None)
            ]
        );
        let items: Vec<(i64, i64)> = sqlx::query_as("SELECT outbox_id, alert_id FROM digest_item")
            .fetch_all(&pool)
            .await
            .unwrap();
        assert_eq!(items, vec![(8, 4)]);
        // digest_item still refers to the (new) outbox, and a row announces exactly one thing.
        let orphan = sqlx::query("INSERT INTO digest_item (outbox_id, alert_id) VALUES (99, 4)")
            .execute(&pool)
            .await;
        assert!(orphan.is_err());
        let two = sqlx::query(
            "INSERT INTO outbox (alert_event_id, digest_id, channel, recipient, state, \
             created_at, next_attempt_at) VALUES (3, 2, 'log', 'log', 'pending', 'x', 'x')",
        )
        .execute(&pool)
        .await;
        assert!(two.is_err());
        let tables: i64 = sqlx::query_scalar(
            "SELECT COUNT(*) FROM sqlite_master WHERE name IN ('outbox_new', 'digest_item_kept')",
        )
        .fetch_one(&pool)
        .await
        .unwrap();
        assert_eq!(tables, 0);
    }

    /// A database of migrations 0001 to 0005 with queued alert, digest and silence messages
    /// keeps them, and the digest's listed alerts, when migration 0006 rebuilds the outbox
    /// with foreign keys on; both components start healthy.
    #[tokio::test]
    async fn the_health_migration_keeps_queued_messages_and_starts_healthy() {
        let dir = tempfile::tempdir().unwrap();
        let old = dir.path().join("m5");
        std::fs::create_dir(&old).unwrap();
        for f in [
            "0001_initial.sql",
            "0002_digest.sql",
            "0003_robust.sql",
            "0004_silence.sql",
            "0005_replaced_values.sql",
        ] {
            let from = Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("migrations")
                .join(f);
            std::fs::copy(from, old.join(f)).unwrap();
        }
        let db = dir.path().join("old.db");
        let connect = |fk: bool| {
            SqlitePoolOptions::new().max_connections(1).connect_with(
                SqliteConnectOptions::new()
                    .filename(&db)
                    .create_if_missing(true)
                    .foreign_keys(fk),
            )
        };
        let pool = connect(false).await.unwrap();
        let migrator = sqlx::migrate::Migrator::new(old.as_path()).await.unwrap();
        migrator.run(&pool).await.unwrap();
        sqlx::query(
            "INSERT INTO alert (id, series_id, kind, state, opened_at, opening_evaluation) \
             VALUES (4, 1, 'mean', 'open', 't', 1); \
             INSERT INTO alert_event (id, alert_id, kind, at) VALUES (3, 4, 'opened', 't'); \
             INSERT INTO digest (id, local_date, scheduled_at, created_at, open_alerts) \
             VALUES (2, '2026-01-01', 't', 't', 1); \
             INSERT INTO silence (id, source_id, opened_at, last_lot_id, last_lot_at, \
             threshold_days, basis) VALUES (1, 1, 't', 1, 't', 3.0, 'configured'); \
             INSERT INTO silence_event (id, silence_id, kind, at) VALUES (6, 1, 'opened', 't'); \
             INSERT INTO outbox (id, alert_event_id, digest_id, silence_event_id, channel, \
             recipient, state, attempts, created_at, next_attempt_at, last_error) VALUES \
             (7, 3, NULL, NULL, 'email', 'q@x.org', 'pending', 2, 't', 'u', '451 busy'), \
             (8, NULL, 2, NULL, 'email', 'q@x.org', 'pending', 0, 't', 't', NULL), \
             (9, NULL, NULL, 6, 'log', 'log', 'delivered', 1, 't', 't', NULL); \
             INSERT INTO digest_item (outbox_id, alert_id) VALUES (8, 4);",
        )
        .execute(&pool)
        .await
        .unwrap();
        pool.close().await;
        let pool = connect(true).await.unwrap();
        sqlx::migrate!().run(&pool).await.unwrap();
        type Row = (i64, Option<i64>, Option<i64>, Option<i64>, Option<i64>, i64);
        let rows: Vec<Row> = sqlx::query_as(
            "SELECT id, alert_event_id, digest_id, silence_event_id, health_event_id, attempts \
             FROM outbox ORDER BY id",
        )
        .fetch_all(&pool)
        .await
        .unwrap();
        assert_eq!(
            rows,
            vec![
                (7, Some(3), None, None, None, 2),
                (8, None, Some(2), None, None, 0),
                (9, None, None, Some(6), None, 1)
            ]
        );
        let items: Vec<(i64, i64)> = sqlx::query_as("SELECT outbox_id, alert_id FROM digest_item")
            .fetch_all(&pool)
            .await
            .unwrap();
        assert_eq!(items, vec![(8, 4)]);
        let health: Vec<(String, Option<String>, i64)> =
            sqlx::query_as("SELECT component, failing_since, failures FROM health ORDER BY 1")
                .fetch_all(&pool)
                .await
                .unwrap();
        assert_eq!(
            health,
            vec![("delivery".into(), None, 0), ("ingest".into(), None, 0)]
        );
        // A row announces exactly one thing, a health event included.
        sqlx::query(
            "INSERT INTO health_event (id, component, kind, at, failing_since, failures, \
             last_error) VALUES (1, 'ingest', 'stuck', 't', 't', 3, 'e')",
        )
        .execute(&pool)
        .await
        .unwrap();
        let two = sqlx::query(
            "INSERT INTO outbox (silence_event_id, health_event_id, channel, recipient, state, \
             created_at, next_attempt_at) VALUES (6, 1, 'log', 'log', 'pending', 'x', 'x')",
        )
        .execute(&pool)
        .await;
        assert!(two.is_err());
        let tables: i64 = sqlx::query_scalar(
            "SELECT COUNT(*) FROM sqlite_master WHERE name IN ('outbox_new', 'digest_item_kept')",
        )
        .fetch_one(&pool)
        .await
        .unwrap();
        assert_eq!(tables, 0);
    }

    /// A failing streak gets one "stuck" notice however often it is checked, and one
    /// "recovered" notice when it ends; a short streak ends without any.
    #[tokio::test]
    async fn a_streak_is_noticed_once_and_its_end_once() {
        let dir = tempfile::tempdir().unwrap();
        let store = Db::open(&dir.path().join("h.db"), "test").await.unwrap();
        let log = [("log".to_string(), "log".to_string())];
        assert!(!store.health_stuck("ingest", "z", "t1", &log).await.unwrap());
        store
            .health_failed("ingest", "disk full", "2026-01-01T00:00:00.000Z")
            .await
            .unwrap();
        store
            .health_failed("ingest", "still full", "2026-01-01T00:01:00.000Z")
            .await
            .unwrap();
        // Not failing long enough yet.
        let before = "2025-12-31T23:59:00.000Z";
        assert!(
            !store
                .health_stuck("ingest", before, "t", &log)
                .await
                .unwrap()
        );
        let later = "2026-01-01T00:30:00.000Z";
        assert!(
            store
                .health_stuck("ingest", later, later, &log)
                .await
                .unwrap()
        );
        assert!(
            !store
                .health_stuck("ingest", later, later, &log)
                .await
                .unwrap()
        );
        let rows = store.health().await.unwrap();
        assert_eq!(rows[0].component, "ingest");
        assert_eq!(
            rows[0].failing_since.as_deref(),
            Some("2026-01-01T00:00:00.000Z")
        );
        assert_eq!((rows[0].failures, rows[0].notice_sent), (2, true));
        assert_eq!(rows[0].last_error.as_deref(), Some("still full"));
        let due = store.due_health_messages("9999", 10).await.unwrap();
        assert_eq!(due.len(), 1);
        assert_eq!((due[0].kind.as_str(), due[0].failures), ("stuck", 2));
        assert!(
            store
                .health_recovered("ingest", "2026-01-01T01:00:00.000Z", &log)
                .await
                .unwrap()
        );
        assert!(
            !store
                .health_recovered("ingest", "2026-01-01T01:01:00.000Z", &log)
                .await
                .unwrap()
        );
        let due = store.due_health_messages("9999", 10).await.unwrap();
        assert_eq!(due.len(), 2);
        assert_eq!(due[1].kind, "recovered");
        // A short streak: no notice either way, but the error stays for `status`.
        store
            .health_failed("delivery", "refused", "t4")
            .await
            .unwrap();
        assert!(
            !store
                .health_recovered("delivery", "t5", &log)
                .await
                .unwrap()
        );
        let rows = store.health().await.unwrap();
        assert_eq!(rows[1].failing_since, None);
        assert_eq!(rows[1].last_error.as_deref(), Some("refused"));
        assert_eq!(rows[1].recovered_at.as_deref(), Some("t5"));
        assert_eq!(
            store.due_health_messages("9999", 10).await.unwrap().len(),
            2
        );
        store.close().await;
    }
}
