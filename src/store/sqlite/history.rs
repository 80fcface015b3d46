//! The history read model: one row per lot of a source's series, streamed to a caller's sink.
//!
//! A long series has 100,000 lots and more. Every row is read on the connection's own SQLite
//! handle (as in [`super::bulk`]) and handed to the sink as borrowed text and numbers, so no
//! row is copied into owned strings and none is kept after the sink has seen it. Lots come in
//! series order straight from the index `lot_source_time` (no sort); the few alert events,
//! alert ids and outliers of a series are gathered once before its lots are walked. A lot's
//! decisions (its mean and spread evaluations, as `decision_view` shows them) come in the same
//! row.

use std::collections::HashMap;
use std::ptr::NonNull;

use rusqlite::ffi::sqlite3;
use rusqlite::{Connection, Row};

use super::bulk::{Doing, borrow};
use super::{HistoryRow, Result};

/// One lot of a series as `history` shows it, borrowed from the row being read.
#[derive(Debug, Clone, Copy)]
pub struct HistoryLot<'a> {
    pub source: &'a str,
    pub characteristic: &'a str,
    pub lot: &'a str,
    pub sampled_at: Option<&'a str>,
    pub n: i64,
    pub mean: f64,
    pub sd: Option<f64>,
    pub min: f64,
    pub max: f64,
    /// "baseline", "tested" or "pending".
    pub role: &'a str,
    pub p_value: Option<f64>,
    pub p_adjusted: Option<f64>,
    pub significant: Option<bool>,
    pub alert_id: Option<i64>,
    /// The alert events this lot's decisions made (empty when none).
    pub events: &'a str,
    /// The lot's units found as outliers (empty when none).
    pub outliers: &'a str,
    /// The lot's mean decision and its spread decision, each where one was made.
    pub decisions: [Option<LotTest<'a>>; 2],
}

/// One decision on a lot, with the names and meanings of `decision_view`'s columns.
#[derive(Debug, Clone, Copy)]
pub struct LotTest<'a> {
    /// "mean" or "spread".
    pub kind: &'static str,
    /// The test that decided ("cusum" when the CUSUM alone signalled).
    pub test: &'a str,
    pub statistic: Option<f64>,
    pub p_value: Option<f64>,
    pub p_adjusted: Option<f64>,
    /// The level the adjusted (else raw) p-value was compared with.
    pub threshold: f64,
    pub significant: bool,
    /// CUSUM sums after this lot and the decision interval (mean decisions with a CUSUM).
    pub cusum_upper: Option<f64>,
    pub cusum_lower: Option<f64>,
    pub cusum_h: Option<f64>,
    pub cusum_signal: bool,
    /// The alert this decision opened, joined or repeated.
    pub alert_id: Option<i64>,
}

impl<'a> HistoryLot<'a> {
    /// The decisions made, the mean decision first.
    pub fn decisions(&self) -> impl Iterator<Item = &LotTest<'a>> {
        self.decisions.iter().flatten()
    }

    /// The lot without its decisions, as owned text ([`crate::store::Store::history`]).
    pub fn to_owned_row(&self) -> HistoryRow {
        HistoryRow {
            source: self.source.to_string(),
            characteristic: self.characteristic.to_string(),
            lot: self.lot.to_string(),
            sampled_at: self.sampled_at.map(str::to_string),
            n: self.n,
            mean: self.mean,
            sd: self.sd,
            min: self.min,
            max: self.max,
            role: self.role.to_string(),
            p_value: self.p_value,
            p_adjusted: self.p_adjusted,
            significant: self.significant,
            alert_id: self.alert_id,
            events: self.events.to_string(),
            outliers: self.outliers.to_string(),
        }
    }
}

/// A series of the source, with the names its rows carry.
struct Series {
    id: i64,
    source_id: i64,
    source: String,
    characteristic: String,
}

/// What is gathered once per series: texts by sample id, and the alert each decision opened,
/// joined or repeated, by sample id and kind (`true` for spread).
#[derive(Default)]
struct SeriesNotes {
    events: HashMap<i64, String>,
    outliers: HashMap<i64, String>,
    alerts: HashMap<(i64, bool), i64>,
}

const SERIES: &str = "SELECT se.id, s.id, s.name, c.name FROM series se \
     JOIN source s ON s.id = se.source_id JOIN characteristic c ON c.id = se.characteristic_id \
     WHERE s.name = ?1 AND (?2 IS NULL OR c.name = ?2) ORDER BY c.name";

