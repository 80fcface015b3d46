//! What a page shows, gathered through `store` and turned into charts with the engine's own
//! limits (`engine::limits`). Both the report and the dashboard render these values.

use serde::Serialize;

use super::fmt;
use super::svg::{Chart, Line, LineStyle, Mark, Point};
use crate::config::{CharacteristicPolicy, Config, Direction};
use crate::engine::{self, limits};
use crate::numbers::{self, MISSING, with_unit};
use crate::store::{AlertRow, ChartLot, Design, SeriesRow, Store, StoreError};

/// Which lots a page covers.
#[derive(Debug, Clone, Default)]
pub struct Scope {
    pub source: Option<String>,
    /// Sampling dates, `YYYY-MM-DD`, inclusive.
    pub from: Option<String>,
    pub to: Option<String>,
    /// At most this many of the latest lots per series.
    pub max_lots: i64,
}

/// One series as a page shows it.
#[derive(Debug, Clone, Serialize)]
pub struct SeriesPage {
    pub id: i64,
    pub source: String,
    pub characteristic: String,
    /// The characteristic's unit of measure (`characteristic.NAME.unit`), when configured.
    pub unit: Option<String>,
    /// "alert", "watch" (baseline not frozen), or "in control".
    pub state: &'static str,
    pub row: SeriesRow,
    /// The newest lot's sampling time, as people write it.
    pub newest: String,
    /// Facts about the design, as (label, value).
    pub facts: Vec<(String, String)>,
    pub notes: Vec<String>,
    pub charts: Vec<String>,
    pub lots: Vec<LotLine>,
}

/// One lot in a series' table.
#[derive(Debug, Clone, Serialize)]
pub struct LotLine {
    pub lot: String,
    pub when: String,
    pub role: &'static str,
    pub n: u64,
    pub mean: String,
    pub sd: String,
    pub mean_p: String,
    pub mean_decision: String,
    pub spread: String,
    pub spread_decision: String,
    pub outliers: String,
    pub cpk: String,
}

/// An alert with the numbers behind it, formatted.
#[derive(Debug, Clone, Serialize)]
pub struct AlertLine {
    pub id: i64,
    pub source: String,
    pub characteristic: String,
    pub kind: String,
    pub state: String,
    pub opened_at: String,
    pub resolved_at: String,
    pub lot: String,
    pub test: String,
    pub numbers: String,
    pub acknowledged: String,
    pub note: String,
}

/// One series in an overview: its names, state and counts, no charts.
#[derive(Debug, Clone, Serialize)]
pub struct SeriesBrief {
    pub id: i64,
    pub source: String,
    pub characteristic: String,
    /// The characteristic's unit of measure, when configured.
    pub unit: Option<String>,
    pub state: &'static str,
    pub newest: String,
    pub row: SeriesRow,
}

fn state_of(row: &SeriesRow) -> &'static str {
    if row.open_mean.is_some() || row.open_spread.is_some() {
        "alert"
    } else if row.baseline_lots == 0 {
        "collecting baseline"
    } else {
        "in control"
    }
}

/// A series for an overview.
pub fn brief(row: SeriesRow, config: &Config) -> SeriesBrief {
    SeriesBrief {
        id: row.id,
        source: row.source.clone(),
        characteristic: row.characteristic.clone(),
        unit: config.unit(&row.characteristic).map(String::from),
        state: state_of(&row),
        newest: row
            .last_lot_at
            .as_deref()
            .map(fmt::when)
            .unwrap_or_default(),
        row,
    }
}

/// The chart of the quantity an alert is about (within-lot spread for a spread alert, the
/// CUSUM path for one the CUSUM opened, else the lot means), over the series' latest
/// `max_lots` lots, with the engine's limits; None when the series is not stored.
pub async fn alert_chart(
    store: &Store,
    config: &Config,
    a: &AlertRow,
    max_lots: i64,
) -> Result<Option<Chart>, StoreError> {
    let Some(id) = store.series_named(&a.source, &a.characteristic).await? else {
        return Ok(None);
    };
    let design = store.series_design(id).await?;
    let lots = store.chart_lots(id, None, None, max_lots).await?;
    let policy = config.monitor.policy(&a.characteristic);
    let unit = config.unit(&a.characteristic);
    let key = format!("s{id}");
    let mut chart = match (a.kind.as_str(), a.test.as_str()) {
        ("spread", _) => spread_chart(&key, &lots, design.as_ref(), unit),
        (_, "cusum") => cusum_chart(&key, &lots),
        _ => {
            let geo = match &design {
                Some(d) if d.log_scale => geometric_means(store, &lots).await?,
                _ => Vec::new(),
            };
            mean_chart(&key, &lots, design.as_ref(), &policy, &geo, unit)
        }
    };
    let what = match (a.kind.as_str(), a.test.as_str()) {
        ("spread", _) => "within-lot spread",
        (_, "cusum") => "CUSUM path",
        _ => "lot means",
    };
    chart.title = format!(
        "{} / {}: {what}, alert A{}",
        a.source, a.characteristic, a.id
    );
    Ok(Some(chart))
}

