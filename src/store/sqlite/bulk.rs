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

use rusqlite::Connection;
use rusqlite::ffi::sqlite3;

use super::{
    Decision, NewEvaluation, NewFile, NewSample, Result, SeriesSample, StoreError, sd,
    stored_summary,
};
use crate::lotfile::{Serials, Stamp};

const INSERT_VALUES: &str = "INSERT INTO sample_values (sample_id, values_json, units_json, \
     sampled_at_json) VALUES (?1, ?2, ?3, ?4)";

const EVALUATION_COLUMNS: &str = "sample_id, series_id, baseline_id, kind, decided_at, test, \
     model, alternative, delta, statistic, df, df2, p_value, p_adjusted, method, family_size, \
     level, significant, baseline_n, baseline_mean, baseline_sd, lot_n, lot_mean, lot_sd, \
     estimate, ci_low, ci_high, std_error, cusum_upper, cusum_lower, cusum_h, cusum_signal, cpk, \
     cpk_low, cpk_high, note, site";

/// Parameters of one evaluation row (the columns of [`EVALUATION_COLUMNS`]).
const EVALUATION_PARAMS: usize = 37;

/// Evaluation rows per INSERT statement. Each statement that fires triggers opens a statement
/// journal holding a copy of every page it touches: per row, that copying cost a quarter of a
/// backfill's engine pass; per 128 rows, the pages are mostly shared.
const EVALUATIONS_PER_STATEMENT: usize = 128;

/// `INSERT INTO evaluation (...) VALUES (?1, ..., ?37), (?38, ...)` for `rows` rows.
fn insert_evaluations_sql(rows: usize) -> String {
    use std::fmt::Write;
    let mut sql = format!("INSERT INTO evaluation ({EVALUATION_COLUMNS}) VALUES ");
    for r in 0..rows {
        sql.push_str(if r == 0 { "(" } else { ", (" });
        for c in 0..EVALUATION_PARAMS {
            let sep = if c == 0 { "" } else { ", " };
            write!(sql, "{sep}?{}", r * EVALUATION_PARAMS + c + 1).expect("writing to a String");
        }
        sql.push(')');
    }
    sql
}

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

const INSERT_FILE: &str = "INSERT INTO ingested_file (content_hash, file_name, received_at, \
     layout, row_count, site) VALUES (?1, ?2, ?3, ?4, ?5, ?6)";

const INSERT_LOT: &str =
    "INSERT INTO lot (source_id, code, sampled_at, first_seen_at) VALUES (?1, ?2, ?3, ?4)";

const INSERT_SAMPLE: &str = "INSERT INTO sample (lot_id, series_id, file_id, n, mean, m2, \
     min_value, max_value, sampled_at, content_digest, sd) \
     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)";

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
    const WHAT: &str = "recording files";
    let conn = borrow(handle)?;
    let mut stmt = conn.prepare(INSERT_FILE).doing(WHAT)?;
    stmt.raw_bind_parameter(3, received_at).doing(WHAT)?;
    stmt.raw_bind_parameter(6, site).doing(WHAT)?;
    let mut ids = HashMap::with_capacity(to_store.len());
    for i in to_store {
        let f = &files[*i];
        stmt.raw_bind_parameter(1, f.hash.as_str()).doing(WHAT)?;
        stmt.raw_bind_parameter(2, f.name.as_str()).doing(WHAT)?;
        stmt.raw_bind_parameter(4, f.layout).doing(WHAT)?;
        stmt.raw_bind_parameter(5, f.rows as i64).doing(WHAT)?;
        stmt.raw_execute().doing(WHAT)?;
        ids.insert(*i, conn.last_insert_rowid());
    }
    Ok(ids)
}

/// Inserts new lots ((source id, code), earliest sampling time); adds their ids to `lot_ids`.
pub(super) fn insert_lots(
    handle: NonNull<sqlite3>,
    new_lots: &[((i64, &str), Option<&str>)],
    received_at: &str,
    lot_ids: &mut HashMap<(i64, String), i64>,
) -> Result<()> {
    const WHAT: &str = "recording lots";
    let conn = borrow(handle)?;
    let mut stmt = conn.prepare(INSERT_LOT).doing(WHAT)?;
    stmt.raw_bind_parameter(4, received_at).doing(WHAT)?;
    for ((source_id, code), time) in new_lots {
        stmt.raw_bind_parameter(1, source_id).doing(WHAT)?;
        stmt.raw_bind_parameter(2, code).doing(WHAT)?;
        stmt.raw_bind_parameter(3, time).doing(WHAT)?;
        stmt.raw_execute().doing(WHAT)?;
        lot_ids.insert((*source_id, code.to_string()), conn.last_insert_rowid());
    }
    Ok(())
}

