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

use super::{NewSample, Result, StoreError};
use crate::lotfile::Stamp;

const INSERT_VALUES: &str = "INSERT INTO sample_values (sample_id, values_json, units_json, \
     sampled_at_json) VALUES (?1, ?2, ?3, ?4)";

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
        pack_values(&s.values, &mut self.values);
        self.units.clear();
        if s.units.iter().any(|u| s.serials.get(*u).is_some()) {
            pack_units(s, &mut self.units);
        }
        self.times.clear();
        if s.sampled_at.iter().any(|t| *t != s.sampled_at[0]) {
            pack_times(&s.sampled_at, &mut self.times);
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

fn pack_units(s: &NewSample, out: &mut String) {
    out.push('[');
    for (k, unit) in s.units.iter().enumerate() {
        if k > 0 {
            out.push(',');
        }
        match s.serials.get(*unit) {
            Some(serial) => push_json_string(serial, out),
            None => out.push_str("null"),
        }
    }
    out.push(']');
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
        match last.as_ref().and_then(|(_, text)| text.as_deref()) {
            Some(text) => push_json_string(text, out),
            None => out.push_str("null"),
        }
    }
    out.push(']');
}

/// `text` as a JSON string: quotes, backslashes and control characters escaped.
fn push_json_string(text: &str, out: &mut String) {
    out.push('"');
    for c in text.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            c if u32::from(c) < 0x20 => {
                out.push_str(&format!("\\u{:04x}", u32::from(c)));
            }
            c => out.push(c),
        }
    }
    out.push('"');
}

/// The numbers of a `values_json` array, in seq order; None when the text is not an array of
/// finite numbers. Rust's float parsing is correctly rounded, so the stored bits come back.
pub(super) fn unpack_values(text: &str) -> Option<Vec<f64>> {
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
        let values = text
            .as_str()
            .ok()
            .and_then(unpack_values)
            .ok_or_else(|| {
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

#[cfg(test)]
mod tests {
    use super::*;

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
        assert!(text[1..text.len() - 1]
            .split(',')
            .all(|v| v.contains('.') || v.contains('e')));
        pack_values(&[], &mut text);
        assert_eq!(unpack_values(&text), Some(vec![]));
        assert_eq!(unpack_values("[1.0,x]"), None);
        assert_eq!(unpack_values("1.0"), None);
    }

    #[test]
    fn serials_are_escaped_as_json_strings() {
        let mut out = String::new();
        push_json_string("a\"b\\c\u{1}é", &mut out);
        assert_eq!(out, r#""a\"b\\c\u0001é""#);
        let parsed: String = serde_json::from_str(&out).unwrap();
        assert_eq!(parsed, "a\"b\\c\u{1}é");
    }
}