/// Reads the series of `scope` and builds their pages.
pub async fn series_pages(
    store: &Store,
    config: &Config,
    scope: &Scope,
) -> Result<Vec<SeriesPage>, StoreError> {
    let mut out = Vec::new();
    for row in store.series_list(scope.source.as_deref()).await? {
        out.push(series_page(store, config, scope, row).await?);
    }
    Ok(out)
}

/// One series' page.
pub async fn series_page(
    store: &Store,
    config: &Config,
    scope: &Scope,
    row: SeriesRow,
) -> Result<SeriesPage, StoreError> {
    let design = store.series_design(row.id).await?;
    let lots = store
        .chart_lots(
            row.id,
            scope.from.as_deref(),
            scope.to.as_deref(),
            scope.max_lots,
        )
        .await?;
    let policy = config.monitor.policy(&row.characteristic);
    let unit = config.unit(&row.characteristic);
    let geo = match &design {
        Some(d) if d.log_scale => geometric_means(store, &lots).await?,
        _ => Vec::new(),
    };
    let id = format!("s{}", row.id);
    let mut charts = vec![mean_chart(&id, &lots, design.as_ref(), &policy, &geo, unit)];
    if lots.iter().any(|l| l.spread.is_some()) {
        charts.push(spread_chart(&id, &lots, design.as_ref(), unit));
    }
    if lots
        .iter()
        .any(|l| l.mean.as_ref().is_some_and(|m| m.cusum.is_some()))
    {
        charts.push(cusum_chart(&id, &lots));
    }
    let state = state_of(&row);
    Ok(SeriesPage {
        id: row.id,
        source: row.source.clone(),
        characteristic: row.characteristic.clone(),
        unit: unit.map(String::from),
        state,
        facts: facts(&row, design.as_ref(), config),
        notes: notes(design.as_ref(), &policy, &lots, unit),
        charts: charts.iter().map(super::svg::render).collect(),
        lots: lots.iter().map(lot_line).collect(),
        newest: row
            .last_lot_at
            .as_deref()
            .map(fmt::when)
            .unwrap_or_default(),
        row,
    })
}

/// Geometric mean of each lot's units (log-scale series; NaN where a unit is not above 0).
async fn geometric_means(store: &Store, lots: &[ChartLot]) -> Result<Vec<f64>, StoreError> {
    let ids: Vec<i64> = lots.iter().map(|l| l.sample_id).collect();
    let values = store.values(&ids).await?;
    Ok(lots
        .iter()
        .map(|l| match values.get(&l.sample_id) {
            Some(v) if !v.is_empty() && v.iter().all(|x| *x > 0.0) => {
                (v.iter().map(|x| x.ln()).sum::<f64>() / v.len() as f64).exp()
            }
            _ => f64::NAN,
        })
        .collect())
}

/// A point's tooltip: the lot, its size and the value plotted (with its unit, if any).
fn tip(l: &ChartLot, what: &str, v: f64, unit: Option<&str>) -> String {
    format!(
        "lot {} ({}), n = {}: {what} {}",
        l.lot,
        fmt::when(&l.order_time),
        l.summary.n(),
        with_unit(fmt::sig(v, 4), unit)
    )
}

/// An axis label with the unit of its values: `lot mean (mAh)`.
fn axis_label(what: &str, unit: Option<&str>) -> String {
    match unit {
        Some(u) => format!("{what} ({u})"),
        None => what.to_string(),
    }
}

