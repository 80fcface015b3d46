//! Report: stored state formatted for people and scripts (tables, JSON, CSV).
//!
//! Formats what `store` returns; decides nothing and queries nothing itself. The JSON field
//! names are part of the scripting contract (README, "Scripting").

use serde_json::{Value, json};

use crate::health::{ComponentStatus, HealthStatus};
use crate::stats::compare::{Comparison, Df};
use crate::store::{AlertRow, HistoryRow, SilentSource, StatusCounts, UndeliveredRow};

/// A plain text table with a header row, columns padded to their widest cell.
pub fn table(header: &[&str], rows: &[Vec<String>]) -> String {
    let mut widths: Vec<usize> = header.iter().map(|h| h.chars().count()).collect();
    for r in rows {
        for (i, c) in r.iter().enumerate() {
            if i < widths.len() {
                widths[i] = widths[i].max(c.chars().count());
            }
        }
    }
    let line = |cells: Vec<&str>| -> String {
        let mut s = String::new();
        for (i, c) in cells.iter().enumerate() {
            if i > 0 {
                s.push_str("  ");
            }
            s.push_str(c);
            if i + 1 < cells.len() {
                s.push_str(&" ".repeat(widths[i].saturating_sub(c.chars().count())));
            }
        }
        s.trim_end().to_string() + "\n"
    };
    let mut out = line(header.to_vec());
    out.push_str(&line(
        widths
            .iter()
            .map(|w| "-".repeat(*w))
            .collect::<Vec<_>>()
            .iter()
            .map(String::as_str)
            .collect(),
    ));
    for r in rows {
        out.push_str(&line(r.iter().map(String::as_str).collect()));
    }
    out
}

fn num(v: Option<f64>, digits: usize) -> String {
    v.map_or_else(|| "-".into(), |v| format!("{v:.digits$}"))
}

fn p(v: Option<f64>) -> String {
    v.map_or_else(|| "-".into(), |v| format!("{v:.2e}"))
}

/// One monitored series in `status`: its design in numbers.
#[derive(Debug, Clone, serde::Serialize)]
pub struct SeriesStatus {
    pub source: String,
    pub characteristic: String,
    pub baseline_lots: usize,
    pub baseline_mean: f64,
    pub between_lot_sd: f64,
    pub within_lot_sd: f64,
    /// "lot-means" or "units".
    pub model: &'static str,
    pub level_mean: f64,
    pub cusum_h: Option<f64>,
    /// Smallest shift of one lot's mean flagged with 90 % power by the lot test.
    pub detectable_shift: Option<f64>,
    pub normality_p: Option<f64>,
    /// "lot t test" or "Mann–Whitney on units" (baseline clearly non-normal, no between-lot
    /// component).
    pub test: &'static str,
    /// Cpk of the baseline [value, low, high] when specification limits are configured.
    pub baseline_cpk: Option<[f64; 3]>,
}

pub fn series_text(series: &[SeriesStatus]) -> String {
    if series.is_empty() {
        return String::new();
    }
    let rows: Vec<Vec<String>> = series
        .iter()
        .map(|s| {
            vec![
                s.source.clone(),
                s.characteristic.clone(),
                s.baseline_lots.to_string(),
                format!("{:.4}", s.baseline_mean),
                format!("{:.3e}", s.between_lot_sd),
                format!("{:.3e}", s.within_lot_sd),
                s.model.to_string(),
                num(s.detectable_shift, 4),
            ]
        })
        .collect();
    format!(
        "\nSeries with a baseline (detectable: shift of one lot's mean found with 90 % power):\n{}",
        table(
            &[
                "source",
                "characteristic",
                "lots",
                "baseline mean",
                "between-lot sd",
                "within-lot sd",
                "model",
                "detectable",
            ],
            &rows
        )
    )
}

