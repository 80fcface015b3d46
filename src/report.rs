//! Report: stored state formatted for people and scripts (tables, JSON, CSV).
//!
//! Formats what `store` returns; decides nothing and queries nothing itself. The JSON field
//! names are part of the scripting contract (README, "Scripting").

use serde_json::{Value, json};

use crate::health::{ComponentStatus, HealthStatus};
use crate::stats::compare::{Comparison, Df};
use crate::store::{AlertRow, SilentSource, StatusCounts, UndeliveredRow};

pub use crate::numbers::{decimals_for, fixed, p_value, signed, two_digits};

mod fitted;
mod history;

pub use history::{HistoryFormat, HistoryWriter};

/// Columns a table may use when the terminal's width is unknown (output to a file or a pipe,
/// `COLUMNS` unset).
pub const DEFAULT_WIDTH: u16 = 100;

/// The width tables must fit: `COLUMNS` when set, else the terminal's width when standard
/// output is a terminal, else [`DEFAULT_WIDTH`].
pub fn width() -> u16 {
    static WIDTH: std::sync::OnceLock<u16> = std::sync::OnceLock::new();
    *WIDTH.get_or_init(|| {
        std::env::var("COLUMNS")
            .ok()
            .and_then(|c| c.trim().parse::<u16>().ok())
            .filter(|w| *w >= 40)
            .or_else(terminal_width)
            .unwrap_or(DEFAULT_WIDTH)
    })
}

/// The width of the terminal on standard output, if it is one.
fn terminal_width() -> Option<u16> {
    if !std::io::IsTerminal::is_terminal(&std::io::stdout()) {
        return None;
    }
    let mut size = libc::winsize {
        ws_row: 0,
        ws_col: 0,
        ws_xpixel: 0,
        ws_ypixel: 0,
    };
    // SAFETY: TIOCGWINSZ writes one `winsize` into the struct we own; fd 1 is open.
    let ok = unsafe { libc::ioctl(1, libc::TIOCGWINSZ, &mut size) } == 0;
    (ok && size.ws_col >= 40).then_some(size.ws_col)
}

/// A text table with a header row that fits [`width`]: the last column wraps, the others
/// keep their content's width.
pub fn table(header: &[&str], rows: &[Vec<String>]) -> String {
    let last = header.len().saturating_sub(1);
    table_in(width(), header, rows, &[last])
}

/// A text table that fits `width` columns where it can: the columns `wrap` break their cells
/// into lines (at spaces where possible); every other column keeps its content's width. A
/// cell may hold several lines.
pub fn table_in(width: u16, header: &[&str], rows: &[Vec<String>], wrap: &[usize]) -> String {
    let mut t = styled_table(width);
    if header.iter().any(|h| !h.is_empty()) {
        t.set_header(header.to_vec());
    }
    for r in rows {
        t.add_row(r.clone());
    }
    constrain_columns(&mut t, wrap);
    let mut out = String::new();
    for line in t.lines() {
        out.push_str(line.trim_end());
        out.push('\n');
    }
    out
}

/// An empty table in our style: no borders, a rule of dashes under the header, fitted to
/// `width` (see [`table_in`]).
fn styled_table(width: u16) -> comfy_table::Table {
    use comfy_table::{ContentArrangement, LineStyle, Table, TableStyle};
    let style = TableStyle::new().header_separator(LineStyle::none().fill('-').junction(' '));
    let mut t = Table::new();
    t.load_style(style)
        .set_content_arrangement(ContentArrangement::Dynamic)
        .set_width(width);
    t
}

/// One space after every column but the last; the columns not in `wrap` keep their content's
/// width (call once the rows are in: the columns exist from then on).
fn constrain_columns(t: &mut comfy_table::Table, wrap: &[usize]) {
    let columns = t.column_count();
    for (i, c) in t.column_iter_mut().enumerate() {
        c.set_padding((0, if i + 1 < columns { 1 } else { 0 }));
        if !wrap.contains(&i) {
            c.set_constraint(comfy_table::ColumnConstraint::ContentWidth);
        }
    }
}

