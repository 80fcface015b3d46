//! Report: stored state formatted for people and scripts (tables, JSON, CSV).
//!
//! Formats what `store` returns; decides nothing and queries nothing itself. The JSON field
//! names are part of the scripting contract (README, "Scripting").

use serde_json::{Value, json};

use crate::health::{ComponentStatus, HealthStatus};
use crate::stats::compare::{Comparison, Df};
use crate::store::{AlertRow, HistoryLot, HistoryRow, SilentSource, StatusCounts, UndeliveredRow};

/// A plain text table with a header row, columns padded to their widest cell.
pub fn table(header: &[&str], rows: &[Vec<String>]) -> String {
    let mut t = TextTable::new(header);
    for r in rows {
        for c in r {
            t.cell(c);
        }
        t.end_row();
    }
    let mut out = Vec::new();
    let _ = t.write_to(&mut out);
    String::from_utf8(out).unwrap_or_default()
}

/// A text table built one cell at a time: every cell is appended to one string (no string per
/// cell), each column's width follows its widest cell, and [`TextTable::write_to`] pads the
/// columns (two spaces between them, none after the last) under a header and a rule of dashes.
#[derive(Debug, Default)]
pub struct TextTable {
    header: Vec<String>,
    widths: Vec<usize>,
    cells: String,
    /// Where each cell ends in `cells`.
    ends: Vec<usize>,
    /// How many cells each row has.
    row_len: Vec<u16>,
    /// Cells of the row being built.
    open: u16,
}

impl TextTable {
    pub fn new(header: &[&str]) -> TextTable {
        TextTable {
            header: header.iter().map(|h| h.to_string()).collect(),
            widths: header.iter().map(|h| h.chars().count()).collect(),
            ..TextTable::default()
        }
    }

    /// Appends a cell to the current row.
    pub fn cell(&mut self, v: impl std::fmt::Display) {
        use std::fmt::Write as _;
        let start = self.cells.len();
        let _ = write!(self.cells, "{v}");
        let width = self.cells[start..].chars().count();
        let col = usize::from(self.open);
        if col < self.widths.len() {
            self.widths[col] = self.widths[col].max(width);
        } else {
            self.widths.push(width);
        }
        self.ends.push(self.cells.len());
        self.open += 1;
    }

    /// Ends the current row.
    pub fn end_row(&mut self) {
        self.row_len.push(self.open);
        self.open = 0;
    }

    /// The header, the rule and every row, padded.
    pub fn write_to(&self, out: &mut impl std::io::Write) -> std::io::Result<()> {
        let mut line = String::new();
        let header: Vec<&str> = self.header.iter().map(String::as_str).collect();
        self.write_line(out, &mut line, &header)?;
        let rule: Vec<String> = self.widths[..self.header.len()]
            .iter()
            .map(|w| "-".repeat(*w))
            .collect();
        let rule: Vec<&str> = rule.iter().map(String::as_str).collect();
        self.write_line(out, &mut line, &rule)?;
        let (mut cell, mut start) = (0, 0);
        let mut row: Vec<&str> = Vec::new();
        for len in &self.row_len {
            row.clear();
            for end in &self.ends[cell..cell + usize::from(*len)] {
                row.push(&self.cells[start..*end]);
                start = *end;
            }
            cell += usize::from(*len);
            self.write_line(out, &mut line, &row)?;
        }
        Ok(())
    }