/// `status --json`, from a typed struct so that no key can be written twice. (An earlier
/// version wrote `series` twice, a count and then this array; the array is what readers got,
/// so it keeps the name and the count is `series_count`.)
#[derive(serde::Serialize)]
struct StatusJson<'a> {
    lots: i64,
    measurements: i64,
    quarantined: i64,
    open_alerts: i64,
    outbox_pending: i64,
    outbox_failed: i64,
    outbox_expired: i64,
    last_digest: Option<&'a str>,
    sources: i64,
    series_count: i64,
    files: i64,
    evaluations: i64,
    alerts: i64,
    outliers: i64,
    undelivered: &'a [UndeliveredRow],
    series: &'a [SeriesStatus],
    silent_sources: &'a [SilentSource],
    health: &'a HealthStatus,
}

pub fn status_json(
    s: &StatusCounts,
    undelivered: &[UndeliveredRow],
    series: &[SeriesStatus],
    silent: &[SilentSource],
    health: &HealthStatus,
) -> Value {
    json!(StatusJson {
        lots: s.lots,
        measurements: s.measurements,
        quarantined: s.quarantined,
        open_alerts: s.open_alerts,
        outbox_pending: s.outbox_pending,
        outbox_failed: s.outbox_failed,
        outbox_expired: s.outbox_expired,
        last_digest: s.last_digest.as_deref(),
        sources: s.sources,
        series_count: s.series,
        files: s.files,
        evaluations: s.evaluations,
        alerts: s.alerts,
        outliers: s.outliers,
        undelivered,
        series,
        silent_sources: silent,
        health,
    })
}

/// Ingest and delivery: state, failing streak, latest success and latest error.
pub fn health_text(h: &HealthStatus) -> String {
    let row = |name: &str, c: &ComponentStatus, success: &str| {
        let r = &c.row;
        let error = match (&r.last_error_at, &r.last_error) {
            (Some(at), Some(e)) => format!("{at}: {e}"),
            _ => "-".into(),
        };
        vec![
            name.to_string(),
            c.state.to_string(),
            r.failing_since.clone().unwrap_or_else(|| "-".into()),
            r.failures.to_string(),
            format!(
                "{success} {}",
                c.last_success_at.as_deref().unwrap_or("never")
            ),
            error,
        ]
    };
    let rows = vec![
        row("ingest", &h.ingest, "file stored"),
        row("delivery", &h.delivery, "message delivered"),
    ];
    format!(
        "\nHealth (a notice after {} min of failing):\n{}",
        h.notice_after_minutes,
        table(
            &[
                "",
                "state",
                "failing since",
                "failures",
                "latest success",
                "latest error"
            ],
            &rows
        )
    )
}

/// The sources with an open silence, as a table (nothing when there are none).
pub fn silent_text(silent: &[SilentSource]) -> String {
    if silent.is_empty() {
        return String::new();
    }
    let rows: Vec<Vec<String>> = silent
        .iter()
        .map(|s| {
            vec![
                s.source.clone(),
                s.last_lot_at.clone(),
                s.since.clone(),
                format!("{:.1}", s.threshold_days),
            ]
        })
        .collect();
    format!(
        "\nSilent sources (no lot for longer than the threshold):\n{}",
        table(
            &["source", "last lot time", "noticed", "threshold (days)"],
            &rows
        )
    )
}