/// What is written above a lot's point: the alerts of `kind` it opened, its outliers.
fn label(l: &ChartLot, kind: &str) -> Option<String> {
    let mut parts: Vec<String> = l
        .opened
        .iter()
        .filter(|(k, _)| k == kind)
        .map(|(_, a)| format!("A{a}"))
        .collect();
    if l.outliers > 0 {
        parts.push(format!("{}×out", l.outliers));
    }
    (!parts.is_empty()).then(|| parts.join(" "))
}

/// The value plotted for a lot on the mean chart: the mean the decision tested (outliers set
/// aside), the geometric mean on a log-scale series, the stored mean for baseline lots.
fn plotted_mean(l: &ChartLot, design: Option<&Design>, geo: Option<f64>) -> f64 {
    let log = design.is_some_and(|d| d.log_scale);
    match (&l.mean, log) {
        (Some(e), true) => e.lot_mean.exp(),
        (Some(e), false) => e.lot_mean,
        (None, true) => geo.unwrap_or(f64::NAN),
        (None, false) => l.summary.mean(),
    }
}

fn mean_chart(
    id: &str,
    lots: &[ChartLot],
    design: Option<&Design>,
    policy: &CharacteristicPolicy,
    geo: &[f64],
    unit: Option<&str>,
) -> Chart {
    let mut points = Vec::new();
    for (i, l) in lots.iter().enumerate() {
        let y = plotted_mean(l, design, geo.get(i).copied());
        let mark = match &l.mean {
            Some(e) if e.significant => Mark::Flagged,
            Some(_) => Mark::Tested,
            None => Mark::Baseline,
        };
        points.push(Point {
            x: i,
            y,
            mark,
            label: label(l, "mean"),
            tip: tip(l, "mean", y, unit),
        });
    }
    let lines = design
        .map(|d| mean_lines(lots, d, policy))
        .unwrap_or_default();
    let log = design.is_some_and(|d| d.log_scale);
    Chart {
        id: format!("{id}-mean"),
        title: "Lot means against the baseline and the lot test's decision limits".into(),
        y_label: axis_label(
            if log {
                "geometric lot mean"
            } else {
                "lot mean"
            },
            unit,
        ),
        lots: lots.iter().map(|l| l.lot.clone()).collect(),
        points,
        lines,
        legend: vec![
            (Mark::Baseline, "baseline lot"),
            (Mark::Tested, "tested, in control"),
            (Mark::Flagged, "flagged"),
        ],
        limit_name: "decision limit".into(),
    }
}

/// The centre and the limits of each lot (its own size and level).
fn mean_lines(lots: &[ChartLot], d: &Design, policy: &CharacteristicPolicy) -> Vec<Line> {
    let centre = if d.log_scale {
        d.re.mean_of_means.exp()
    } else {
        d.re.mean_of_means
    };
    let mut inner = Vec::new();
    let mut outer = Vec::new();
    for l in lots {
        let (n, level, k) = match &l.mean {
            Some(e) => (e.lot_n as u64, e.level, e.family_size.max(1)),
            None => (d.re.n_harmonic.round() as u64, d.level_mean, 1),
        };
        let within = limits::to_values(d, limits::mean_limits(d, policy, n, level));
        inner.push(within);
        outer
            .push((k > 1).then(|| {
                limits::to_values(d, limits::mean_limits(d, policy, n, level / k as f64))
            }));
    }
    let side = |f: fn(&limits::Limits) -> Option<f64>, v: &[limits::Limits]| {
        v.iter().map(f).collect::<Vec<_>>()
    };
    let mut lines = vec![Line {
        name: "baseline".into(),
        values: vec![Some(centre); lots.len()],
        style: LineStyle::Centre,
    }];
    for (name, f) in [
        ("upper limit", (|l: &limits::Limits| l.upper) as fn(&_) -> _),
        ("lower limit", |l: &limits::Limits| l.lower),
    ] {
        let values = side(f, &inner);
        if values.iter().any(Option::is_some) {
            lines.push(Line {
                name: name.into(),
                values,
                style: LineStyle::Limit,
            });
        }
        let values: Vec<Option<f64>> = outer.iter().map(|o| o.as_ref().and_then(f)).collect();
        if values.iter().any(Option::is_some) {
            lines.push(Line {
                name: format!("{name}, whole family"),
                values,
                style: LineStyle::Outer,
            });
        }
    }
    lines
}

