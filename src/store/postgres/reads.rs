//! What the read commands and pages ask of a PostgreSQL history: the same rows, in the same
//! order and with the same texts as the SQLite backend gives (`store/sqlite.rs`, `charts.rs`,
//! `views.rs`, `history.rs`), so the read commands print the same on both.
//!
//! Text sorts and compares by bytes as in SQLite (the schema's text columns are `COLLATE
//! "C"`). Where SQLite turns a number into text (the outlier notes of `history`), the text is
//! made with SQLite's own formatter, so it is the same byte for byte.

use std::collections::HashMap;
use std::ffi::CStr;

use futures_util::TryStreamExt;
use sqlx::Row;
use sqlx::postgres::PgRow;

use super::super::sqlite::charts::{EVAL_COLUMNS, eval_from_row, prefixed};
use super::*;

impl Db {
    /// Alerts, newest first, each with its events and acknowledgements (oldest first).
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
        let mut events = self.alert_events(&ids).await?;
        let mut acks = self.alert_acks(&ids).await?;
        for a in &mut alerts {
            a.events = events.remove(&a.id).unwrap_or_default();
            a.acknowledgements = acks.remove(&a.id).unwrap_or_default();
        }
        Ok(alerts)
    }

    /// The events of the given alerts, by alert, oldest first.
    async fn alert_events(&self, ids: &[i64]) -> Result<HashMap<i64, Vec<EventRow>>> {
        let rows = sqlx::query(
            "SELECT ev.alert_id, ev.kind, ev.at, l.code FROM alert_event ev \
             LEFT JOIN evaluation e ON e.id = ev.evaluation_id \
             LEFT JOIN sample sm ON sm.id = e.sample_id LEFT JOIN lot l ON l.id = sm.lot_id \
             WHERE ev.alert_id = ANY($1) ORDER BY ev.id",
        )
        .bind(ids)
        .fetch_all(&self.pool)
        .await
        .doing("listing alert events")?;
        let mut events: HashMap<i64, Vec<EventRow>> = HashMap::new();
        for r in &rows {
            events.entry(r.get(0)).or_default().push(EventRow {
                kind: r.get(1),
                at: r.get(2),
                lot: r.get(3),
            });
        }
        Ok(events)
    }

    /// The acknowledgements of the given alerts, by alert, oldest first.
    async fn alert_acks(&self, ids: &[i64]) -> Result<HashMap<i64, Vec<AckRow>>> {
        let rows = sqlx::query(
            "SELECT alert_id, acked_by, acked_at, note FROM alert_ack \
             WHERE alert_id = ANY($1) ORDER BY id",
        )
        .bind(ids)
        .fetch_all(&self.pool)
        .await
        .doing("listing acknowledgements")?;
        let mut acks: HashMap<i64, Vec<AckRow>> = HashMap::new();
        for r in &rows {
            acks.entry(r.get(0)).or_default().push(AckRow {
                by: r.get(1),
                at: r.get(2),
                note: r.get(3),
            });
        }
        Ok(acks)
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

    /// Records an acknowledgement; false when no alert has that id (one statement: the
    /// acknowledgement is written only with its alert).
    pub async fn acknowledge(&self, alert_id: i64, by: &str, at: &str, note: &str) -> Result<bool> {
        let done = sqlx::query(
            "INSERT INTO alert_ack (alert_id, acked_at, acked_by, note) \
             SELECT id, $2, $3, $4 FROM alert WHERE id = $1",
        )
        .bind(alert_id)
        .bind(at)
        .bind(by)
        .bind(note)
        .execute(&self.pool)
        .await
        .doing("recording an acknowledgement")?;
        Ok(done.rows_affected() > 0)
    }

    /// Hands every lot of a source (optionally one characteristic) to `each` in series order,
    /// as SQLite's `history::each_lot` does: one read snapshot, the lots streamed from the
    /// server and each handed over borrowed from its row. The first error of `each` stops the
    /// read and is returned in `Ok`.
    pub async fn history_each<E>(
        &self,
        source: &str,
        characteristic: Option<&str>,
        mut each: impl FnMut(&HistoryLot<'_>) -> std::result::Result<(), E>,
    ) -> Result<std::result::Result<(), E>> {
        const DOING: &str = "reading history";
        let mut tx = self.pool.begin().await.doing(DOING)?;
        sqlx::query("SET TRANSACTION ISOLATION LEVEL REPEATABLE READ, READ ONLY")
            .execute(&mut *tx)
            .await
            .doing(DOING)?;
        let series: Vec<HistorySeries> = sqlx::query(HISTORY_SERIES)
            .bind(source)
            .bind(characteristic)
            .fetch_all(&mut *tx)
            .await
            .doing(DOING)?
            .iter()
            .map(|r| HistorySeries {
                id: r.get(0),
                source_id: r.get(1),
                source: r.get(2),
                characteristic: r.get(3),
            })
            .collect();
        for s in &series {
            let notes = history_notes(&mut tx, s.id).await?;
            let mut rows = sqlx::query(HISTORY_LOTS)
                .bind(s.source_id)
                .bind(s.id)
                .fetch(&mut *tx);
            while let Some(row) = rows.try_next().await.doing(DOING)? {
                let lot = history_lot(&row, s, &notes).doing(DOING)?;
                if let Err(e) = each(&lot) {
                    return Ok(Err(e));
                }
            }
        }
        tx.commit().await.doing(DOING)?;
        Ok(Ok(()))
    }

    /// The last `limit` lots of the series `source` × `characteristic`, oldest first, in
    /// series order (sampling time, else arrival, then lot code). "Significant" is the mean
    /// decision's where there is one (SQLite's scalar subquery reads the evaluations of a
    /// sample along its `(sample_id, kind)` index, so the mean row comes first).
    pub async fn recent_lot_means(
        &self,
        source: &str,
        characteristic: &str,
        limit: i64,
    ) -> Result<Vec<LotMeanRow>> {
        let rows = sqlx::query(
            "SELECT l.code, l.sampled_at, sm.n, sm.mean, \
                    EXISTS (SELECT 1 FROM baseline_lot bl WHERE bl.sample_id = sm.id), \
                    COALESCE((SELECT e.significant FROM evaluation e WHERE e.sample_id = sm.id \
                              ORDER BY e.kind LIMIT 1), 0) \
             FROM sample sm JOIN lot l ON l.id = sm.lot_id \
             JOIN series se ON se.id = sm.series_id \
             JOIN source src ON src.id = se.source_id \
             JOIN characteristic ch ON ch.id = se.characteristic_id \
             WHERE src.name = $1 AND ch.name = $2 \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at) DESC, \
                      l.code DESC LIMIT $3",
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
                baseline: r.get::<bool, _>(4),
                significant: r.get::<i64, _>(5) != 0,
            })
            .collect();
        out.reverse();
        Ok(out)
    }

    /// Every series (of one source, when given) with its counts and open alerts, by source
    /// and characteristic name.
    pub async fn series_list(&self, source: Option<&str>) -> Result<Vec<SeriesRow>> {
        let rows = sqlx::query(
            "SELECT se.id, src.name, ch.name, \
               (SELECT COUNT(*) FROM sample sm WHERE sm.series_id = se.id), \
               (SELECT MAX(COALESCE(l.sampled_at, l.first_seen_at)) \
                FROM sample sm JOIN lot l ON l.id = sm.lot_id WHERE sm.series_id = se.id), \
               COALESCE((SELECT b.lot_count FROM baseline b WHERE b.series_id = se.id \
                AND b.retired_at IS NULL), 0), \
               (SELECT a.id FROM alert a WHERE a.series_id = se.id AND a.kind = 'mean' \
                AND a.state = 'open'), \
               (SELECT a.id FROM alert a WHERE a.series_id = se.id AND a.kind = 'spread' \
                AND a.state = 'open'), \
               (SELECT COUNT(*) FROM outlier o JOIN sample sm ON sm.id = o.sample_id \
                WHERE sm.series_id = se.id) \
             FROM series se JOIN source src ON src.id = se.source_id \
             JOIN characteristic ch ON ch.id = se.characteristic_id \
             WHERE $1::TEXT IS NULL OR src.name = $1 \
             ORDER BY src.name, ch.name",
        )
        .bind(source)
        .fetch_all(&self.pool)
        .await
        .doing("reading the series")?;
        Ok(rows
            .iter()
            .map(|r| SeriesRow {
                id: r.get(0),
                source: r.get(1),
                characteristic: r.get(2),
                lots: r.get(3),
                last_lot_at: r.get(4),
                baseline_lots: r.get(5),
                open_mean: r.get(6),
                open_spread: r.get(7),
                outliers: r.get(8),
            })
            .collect())
    }

    /// The design of a series' current baseline, if one is frozen.
    pub async fn series_design(&self, series_id: i64) -> Result<Option<Design>> {
        let row = sqlx::query(&format!(
            "SELECT {DESIGN_COLUMNS} FROM baseline b \
             WHERE b.series_id = $1 AND b.retired_at IS NULL"
        ))
        .bind(series_id)
        .fetch_optional(&self.pool)
        .await
        .doing("reading a series design")?;
        Ok(row.map(|r| design_from_row(&r, 0)))
    }

    /// The latest `limit` lots of a series whose sampling date (YYYY-MM-DD, else arrival) lies
    /// within `from`..=`to` (each optional), oldest first, in series order. A lot's openings
    /// are listed as SQLite's `group_concat` reads them: by evaluation kind, then event.
    pub async fn chart_lots(
        &self,
        series_id: i64,
        from: Option<&str>,
        to: Option<&str>,
        limit: i64,
    ) -> Result<Vec<ChartLot>> {
        let sql = format!(
            "SELECT sm.id, l.code, COALESCE(l.sampled_at, l.first_seen_at), \
                    sm.n, sm.mean, sm.m2, sm.min_value, sm.max_value, \
                    EXISTS (SELECT 1 FROM baseline_lot bl JOIN baseline b ON b.id = bl.baseline_id \
                            AND b.retired_at IS NULL WHERE bl.sample_id = sm.id), \
                    (SELECT COUNT(*) FROM outlier o WHERE o.sample_id = sm.id), \
                    (SELECT COUNT(*) FROM outlier o WHERE o.sample_id = sm.id AND o.set_aside = 1), \
                    (SELECT string_agg(x.kind || ':' || ev.alert_id, ',' \
                                       ORDER BY x.kind, ev.id) \
                     FROM alert_event ev JOIN evaluation x ON x.id = ev.evaluation_id \
                     WHERE x.sample_id = sm.id AND ev.kind = 'opened'), \
                    {}, {} \
             FROM sample sm JOIN lot l ON l.id = sm.lot_id \
             LEFT JOIN evaluation em ON em.sample_id = sm.id AND em.kind = 'mean' \
             LEFT JOIN evaluation es ON es.sample_id = sm.id AND es.kind = 'spread' \
             WHERE sm.series_id = $1 \
               AND ($2::TEXT IS NULL \
                    OR substr(COALESCE(l.sampled_at, l.first_seen_at), 1, 10) >= $2) \
               AND ($3::TEXT IS NULL \
                    OR substr(COALESCE(l.sampled_at, l.first_seen_at), 1, 10) <= $3) \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at) DESC, \
                      l.code DESC LIMIT $4",
            prefixed("em"),
            prefixed("es")
        );
        let rows = sqlx::query(&sql)
            .bind(series_id)
            .bind(from)
            .bind(to)
            .bind(limit)
            .fetch_all(&self.pool)
            .await
            .doing("reading a series' lots")?;
        rows.iter().rev().map(chart_lot).collect()
    }

    /// Replaces the table `characteristic_unit` with the config's units of measure, so that
    /// users' own SQL (the views) shows them. The table is locked against other writers (the
    /// daemons of other sites starting meanwhile) until the commit, so the last writer's units
    /// are the table, whole; readers are not held up.
    pub async fn set_units(&self, units: &BTreeMap<String, String>) -> Result<()> {
        let mut tx = self
            .pool
            .begin()
            .await
            .doing("recording units of measure")?;
        sqlx::query("LOCK TABLE characteristic_unit IN SHARE ROW EXCLUSIVE MODE")
            .execute(&mut *tx)
            .await
            .doing("locking the units of measure")?;
        sqlx::query("DELETE FROM characteristic_unit")
            .execute(&mut *tx)
            .await
            .doing("clearing units of measure")?;
        let (names, symbols): (Vec<&str>, Vec<&str>) =
            units.iter().map(|(c, u)| (c.as_str(), u.as_str())).unzip();
        sqlx::query(
            "INSERT INTO characteristic_unit (characteristic, unit) \
             SELECT * FROM unnest($1::TEXT[], $2::TEXT[])",
        )
        .bind(&names)
        .bind(&symbols)
        .execute(&mut *tx)
        .await
        .doing("recording a unit of measure")?;
        tx.commit().await.doing("committing units of measure")
    }

    /// Every decision on the lots of a source (one characteristic, or all), by characteristic,
    /// lot order and kind (mean first).
    pub async fn lot_decisions(
        &self,
        source: &str,
        characteristic: Option<&str>,
    ) -> Result<Vec<LotDecision>> {
        let rows = sqlx::query(
            "SELECT characteristic, lot, kind, test, statistic, p_value, p_adjusted, threshold, \
                    significant, cusum_upper, cusum_lower, cusum_h, cusum_signal, alert_id \
             FROM decision_view WHERE source = $1 AND ($2::TEXT IS NULL OR characteristic = $2) \
             ORDER BY characteristic, sampled_at, lot, \
                      kind",
        )
        .bind(source)
        .bind(characteristic)
        .fetch_all(&self.pool)
        .await
        .doing("reading decisions")?;
        Ok(rows
            .iter()
            .map(|r| LotDecision {
                characteristic: r.get(0),
                lot: r.get(1),
                kind: r.get(2),
                test: r.get(3),
                statistic: r.get(4),
                p_value: r.get(5),
                p_adjusted: r.get(6),
                threshold: r.get(7),
                significant: r.get::<i64, _>(8) != 0,
                cusum_upper: r.get(9),
                cusum_lower: r.get(10),
                cusum_h: r.get(11),
                cusum_signal: r.get::<i64, _>(12) != 0,
                alert_id: r.get(13),
            })
            .collect())
    }
}