/// Inserts new samples; appends (id, sample) of each to `sample_ids`.
pub(super) fn insert_samples<'a>(
    handle: NonNull<sqlite3>,
    inserts: &[PendingSample<'a>],
    sample_ids: &mut Vec<(i64, &'a NewSample)>,
) -> Result<()> {
    const WHAT: &str = "recording samples";
    let conn = borrow(handle)?;
    let mut stmt = conn.prepare(INSERT_SAMPLE).doing(WHAT)?;
    for p in inserts {
        let s = &p.sample.summary;
        let n = s.n() as i64;
        stmt.raw_bind_parameter(1, p.lot_id).doing(WHAT)?;
        stmt.raw_bind_parameter(2, p.series_id).doing(WHAT)?;
        stmt.raw_bind_parameter(3, p.file_id).doing(WHAT)?;
        stmt.raw_bind_parameter(4, n).doing(WHAT)?;
        stmt.raw_bind_parameter(5, s.mean()).doing(WHAT)?;
        stmt.raw_bind_parameter(6, s.m2()).doing(WHAT)?;
        stmt.raw_bind_parameter(7, s.min()).doing(WHAT)?;
        stmt.raw_bind_parameter(8, s.max()).doing(WHAT)?;
        stmt.raw_bind_parameter(9, p.sample.earliest.as_deref())
            .doing(WHAT)?;
        stmt.raw_bind_parameter(10, p.sample.digest.hex())
            .doing(WHAT)?;
        stmt.raw_bind_parameter(11, sd(n, s.m2())).doing(WHAT)?;
        stmt.raw_execute().doing(WHAT)?;
        sample_ids.push((conn.last_insert_rowid(), p.sample));
    }
    Ok(())
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

/// Inserts the evaluation of every decision, [`EVALUATIONS_PER_STATEMENT`] rows per step of
/// one prepared statement (an engine pass of a backfill writes hundreds of thousands), and
/// returns each row's id by (sample id, kind), read back by id range. `baseline_ids` holds the
/// current baseline of every decided series; `site` is the deciding daemon's.
pub(super) fn insert_evaluations(
    handle: NonNull<sqlite3>,
    decisions: &[Decision],
    baseline_ids: &HashMap<i64, i64>,
    at: &str,
    site: &str,
) -> Result<HashMap<(i64, &'static str), i64>> {
    const WHAT: &str = "recording decisions";
    let conn = borrow(handle)?;
    let before: i64 = conn
        .query_row("SELECT COALESCE(MAX(id), 0) FROM evaluation", [], |r| {
            r.get(0)
        })
        .doing(WHAT)?;
    let mut many = conn
        .prepare(&insert_evaluations_sql(EVALUATIONS_PER_STATEMENT))
        .doing("preparing the insert of decisions")?;
    let mut one = conn
        .prepare(&insert_evaluations_sql(1))
        .doing("preparing the insert of decisions")?;
    // Binds decision `d` as the statement's row starting after parameter `first`.
    let bind = |stmt: &mut rusqlite::Statement<'_>, first: usize, d: &Decision| {
        let e = &d.evaluation;
        let baseline_id = *baseline_ids.get(&e.series_id).ok_or_else(|| {
            StoreError::Corrupt(format!(
                "decision for series {} without a baseline",
                e.series_id
            ))
        })?;
        bind_evaluation(stmt, first, e, baseline_id, at, site).doing(WHAT)
    };
    let mut chunks = decisions.chunks_exact(EVALUATIONS_PER_STATEMENT);
    for chunk in &mut chunks {
        for (k, d) in chunk.iter().enumerate() {
            bind(&mut many, k * EVALUATION_PARAMS, d)?;
        }
        many.raw_execute().doing(WHAT)?;
    }
    for d in chunks.remainder() {
        bind(&mut one, 0, d)?;
        one.raw_execute().doing(WHAT)?;
    }
    drop((many, one));
    evaluation_ids(&conn, decisions, before)
}

/// The ids of the evaluations inserted after id `before`, by (sample id, kind); every decision
/// must be among them.
fn evaluation_ids(
    conn: &Connection,
    decisions: &[Decision],
    before: i64,
) -> Result<HashMap<(i64, &'static str), i64>> {
    const WHAT: &str = "recording decisions";
    let mut kinds: Vec<&'static str> = decisions.iter().map(|d| d.evaluation.kind).collect();
    kinds.sort_unstable();
    kinds.dedup();
    let mut stmt = conn
        .prepare("SELECT id, sample_id, kind FROM evaluation WHERE id > ?1")
        .doing(WHAT)?;
    let mut rows = stmt.query([before]).doing(WHAT)?;
    let mut ids = HashMap::with_capacity(decisions.len());
    while let Some(r) = rows.next().doing(WHAT)? {
        let kind = r.get_ref(2).doing(WHAT)?;
        let kind = kinds.iter().find(|k| kind.as_str().ok() == Some(**k));
        if let Some(kind) = kind {
            ids.insert((r.get(1).doing(WHAT)?, *kind), r.get(0).doing(WHAT)?);
        }
    }
    if ids.len() != decisions.len() {
        return Err(StoreError::Corrupt(format!(
            "{} decisions written, {} read back by id",
            decisions.len(),
            ids.len()
        )));
    }
    Ok(ids)
}

/// Binds one row of [`EVALUATION_COLUMNS`] as parameters `first + 1` to `first + 37` (an
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
}

impl Packed {
    /// Writes the arrays of `s` over the previous sample's.
    pub fn fill(&mut self, s: &NewSample) {
        let n = s.values.len();
        let (units, times) = (&s.track.units[..n], &s.track.sampled_at[..n]);
        pack_values(&s.values, &mut self.values);
        self.units.clear();
        if units.iter().any(|u| s.serials.get(*u).is_some()) {
            pack_units(units, &s.serials, &mut self.units);
        }
        self.times.clear();
        if times.iter().any(|t| *t != times[0]) {
            pack_times(times, &mut self.times);
        }
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
                    sm.n, sm.mean, sm.m2, sm.min_value, sm.max_value \
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