/// A spread ratio of test `test` as a within-lot sd in the unit of measure: the ratio times
/// the baseline's within-lot sd, or its square root times it for an F test (a ratio of
/// variances). None on the log scale, where the test's spread is of ln(value).
fn ratio_as_sd(test: &str, ratio: f64, design: Option<&Design>) -> Option<f64> {
    let d = design.filter(|d| !d.log_scale)?;
    let sd = d.re.var_within.sqrt();
    Some(if test == "f-variance" {
        ratio.sqrt() * sd
    } else {
        ratio * sd
    })
}

/// A lot on the spread chart: a tested lot at the spread its test measured (outliers set
/// aside) as an sd, so that it lies beyond the limit exactly when it was flagged; any other
/// lot (or any lot on the log scale) at the sd of its stored values.
fn spread_point(
    i: usize,
    l: &ChartLot,
    design: Option<&Design>,
    unit: Option<&str>,
) -> Option<Point> {
    let tested = l.spread.as_ref();
    let as_tested = tested.and_then(|e| ratio_as_sd(&e.test, e.estimate?, design));
    let y = as_tested.or(l.summary.sd())?;
    let what = if as_tested.is_some() {
        "within-lot sd as tested"
    } else {
        "within-lot sd"
    };
    let mut tip = tip(l, what, y, unit);
    if let Some(e) = tested {
        tip.push_str(&format!(
            ", spread ratio {}, p {}",
            fmt::opt(e.estimate, 3),
            numbers::p_is(e.p_value)
        ));
    }
    Some(Point {
        x: i,
        y,
        mark: tested.map_or(Mark::Baseline, spread_mark),
        label: label(l, "spread"),
        tip,
    })
}

fn spread_mark(e: &crate::store::ChartEval) -> Mark {
    if e.significant {
        Mark::Flagged
    } else {
        Mark::Tested
    }
}

/// Every lot's within-lot sd, the tested ones marked by their spread decision, against the
/// baseline's within-lot sd and the spread test's limit (as an sd); on the log scale the
/// marks alone show the decisions.
fn spread_chart(id: &str, lots: &[ChartLot], design: Option<&Design>, unit: Option<&str>) -> Chart {
    let points = lots
        .iter()
        .enumerate()
        .filter_map(|(i, l)| spread_point(i, l, design, unit))
        .collect();
    let mut lines = Vec::new();
    if let Some(d) = design.filter(|d| !d.log_scale) {
        let sd = d.re.var_within.sqrt();
        lines.push(Line {
            name: "baseline within-lot sd".into(),
            values: vec![Some(sd); lots.len()],
            style: LineStyle::Centre,
        });
        let limit: Vec<Option<f64>> = lots
            .iter()
            .map(|l| match &l.spread {
                Some(e) => limits::spread_limit(d, e.lot_n as u64, e.level)
                    .and_then(|r| ratio_as_sd(&e.test, r, design)),
                None => None,
            })
            .collect();
        if limit.iter().any(Option::is_some) {
            lines.push(Line {
                name: "limit".into(),
                values: limit,
                style: LineStyle::Limit,
            });
        }
    }
    Chart {
        id: format!("{id}-spread"),
        title: "Within-lot sd of every lot, tested lots marked by the spread test".into(),
        y_label: axis_label("within-lot sd", unit),
        lots: lots.iter().map(|l| l.lot.clone()).collect(),
        points,
        lines,
        legend: vec![
            (Mark::Baseline, "baseline or not tested"),
            (Mark::Tested, "tested, in control"),
            (Mark::Flagged, "flagged"),
        ],
        limit_name: "decision limit".into(),
    }
}

/// The two CUSUM sums of a lot as points; the larger one is a diamond when the lot signalled,
/// labelled at the first lot of a run of signals.
fn cusum_points(
    i: usize,
    l: &ChartLot,
    (u, d): (f64, f64),
    signal: bool,
    first: bool,
) -> [Point; 2] {
    [(u, Mark::Up, "upper sum"), (d, Mark::Down, "lower sum")].map(|(v, mark, what)| {
        let top = signal && v == u.max(d);
        Point {
            x: i,
            y: v,
            mark: if top { Mark::Flagged } else { mark },
            label: (top && first).then(|| "signal".to_string()),
            tip: tip(l, what, v, None),
        }
    })
}