    fn write_line(
        &self,
        out: &mut impl std::io::Write,
        line: &mut String,
        cells: &[&str],
    ) -> std::io::Result<()> {
        line.clear();
        for (i, c) in cells.iter().enumerate() {
            if i > 0 {
                line.push_str("  ");
            }
            line.push_str(c);
            if i + 1 < cells.len() {
                let pad = self.widths[i].saturating_sub(c.chars().count());
                line.extend(std::iter::repeat_n(' ', pad));
            }
        }
        out.write_all(line.trim_end().as_bytes())?;
        out.write_all(b"\n")
    }
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

/// `history --json` as one string (see [`HistoryWriter`]).
pub fn history_json(rows: &[HistoryRow]) -> String {
    history_into(HistoryFormat::Json, rows)
}

/// `history --csv` as one string (see [`HistoryWriter`]).
pub fn history_csv(rows: &[HistoryRow]) -> String {
    history_into(HistoryFormat::Csv, rows)
}

/// The `history` table as one string (see [`HistoryWriter`]).
pub fn history_text(rows: &[HistoryRow]) -> String {
    history_into(HistoryFormat::Text, rows)
}

fn history_into(format: HistoryFormat, rows: &[HistoryRow]) -> String {
    let mut out = Vec::new();
    let mut w = HistoryWriter::new(format, &mut out);
    for r in rows {
        let _ = w.row(&r.as_lot());
    }
    let _ = w.finish();
    String::from_utf8(out).unwrap_or_default()
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

/// How `history` is written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HistoryFormat {
    /// A table for people (padded columns, rounded numbers).
    Text,
    /// One CSV record per lot under [`HISTORY_HEADER`], numbers in full.
    Csv,
    /// A pretty-printed array of one object per lot ([`HistoryJson`]), ending in a newline.
    Json,
}

/// Writes `history` lot by lot as the store reads it ([`crate::store::Store::history_each`]).
/// CSV and JSON go to the output at once, so a 100,000-lot series is never held in memory;
/// the text table keeps its cells (one string for all of them) to pad the columns at the end.
pub struct HistoryWriter<W: std::io::Write> {
    to: HistoryTo<W>,
}

enum HistoryTo<W: std::io::Write> {
    Text {
        out: W,
        table: TextTable,
    },
    Csv {
        csv: Box<csv::Writer<W>>,
        field: String,
        header: bool,
    },
    Json {
        out: W,
        lots: usize,
        object: Vec<u8>,
    },
}

impl<W: std::io::Write> HistoryWriter<W> {
    pub fn new(format: HistoryFormat, out: W) -> HistoryWriter<W> {
        let to = match format {
            HistoryFormat::Text => HistoryTo::Text {
                out,
                table: TextTable::new(&HISTORY_HEADER),
            },
            HistoryFormat::Csv => HistoryTo::Csv {
                csv: Box::new(csv::Writer::from_writer(out)),
                field: String::new(),
                header: false,
            },
            HistoryFormat::Json => HistoryTo::Json {
                out,
                lots: 0,
                object: Vec::new(),
            },
        };
        HistoryWriter { to }
    }

    /// Writes (or, for the table, keeps) one lot.
    pub fn row(&mut self, lot: &HistoryLot<'_>) -> std::io::Result<()> {
        match &mut self.to {
            HistoryTo::Text { table, .. } => {
                history_cells(table, lot);
                Ok(())
            }
            HistoryTo::Csv { csv, field, header } => {
                if !*header {
                    csv.write_record(HISTORY_HEADER)?;
                    *header = true;
                }
                history_record(csv, field, lot)
            }
            HistoryTo::Json { out, lots, object } => {
                out.write_all(if *lots == 0 { b"[\n  " } else { b",\n  " })?;
                *lots += 1;
                write_json_element(out, object, lot)
            }
        }
    }

    /// Writes what is still owed (the header of an empty CSV, the table, the array's end) and
    /// flushes.
    pub fn finish(self) -> std::io::Result<()> {
        match self.to {
            HistoryTo::Text { mut out, table } => {
                table.write_to(&mut out)?;
                out.flush()
            }
            HistoryTo::Csv {
                mut csv, header, ..
            } => {
                if !header {
                    csv.write_record(HISTORY_HEADER)?;
                }
                csv.flush()
            }
            HistoryTo::Json { mut out, lots, .. } => {
                out.write_all(if lots == 0 { b"[]\n" } else { b"\n]\n" })?;
                out.flush()
            }
        }
    }
}
/// The cells of one lot in the `history` table.
fn history_cells(t: &mut TextTable, r: &HistoryLot<'_>) {
    t.cell(r.source);
    t.cell(r.characteristic);
    t.cell(r.lot);
    t.cell(r.sampled_at.map_or("-", |s| s.get(..10).unwrap_or(s)));
    t.cell(r.n);
    t.cell(format_args!("{:.4}", r.mean));
    match r.sd {
        Some(sd) => t.cell(format_args!("{sd:.4}")),
        None => t.cell("-"),
    }
    t.cell(format_args!("{:.4}", r.min));
    t.cell(format_args!("{:.4}", r.max));
    t.cell(r.role);
    for v in [r.p_value, r.p_adjusted] {
        match v {
            Some(v) => t.cell(format_args!("{v:.2e}")),
            None => t.cell("-"),
        }
    }
    match (r.alert_id, r.significant) {
        (Some(id), _) => t.cell(id),
        (None, Some(true)) => t.cell("yes"),
        (None, _) => t.cell(""),
    }
    t.cell(r.events);
    t.cell(r.outliers);
    t.end_row();
}

/// One lot as a CSV record: numbers in full (Rust's shortest round-trip form), empty fields
/// for what is missing. `field` is a reused buffer for the numbers.
fn history_record<W: std::io::Write>(
    csv: &mut csv::Writer<W>,
    field: &mut String,
    r: &HistoryLot<'_>,
) -> std::io::Result<()> {
    let mut number = |csv: &mut csv::Writer<W>, v: Option<&dyn std::fmt::Display>| {
        use std::fmt::Write as _;
        field.clear();
        if let Some(v) = v {
            let _ = write!(field, "{v}");
        }
        csv.write_field(field.as_bytes())
    };
    csv.write_field(r.source)?;
    csv.write_field(r.characteristic)?;
    csv.write_field(r.lot)?;
    csv.write_field(r.sampled_at.unwrap_or_default())?;
    number(csv, Some(&r.n))?;
    number(csv, Some(&r.mean))?;
    number(csv, r.sd.as_ref().map(|v| v as _))?;
    number(csv, Some(&r.min))?;
    number(csv, Some(&r.max))?;
    csv.write_field(r.role)?;
    number(csv, r.p_value.as_ref().map(|v| v as _))?;
    number(csv, r.p_adjusted.as_ref().map(|v| v as _))?;
    number(csv, r.alert_id.as_ref().map(|v| v as _))?;
    csv.write_field(r.events)?;
    csv.write_field(r.outliers)?;
    Ok(csv.write_record(None::<&[u8]>)?)
}

/// One `history --json` element. The keys are in alphabetical order: the first version
/// printed a `serde_json` map, which sorts its keys, and scripts have read that order since.
#[derive(serde::Serialize)]
struct HistoryJson<'a> {
    alert_id: Option<i64>,
    characteristic: &'a str,
    events: &'a str,
    lot: &'a str,
    max: f64,
    mean: f64,
    min: f64,
    n: i64,
    outliers: &'a str,
    p_adjusted: Option<f64>,
    p_value: Option<f64>,
    role: &'a str,
    sampled_at: Option<&'a str>,
    sd: Option<f64>,
    significant: Option<bool>,
    source: &'a str,
}

