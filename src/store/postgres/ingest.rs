//! Files and ingest on PostgreSQL: content hashes, names, lots, samples and their unit values.
//!
//! Every batch, whichever daemon stores it, holds one transaction-level advisory lock
//! ([`INGEST_LOCK`]) from its first lookup to its commit: a file is decided against every
//! batch committed before it, so the same content dropped at two plants is stored once and
//! archived as a duplicate at the other. Lists go in as arrays (`UNNEST`, `= ANY`), one
//! statement per table; the unit values go in with `COPY`.

use std::collections::HashSet;

use sqlx::{Postgres, QueryBuilder, Row, Transaction};

use super::super::plan::{self, Lookups};
use super::copy;
use super::*;

/// The advisory lock key every ingest batch holds ("lotd" and 1).
const INGEST_LOCK: i64 = 0x6c6f_7464_0001;

type Tx = Transaction<'static, Postgres>;

impl Db {
    pub async fn file_known(&self, hash: &str) -> Result<Option<String>> {
        sqlx::query_scalar("SELECT file_name FROM ingested_file WHERE content_hash = $1")
            .bind(hash)
            .fetch_optional(&self.pool)
            .await
            .doing("looking up a content hash")
    }

    pub async fn ingest_batch(
        &self,
        files: &[NewFile],
        received_at: &str,
        replace: Option<&Replacement<'_>>,
    ) -> Result<Vec<FileOutcome>> {
        let mut tx = self.pool.begin().await.doing("beginning a batch")?;
        sqlx::query("SELECT pg_advisory_xact_lock($1)")
            .bind(INGEST_LOCK)
            .execute(&mut *tx)
            .await
            .doing("waiting for other sites' batches")?;
        let mut look = Lookups {
            known: known_hashes(&mut tx, files).await?,
            ..Lookups::default()
        };
        name_ids(&mut tx, files, &mut look).await?;
        look.lot_ids = stored_lots(&mut tx, look.lots_wanted(files)).await?;
        look.stored = stored_samples(&mut tx, &look.lot_ids).await?;

        let batch = plan::decide(files, &look, replace.is_some());
        let to_store = batch.to_store();
        let file_ids = self
            .insert_files(&mut tx, files, &to_store, received_at)
            .await?;
        let lot_times = batch.lot_times(files, &look);
        insert_lots(&mut tx, &lot_times, &mut look.lot_ids, received_at).await?;

        let mut fresh: Vec<(&NewSample, [i64; 3])> = Vec::new();
        let mut values: Vec<(i64, &NewSample)> = Vec::new();
        for i in &to_store {
            for (j, replaced) in &batch.plans[*i] {
                let s = &files[*i].samples[*j];
                match replaced {
                    Some(old) => {
                        replace_sample(&mut tx, old, s, file_ids[i], received_at, replace).await?;
                        values.push((old.id, s));
                    }
                    None => {
                        let lot_id = look.lot_of(s).expect("every lot of the batch is stored");
                        fresh.push((s, [lot_id, look.series_of(s), file_ids[i]]));
                    }
                }
            }
        }
        insert_samples(&mut tx, &fresh, &mut values).await?;
        copy::sample_values(&mut tx, &values).await?;
        tx.commit().await.doing("committing a batch of files")?;
        Ok(batch.finish(&file_ids))
    }

    /// Records the files to store; returns each one's id by its index in `files`.
    async fn insert_files(
        &self,
        tx: &mut Tx,
        files: &[NewFile],
        to_store: &[usize],
        received_at: &str,
    ) -> Result<HashMap<usize, i64>> {
        let pick = |f: fn(&NewFile) -> String| -> Vec<String> {
            to_store.iter().map(|i| f(&files[*i])).collect()
        };
        let rows: Vec<i64> = to_store.iter().map(|i| files[*i].rows as i64).collect();
        let ids: HashMap<String, i64> = sqlx::query(
            "INSERT INTO ingested_file (content_hash, file_name, received_at, layout, row_count, \
             site) SELECT h, n, $3, l, r, $6 FROM UNNEST($1::text[], $2::text[], $4::text[], \
             $5::bigint[]) AS u(h, n, l, r) RETURNING id, content_hash",
        )
        .bind(pick(|f| f.hash.clone()))
        .bind(pick(|f| f.name.clone()))
        .bind(received_at)
        .bind(pick(|f| f.layout.to_string()))
        .bind(rows)
        .bind(&self.site)
        .fetch_all(&mut **tx)
        .await
        .doing("recording files")?
        .iter()
        .map(|r| (r.get(1), r.get(0)))
        .collect();
        Ok(to_store
            .iter()
            .map(|i| (*i, ids[&files[*i].hash]))
            .collect())
    }