pub fn status_text(s: &StatusCounts, undelivered: &[UndeliveredRow], db: &str) -> String {
    let rows = vec![
        vec!["database".into(), db.to_string()],
        vec!["sources".into(), s.sources.to_string()],
        vec!["series".into(), s.series.to_string()],
        vec!["files stored".into(), s.files.to_string()],
        vec!["lots".into(), s.lots.to_string()],
        vec!["measurements".into(), s.measurements.to_string()],
        vec!["files quarantined".into(), s.quarantined.to_string()],
        vec!["lots tested".into(), s.evaluations.to_string()],
        vec!["open alerts".into(), s.open_alerts.to_string()],
        vec!["alerts in all".into(), s.alerts.to_string()],
        vec!["outlier units".into(), s.outliers.to_string()],
        vec!["messages pending".into(), s.outbox_pending.to_string()],
        vec!["messages failed".into(), s.outbox_failed.to_string()],
        vec!["messages expired".into(), s.outbox_expired.to_string()],
        vec![
            "last daily digest".into(),
            s.last_digest.clone().unwrap_or_else(|| "-".into()),
        ],
    ];
    let mut out = table(&["", ""], &rows)
        .lines()
        .skip(2)
        .map(|l| format!("{l}\n"))
        .collect::<String>();
    if !undelivered.is_empty() {
        out.push_str("\nUndelivered messages:\n");
        let rows: Vec<Vec<String>> = undelivered
            .iter()
            .map(|u| {
                vec![
                    u.id.to_string(),
                    u.message.clone(),
                    u.channel.clone(),
                    u.recipient.clone(),
                    u.state.clone(),
                    u.attempts.to_string(),
                    u.last_error.clone().unwrap_or_default(),
                ]
            })
            .collect();
        out.push_str(&table(
            &[
                "id",
                "message",
                "channel",
                "recipient",
                "state",
                "attempts",
                "last error",
            ],
            &rows,
        ));
    }
    out
}

pub fn alerts_json(alerts: &[AlertRow]) -> Value {
    Value::Array(alerts.iter().map(|a| json!(a)).collect())
}

pub fn alerts_text(alerts: &[AlertRow]) -> String {
    if alerts.is_empty() {
        return "no alerts\n".into();
    }
    let rows: Vec<Vec<String>> = alerts
        .iter()
        .map(|a| {
            vec![
                a.id.to_string(),
                a.state.clone(),
                a.source.clone(),
                a.characteristic.clone(),
                a.lot.clone(),
                a.opened_at[..16].replace('T', " "),
                num(Some(a.baseline_mean), 4),
                num(Some(a.lot_mean), 4),
                num(a.estimate, 4),
                p(a.p_value),
                p(a.p_adjusted),
                a.lots.to_string(),
            ]
        })
        .collect();
    table(
        &[
            "id",
            "state",
            "source",
            "characteristic",
            "lot",
            "opened (UTC)",
            "baseline mean",
            "lot mean",
            "difference",
            "p",
            "p adjusted",
            "lots",
        ],
        &rows,
    )
}

pub fn history_json(rows: &[HistoryRow]) -> Value {
    Value::Array(rows.iter().map(|r| json!(r)).collect())
}

const HISTORY_HEADER: [&str; 15] = [
    "source",
    "characteristic",
    "lot",
    "sampled_at",
    "n",
    "mean",
    "sd",
    "min",
    "max",
    "role",
    "p_value",
    "p_adjusted",
    "alert",
    "events",
    "outliers",
];

pub fn history_csv(rows: &[HistoryRow]) -> String {
    let mut w = csv::Writer::from_writer(Vec::new());
    let _ = w.write_record(HISTORY_HEADER);
    for r in rows {
        let _ = w.write_record([
            r.source.clone(),
            r.characteristic.clone(),
            r.lot.clone(),
            r.sampled_at.clone().unwrap_or_default(),
            r.n.to_string(),
            r.mean.to_string(),
            r.sd.map(|v| v.to_string()).unwrap_or_default(),
            r.min.to_string(),
            r.max.to_string(),
            r.role.clone(),
            r.p_value.map(|v| v.to_string()).unwrap_or_default(),
            r.p_adjusted.map(|v| v.to_string()).unwrap_or_default(),
            r.alert_id.map(|v| v.to_string()).unwrap_or_default(),
            r.events.clone(),
            r.outliers.clone(),
        ]);
    }
    String::from_utf8(w.into_inner().unwrap_or_default()).unwrap_or_default()
}