const EVENTS: &str = "SELECT sample_id, group_concat(text, '; ') FROM ( \
     SELECT xe.sample_id, ev.kind || ' ' || xa.kind || ' alert ' || xa.id AS text \
     FROM alert xa JOIN alert_event ev ON ev.alert_id = xa.id \
     JOIN evaluation xe ON xe.id = ev.evaluation_id \
     WHERE xa.series_id = ?1 ORDER BY xe.sample_id, ev.id) GROUP BY sample_id";

const OUTLIERS: &str = "SELECT sample_id, group_concat(text, '; ') FROM ( \
     SELECT o.sample_id, COALESCE(om.units_json ->> o.seq, '#' || o.seq) || ' = ' || o.value \
            || ' (' || printf('%.1f', o.distance) || ' sd' \
            || CASE WHEN o.set_aside = 1 THEN ', set aside' ELSE '' END || ')' AS text \
     FROM outlier o CROSS JOIN sample os ON os.id = o.sample_id \
     LEFT JOIN sample_values om ON om.sample_id = o.sample_id \
     WHERE os.series_id = ?1 ORDER BY o.sample_id, o.seq) GROUP BY sample_id";

/// The alert of each decision (as `decision_view` has it): the first event (by id) that opened,
/// joined or repeated an alert.
const ALERTS: &str = "SELECT xe.sample_id, xe.kind = 'spread', ev.alert_id FROM alert xa \
     JOIN alert_event ev ON ev.alert_id = xa.id JOIN evaluation xe ON xe.id = ev.evaluation_id \
     WHERE xa.series_id = ?1 AND ev.kind IN ('opened', 'attached', 'repeated') \
     ORDER BY ev.id DESC";

/// The lots of one series in series order (earliest sampling time, else arrival, then code),
/// walked along `lot_source_time`, each with its mean decision `e` and spread decision `es`
/// (the columns [`DECIDED`] reads, from column 9 and 19).
const LOTS: &str = "SELECT sm.id, l.code, l.sampled_at, sm.n, sm.mean, sm.m2, sm.min_value, \
     sm.max_value, \
     CASE WHEN EXISTS (SELECT 1 FROM baseline_lot bl WHERE bl.sample_id = sm.id) THEN 0 \
          WHEN e.id IS NOT NULL THEN 1 ELSE 2 END, \
     e.test, e.statistic, e.p_value, e.p_adjusted, e.level, e.significant, \
     e.cusum_upper, e.cusum_lower, e.cusum_h, e.cusum_signal, \
     es.test, es.statistic, es.p_value, es.p_adjusted, es.level, es.significant, \
     es.cusum_upper, es.cusum_lower, es.cusum_h, es.cusum_signal \
     FROM lot l CROSS JOIN sample sm ON sm.lot_id = l.id AND sm.series_id = ?2 \
     LEFT JOIN evaluation e ON e.sample_id = sm.id AND e.kind = 'mean' \
     LEFT JOIN evaluation es ON es.sample_id = sm.id AND es.kind = 'spread' \
     WHERE l.source_id = ?1 ORDER BY COALESCE(l.sampled_at, l.first_seen_at), l.code";

/// Where [`LOTS`] has each kind's decision columns: test, statistic, p_value, p_adjusted,
/// level, significant, cusum_upper, cusum_lower, cusum_h, cusum_signal.
const DECIDED: [(&str, usize); 2] = [("mean", 9), ("spread", 19)];

const ROLES: [&str; 3] = ["baseline", "tested", "pending"];