/// `text` broken into lines of at most `width` characters at spaces, each line after the
/// first indented by `indent`.
pub fn wrap(text: &str, width: usize, indent: &str) -> String {
    let mut out = String::new();
    // The text's own leading spaces stay: they indent its first line.
    let lead = &text[..text.len() - text.trim_start_matches(' ').len()];
    let mut line = lead.to_string();
    let mut fresh = true;
    for word in text.split(' ').filter(|w| !w.is_empty()) {
        let len = line.chars().count();
        if !fresh && len + 1 + word.chars().count() > width {
            out.push_str(&line);
            out.push('\n');
            line = indent.to_string();
        } else if !fresh {
            line.push(' ');
        }
        line.push_str(word);
        fresh = false;
    }
    out.push_str(&line);
    out.push('\n');
    out
}

/// A name with its unit of measure, `capacity_mah (mAh)`.
pub fn with_unit(name: &str, unit: Option<&str>) -> String {
    match unit {
        Some(u) => format!("{name} ({u})"),
        None => name.to_string(),
    }
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
    /// The characteristic's unit of measure (`characteristic.NAME.unit`), when configured;
    /// `unit_of_measure` in JSON, as everywhere (`unit` is a measured unit's serial).
    #[serde(rename = "unit_of_measure", skip_serializing_if = "Option::is_none")]
    pub unit: Option<String>,
}