/// One row of [`Db::chart_lots`]' query.
fn chart_lot(r: &PgRow) -> Result<ChartLot> {
    let n = EVAL_COLUMNS.split(", ").count();
    let opened: Option<String> = r.get(11);
    Ok(ChartLot {
        sample_id: r.get(0),
        lot: r.get(1),
        order_time: r.get(2),
        summary: summary_from_row(r, 3)?,
        baseline: r.cell::<bool>(8),
        outliers: r.get(9),
        set_aside: r.get(10),
        opened: opened
            .unwrap_or_default()
            .split(',')
            .filter_map(|s| {
                let (kind, id) = s.split_once(':')?;
                Some((kind.to_string(), id.parse().ok()?))
            })
            .collect(),
        mean: eval_from_row(r, 12),
        spread: eval_from_row(r, 12 + n),
    })
}

// `history`, as `store/sqlite/history.rs` reads it.

/// A series of the source, with the names its rows carry.
struct HistorySeries {
    id: i64,
    source_id: i64,
    source: String,
    characteristic: String,
}

/// What is gathered once per series: texts by sample id, and the alert each decision opened,
/// joined or repeated, by sample id and kind (`true` for spread).
#[derive(Default)]
struct HistoryNotes {
    events: HashMap<i64, String>,
    outliers: HashMap<i64, String>,
    alerts: HashMap<(i64, bool), i64>,
}