fn cusum_chart(id: &str, lots: &[ChartLot]) -> Chart {
    let mut points = Vec::new();
    let (mut up, mut down, mut h) = (Vec::new(), Vec::new(), Vec::new());
    let mut previous = false;
    for (i, l) in lots.iter().enumerate() {
        let c = l
            .mean
            .as_ref()
            .and_then(|e| e.cusum.map(|c| (c, e.cusum_signal)));
        up.push(c.map(|((u, _, _), _)| u));
        down.push(c.map(|((_, d, _), _)| d));
        h.push(c.map(|((_, _, h), _)| h));
        if let Some(((u, d, _), signal)) = c {
            points.extend(cusum_points(i, l, (u, d), signal, !previous));
        }
        previous = c.is_some_and(|(_, s)| s);
    }
    let line = |name: &str, values, style| Line {
        name: name.into(),
        values,
        style,
    };
    Chart {
        id: format!("{id}-cusum"),
        title: "CUSUM of standardised lot means against its decision interval h".into(),
        y_label: "CUSUM (sd of a lot mean)".into(),
        lots: lots.iter().map(|l| l.lot.clone()).collect(),
        points,
        lines: vec![
            line("upward drift", up, LineStyle::Path),
            line("downward drift", down, LineStyle::PathDashed),
            line("h", h, LineStyle::Limit),
        ],
        legend: vec![
            (Mark::Up, "upward sum"),
            (Mark::Down, "downward sum"),
            (Mark::Flagged, "signal"),
        ],
        limit_name: "decision interval h".into(),
    }
}

fn facts(row: &SeriesRow, design: Option<&Design>, config: &Config) -> Vec<(String, String)> {
    let mut f = vec![("lots stored".to_string(), row.lots.to_string())];
    let Some(d) = design else {
        f.push((
            "baseline".into(),
            format!(
                "not frozen yet: {} of {} lots",
                row.lots, config.monitor.baseline_lots
            ),
        ));
        return f;
    };
    let re = &d.re;
    let unit = config.unit(&row.characteristic);
    let value = |v: f64, digits| with_unit(fmt::sig(v, digits), unit);
    f.push((
        "baseline".into(),
        format!("first {} lots, {} units", re.m, re.n_total),
    ));
    // On the log scale the design's numbers are of ln(value) and carry no unit.
    let (of, scale_unit) = if d.log_scale {
        (" of ln(value)", None)
    } else {
        ("", unit)
    };
    for (name, v, digits) in [
        ("baseline mean (of lot means)", re.mean_of_means, 5),
        ("within-lot sd", re.var_within.sqrt(), 3),
        ("between-lot sd", re.var_between.sqrt(), 3),
    ] {
        f.push((
            format!("{name}{of}"),
            with_unit(fmt::sig(v, digits), scale_unit),
        ));
    }
    f.push((
        "lot test level (per lot)".into(),
        numbers::p_value(Some(d.level_mean)),
    ));
    if let Some((k, h)) = d.cusum {
        f.push((
            "CUSUM k, h".into(),
            format!("{}, {}", fmt::sig(k, 3), fmt::sig(h, 3)),
        ));
    }
    let policy = config.monitor.policy(&row.characteristic);
    if policy.lsl.is_some() || policy.usl.is_some() {
        f.push((
            "specification limits".into(),
            format!(
                "{} to {}",
                policy.lsl.map_or("none".into(), |v| value(v, 5)),
                policy.usl.map_or("none".into(), |v| value(v, 5))
            ),
        ));
    }
    if let Some(c) = engine::baseline_cpk(d, &config.monitor, &row.characteristic) {
        f.push((
            "Cpk of the baseline (95 % interval)".into(),
            format!(
                "{} ({} – {})",
                fmt::sig(c.cpk, 3),
                fmt::sig(c.low, 3),
                fmt::sig(c.high, 3)
            ),
        ));
    }
    if let Some(s) = engine::detectable_shift(d, &config.monitor, &row.characteristic) {
        f.push(("shift one lot shows (90 % power)".into(), value(s, 3)));
    }
    f
}

