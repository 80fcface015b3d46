//! Files and ingest on SQLite: content hashes, names, lots, samples and their unit values.

use super::bulk::PendingSample;
use super::*;

impl Db {
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
        let (outcomes, stored) = self
            .ingest_in(&mut tx, files, received_at, replace, &mut created)
            .await?;
        tx.commit().await.doing("committing a batch of files")?;
        self.fresh.lock().expect("fresh values lock").keep(&stored);
        let mut cache = self.names.lock().expect("name cache lock");
        cache.sources.extend(created.sources);
        cache.characteristics.extend(created.characteristics);
        cache.series.extend(created.series);
        Ok(outcomes)
    }

    /// Stores `files` inside `tx`; returns each file's outcome and (sample id, file id,
    /// unit values) of every sample inserted (a replaced sample was decided before, or is
    /// read back).
    async fn ingest_in<'a>(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        files: &'a [NewFile],
        received_at: &str,
        replace: Option<&Replacement<'_>>,
        created: &mut NameCache,
    ) -> Result<(Vec<FileOutcome>, Vec<(i64, i64, &'a [f64])>)> {
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
        let replaced = sample_ids.len();
        insert_samples(tx, &inserts, &mut sample_ids).await?;
        // `insert_samples` appends the inserted samples' ids in the order of `inserts`.
        let stored = sample_ids[replaced..]
            .iter()
            .zip(&inserts)
            .map(|((id, s), p)| (*id, p.file_id, &s.values[..]))
            .collect();
        self.insert_measurements(tx, &sample_ids).await?;
        Ok((batch.finish(&file_ids), stored))
    }

    /// Records the files to store; returns each one's id by its index in `files`.
    async fn insert_files(
        &self,
        tx: &mut Transaction<'static, Sqlite>,
        files: &[NewFile],
        to_store: &[usize],
        received_at: &str,
    ) -> Result<HashMap<usize, i64>> {
        let mut handle = tx.lock_handle().await.doing("recording files")?;
        bulk::insert_files(
            handle.as_raw_handle(),
            files,
            to_store,
            received_at,
            &self.site,
        )
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
    let mut handle = tx.lock_handle().await.doing("recording lots")?;
    bulk::insert_lots(handle.as_raw_handle(), &new_lots, received_at, lot_ids)?;
    Ok(())
}

/// Inserts new samples; appends (id, sample) of each to `sample_ids`.
async fn insert_samples<'a>(
    tx: &mut Transaction<'static, Sqlite>,
    inserts: &[PendingSample<'a>],
    sample_ids: &mut Vec<(i64, &'a NewSample)>,
) -> Result<()> {
    let mut handle = tx.lock_handle().await.doing("recording samples")?;
    bulk::insert_samples(handle.as_raw_handle(), inserts, sample_ids)
}