/// Writes one lot as a pretty-printed object indented as an element of the top-level array
/// (JSON strings hold no raw newline, so every newline of the object is a line break).
fn write_json_element(
    out: &mut impl std::io::Write,
    object: &mut Vec<u8>,
    r: &HistoryLot<'_>,
) -> std::io::Result<()> {
    object.clear();
    serde_json::to_writer_pretty(
        &mut *object,
        &HistoryJson {
            alert_id: r.alert_id,
            characteristic: r.characteristic,
            events: r.events,
            lot: r.lot,
            max: r.max,
            mean: r.mean,
            min: r.min,
            n: r.n,
            outliers: r.outliers,
            p_adjusted: r.p_adjusted,
            p_value: r.p_value,
            role: r.role,
            sampled_at: r.sampled_at,
            sd: r.sd,
            significant: r.significant,
            source: r.source,
        },
    )?;
    for (i, line) in object.split(|b| *b == b'\n').enumerate() {
        if i > 0 {
            out.write_all(b"\n  ")?;
        }
        out.write_all(line)?;
    }
    Ok(())
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

    fn lot(lot: &str, events: &str, outliers: &str, p: Option<f64>) -> HistoryRow {
        HistoryRow {
            source: "alder".into(),
            characteristic: "capacity".into(),
            lot: lot.into(),
            sampled_at: Some("2026-03-01T08:00:00Z".into()),
            n: 5,
            mean: 2.5,
            sd: Some(0.125),
            min: 2.0,
            max: 3.0,
            role: "tested".into(),
            p_value: p,
            p_adjusted: p.map(|p| p * 2.0),
            significant: Some(false),
            alert_id: None,
            events: events.into(),
            outliers: outliers.into(),
        }
    }

    /// The streamed JSON is byte for byte what printing a `serde_json` value of the rows gave
    /// (keys sorted, two-space indent), which scripts have read since the first version.
    #[test]
    fn history_json_streams_the_pretty_printed_array() {
        let rows = vec![
            lot("L1", "", "U3 = 1.5 (9.1 sd, set aside)", Some(1e-7)),
            lot("L \"2\"\n", "opened mean alert 1", "", None),
        ];
        let value = Value::Array(rows.iter().map(|r| json!(r)).collect());
        let expected = serde_json::to_string_pretty(&value).unwrap() + "\n";
        assert_eq!(history_json(&rows), expected);
        assert_eq!(history_json(&[]), "[]\n");
    }

    #[test]
    fn history_csv_quotes_what_needs_it() {
        let rows = vec![lot("L1", "", "U3 = 1.5 (9.1 sd, set aside)", Some(1e-7))];
        assert_eq!(
            history_csv(&rows),
            "source,characteristic,lot,sampled_at,n,mean,sd,min,max,role,p_value,p_adjusted,\
             alert,events,outliers\nalder,capacity,L1,2026-03-01T08:00:00Z,5,2.5,0.125,2,3,tested,\
             0.0000001,0.0000002,,,\"U3 = 1.5 (9.1 sd, set aside)\"\n"
        );
    }

    #[test]
    fn tables_pad_columns() {
        let t = table(&["a", "bb"], &[vec!["xxx".into(), "y".into()]]);
        assert_eq!(t, "a    bb\n---  --\nxxx  y\n");
    }
}