fn notes(
    design: Option<&Design>,
    policy: &CharacteristicPolicy,
    lots: &[ChartLot],
    unit: Option<&str>,
) -> Vec<String> {
    let mut n = Vec::new();
    let Some(d) = design else {
        return n;
    };
    if d.re.var_between > 0.0 {
        n.push("Lots differ from each other more than their units explain: the limits include that lot-to-lot variation.".into());
    } else {
        n.push("The baseline shows no lot-to-lot variation beyond its units': the limits rest on the within-lot spread.".into());
    }
    match policy.direction {
        Direction::TwoSided => {}
        Direction::HigherIsBetter => n.push("Higher is better here: only a fall is tested.".into()),
        Direction::LowerIsBetter => n.push("Lower is better here: only a rise is tested.".into()),
    }
    if policy.min_shift > 0.0 {
        n.push(format!(
            "Only shifts significantly larger than {} count.",
            with_unit(fmt::sig(policy.min_shift, 3), unit)
        ));
    }
    if d.log_scale && lots.iter().any(|l| l.spread.is_some()) {
        n.push("The spread test compares the spread of ln(value), which does not convert to an sd of the values: the spread chart shows each lot's sd without a limit; its marks show the decisions.".into());
    }
    if d.log_scale {
        n.push("Tested on the log scale (positive, right-skewed values): the chart shows geometric lot means.".into());
    }
    if lots
        .iter()
        .any(|l| l.mean.as_ref().is_some_and(|e| e.test == "mann-whitney"))
    {
        n.push("Some lots were tested by ranks of their units (the baseline's units are not normal); for those the limits are a guide, the marks show the decision.".into());
    }
    if lots
        .iter()
        .any(|l| l.mean.as_ref().is_some_and(|e| e.family_size > 1))
    {
        n.push("Several characteristics of a lot are tested together: a lot inside the dashed limits is never flagged by the lot test, a lot beyond the dotted ones always is; between them it depends on the lot's other characteristics.".into());
    }
    n
}

fn decision(e: &crate::store::ChartEval) -> String {
    if e.significant {
        if e.test == "cusum" {
            "flagged (CUSUM)".into()
        } else {
            "flagged".into()
        }
    } else {
        "in control".into()
    }
}

fn lot_line(l: &ChartLot) -> LotLine {
    LotLine {
        lot: l.lot.clone(),
        when: fmt::when(&l.order_time),
        role: if l.baseline {
            "baseline"
        } else if l.mean.is_some() {
            "tested"
        } else {
            "pending"
        },
        n: l.summary.n(),
        mean: fmt::sig(l.summary.mean(), 5),
        sd: fmt::opt(l.summary.sd(), 3),
        mean_p: l
            .mean
            .as_ref()
            .map_or(MISSING.into(), |e| numbers::p_value(e.p_value)),
        mean_decision: l.mean.as_ref().map_or(String::new(), decision),
        spread: l
            .spread
            .as_ref()
            .map_or(MISSING.into(), |e| fmt::opt(e.estimate, 3)),
        spread_decision: l.spread.as_ref().map_or(String::new(), decision),
        outliers: match (l.outliers, l.set_aside) {
            (0, _) => String::new(),
            (n, s) => format!("{n} ({s} set aside)"),
        },
        cpk: l
            .mean
            .as_ref()
            .and_then(|e| e.cpk)
            .map_or(String::new(), |c| fmt::sig(c[0], 3)),
    }
}

/// The alerts of `scope`'s source (all sources without one), open first, then newest; their
/// numbers in each characteristic's unit of measure (`config.units`).
pub fn alert_lines(alerts: &[AlertRow], scope: &Scope, config: &Config) -> Vec<AlertLine> {
    let mut rows: Vec<&AlertRow> = alerts
        .iter()
        .filter(|a| scope.source.as_ref().is_none_or(|s| *s == a.source))
        .collect();
    rows.sort_by(|a, b| {
        (a.state != "open")
            .cmp(&(b.state != "open"))
            .then(b.id.cmp(&a.id))
    });
    rows.into_iter()
        .map(|a| alert_line(a, config.unit(&a.characteristic)))
        .collect()
}

/// Resolved alerts a report lists at most (the newest), besides every open one.
const RECENT_RESOLVED: usize = 20;

