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
use crate::lotfile::Timestamp;

const INSERT_MEASUREMENT: &str =
    "INSERT INTO measurement (sample_id, seq, unit, value, sampled_at) VALUES (?1, ?2, ?3, ?4, ?5)";

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

/// Inserts the unit values of each `(sample id, sample)` in sequence order.
pub(super) fn insert_measurements(
    handle: NonNull<sqlite3>,
    samples: &[(i64, &NewSample)],
) -> Result<()> {
    let conn = borrow(handle)?;
    let mut stmt = conn
        .prepare(INSERT_MEASUREMENT)
        .doing("preparing the insert of unit values")?;
    // Units of a lot often share one sampling time: it is formatted and bound once.
    let mut bound_time: Option<Option<Timestamp>> = None;
    for (id, s) in samples {
        stmt.raw_bind_parameter(1, id)
            .doing("recording measurements")?;
        for (k, value) in s.values.iter().enumerate() {
            let time = s.track.sampled_at[k].get();
            if bound_time != Some(time) {
                stmt.raw_bind_parameter(5, time.map(|t| t.to_rfc3339()))
                    .doing("recording measurements")?;
                bound_time = Some(time);
            }
            stmt.raw_bind_parameter(2, k as i64)
                .doing("recording measurements")?;
            stmt.raw_bind_parameter(3, s.serials.get(s.track.units[k]))
                .doing("recording measurements")?;
            stmt.raw_bind_parameter(4, value)
                .doing("recording measurements")?;
            stmt.raw_execute().doing("recording measurements")?;
        }
    }
    Ok(())
}

/// `(seq, value)` of every unit of the given samples, in seq order, read in one snapshot with
/// one prepared statement stepped per sample (an index seek each).
pub(super) fn unit_values(
    handle: NonNull<sqlite3>,
    sample_ids: &[i64],
) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
    let conn = borrow(handle)?;
    let snapshot = conn.unchecked_transaction().doing("reading unit values")?;
    let mut stmt = snapshot
        .prepare("SELECT seq, value FROM measurement WHERE sample_id = ?1 ORDER BY seq")
        .doing("reading unit values")?;
    let mut out = HashMap::with_capacity(sample_ids.len());
    for id in sample_ids {
        let mut units = Vec::new();
        let mut rows = stmt.query([id]).doing("reading unit values")?;
        while let Some(row) = rows.next().doing("reading unit values")? {
            units.push((
                row.get(0).doing("reading unit values")?,
                row.get(1).doing("reading unit values")?,
            ));
        }
        if !units.is_empty() {
            out.insert(*id, units);
        }
    }
    drop(stmt);
    snapshot.commit().doing("reading unit values")?;
    Ok(out)
}