/// Hands every lot of `source` (one characteristic, or all in name order) to `each`, in one
/// read snapshot. Stops at the first error of `each` and returns it inside `Ok`.
pub(super) fn each_lot<E>(
    handle: NonNull<sqlite3>,
    source: &str,
    characteristic: Option<&str>,
    each: &mut dyn FnMut(&HistoryLot<'_>) -> std::result::Result<(), E>,
) -> Result<std::result::Result<(), E>> {
    const DOING: &str = "reading history";
    let conn = borrow(handle)?;
    let snapshot = conn.unchecked_transaction().doing(DOING)?;
    let series = series_of(&snapshot, source, characteristic)?;
    let mut lots = snapshot.prepare(LOTS).doing(DOING)?;
    for s in &series {
        let notes = notes_of(&snapshot, s.id)?;
        let mut rows = lots.query((s.source_id, s.id)).doing(DOING)?;
        while let Some(row) = rows.next().doing(DOING)? {
            let lot = lot_of(row, s, &notes).doing(DOING)?;
            if let Err(e) = each(&lot) {
                return Ok(Err(e));
            }
        }
    }
    Ok(Ok(()))
}

fn series_of(conn: &Connection, source: &str, characteristic: Option<&str>) -> Result<Vec<Series>> {
    let mut stmt = conn.prepare(SERIES).doing("reading history")?;
    let rows = stmt
        .query_map((source, characteristic), |r| {
            Ok(Series {
                id: r.get(0)?,
                source_id: r.get(1)?,
                source: r.get(2)?,
                characteristic: r.get(3)?,
            })
        })
        .doing("reading history")?;
    rows.collect::<rusqlite::Result<_>>()
        .doing("reading history")
}

fn notes_of(conn: &Connection, series_id: i64) -> Result<SeriesNotes> {
    let texts = |sql: &str| -> rusqlite::Result<HashMap<i64, String>> {
        let mut stmt = conn.prepare(sql)?;
        let rows = stmt.query_map([series_id], |r| Ok((r.get(0)?, r.get(1)?)))?;
        rows.collect()
    };
    let mut notes = SeriesNotes {
        events: texts(EVENTS).doing("reading alert events")?,
        outliers: texts(OUTLIERS).doing("reading outliers")?,
        alerts: HashMap::new(),
    };
    let mut stmt = conn.prepare(ALERTS).doing("reading alerts")?;
    let mut rows = stmt.query([series_id]).doing("reading alerts")?;
    // Latest first, so the earliest event of a decision is the one left in the map.
    while let Some(r) = rows.next().doing("reading alerts")? {
        let sample: i64 = r.get(0).doing("reading alerts")?;
        let spread: bool = r.get(1).doing("reading alerts")?;
        notes
            .alerts
            .insert((sample, spread), r.get(2).doing("reading alerts")?);
    }
    Ok(notes)
}

/// One row of [`LOTS`] as a borrowed lot.
fn lot_of<'a>(
    row: &'a Row<'_>,
    s: &'a Series,
    notes: &'a SeriesNotes,
) -> rusqlite::Result<HistoryLot<'a>> {
    let sample: i64 = row.get(0)?;
    let n: i64 = row.get(3)?;
    let m2: f64 = row.get(5)?;
    let role: usize = row.get(8)?;
    let decisions = [
        decision_of(row, DECIDED[0], notes.alerts.get(&(sample, false)))?,
        decision_of(row, DECIDED[1], notes.alerts.get(&(sample, true)))?,
    ];
    let mean = decisions[0].as_ref();
    Ok(HistoryLot {
        source: &s.source,
        characteristic: &s.characteristic,
        lot: row.get_ref(1)?.as_str()?,
        sampled_at: row.get_ref(2)?.as_str_or_null()?,
        n,
        mean: row.get(4)?,
        sd: (n > 1).then(|| (m2 / (n - 1) as f64).sqrt()),
        min: row.get(6)?,
        max: row.get(7)?,
        role: ROLES[role.min(2)],
        p_value: mean.and_then(|d| d.p_value),
        p_adjusted: mean.and_then(|d| d.p_adjusted),
        significant: mean.map(|d| d.significant),
        alert_id: mean.and_then(|d| d.alert_id),
        events: notes.events.get(&sample).map_or("", String::as_str),
        outliers: notes.outliers.get(&sample).map_or("", String::as_str),
        decisions,
    })
}

/// The decision of one kind in a row of [`LOTS`] (its columns from `at`), if one was made.
fn decision_of<'a>(
    row: &'a Row<'_>,
    (kind, at): (&'static str, usize),
    alert_id: Option<&i64>,
) -> rusqlite::Result<Option<LotTest<'a>>> {
    let Some(test) = row.get_ref(at)?.as_str_or_null()? else {
        return Ok(None);
    };
    Ok(Some(LotTest {
        kind,
        test,
        statistic: row.get(at + 1)?,
        p_value: row.get(at + 2)?,
        p_adjusted: row.get(at + 3)?,
        threshold: row.get(at + 4)?,
        significant: row.get::<_, i64>(at + 5)? != 0,
        cusum_upper: row.get(at + 6)?,
        cusum_lower: row.get(at + 7)?,
        cusum_h: row.get(at + 8)?,
        cusum_signal: row.get::<_, i64>(at + 9)? != 0,
        alert_id: alert_id.copied(),
    }))
}