/// The alerts of a report: every open one of the scope's source, and the newest resolved ones
/// (at most 20) that were open at some time within the scope's dates.
pub fn report_alerts(alerts: &[AlertRow], scope: &Scope, config: &Config) -> Vec<AlertLine> {
    let day = |t: &str| t.chars().take(10).collect::<String>();
    let within = |a: &AlertRow| {
        let ended = a.resolved_at.as_deref().map(day);
        scope
            .from
            .as_ref()
            .is_none_or(|f| ended.as_ref().is_none_or(|e| e >= f))
            && scope.to.as_ref().is_none_or(|t| day(&a.opened_at) <= *t)
    };
    let kept: Vec<AlertRow> = alerts
        .iter()
        .filter(|a| a.state == "open" || within(a))
        .cloned()
        .collect();
    let mut lines = alert_lines(&kept, scope, config);
    let mut resolved = 0;
    lines.retain(|a| {
        resolved += usize::from(a.state != "open");
        a.state == "open" || resolved <= RECENT_RESOLVED
    });
    lines
}

/// What the lot showed against the baseline: means and their difference for a mean alert,
/// sds and their ratio for a spread alert; in the unit of measure unless tested on the log
/// scale (then the numbers are of ln(value)).
fn alert_comparison(a: &AlertRow, unit: Option<&str>) -> String {
    let unit = unit.filter(|_| !engine::on_log_scale(a.note.as_deref()));
    let v = |x: Option<f64>, digits: usize| with_unit(fmt::opt(x, digits), unit);
    let interval = |c: Option<[f64; 2]>, unit: Option<&str>| {
        c.map_or(MISSING.into(), |[lo, hi]| {
            format!(
                "{} to {}",
                fmt::sig(lo, 3),
                with_unit(fmt::sig(hi, 3), unit)
            )
        })
    };
    if a.kind == "spread" {
        format!(
            "lot sd {} (n = {}) against baseline sd {} (n = {}); spread ratio {}, 95 % interval {}",
            v(a.lot_sd, 3),
            a.lot_n,
            v(a.baseline_sd, 3),
            a.baseline_n,
            fmt::opt(a.estimate, 3),
            interval(a.ci, None)
        )
    } else {
        format!(
            "lot mean {} (n = {}) against baseline {} (n = {}); difference {}, 95 % interval {}",
            v(Some(a.lot_mean), 5),
            a.lot_n,
            v(Some(a.baseline_mean), 5),
            a.baseline_n,
            v(a.estimate, 3),
            interval(a.ci, unit)
        )
    }
}

/// The test behind an alert: statistic, degrees of freedom, p-values and the family.
fn alert_test(a: &AlertRow) -> String {
    let df = match a.df {
        Some(_) => format!(", df = {}", numbers::df(a.df, a.df2)),
        None => String::new(),
    };
    format!(
        "statistic {}{df}; p {}, adjusted {} (level {}, {} tested together); {} lot(s) so far",
        fmt::opt(a.statistic, 3),
        numbers::p_is(a.p_value),
        numbers::p_is(a.p_adjusted),
        numbers::p_value(Some(a.level)),
        a.family_size,
        a.lots
    )
}