pub fn history_text(rows: &[HistoryRow]) -> String {
    let body: Vec<Vec<String>> = rows
        .iter()
        .map(|r| {
            vec![
                r.source.clone(),
                r.characteristic.clone(),
                r.lot.clone(),
                r.sampled_at
                    .as_deref()
                    .map(|s| s[..10].to_string())
                    .unwrap_or_else(|| "-".into()),
                r.n.to_string(),
                num(Some(r.mean), 4),
                num(r.sd, 4),
                num(Some(r.min), 4),
                num(Some(r.max), 4),
                r.role.clone(),
                p(r.p_value),
                p(r.p_adjusted),
                r.alert_id.map(|v| v.to_string()).unwrap_or_else(|| {
                    if r.significant == Some(true) {
                        "yes".into()
                    } else {
                        String::new()
                    }
                }),
                r.events.clone(),
                r.outliers.clone(),
            ]
        })
        .collect();
    table(&HISTORY_HEADER, &body)
}

fn finite_or_null(v: f64) -> Value {
    if v.is_finite() { json!(v) } else { Value::Null }
}

pub fn compare_json(c: &Comparison, alpha: f64) -> Value {
    json!({
        "test": c.test.as_str(),
        "alternative": c.alternative.as_str(),
        "statistic": c.statistic,
        "df": match c.df {
            Some(Df::One(d)) => json!(d),
            Some(Df::Two(a, b)) => json!([a, b]),
            None => Value::Null,
        },
        "p_value": c.p_value,
        "estimate": c.estimate,
        "estimate_of": c.estimate_label,
        "ci": c.ci.map(|(lo, hi)| json!([finite_or_null(lo), finite_or_null(hi)])),
        "conf_level": c.conf_level,
        "delta": c.delta,
        "alpha": alpha,
        "reject": c.p_value <= alpha,
        "n_a": c.n_a,
        "n_b": c.n_b,
    })
}

pub fn compare_text(c: &Comparison, alpha: f64) -> String {
    let mut s = String::new();
    s.push_str(&format!(
        "{} test, {} (n_a = {}, n_b = {})\n",
        c.test, c.alternative, c.n_a, c.n_b
    ));
    s.push_str(&format!(
        "estimate   {} = {:.6}\n",
        c.estimate_label, c.estimate
    ));
    if let Some((lo, hi)) = c.ci {
        s.push_str(&format!(
            "interval   {:.0} % confidence: [{}, {}]\n",
            c.conf_level * 100.0,
            fmt_bound(lo),
            fmt_bound(hi)
        ));
    }
    let df = match c.df {
        Some(Df::One(d)) => format!("{d:.4}"),
        Some(Df::Two(a, b)) => format!("[{a}, {b}]"),
        None => "-".into(),
    };
    s.push_str(&format!("statistic  {:.6}, df {df}\n", c.statistic));
    s.push_str(&format!("p-value    {:.4e}\n", c.p_value));
    let null = if c.delta != 0.0 {
        format!(" (null difference {})", c.delta)
    } else {
        String::new()
    };
    if c.p_value <= alpha {
        s.push_str(&format!(
            "decision   reject the null hypothesis{null} at alpha = {alpha}\n"
        ));
    } else {
        s.push_str(&format!(
            "decision   no evidence against the null hypothesis{null} at alpha = {alpha}\n"
        ));
    }
    s.push_str(&format!("assumes    {}\n", c.assumption));
    s
}

fn fmt_bound(v: f64) -> String {
    if v == f64::INFINITY {
        "+inf".into()
    } else if v == f64::NEG_INFINITY {
        "-inf".into()
    } else {
        format!("{v:.6}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tables_pad_columns() {
        let t = table(&["a", "bb"], &[vec!["xxx".into(), "y".into()]]);
        assert_eq!(t, "a    bb\n---  --\nxxx  y\n");
    }
}