    pub async fn record_quarantine(
        &self,
        hash: &str,
        file_name: &str,
        at: &str,
        reason: &str,
    ) -> Result<()> {
        sqlx::query(
            "INSERT INTO quarantined_file (content_hash, file_name, quarantined_at, reason) \
             VALUES ($1, $2, $3, $4) ON CONFLICT (content_hash) DO UPDATE SET \
             file_name = excluded.file_name, quarantined_at = excluded.quarantined_at, \
             reason = excluded.reason",
        )
        .bind(hash)
        .bind(file_name)
        .bind(at)
        .bind(reason)
        .execute(&self.pool)
        .await
        .doing("recording a quarantined file")?;
        Ok(())
    }
}

/// The content hashes of `files` stored before, with the name each was stored from.
async fn known_hashes(tx: &mut Tx, files: &[NewFile]) -> Result<HashMap<String, String>> {
    let hashes: Vec<&str> = files.iter().map(|f| f.hash.as_str()).collect();
    let rows = sqlx::query(
        "SELECT content_hash, file_name FROM ingested_file WHERE content_hash = ANY($1)",
    )
    .bind(&hashes)
    .fetch_all(&mut **tx)
    .await
    .doing("looking up content hashes")?;
    Ok(rows.iter().map(|r| (r.get(0), r.get(1))).collect())
}

/// Ids of the batch's sources and series, created where new.
async fn name_ids<'a>(tx: &mut Tx, files: &'a [NewFile], look: &mut Lookups<'a>) -> Result<()> {
    let pairs = Lookups::series_named(files);
    let sources = upsert_names(tx, "source", pairs.iter().map(|p| p.0)).await?;
    let characteristics = upsert_names(tx, "characteristic", pairs.iter().map(|p| p.1)).await?;
    let source_ids: Vec<i64> = pairs.iter().map(|p| sources[p.0]).collect();
    let ch_ids: Vec<i64> = pairs.iter().map(|p| characteristics[p.1]).collect();
    sqlx::query(
        "INSERT INTO series (source_id, characteristic_id) \
         SELECT * FROM UNNEST($1::bigint[], $2::bigint[]) ON CONFLICT DO NOTHING",
    )
    .bind(&source_ids)
    .bind(&ch_ids)
    .execute(&mut **tx)
    .await
    .doing("recording series")?;
    let series: HashMap<(i64, i64), i64> = sqlx::query(
        "SELECT se.id, se.source_id, se.characteristic_id FROM series se \
         JOIN UNNEST($1::bigint[], $2::bigint[]) AS u(s, c) \
         ON se.source_id = u.s AND se.characteristic_id = u.c",
    )
    .bind(&source_ids)
    .bind(&ch_ids)
    .fetch_all(&mut **tx)
    .await
    .doing("looking up series")?
    .iter()
    .map(|r| ((r.get(1), r.get(2)), r.get(0)))
    .collect();
    for (k, pair) in pairs.iter().enumerate() {
        look.source_ids.insert(pair.0, source_ids[k]);
        look.series_ids
            .insert(*pair, series[&(source_ids[k], ch_ids[k])]);
    }
    Ok(())
}

/// Ids of `names` in `table` (source or characteristic), created where new.
async fn upsert_names<'a>(
    tx: &mut Tx,
    table: &'static str,
    names: impl Iterator<Item = &'a str>,
) -> Result<HashMap<&'a str, i64>> {
    let names: Vec<&str> = names.collect::<HashSet<_>>().into_iter().collect();
    sqlx::query(&format!(
        "INSERT INTO {table} (name) SELECT * FROM UNNEST($1::text[]) ON CONFLICT DO NOTHING"
    ))
    .bind(&names)
    .execute(&mut **tx)
    .await
    .doing("recording names")?;
    let ids: HashMap<String, i64> = sqlx::query(&format!(
        "SELECT name, id FROM {table} WHERE name = ANY($1)"
    ))
    .bind(&names)
    .fetch_all(&mut **tx)
    .await
    .doing("looking up names")?
    .iter()
    .map(|r| (r.get(0), r.get(1)))
    .collect();
    Ok(names.into_iter().map(|n| (n, ids[n])).collect())
}

