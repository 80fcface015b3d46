//! Read models for the report and the dashboard: the series with their state, and a series'
//! lots with the numbers of both its decisions (mean, spread), outliers and alert openings.

use sqlx::Row;

use super::{Cells, DESIGN_COLUMNS, Db, Design, Doing, Result, design_from_row, summary_from_row};
use crate::stats::Summary;

/// One series with its state, for an overview.
#[derive(Debug, Clone, serde::Serialize)]
pub struct SeriesRow {
    pub id: i64,
    pub source: String,
    pub characteristic: String,
    pub lots: i64,
    /// Sampling time (else arrival) of the newest lot.
    pub last_lot_at: Option<String>,
    /// Lots in the current baseline (0: not frozen yet).
    pub baseline_lots: i64,
    /// Ids of the open mean and spread alerts.
    pub open_mean: Option<i64>,
    pub open_spread: Option<i64>,
    /// Units found as outliers in the series.
    pub outliers: i64,
}

/// The numbers of one decision (kind mean or spread) on a lot.
#[derive(Debug, Clone, PartialEq)]
pub struct ChartEval {
    pub test: String,
    pub level: f64,
    pub family_size: i64,
    pub significant: bool,
    pub statistic: Option<f64>,
    pub df: Option<f64>,
    pub df2: Option<f64>,
    pub p_value: Option<f64>,
    pub p_adjusted: Option<f64>,
    /// The mean tested (test scale, outliers set aside).
    pub lot_mean: f64,
    pub lot_n: i64,
    pub estimate: Option<f64>,
    /// CUSUM upper and lower sums after the lot (before a restart) and h.
    pub cusum: Option<(f64, f64, f64)>,
    pub cusum_signal: bool,
    pub cpk: Option<[f64; 3]>,
}

/// One lot of a series for a chart.
#[derive(Debug, Clone)]
pub struct ChartLot {
    pub sample_id: i64,
    pub lot: String,
    /// Sampling time, else arrival of the lot's first file.
    pub order_time: String,
    pub summary: Summary,
    /// In the current baseline.
    pub baseline: bool,
    pub mean: Option<ChartEval>,
    pub spread: Option<ChartEval>,
    /// Units found as outliers, and how many of them were set aside.
    pub outliers: i64,
    pub set_aside: i64,
    /// Alerts this lot's decisions opened or reopened: (kind, id).
    pub opened: Vec<(String, i64)>,
}

/// The columns [`eval_from_row`] reads, in its order (both backends).
pub(in crate::store) const EVAL_COLUMNS: &str = "test, level, family_size, significant, statistic, df, df2, p_value, \
     p_adjusted, lot_mean, lot_n, estimate, cusum_upper, cusum_lower, cusum_h, cusum_signal, \
     cpk, cpk_low, cpk_high";

/// A decision's numbers from [`EVAL_COLUMNS`] starting at column `o` (None when the lot has
/// no decision of that kind: its columns are NULL).
pub(in crate::store) fn eval_from_row(r: &impl Cells, o: usize) -> Option<ChartEval> {
    let test: Option<String> = r.cell(o);
    let cusum = match (
        r.cell::<Option<f64>>(o + 12),
        r.cell::<Option<f64>>(o + 13),
        r.cell::<Option<f64>>(o + 14),
    ) {
        (Some(u), Some(l), Some(h)) => Some((u, l, h)),
        _ => None,
    };
    let cpk = match (
        r.cell::<Option<f64>>(o + 16),
        r.cell::<Option<f64>>(o + 17),
        r.cell::<Option<f64>>(o + 18),
    ) {
        (Some(a), Some(b), Some(c)) => Some([a, b, c]),
        _ => None,
    };
    Some(ChartEval {
        test: test?,
        level: r.cell(o + 1),
        family_size: r.cell(o + 2),
        significant: r.cell::<i64>(o + 3) != 0,
        statistic: r.cell(o + 4),
        df: r.cell(o + 5),
        df2: r.cell(o + 6),
        p_value: r.cell(o + 7),
        p_adjusted: r.cell(o + 8),
        lot_mean: r.cell(o + 9),
        lot_n: r.cell(o + 10),
        estimate: r.cell(o + 11),
        cusum,
        cusum_signal: r.cell::<i64>(o + 15) != 0,
        cpk,
    })
}

/// [`EVAL_COLUMNS`] of the table aliased `alias`.
pub(in crate::store) fn prefixed(alias: &str) -> String {
    EVAL_COLUMNS
        .split(", ")
        .map(|c| format!("{alias}.{}", c.trim()))
        .collect::<Vec<_>>()
        .join(", ")
}

impl Db {
    /// Every series (of one source, when given) with its counts and open alerts, by source
    /// and characteristic name.
    pub async fn series_list(&self, source: Option<&str>) -> Result<Vec<SeriesRow>> {
        let rows = sqlx::query(
            "SELECT se.id, src.name, ch.name, \
               (SELECT COUNT(*) FROM sample sm WHERE sm.series_id = se.id), \
               (SELECT MAX(COALESCE(l.sampled_at, l.first_seen_at)) FROM sample sm \
                JOIN lot l ON l.id = sm.lot_id WHERE sm.series_id = se.id), \
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
             WHERE ?1 IS NULL OR src.name = ?1 ORDER BY src.name, ch.name",
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
            "SELECT {DESIGN_COLUMNS} FROM baseline b WHERE b.series_id = ? AND b.retired_at IS NULL"
        ))
        .bind(series_id)
        .fetch_optional(&self.pool)
        .await
        .doing("reading a series design")?;
        Ok(row.map(|r| design_from_row(&r, 0)))
    }

    /// The latest `limit` lots of a series whose sampling date (YYYY-MM-DD, else arrival) lies
    /// within `from`..=`to` (each optional), oldest first, in series order.
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
                    (SELECT group_concat(x.kind || ':' || ev.alert_id) FROM alert_event ev \
                     JOIN evaluation x ON x.id = ev.evaluation_id \
                     WHERE x.sample_id = sm.id AND ev.kind = 'opened'), \
                    {}, {} \
             FROM sample sm JOIN lot l ON l.id = sm.lot_id \
             LEFT JOIN evaluation em ON em.sample_id = sm.id AND em.kind = 'mean' \
             LEFT JOIN evaluation es ON es.sample_id = sm.id AND es.kind = 'spread' \
             WHERE sm.series_id = ?1 \
               AND (?2 IS NULL OR substr(COALESCE(l.sampled_at, l.first_seen_at), 1, 10) >= ?2) \
               AND (?3 IS NULL OR substr(COALESCE(l.sampled_at, l.first_seen_at), 1, 10) <= ?3) \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at) DESC, l.code DESC LIMIT ?4",
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
        let n = EVAL_COLUMNS.split(", ").count();
        let mut out = Vec::with_capacity(rows.len());
        for r in rows.iter().rev() {
            let opened: Option<String> = r.get(11);
            out.push(ChartLot {
                sample_id: r.get(0),
                lot: r.get(1),
                order_time: r.get(2),
                summary: summary_from_row(r, 3)?,
                baseline: r.get::<i64, _>(8) != 0,
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
            });
        }
        Ok(out)
    }
}