pub fn series_text(series: &[SeriesStatus]) -> String {
    if series.is_empty() {
        return String::new();
    }
    let rows: Vec<Vec<String>> = series
        .iter()
        .map(|s| {
            let d = decimals_for(s.within_lot_sd.max(s.between_lot_sd));
            vec![
                format!(
                    "{}\n{}",
                    s.source,
                    with_unit(&s.characteristic, s.unit.as_deref())
                ),
                s.baseline_lots.to_string(),
                fixed(Some(s.baseline_mean), d),
                two_digits(Some(s.between_lot_sd)),
                two_digits(Some(s.within_lot_sd)),
                s.model.to_string(),
                fixed(s.detectable_shift, d),
            ]
        })
        .collect();
    format!(
        "\nSeries with a baseline (detectable: shift of one lot's mean found with 90 % power):\n{}",
        table_in(
            width(),
            &[
                "series",
                "lots",
                "baseline mean",
                "between-lot sd",
                "within-lot sd",
                "model",
                "detectable",
            ],
            &rows,
            &[0]
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
        table_in(
            width(),
            &[
                "",
                "state",
                "failing since",
                "failures",
                "latest success",
                "latest error"
            ],
            &rows,
            &[4, 5]
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
        vec!["tests (mean and spread)".into(), s.evaluations.to_string()],
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
    let mut out = table_in(width(), &["", ""], &rows, &[1]);
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

/// One alert in `alerts --json`: the stored row and the characteristic's unit of measure.
#[derive(serde::Serialize)]
struct AlertJson<'a> {
    #[serde(flatten)]
    row: &'a AlertRow,
    #[serde(skip_serializing_if = "Option::is_none")]
    unit_of_measure: Option<&'a str>,
}

/// `alerts --json`: an array of alerts; `unit_of_measure` where the characteristic has one
/// configured (`unit` is a unit's serial in lot files and views, so the key says which unit).
pub fn alerts_json(alerts: &[AlertRow], units: &Units) -> Value {
    json!(
        alerts
            .iter()
            .map(|a| AlertJson {
                row: a,
                unit_of_measure: units.get(&a.characteristic).map(String::as_str),
            })
            .collect::<Vec<_>>()
    )
}

/// Units of measure by characteristic (`Config::units`).
pub type Units = std::collections::BTreeMap<String, String>;

/// "CUSUM" for an alert or decision the CUSUM made, "lot test" for the single-lot tests.
fn test_label(test: &str) -> &'static str {
    if test == "cusum" { "CUSUM" } else { "lot test" }
}

/// The CUSUM sum that signalled (the larger side) against its interval: `CUSUM 6.1 > h 5.2`.
fn cusum_text(upper: Option<f64>, lower: Option<f64>, h: Option<f64>) -> String {
    let value = upper.unwrap_or(0.0).max(lower.unwrap_or(0.0));
    let rel = if h.is_some_and(|h| value > h) {
        ">"
    } else {
        "≤"
    };
    format!("CUSUM {value:.1}\n{rel} h {}", fixed(h, 1))
}

/// What made an alert: the lot test's p-value against its level, or the CUSUM.
fn alert_evidence(a: &AlertRow) -> String {
    if a.test == "cusum" {
        cusum_text(a.cusum_upper, a.cusum_lower, a.cusum_h)
    } else {
        let p = a.p_adjusted.or(a.p_value);
        format!("p {}\n≤ {}", p_value(p), p_value(Some(a.level)))
    }
}

/// The shift an alert reports, in the characteristic's unit (mean) or as a ratio (spread).
fn alert_shift(a: &AlertRow, unit: Option<&str>) -> String {
    if a.kind == "spread" {
        return a
            .estimate
            .map_or("-".into(), |e| format!("×{}", two_digits(Some(e))));
    }
    let d = decimals_for(a.baseline_sd.or(a.lot_sd).unwrap_or(f64::NAN));
    // On the log scale the estimate is of ln(value): it has no unit.
    let unit = unit.filter(|_| !crate::engine::on_log_scale(a.note.as_deref()));
    crate::numbers::with_unit(signed(a.estimate, d), unit)
}

pub fn alerts_text(alerts: &[AlertRow], units: &Units) -> String {
    if alerts.is_empty() {
        return "no alerts\n".into();
    }
    let rows: Vec<Vec<String>> = alerts
        .iter()
        .map(|a| {
            let unit = units.get(&a.characteristic).map(String::as_str);
            vec![
                a.id.to_string(),
                format!("{}\n{}", a.state, date(Some(&a.opened_at))),
                format!("{}\n{}", a.source, a.characteristic),
                format!("{}\n{}", a.kind, test_label(&a.test)),
                format!("{}\n{}", a.lot, date(a.lot_sampled_at.as_deref())),
                alert_shift(a, unit),
                alert_evidence(a),
                a.lots.to_string(),
                a.acknowledged
                    .as_ref()
                    .map_or_else(|| "-".into(), |k| k.by.clone()),
            ]
        })
        .collect();
    table_in(
        width(),
        &[
            "id", "state", "series", "alert", "lot", "shift", "evidence", "lots", "ack by",
        ],
        &rows,
        &[2, 8],
    )
}

/// The date of an RFC 3339 time (`-` when absent).
fn date(t: Option<&str>) -> String {
    t.map_or_else(|| "-".into(), |t| t.chars().take(10).collect())
}

/// A series' baseline and its changes, for `baseline show`.
#[derive(Debug, serde::Serialize)]
pub struct BaselineShow {
    pub source: String,
    pub characteristic: String,
    #[serde(rename = "unit_of_measure", skip_serializing_if = "Option::is_none")]
    pub unit: Option<String>,
    /// The current baseline, or null while the next undecided lots are still to form it.
    pub baseline: Option<BaselineNow>,
    /// Every change made by people, oldest first.
    pub changes: Vec<BaselineChange>,
}

#[derive(Debug, serde::Serialize)]
pub struct BaselineNow {
    pub definition: String,
    pub frozen_at: String,
    pub lots: Vec<String>,
    pub design: String,
}

#[derive(Debug, serde::Serialize)]
pub struct BaselineChange {
    pub at: String,
    pub by: String,
    pub reason: String,
    /// The definition replaced (null for the first baseline).
    pub from: Option<String>,
    pub to: String,
}

/// `baseline show` for people: wrapped to the terminal's width.
pub fn baseline_text(b: &BaselineShow, baseline_lots: usize) -> String {
    let w = usize::from(width());
    let series = format!(
        "{} / {}",
        b.source,
        with_unit(&b.characteristic, b.unit.as_deref())
    );
    let mut out = match &b.baseline {
        Some(now) => {
            let mut s = wrap(
                &format!("{series}: {}, frozen {}", now.definition, now.frozen_at),
                w,
                "  ",
            );
            s.push_str(&wrap(&format!("lots: {}", now.lots.join(", ")), w, "  "));
            s.push_str(&wrap(&format!("design: {}", now.design), w, "  "));
            s
        }
        None => wrap(
            &format!(
                "{series}: no baseline yet (the next {baseline_lots} undecided lots will form it)"
            ),
            w,
            "  ",
        ),
    };
    if !b.changes.is_empty() {
        out.push_str("\nchanges:\n");
        for c in &b.changes {
            let from = c.from.as_deref().unwrap_or("none");
            out.push_str(&wrap(
                &format!("  {} by {}: {from} -> {}", c.at, c.by, c.to),
                w,
                "    ",
            ));
            out.push_str(&wrap(&format!("    why: {}", c.reason), w, "      "));
        }
    }
    out
}

/// `check-config --json`: whether the file is valid, its problems (each naming its key), and
/// what a script most often needs of a valid one.
#[derive(Debug, serde::Serialize)]
pub struct CheckConfigJson {
    pub ok: bool,
    pub file: String,
    pub problems: Vec<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub database: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub site: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub inbox: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub channels: Option<Vec<&'static str>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub baseline_lots: Option<usize>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub units: Option<Units>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub profiles: Option<Vec<String>>,
}

impl CheckConfigJson {
    pub fn of(c: &crate::config::Config) -> CheckConfigJson {
        CheckConfigJson {
            ok: true,
            file: c.file.display().to_string(),
            problems: Vec::new(),
            database: Some(c.history_shown()),
            site: Some(c.site.clone()),
            inbox: Some(c.paths.inbox.display().to_string()),
            channels: Some(c.alerts.channels.iter().map(|ch| ch.as_str()).collect()),
            baseline_lots: Some(c.monitor.baseline_lots),
            units: Some(c.units.clone()),
            profiles: Some(c.input.profiles.iter().map(|p| p.name.clone()).collect()),
        }
    }

    pub fn failed(file: &std::path::Path, problems: Vec<String>) -> CheckConfigJson {
        CheckConfigJson {
            ok: false,
            file: file.display().to_string(),
            problems,
            database: None,
            site: None,
            inbox: None,
            channels: None,
            baseline_lots: None,
            units: None,
            profiles: None,
        }
    }
}

/// One recipient in `alerts test-email --json`.
#[derive(Debug, serde::Serialize)]
struct TestEmailJson<'a> {
    recipient: &'a str,
    accepted: bool,
    /// The server's reply on acceptance, the error (with the reply) on refusal.
    reply: &'a str,
}

pub fn test_email_json(sent: &[crate::alert::TestDelivery]) -> Value {
    json!(
        sent.iter()
            .map(|d| TestEmailJson {
                recipient: &d.recipient,
                accepted: d.outcome.is_ok(),
                reply: match &d.outcome {
                    Ok(r) | Err(r) => r,
                },
            })
            .collect::<Vec<_>>()
    )
}

/// `adjust --json`.
#[derive(Debug, serde::Serialize)]
pub struct AdjustJson<'a> {
    pub method: &'a str,
    pub level: f64,
    pub adjusted: &'a [f64],
    pub reject: &'a [bool],
}