fn alert_line(a: &AlertRow, unit: Option<&str>) -> AlertLine {
    AlertLine {
        id: a.id,
        source: a.source.clone(),
        characteristic: a.characteristic.clone(),
        kind: a.kind.clone(),
        state: a.state.clone(),
        opened_at: fmt::when(&a.opened_at),
        resolved_at: a.resolved_at.as_deref().map(fmt::when).unwrap_or_default(),
        lot: a.lot.clone(),
        test: a.test.clone(),
        numbers: format!("{}; {}", alert_comparison(a, unit), alert_test(a)),
        acknowledged: a
            .acknowledged
            .as_ref()
            .map(|k| format!("{} at {}: {}", k.by, fmt::when(&k.at), k.note))
            .unwrap_or_default(),
        note: a.note.clone().unwrap_or_default(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::summary::Summary;

    fn alert(kind: &str) -> AlertRow {
        let mut a = AlertRow::example("alder", "L7");
        a.kind = kind.into();
        a.df = Some(13.52);
        a.p_adjusted = Some(3.0e-4);
        a
    }

    #[test]
    fn an_alert_shows_its_numbers_in_the_unit_of_measure() {
        let line = alert_line(&alert("mean"), Some("g"));
        assert_eq!(
            line.numbers,
            "lot mean 197.00 g (n = 12) against baseline 200.00 g (n = 240); difference \
             -3.00 g, 95 % interval -3.70 to -2.30 g; statistic -7.25, df = 13.5; p = 1.5e-6, \
             adjusted = 0.0003 (level 0.01, 2 tested together); 1 lot(s) so far"
        );
        let bare = alert_line(&alert("mean"), None);
        assert!(!bare.numbers.contains(" g"), "{}", bare.numbers);
    }

    #[test]
    fn a_log_scale_alert_has_no_unit_and_a_spread_alert_shows_sds_and_a_ratio() {
        let mut log = alert("mean");
        log.note = Some(crate::engine::log_scale_note().to_string());
        let line = alert_line(&log, Some("g"));
        assert!(!line.numbers.contains(" g"), "{}", line.numbers);

        let mut spread = alert("spread");
        spread.test = "f-variance".into();
        spread.df = Some(11.0);
        spread.df2 = Some(239.0);
        spread.estimate = Some(2.4);
        spread.ci = None;
        let line = alert_line(&spread, Some("g"));
        assert!(
            line.numbers.starts_with(
                "lot sd 1.10 g (n = 12) against baseline sd 1.00 g (n = 240); spread ratio \
                 2.40, 95 % interval -; statistic -7.25, df = 11 and 239;"
            ),
            "{}",
            line.numbers
        );
    }

    fn lot(code: &str, values: &[f64]) -> ChartLot {
        ChartLot {
            sample_id: 1,
            lot: code.into(),
            order_time: "2026-03-04T10:20:00.000Z".into(),
            summary: Summary::from_slice(values).unwrap(),
            baseline: true,
            mean: None,
            spread: None,
            outliers: 0,
            set_aside: 0,
            opened: Vec::new(),
        }
    }

    fn spread_eval(significant: bool) -> crate::store::ChartEval {
        crate::store::ChartEval {
            test: "f-variance".into(),
            level: 0.001,
            family_size: 1,
            significant,
            statistic: Some(1.2),
            df: Some(11.0),
            df2: Some(239.0),
            p_value: Some(0.3),
            p_adjusted: Some(0.3),
            lot_mean: 3001.0,
            lot_n: 2,
            estimate: Some(1.2),
            cusum: None,
            cusum_signal: false,
            cpk: None,
        }
    }

    #[test]
    fn the_spread_chart_shows_every_lots_sd_and_marks_the_tested_ones() {
        let mut lots = vec![
            lot("L1", &[3000.0, 3002.0]),
            lot("L2", &[3000.0, 3004.0]),
            lot("L3", &[3000.0, 3008.0]),
        ];
        lots[1].baseline = false;
        lots[1].spread = Some(spread_eval(false));
        lots[2].baseline = false;
        lots[2].spread = Some(spread_eval(true));
        let chart = spread_chart("s1", &lots, None, Some("mAh"));
        assert_eq!(chart.y_label, "within-lot sd (mAh)");
        let marks: Vec<(usize, Mark)> = chart.points.iter().map(|p| (p.x, p.mark)).collect();
        assert_eq!(
            marks,
            [(0, Mark::Baseline), (1, Mark::Tested), (2, Mark::Flagged)]
        );
        // Without a design the sds are the stored values' (sd of 3000 and 3008: 5.657).
        assert!((chart.points[2].y - 32f64.sqrt()).abs() < 1e-12);
        assert!(
            chart.points[1]
                .tip
                .ends_with("sd 2.828 mAh, spread ratio 1.20, p = 0.3"),
            "{}",
            chart.points[1].tip
        );
    }

    #[test]
    fn the_mean_chart_names_its_unit_on_the_axis_and_in_every_tip() {
        let lots = [lot("L1", &[3000.0, 3002.0]), lot("L2", &[3001.0, 3003.0])];
        let policy = Config::defaults_in(std::path::Path::new("/x"))
            .monitor
            .policy("capacity");
        let chart = mean_chart("s1", &lots, None, &policy, &[], Some("mAh"));
        assert_eq!(chart.y_label, "lot mean (mAh)");
        assert_eq!(
            chart.points[1].tip,
            "lot L2 (2026-03-04 10:20 UTC), n = 2: mean 3002 mAh"
        );
        let plain = mean_chart("s1", &lots, None, &policy, &[], None);
        assert_eq!(plain.y_label, "lot mean");
        assert!(
            plain
                .points
                .iter()
                .all(|p| p.tip.ends_with(": mean 3002") || p.tip.ends_with(": mean 3001"))
        );
    }
}