/// Stored lots among `wanted` (lot codes by source id): (source id, code) → lot id.
async fn stored_lots(
    tx: &mut Tx,
    wanted: HashMap<i64, Vec<&str>>,
) -> Result<HashMap<(i64, String), i64>> {
    let (sources, codes): (Vec<i64>, Vec<&str>) = wanted
        .iter()
        .flat_map(|(source, codes)| codes.iter().map(move |c| (*source, *c)))
        .unzip();
    let rows = sqlx::query(
        "SELECT l.id, l.source_id, l.code FROM lot l \
         JOIN UNNEST($1::bigint[], $2::text[]) AS u(s, c) ON l.source_id = u.s AND l.code = u.c",
    )
    .bind(&sources)
    .bind(&codes)
    .fetch_all(&mut **tx)
    .await
    .doing("looking up lots")?;
    Ok(rows
        .iter()
        .map(|r| ((r.get(1), r.get(2)), r.get(0)))
        .collect())
}

/// The stored samples of the given lots, by (lot id, series id).
async fn stored_samples(
    tx: &mut Tx,
    lot_ids: &HashMap<(i64, String), i64>,
) -> Result<HashMap<(i64, i64), StoredSample>> {
    let ids: Vec<i64> = lot_ids.values().copied().collect();
    let rows = sqlx::query(
        "SELECT s.id, s.lot_id, s.series_id, s.content_digest, f.file_name, s.n, s.mean, \
         s.m2, s.file_id FROM sample s JOIN ingested_file f ON f.id = s.file_id \
         WHERE s.lot_id = ANY($1)",
    )
    .bind(&ids)
    .fetch_all(&mut **tx)
    .await
    .doing("looking up stored samples")?;
    Ok(rows
        .iter()
        .map(|r| ((r.get(1), r.get(2)), stored_sample_from_row(r)))
        .collect())
}

/// New lots inserted (their ids added to `lot_ids`); stored lots get an earlier sampling
/// time if the batch brings one.
async fn insert_lots(
    tx: &mut Tx,
    lot_times: &HashMap<(i64, &str), Option<&str>>,
    lot_ids: &mut HashMap<(i64, String), i64>,
    received_at: &str,
) -> Result<()> {
    let (mut earlier_ids, mut earlier_times) = (Vec::new(), Vec::new());
    let mut new_lots: Vec<((i64, &str), Option<&str>)> = Vec::new();
    for (key, time) in lot_times {
        match (lot_ids.get(&(key.0, key.1.to_string())), time) {
            (Some(id), Some(t)) => {
                earlier_ids.push(*id);
                earlier_times.push(*t);
            }
            (Some(_), None) => {}
            (None, _) => new_lots.push((*key, *time)),
        }
    }
    sqlx::query(
        "UPDATE lot SET sampled_at = u.t FROM UNNEST($1::bigint[], $2::text[]) AS u(id, t) \
         WHERE lot.id = u.id AND (lot.sampled_at IS NULL OR lot.sampled_at > u.t)",
    )
    .bind(&earlier_ids)
    .bind(&earlier_times)
    .execute(&mut **tx)
    .await
    .doing("updating lots' sampling times")?;
    new_lots.sort();
    let sources: Vec<i64> = new_lots.iter().map(|l| l.0.0).collect();
    let codes: Vec<&str> = new_lots.iter().map(|l| l.0.1).collect();
    let times: Vec<Option<&str>> = new_lots.iter().map(|l| l.1).collect();
    let rows = sqlx::query(
        "INSERT INTO lot (source_id, code, sampled_at, first_seen_at) \
         SELECT s, c, t, $4 FROM UNNEST($1::bigint[], $2::text[], $3::text[]) \
         WITH ORDINALITY AS u(s, c, t, k) ORDER BY k RETURNING id, source_id, code",
    )
    .bind(&sources)
    .bind(&codes)
    .bind(&times)
    .bind(received_at)
    .fetch_all(&mut **tx)
    .await
    .doing("recording lots")?;
    for r in &rows {
        lot_ids.insert((r.get(1), r.get(2)), r.get(0));
    }
    Ok(())
}