const HISTORY_SERIES: &str = "SELECT se.id, s.id, s.name, c.name FROM series se \
     JOIN source s ON s.id = se.source_id JOIN characteristic c ON c.id = se.characteristic_id \
     WHERE s.name = $1 AND ($2::TEXT IS NULL OR c.name = $2) ORDER BY c.name";

/// Each sample's alert events, e.g. "opened mean alert 3; resolved spread alert 2", in event
/// order.
const HISTORY_EVENTS: &str = "SELECT xe.sample_id, \
     string_agg(ev.kind || ' ' || xa.kind || ' alert ' || xa.id, '; ' ORDER BY ev.id) \
     FROM alert xa JOIN alert_event ev ON ev.alert_id = xa.id \
     JOIN evaluation xe ON xe.id = ev.evaluation_id \
     WHERE xa.series_id = $1 GROUP BY xe.sample_id";

/// The outliers of the series' samples, by sample and unit, with the unit's serial (array
/// element `seq + 1`, NULL when the unit has none). Their notes are written in Rust
/// ([`outlier_note`]), with SQLite's number formats.
const HISTORY_OUTLIERS: &str = "SELECT o.sample_id, o.seq, om.unit_serials[(o.seq + 1)::INT], \
     o.value, o.distance, o.set_aside \
     FROM outlier o JOIN sample os ON os.id = o.sample_id \
     LEFT JOIN sample_values om ON om.sample_id = o.sample_id \
     WHERE os.series_id = $1 ORDER BY o.sample_id, o.seq";

