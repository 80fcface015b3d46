//! The bulk path: statements run on the connection's own SQLite handle.
//!
//! sqlx hands every statement to a worker thread and back, and binds parameters one by one
//! through its own argument buffers; for a backfill of millions of unit values that overhead
//! costs more than SQLite's own work. Here one prepared statement is stepped once per row on
//! the raw handle (`SqliteConnection::lock_handle`), inside the transaction sqlx has open, with
//! each parameter re-bound only when it changes. The lock on the handle is held only for this
//! one synchronous section; sqlx's worker cannot use the handle meanwhile.

use std::collections::HashMap;
use std::ptr::NonNull;
use std::sync::Arc;

use rusqlite::Connection;
use rusqlite::ffi::sqlite3;

use super::{
    Decision, NewEvaluation, NewFile, NewSample, Result, SeriesSample, StoreError, sd,
    stored_summary,
};
use crate::lotfile::{Serials, Stamp, Track};

const INSERT_VALUES: &str = "INSERT INTO sample_values (sample_id, values_json, units_json, \
     sampled_at_json) VALUES (?1, ?2, ?3, ?4)";

/// Rows per multi-row INSERT. Every statement on a table with triggers (the counts, the queue
/// of undecided samples) opens a statement journal holding a copy of each page it touches: one
/// statement per row made that copying a quarter of a backfill's writes; per 128 rows the
/// pages are mostly shared.
const ROWS_PER_STATEMENT: usize = 128;

/// `INSERT INTO table (columns) VALUES (?1, ..., ?k), (?k+1, ...)`: `rows` rows of `params`.
fn insert_sql(table: &str, columns: &str, params: usize, rows: usize) -> String {
    use std::fmt::Write;
    let mut sql = format!("INSERT INTO {table} ({columns}) VALUES ");
    for r in 0..rows {
        sql.push_str(if r == 0 { "(" } else { ", (" });
        for c in 0..params {
            let sep = if c == 0 { "" } else { ", " };
            write!(sql, "{sep}?{}", r * params + c + 1).expect("writing to a String");
        }
        sql.push(')');
    }
    sql
}

/// One table's multi-row insert: its name, columns and parameters per row.
struct Rows {
    table: &'static str,
    columns: &'static str,
    params: usize,
    what: &'static str,
}