/// Inserts new samples (each with its lot, series and file id); appends (id, sample) of
/// each to `values`.
async fn insert_samples<'a>(
    tx: &mut Tx,
    fresh: &[(&'a NewSample, [i64; 3])],
    values: &mut Vec<(i64, &'a NewSample)>,
) -> Result<()> {
    let mut q = QueryBuilder::<Postgres>::new(
        "INSERT INTO sample (lot_id, series_id, file_id, n, mean, m2, min_value, max_value, \
         sampled_at, content_digest, sd) SELECT * FROM UNNEST(",
    );
    let ids = |k: usize| -> Vec<i64> { fresh.iter().map(|f| f.1[k]).collect() };
    let real =
        |f: fn(&Summary) -> f64| -> Vec<f64> { fresh.iter().map(|(s, _)| f(&s.summary)).collect() };
    let mut args = q.separated(", ");
    args.push_bind(ids(0)).push_unseparated("::bigint[]");
    args.push_bind(ids(1)).push_unseparated("::bigint[]");
    args.push_bind(ids(2)).push_unseparated("::bigint[]");
    let n: Vec<i64> = fresh.iter().map(|(s, _)| s.summary.n() as i64).collect();
    args.push_bind(n).push_unseparated("::bigint[]");
    args.push_bind(real(Summary::mean))
        .push_unseparated("::float8[]");
    args.push_bind(real(Summary::m2))
        .push_unseparated("::float8[]");
    args.push_bind(real(Summary::min))
        .push_unseparated("::float8[]");
    args.push_bind(real(Summary::max))
        .push_unseparated("::float8[]");
    let times: Vec<Option<&str>> = fresh.iter().map(|(s, _)| s.earliest.as_deref()).collect();
    args.push_bind(times).push_unseparated("::text[]");
    let digests: Vec<String> = fresh.iter().map(|(s, _)| s.digest.hex()).collect();
    args.push_bind(digests).push_unseparated("::text[]");
    let sds: Vec<Option<f64>> = fresh
        .iter()
        .map(|(s, _)| sd(s.summary.n() as i64, s.summary.m2()))
        .collect();
    args.push_bind(sds).push_unseparated("::float8[]");
    q.push(") RETURNING id, lot_id, series_id");
    let ids: HashMap<(i64, i64), i64> = q
        .build()
        .fetch_all(&mut **tx)
        .await
        .doing("recording samples")?
        .iter()
        .map(|r| ((r.get(1), r.get(2)), r.get(0)))
        .collect();
    for (s, [lot_id, series_id, _]) in fresh {
        values.push((ids[&(*lot_id, *series_id)], s));
    }
    Ok(())
}

/// Replaces a stored sample's values in place, keeping the old ones in the audit trail.
async fn replace_sample(
    tx: &mut Tx,
    old: &StoredSample,
    new: &NewSample,
    file_id: i64,
    at: &str,
    replace: Option<&Replacement<'_>>,
) -> Result<()> {
    let replacement_id: i64 = sqlx::query_scalar(
        "INSERT INTO sample_replacement (sample_id, replaced_at, reason, old_file_id, \
         new_file_id, old_n, old_mean, old_m2, old_digest, replaced_by) \
         VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10) RETURNING id",
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
         SELECT $1, u.k - 1, sv.unit_serials[u.k], u.v, \
                CASE WHEN sv.unit_times IS NULL THEN sm.sampled_at ELSE sv.unit_times[u.k] END \
         FROM sample_values sv JOIN sample sm ON sm.id = sv.sample_id \
         CROSS JOIN LATERAL UNNEST(sv.unit_values) WITH ORDINALITY AS u(v, k) \
         WHERE sv.sample_id = $2 ORDER BY u.k",
    )
    .bind(replacement_id)
    .bind(old.id)
    .execute(&mut **tx)
    .await
    .doing("keeping replaced values")?;
    for sql in [
        "DELETE FROM outlier WHERE sample_id = $1",
        "DELETE FROM sample_values WHERE sample_id = $1",
    ] {
        sqlx::query(sql)
            .bind(old.id)
            .execute(&mut **tx)
            .await
            .doing("removing replaced values")?;
    }
    let s = &new.summary;
    sqlx::query(
        "UPDATE sample SET file_id = $1, n = $2, mean = $3, m2 = $4, min_value = $5, \
         max_value = $6, sampled_at = $7, content_digest = $8, sd = $9 WHERE id = $10",
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