fn finite_or_null(v: f64) -> Value {
    if v.is_finite() { json!(v) } else { Value::Null }
}

/// `compare --json` (keys of the scripting contract: test, statistic, df, p_value, estimate,
/// ci).
#[derive(Debug, serde::Serialize)]
struct CompareJson<'a> {
    test: &'a str,
    alternative: &'a str,
    statistic: f64,
    /// A number, [df1, df2] for F and Brown–Forsythe, null for Mann–Whitney.
    df: Value,
    p_value: f64,
    estimate: f64,
    estimate_of: &'a str,
    /// [low, high] (an infinite bound is null), or null where not defined.
    ci: Option<[Value; 2]>,
    conf_level: f64,
    delta: f64,
    alpha: f64,
    reject: bool,
    n_a: usize,
    n_b: usize,
}

pub fn compare_json(c: &Comparison, alpha: f64) -> Value {
    json!(CompareJson {
        test: c.test.as_str(),
        alternative: c.alternative.as_str(),
        statistic: c.statistic,
        df: match c.df {
            Some(Df::One(d)) => json!(d),
            Some(Df::Two(a, b)) => json!([a, b]),
            None => Value::Null,
        },
        p_value: c.p_value,
        estimate: c.estimate,
        estimate_of: c.estimate_label,
        ci: c
            .ci
            .map(|(lo, hi)| [finite_or_null(lo), finite_or_null(hi)]),
        conf_level: c.conf_level,
        delta: c.delta,
        alpha,
        reject: c.p_value <= alpha,
        n_a: c.n_a,
        n_b: c.n_b,
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
    fn wrapped_text_keeps_its_indent_and_width() {
        let w = wrap("  one two three four", 10, "    ");
        assert_eq!(w, "  one two\n    three\n    four\n");
    }

    #[test]
    fn tables_pad_columns_and_fit_their_width() {
        let t = table_in(100, &["a", "bb"], &[vec!["xxx".into(), "y".into()]], &[1]);
        assert_eq!(t, "a    bb\n---- --\nxxx  y\n");
        let long = vec!["x".into(), "word ".repeat(40)];
        let t = table_in(40, &["x", "text"], &[long], &[1]);
        assert!(t.lines().all(|l| l.chars().count() <= 40), "{t}");
    }
}