/// The alert of each decision (as `decision_view` has it): the first event (by id) that opened,
/// joined or repeated an alert.
const HISTORY_ALERTS: &str = "SELECT DISTINCT ON (ev.evaluation_id) \
     xe.sample_id, xe.kind = 'spread', ev.alert_id FROM alert xa \
     JOIN alert_event ev ON ev.alert_id = xa.id JOIN evaluation xe ON xe.id = ev.evaluation_id \
     WHERE xa.series_id = $1 AND ev.kind IN ('opened', 'attached', 'repeated') \
     ORDER BY ev.evaluation_id, ev.id";

/// The lots of one series in series order (earliest sampling time, else arrival, then code),
/// each with its role and its mean decision `e` and spread decision `es` (the columns
/// [`history_test`] reads, from column 9 and 19).
const HISTORY_LOTS: &str = "SELECT sm.id, l.code, l.sampled_at, sm.n, sm.mean, sm.m2, \
     sm.min_value, sm.max_value, \
     CASE WHEN EXISTS (SELECT 1 FROM baseline_lot bl WHERE bl.sample_id = sm.id) \
          THEN 'baseline' WHEN e.id IS NOT NULL THEN 'tested' ELSE 'pending' END, \
     e.test, e.statistic, e.p_value, e.p_adjusted, e.level, e.significant, \
     e.cusum_upper, e.cusum_lower, e.cusum_h, e.cusum_signal, \
     es.test, es.statistic, es.p_value, es.p_adjusted, es.level, es.significant, \
     es.cusum_upper, es.cusum_lower, es.cusum_h, es.cusum_signal \
     FROM lot l JOIN sample sm ON sm.lot_id = l.id AND sm.series_id = $2 \
     LEFT JOIN evaluation e ON e.sample_id = sm.id AND e.kind = 'mean' \
     LEFT JOIN evaluation es ON es.sample_id = sm.id AND es.kind = 'spread' \
     WHERE l.source_id = $1 \
     ORDER BY COALESCE(l.sampled_at, l.first_seen_at), l.code";