impl Rows {
    /// Inserts one row per item, [`ROWS_PER_STATEMENT`] per statement; `bind(stmt, first,
    /// item)` binds the item's parameters `first + 1 ..= first + params`. Returns the rowid of
    /// the first item: item k's is that plus k.
    ///
    /// SQLite gives a new row the largest rowid plus one, so the rows of one write transaction
    /// are numbered in insert order. That is checked, not assumed: the largest rowid must grow
    /// by exactly the number of items (it would not after a rowid reached its maximum, when
    /// SQLite picks free ones at random), else nothing is returned and the batch rolls back.
    fn insert<T>(
        &self,
        conn: &Connection,
        items: &[T],
        mut bind: impl FnMut(&mut rusqlite::Statement<'_>, usize, &T) -> Result<()>,
    ) -> Result<i64> {
        let largest = |conn: &Connection| -> Result<i64> {
            let sql = format!("SELECT COALESCE(MAX(rowid), 0) FROM {}", self.table);
            conn.query_row(&sql, [], |r| r.get(0)).doing(self.what)
        };
        let before = largest(conn)?;
        // One statement per chunk length: the full chunks share one, the remainder has its own.
        let mut prepared: Option<(usize, rusqlite::Statement<'_>)> = None;
        for chunk in items.chunks(ROWS_PER_STATEMENT) {
            if prepared
                .as_ref()
                .is_none_or(|(rows, _)| *rows != chunk.len())
            {
                let sql = insert_sql(self.table, self.columns, self.params, chunk.len());
                prepared = Some((chunk.len(), conn.prepare(&sql).doing(self.what)?));
            }
            let (_, stmt) = prepared.as_mut().expect("prepared above");
            for (k, item) in chunk.iter().enumerate() {
                bind(stmt, k * self.params, item)?;
            }
            stmt.raw_execute().doing(self.what)?;
        }
        let after = largest(conn)?;
        if after - before != items.len() as i64 {
            return Err(StoreError::Corrupt(format!(
                "{} rows written to {}, but its largest id went from {before} to {after}",
                items.len(),
                self.table
            )));
        }
        Ok(before + 1)
    }
}

const EVALUATIONS: Rows = Rows {
    table: "evaluation",
    columns: "sample_id, series_id, baseline_id, kind, decided_at, test, model, alternative, \
        delta, statistic, df, df2, p_value, p_adjusted, method, family_size, level, \
        significant, baseline_n, baseline_mean, baseline_sd, lot_n, lot_mean, lot_sd, estimate, \
        ci_low, ci_high, std_error, cusum_upper, cusum_lower, cusum_h, cusum_signal, cpk, \
        cpk_low, cpk_high, note, site",
    params: 37,
    what: "recording decisions",
};

const FILES: Rows = Rows {
    table: "ingested_file",
    columns: "content_hash, file_name, received_at, layout, row_count, site",
    params: 6,
    what: "recording files",
};

const LOTS: Rows = Rows {
    table: "lot",
    columns: "source_id, code, sampled_at, first_seen_at",
    params: 4,
    what: "recording lots",
};

const SAMPLES: Rows = Rows {
    table: "sample",
    columns: "lot_id, series_id, file_id, n, mean, m2, min_value, max_value, sampled_at, \
        content_digest, sd",
    params: 11,
    what: "recording samples",
};

const SELECT_VALUES: &str = "SELECT values_json FROM sample_values WHERE sample_id = ?1";

pub(super) trait Doing<T> {
    fn doing(self, what: &'static str) -> Result<T>;
}

impl<T> Doing<T> for rusqlite::Result<T> {
    fn doing(self, what: &'static str) -> Result<T> {
        self.map_err(|source| StoreError::Bulk {
            doing: what,
            source,
        })
    }
}

/// Borrows an open handle as a rusqlite connection that does not close it when dropped.
pub(super) fn borrow(handle: NonNull<sqlite3>) -> Result<Connection> {
    // SAFETY: `handle` comes from a `LockedSqliteHandle` that the caller holds for as long as
    // the returned connection lives (both end within the caller's synchronous section), so it
    // is open and no other thread uses it; `from_handle` never closes a handle it did not open.
    unsafe { Connection::from_handle(handle.as_ptr()) }.doing("borrowing the connection")
}

/// A new sample with the ids it is stored under.
pub(super) struct PendingSample<'a> {
    pub sample: &'a NewSample,
    pub lot_id: i64,
    pub series_id: i64,
    pub file_id: i64,
}

/// Records the files `to_store` (indexes into `files`); returns each one's id by its index.
pub(super) fn insert_files(
    handle: NonNull<sqlite3>,
    files: &[NewFile],
    to_store: &[usize],
    received_at: &str,
    site: &str,
) -> Result<HashMap<usize, i64>> {
    let conn = borrow(handle)?;
    let first = FILES.insert(&conn, to_store, |stmt, at, i| {
        let f = &files[*i];
        stmt.raw_bind_parameter(at + 1, f.hash.as_str())
            .and_then(|()| stmt.raw_bind_parameter(at + 2, f.name.as_str()))
            .and_then(|()| stmt.raw_bind_parameter(at + 3, received_at))
            .and_then(|()| stmt.raw_bind_parameter(at + 4, f.layout))
            .and_then(|()| stmt.raw_bind_parameter(at + 5, f.rows as i64))
            .and_then(|()| stmt.raw_bind_parameter(at + 6, site))
            .doing(FILES.what)
    })?;
    Ok(to_store.iter().copied().zip(first..).collect())
}

/// Inserts new lots ((source id, code), earliest sampling time); adds their ids to `lot_ids`.
pub(super) fn insert_lots(
    handle: NonNull<sqlite3>,
    new_lots: &[((i64, &str), Option<&str>)],
    received_at: &str,
    lot_ids: &mut HashMap<(i64, String), i64>,
) -> Result<()> {
    let conn = borrow(handle)?;
    let first = LOTS.insert(&conn, new_lots, |stmt, at, ((source_id, code), time)| {
        stmt.raw_bind_parameter(at + 1, source_id)
            .and_then(|()| stmt.raw_bind_parameter(at + 2, code))
            .and_then(|()| stmt.raw_bind_parameter(at + 3, time))
            .and_then(|()| stmt.raw_bind_parameter(at + 4, received_at))
            .doing(LOTS.what)
    })?;
    for (((source_id, code), _), id) in new_lots.iter().zip(first..) {
        lot_ids.insert((*source_id, code.to_string()), id);
    }
    Ok(())
}

/// Inserts new samples; appends (id, sample) of each to `sample_ids`.
pub(super) fn insert_samples<'a>(
    handle: NonNull<sqlite3>,
    inserts: &[PendingSample<'a>],
    sample_ids: &mut Vec<(i64, &'a NewSample)>,
) -> Result<()> {
    let conn = borrow(handle)?;
    let first = SAMPLES.insert(&conn, inserts, |stmt, at, p| {
        bind_sample(stmt, at, p).doing(SAMPLES.what)
    })?;
    sample_ids.extend((first..).zip(inserts.iter().map(|p| p.sample)));
    Ok(())
}

/// Binds one row of [`SAMPLES`] as parameters `first + 1` to `first + 11`.
fn bind_sample(
    stmt: &mut rusqlite::Statement<'_>,
    first: usize,
    p: &PendingSample<'_>,
) -> rusqlite::Result<()> {
    let s = &p.sample.summary;
    let n = s.n() as i64;
    stmt.raw_bind_parameter(first + 1, p.lot_id)?;
    stmt.raw_bind_parameter(first + 2, p.series_id)?;
    stmt.raw_bind_parameter(first + 3, p.file_id)?;
    stmt.raw_bind_parameter(first + 4, n)?;
    stmt.raw_bind_parameter(first + 5, s.mean())?;
    stmt.raw_bind_parameter(first + 6, s.m2())?;
    stmt.raw_bind_parameter(first + 7, s.min())?;
    stmt.raw_bind_parameter(first + 8, s.max())?;
    stmt.raw_bind_parameter(first + 9, p.sample.earliest.as_deref())?;
    stmt.raw_bind_parameter(first + 10, p.sample.digest.hex())?;
    stmt.raw_bind_parameter(first + 11, sd(n, s.m2()))
}

/// Inserts the unit values of each `(sample id, sample)`: one `sample_values` row per sample
/// (see migration 0009), its JSON arrays written into buffers reused from sample to sample.
pub(super) fn insert_measurements(
    handle: NonNull<sqlite3>,
    samples: &[(i64, &NewSample)],
) -> Result<()> {
    let conn = borrow(handle)?;
    let mut stmt = conn
        .prepare(INSERT_VALUES)
        .doing("preparing the insert of unit values")?;
    let mut packed = Packed::default();
    for (id, s) in samples {
        packed.fill(s);
        stmt.raw_bind_parameter(1, id)
            .doing("recording measurements")?;
        stmt.raw_bind_parameter(2, packed.values.as_str())
            .doing("recording measurements")?;
        stmt.raw_bind_parameter(3, packed.units())
            .doing("recording measurements")?;
        stmt.raw_bind_parameter(4, packed.times())
            .doing("recording measurements")?;
        stmt.raw_execute().doing("recording measurements")?;
    }
    Ok(())
}

/// Inserts the evaluation of every decision (an engine pass of a backfill writes hundreds of
/// thousands) and returns each row's id by (sample id, kind). `baseline_ids` holds the current
/// baseline of every decided series; `site` is the deciding daemon's.
pub(super) fn insert_evaluations(
    handle: NonNull<sqlite3>,
    decisions: &[Decision],
    baseline_ids: &HashMap<i64, i64>,
    at: &str,
    site: &str,
) -> Result<HashMap<(i64, &'static str), i64>> {
    let conn = borrow(handle)?;
    let first = EVALUATIONS.insert(&conn, decisions, |stmt, first, d| {
        let e = &d.evaluation;
        let baseline_id = *baseline_ids.get(&e.series_id).ok_or_else(|| {
            StoreError::Corrupt(format!(
                "decision for series {} without a baseline",
                e.series_id
            ))
        })?;
        bind_evaluation(stmt, first, e, baseline_id, at, site).doing(EVALUATIONS.what)
    })?;
    let keys = decisions
        .iter()
        .map(|d| (d.evaluation.sample_id, d.evaluation.kind));
    Ok(keys.zip(first..).collect())
}

/// Binds one row of [`EVALUATIONS`] as parameters `first + 1` to `first + 37` (an
/// interval bound that is not finite is NULL).
fn bind_evaluation(
    stmt: &mut rusqlite::Statement<'_>,
    first: usize,
    e: &NewEvaluation,
    baseline_id: i64,
    at: &str,
    site: &str,
) -> rusqlite::Result<()> {
    let p = |k: usize| first + k;
    let finite = |v: f64| Some(v).filter(|v| v.is_finite());
    stmt.raw_bind_parameter(p(1), e.sample_id)?;
    stmt.raw_bind_parameter(p(2), e.series_id)?;
    stmt.raw_bind_parameter(p(3), baseline_id)?;
    stmt.raw_bind_parameter(p(4), e.kind)?;
    stmt.raw_bind_parameter(p(5), at)?;
    stmt.raw_bind_parameter(p(6), e.test)?;
    stmt.raw_bind_parameter(p(7), e.model)?;
    stmt.raw_bind_parameter(p(8), e.alternative)?;
    stmt.raw_bind_parameter(p(9), e.delta)?;
    stmt.raw_bind_parameter(p(10), e.statistic)?;
    stmt.raw_bind_parameter(p(11), e.df)?;
    stmt.raw_bind_parameter(p(12), e.df2)?;
    stmt.raw_bind_parameter(p(13), e.p_value)?;
    stmt.raw_bind_parameter(p(14), e.p_adjusted)?;
    stmt.raw_bind_parameter(p(15), e.method)?;
    stmt.raw_bind_parameter(p(16), e.family_size)?;
    stmt.raw_bind_parameter(p(17), e.level)?;
    stmt.raw_bind_parameter(p(18), e.significant as i64)?;
    stmt.raw_bind_parameter(p(19), e.baseline.n() as i64)?;
    stmt.raw_bind_parameter(p(20), e.baseline_mean)?;
    stmt.raw_bind_parameter(p(21), e.baseline.sd())?;
    stmt.raw_bind_parameter(p(22), e.lot.n() as i64)?;
    stmt.raw_bind_parameter(p(23), e.lot.mean())?;
    stmt.raw_bind_parameter(p(24), e.lot.sd())?;
    stmt.raw_bind_parameter(p(25), e.estimate)?;
    stmt.raw_bind_parameter(p(26), e.ci.and_then(|c| finite(c.0)))?;
    stmt.raw_bind_parameter(p(27), e.ci.and_then(|c| finite(c.1)))?;
    stmt.raw_bind_parameter(p(28), e.std_error)?;
    stmt.raw_bind_parameter(p(29), e.cusum.map(|c| c.0))?;
    stmt.raw_bind_parameter(p(30), e.cusum.map(|c| c.1))?;
    stmt.raw_bind_parameter(p(31), e.cusum.map(|c| c.2))?;
    stmt.raw_bind_parameter(p(32), e.cusum_signal as i64)?;
    stmt.raw_bind_parameter(p(33), e.cpk.map(|c| c.0))?;
    stmt.raw_bind_parameter(p(34), e.cpk.map(|c| c.1))?;
    stmt.raw_bind_parameter(p(35), e.cpk.map(|c| c.2))?;
    stmt.raw_bind_parameter(p(36), e.note.as_deref())?;
    stmt.raw_bind_parameter(p(37), site)
}

/// One sample's row of `sample_values` as text: its values, unit serials and sampling times
/// as JSON arrays (an empty `units` or `times` stands for NULL).
#[derive(Default)]
pub(super) struct Packed {
    pub values: String,
    units: String,
    times: String,
    /// The track, serials and length the unit and time arrays were written from: the samples
    /// of one wide file share them (one track per row of units), so they are written once.
    from: Option<(Arc<Track>, Arc<Serials>, usize)>,
}

impl Packed {
    /// Writes the arrays of `s` over the previous sample's.
    pub fn fill(&mut self, s: &NewSample) {
        let n = s.values.len();
        pack_values(&s.values, &mut self.values);
        let same = self.from.as_ref().is_some_and(|(track, serials, len)| {
            Arc::ptr_eq(track, &s.track) && Arc::ptr_eq(serials, &s.serials) && *len == n
        });
        if same {
            return;
        }
        let (units, times) = (&s.track.units[..n], &s.track.sampled_at[..n]);
        self.units.clear();
        if units.iter().any(|u| s.serials.get(*u).is_some()) {
            pack_units(units, &s.serials, &mut self.units);
        }
        self.times.clear();
        if times.iter().any(|t| *t != times[0]) {
            pack_times(times, &mut self.times);
        }
        self.from = Some((s.track.clone(), s.serials.clone(), n));
    }

    /// `units_json`: NULL when no unit has a serial.
    pub fn units(&self) -> Option<&str> {
        Some(self.units.as_str()).filter(|u| !u.is_empty())
    }

    /// `sampled_at_json`: NULL when every value has the same time (or none), which is then
    /// the sample's own `sampled_at` (the earliest time of its values).
    pub fn times(&self) -> Option<&str> {
        Some(self.times.as_str()).filter(|t| !t.is_empty())
    }
}

/// `[v0,v1,...]`, each value in the shortest text that parses back to the same double (ryu:
/// always with a `.` or an exponent, so SQLite's JSON reads a real, never an integer).
fn pack_values(values: &[f64], out: &mut String) {
    out.clear();
    out.push('[');
    let mut buffer = ryu::Buffer::new();
    for (k, v) in values.iter().enumerate() {
        if k > 0 {
            out.push(',');
        }
        out.push_str(buffer.format_finite(*v));
    }
    out.push(']');
}

/// `["serial",null,...]`, escaped as JSON strings by serde_json.
fn pack_units(units: &[u32], serials: &Serials, out: &mut String) {
    let serials: Vec<Option<&str>> = units.iter().map(|u| serials.get(*u)).collect();
    out.push_str(&serde_json::to_string(&serials).expect("strings and nulls serialise"));
}

/// Units of a lot often share one sampling time: it is formatted once per run of equal times.
fn pack_times(times: &[Stamp], out: &mut String) {
    out.push('[');
    let mut last: Option<(Stamp, Option<String>)> = None;
    for (k, stamp) in times.iter().enumerate() {
        if k > 0 {
            out.push(',');
        }
        if last.as_ref().is_none_or(|(s, _)| s != stamp) {
            last = Some((*stamp, stamp.get().map(|t| t.to_rfc3339())));
        }
        // RFC 3339 text (digits, `-:.TZ`) needs no escaping inside a JSON string.
        match last.as_ref().and_then(|(_, text)| text.as_deref()) {
            Some(text) => {
                out.push('"');
                out.push_str(text);
                out.push('"');
            }
            None => out.push_str("null"),
        }
    }
    out.push(']');
}

/// The numbers of a `values_json` array, in seq order; None when the text is not an array of
/// finite numbers. Rust's float parsing is correctly rounded, so the stored bits come back.
pub(in crate::store) fn unpack_values(text: &str) -> Option<Vec<f64>> {
    let inner = text.trim().strip_prefix('[')?.strip_suffix(']')?.trim();
    if inner.is_empty() {
        return Some(Vec::new());
    }
    inner
        .split(',')
        .map(|v| v.trim().parse::<f64>().ok().filter(|v| v.is_finite()))
        .collect()
}

/// `(seq, value)` of every unit of the given samples, in seq order, read in one snapshot with
/// one prepared statement stepped per sample (a primary-key seek each).
pub(super) fn unit_values(
    handle: NonNull<sqlite3>,
    sample_ids: &[i64],
) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
    let conn = borrow(handle)?;
    let snapshot = conn.unchecked_transaction().doing("reading unit values")?;
    let mut stmt = snapshot
        .prepare(SELECT_VALUES)
        .doing("reading unit values")?;
    let mut out = HashMap::with_capacity(sample_ids.len());
    for id in sample_ids {
        let mut rows = stmt.query([id]).doing("reading unit values")?;
        let Some(row) = rows.next().doing("reading unit values")? else {
            continue;
        };
        let text = row.get_ref(0).doing("reading unit values")?;
        let values = text.as_str().ok().and_then(unpack_values).ok_or_else(|| {
            StoreError::Corrupt(format!(
                "the unit values of sample {id} are not a JSON array of numbers"
            ))
        })?;
        if !values.is_empty() {
            out.insert(*id, (0..).zip(values).collect());
        }
    }
    drop(stmt);
    snapshot.commit().doing("reading unit values")?;
    Ok(out)
}

/// Hands every sample waiting in `pending_sample` to `sink` as (series id, sample), in the
/// queue's order (by sample id), read in one snapshot. CROSS JOIN keeps SQLite from walking
/// every sample and probing the queue for each: the queue leads, then two primary-key seeks.
pub(super) fn pending_samples(
    handle: NonNull<sqlite3>,
    mut sink: impl FnMut(i64, SeriesSample),
) -> Result<()> {
    const WHAT: &str = "loading new lots";
    let conn = borrow(handle)?;
    let snapshot = conn.unchecked_transaction().doing(WHAT)?;
    let mut stmt = snapshot
        .prepare(
            "SELECT sm.series_id, sm.id, l.id, l.code, COALESCE(l.sampled_at, l.first_seen_at), \
                    sm.n, sm.mean, sm.m2, sm.min_value, sm.max_value, sm.file_id \
             FROM pending_sample p CROSS JOIN sample sm ON sm.id = p.sample_id \
             CROSS JOIN lot l ON l.id = sm.lot_id",
        )
        .doing(WHAT)?;
    let mut rows = stmt.query([]).doing(WHAT)?;
    while let Some(r) = rows.next().doing(WHAT)? {
        let summary = stored_summary(
            r.get(5).doing(WHAT)?,
            r.get(6).doing(WHAT)?,
            r.get(7).doing(WHAT)?,
            r.get(8).doing(WHAT)?,
            r.get(9).doing(WHAT)?,
        )?;
        let sample = SeriesSample {
            sample_id: r.get(1).doing(WHAT)?,
            lot_id: r.get(2).doing(WHAT)?,
            lot: r.get(3).doing(WHAT)?,
            order_time: r.get(4).doing(WHAT)?,
            summary,
            evaluated: false,
            file_id: r.get(10).doing(WHAT)?,
        };
        sink(r.get(0).doing(WHAT)?, sample);
    }
    drop(rows);
    drop(stmt);
    snapshot.commit().doing(WHAT)
}

#[cfg(test)]
mod tests {
    use super::*;

    const NUMBERS: Rows = Rows {
        table: "t",
        columns: "v, w",
        params: 2,
        what: "test rows",
    };

    fn numbers_table() -> Connection {
        let conn = Connection::open_in_memory().unwrap();
        conn.execute_batch("CREATE TABLE t (id INTEGER PRIMARY KEY, v INTEGER, w TEXT)")
            .unwrap();
        conn
    }

    fn bind_number(stmt: &mut rusqlite::Statement<'_>, at: usize, v: &i64) -> Result<()> {
        stmt.raw_bind_parameter(at + 1, v)
            .and_then(|()| stmt.raw_bind_parameter(at + 2, format!("w{v}")))
            .doing("test rows")
    }

    /// Full statements and a remainder, after rows already there: item k is row first + k.
    #[test]
    fn multi_row_inserts_give_each_item_its_id() {
        let conn = numbers_table();
        conn.execute("INSERT INTO t (id, v) VALUES (41, -1)", [])
            .unwrap();
        for n in [0, 1, ROWS_PER_STATEMENT, 2 * ROWS_PER_STATEMENT + 44] {
            let items: Vec<i64> = (0..n as i64).map(|k| k * 7).collect();
            let first = NUMBERS.insert(&conn, &items, bind_number).unwrap();
            for (k, v) in items.iter().enumerate() {
                let (got_v, got_w): (i64, String) = conn
                    .query_row(
                        "SELECT v, w FROM t WHERE id = ?1",
                        [first + k as i64],
                        |r| Ok((r.get(0)?, r.get(1)?)),
                    )
                    .unwrap();
                assert_eq!((got_v, got_w), (*v, format!("w{v}")));
            }
        }
    }

    /// Past the largest rowid SQLite numbers new rows at random: refused, not mis-numbered.
    #[test]
    fn ids_that_are_not_consecutive_are_an_error() {
        let conn = numbers_table();
        conn.execute("INSERT INTO t (id, v) VALUES (9223372036854775807, 0)", [])
            .unwrap();
        let err = NUMBERS.insert(&conn, &[1, 2, 3], bind_number).unwrap_err();
        assert!(matches!(err, StoreError::Corrupt(_)), "{err}");
    }

    // More digits than a double holds, on purpose: the value a person typed.
    #[allow(clippy::excessive_precision)]
    #[test]
    fn packed_values_read_back_bit_for_bit() {
        let values = [
            0.1 + 0.2,
            1e-300,
            123456789.123456789,
            -0.0,
            5.0,
            1e16,
            f64::MIN_POSITIVE,
            5e-324,
            f64::MAX,
            -1.0 / 3.0,
        ];
        let mut text = String::new();
        pack_values(&values, &mut text);
        let back = unpack_values(&text).unwrap();
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&back), bits(&values));
        // Always a real for SQLite's JSON: a point or an exponent in every number.
        assert!(
            text[1..text.len() - 1]
                .split(',')
                .all(|v| v.contains('.') || v.contains('e'))
        );
        pack_values(&[], &mut text);
        assert_eq!(unpack_values(&text), Some(vec![]));
        assert_eq!(unpack_values("[1.0,x]"), None);
        assert_eq!(unpack_values("1.0"), None);
    }

    #[test]
    fn serials_are_escaped_as_json_strings() {
        let mut serials = Serials::default();
        let unit = serials.intern("a\"b\\c\u{1}é");
        let mut out = String::new();
        pack_units(&[unit], &serials, &mut out);
        assert_eq!(out, r#"["a\"b\\c\u0001é"]"#);
        let parsed: Vec<String> = serde_json::from_str(&out).unwrap();
        assert_eq!(parsed, ["a\"b\\c\u{1}é"]);
    }
}