/// Where [`HISTORY_LOTS`] has each kind's decision columns: test, statistic, p_value,
/// p_adjusted, level, significant, cusum_upper, cusum_lower, cusum_h, cusum_signal.
const HISTORY_DECIDED: [(&str, usize); 2] = [("mean", 9), ("spread", 19)];

/// The events, outlier notes and decision alerts of one series.
async fn history_notes(
    tx: &mut sqlx::Transaction<'static, sqlx::Postgres>,
    series_id: i64,
) -> Result<HistoryNotes> {
    let mut notes = HistoryNotes::default();
    let rows = sqlx::query(HISTORY_EVENTS)
        .bind(series_id)
        .fetch_all(&mut **tx)
        .await
        .doing("reading alert events")?;
    notes.events = rows.iter().map(|r| (r.get(0), r.get(1))).collect();
    let rows = sqlx::query(HISTORY_OUTLIERS)
        .bind(series_id)
        .fetch_all(&mut **tx)
        .await
        .doing("reading outliers")?;
    for r in &rows {
        let note = outlier_note(r.get(1), r.get(2), r.get(3), r.get(4), r.get(5));
        let text = notes.outliers.entry(r.get(0)).or_default();
        if !text.is_empty() {
            text.push_str("; ");
        }
        text.push_str(&note);
    }
    let rows = sqlx::query(HISTORY_ALERTS)
        .bind(series_id)
        .fetch_all(&mut **tx)
        .await
        .doing("reading alerts")?;
    notes.alerts = rows
        .iter()
        .map(|r| ((r.get(0), r.get(1)), r.get(2)))
        .collect();
    Ok(notes)
}

/// One outlier as SQLite's `history` writes it: "U17 = 31.5 (9.2 sd, set aside)", the unit
/// named `#seq` when it has no serial.
fn outlier_note(
    seq: i64,
    serial: Option<String>,
    value: f64,
    distance: f64,
    set_aside: i64,
) -> String {
    let unit = serial.unwrap_or_else(|| format!("#{seq}"));
    let aside = if set_aside == 1 { ", set aside" } else { "" };
    format!(
        "{unit} = {} ({} sd{aside})",
        sqlite_printf(c"%!.15g", value),
        sqlite_printf(c"%.1f", distance)
    )
}

/// `value` formatted by SQLite's own printf with `format` (one double conversion), so a
/// number becomes the same text as in SQLite's SQL: `%!.15g` is how SQLite turns a REAL into
/// text (`0.1 + 0.2` gives `0.3`, `31.0` stays `31.0`), `%.1f` is `printf('%.1f', x)`.
fn sqlite_printf(format: &CStr, value: f64) -> String {
    // SAFETY: every format passed here has exactly one conversion, of a double, which is what
    // is passed; `sqlite3_mprintf` returns a NUL-terminated string allocated by SQLite (or
    // null when out of memory), read here and then released with `sqlite3_free`.
    unsafe {
        let text = rusqlite::ffi::sqlite3_mprintf(format.as_ptr(), value);
        if text.is_null() {
            return value.to_string();
        }
        let owned = CStr::from_ptr(text).to_string_lossy().into_owned();
        rusqlite::ffi::sqlite3_free(text.cast());
        owned
    }
}

/// One row of [`HISTORY_LOTS`] as a lot borrowed from the row.
fn history_lot<'a>(
    row: &'a PgRow,
    s: &'a HistorySeries,
    notes: &'a HistoryNotes,
) -> std::result::Result<HistoryLot<'a>, sqlx::Error> {
    let sample: i64 = row.try_get(0)?;
    let n: i64 = row.try_get(3)?;
    let m2: f64 = row.try_get(5)?;
    let decisions = [
        history_test(row, HISTORY_DECIDED[0], notes.alerts.get(&(sample, false)))?,
        history_test(row, HISTORY_DECIDED[1], notes.alerts.get(&(sample, true)))?,
    ];
    let mean = decisions[0].as_ref();
    Ok(HistoryLot {
        source: &s.source,
        characteristic: &s.characteristic,
        lot: row.try_get(1)?,
        sampled_at: row.try_get(2)?,
        n,
        mean: row.try_get(4)?,
        sd: sd(n, m2),
        min: row.try_get(6)?,
        max: row.try_get(7)?,
        role: row.try_get(8)?,
        p_value: mean.and_then(|d| d.p_value),
        p_adjusted: mean.and_then(|d| d.p_adjusted),
        significant: mean.map(|d| d.significant),
        alert_id: mean.and_then(|d| d.alert_id),
        events: notes.events.get(&sample).map_or("", String::as_str),
        outliers: notes.outliers.get(&sample).map_or("", String::as_str),
        decisions,
    })
}

/// The decision of one kind in a row of [`HISTORY_LOTS`] (its columns from `at`), if one was
/// made.
fn history_test<'a>(
    row: &'a PgRow,
    (kind, at): (&'static str, usize),
    alert_id: Option<&i64>,
) -> std::result::Result<Option<LotTest<'a>>, sqlx::Error> {
    let Some(test) = row.try_get::<Option<&str>, _>(at)? else {
        return Ok(None);
    };
    Ok(Some(LotTest {
        kind,
        test,
        statistic: row.try_get(at + 1)?,
        p_value: row.try_get(at + 2)?,
        p_adjusted: row.try_get(at + 3)?,
        threshold: row.try_get(at + 4)?,
        significant: row.try_get::<i64, _>(at + 5)? != 0,
        cusum_upper: row.try_get(at + 6)?,
        cusum_lower: row.try_get(at + 7)?,
        cusum_h: row.try_get(at + 8)?,
        cusum_signal: row.try_get::<i64, _>(at + 9)? != 0,
        alert_id: alert_id.copied(),
    }))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The numbers SQLite's `||` and `printf('%.1f', …)` write (checked against SQLite itself
    /// in `tests/pg_reads.rs`).
    #[test]
    fn numbers_are_written_as_sqlite_writes_them() {
        assert_eq!(sqlite_printf(c"%!.15g", 0.1 + 0.2), "0.3");
        assert_eq!(sqlite_printf(c"%!.15g", 31.0), "31.0");
        assert_eq!(sqlite_printf(c"%!.15g", -1.5e-7), "-1.5e-07");
        assert_eq!(sqlite_printf(c"%.1f", 9.25), "9.3");
        assert_eq!(
            outlier_note(3, None, 31.5, 9.21, 1),
            "#3 = 31.5 (9.2 sd, set aside)"
        );
        assert_eq!(
            outlier_note(0, Some("U1".into()), 2.0, 4.0, 0),
            "U1 = 2.0 (4.0 sd)"
        );
    }
}
