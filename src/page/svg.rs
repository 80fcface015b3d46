//! A small SVG writer for lot charts: points in lot order, limit lines that may step from lot
//! to lot, reference lines, a legend. Every text is escaped here; the output is inline SVG
//! that needs no script, font download or stylesheet outside itself.
//!
//! Marks are told apart by shape and fill as well as by colour (hollow circle, filled
//! circle, diamond, triangles), and the legend names each, so a page printed in black and
//! white or read with poor colour vision loses nothing.

use std::fmt::Write as _;

use super::escape;

const W: f64 = 920.0;
const H: f64 = 270.0;
const LEFT: f64 = 78.0;
const RIGHT: f64 = 16.0;
const TOP: f64 = 30.0;
const BOTTOM: f64 = 54.0;
/// Width of a legend character (11.5 px sans) for laying out the legend.
const CHAR_W: f64 = 7.0;

/// How one point is drawn.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mark {
    /// A baseline lot: hollow circle.
    Baseline,
    /// A lot tested and in control: filled circle.
    Tested,
    /// A lot whose decision was significant: diamond.
    Flagged,
    /// Upper CUSUM sum: triangle pointing up.
    Up,
    /// Lower CUSUM sum: triangle pointing down.
    Down,
}

/// One point: its lot index, value, mark, and an optional short label above it.
#[derive(Debug, Clone)]
pub struct Point {
    pub x: usize,
    pub y: f64,
    pub mark: Mark,
    pub label: Option<String>,
    /// Tooltip text (the lot and its numbers).
    pub tip: String,
}

/// A line across the chart: a value per lot index (None: no line at that lot).
#[derive(Debug, Clone)]
pub struct Line {
    pub name: String,
    pub values: Vec<Option<f64>>,
    pub style: LineStyle,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LineStyle {
    /// The centre (baseline): solid.
    Centre,
    /// A decision limit: dashed.
    Limit,
    /// A second, outer limit: dotted.
    Outer,
    /// A joining path through points (CUSUM paths): thin solid.
    Path,
    /// A joining path drawn with a dash (lower CUSUM path).
    PathDashed,
}

/// A chart of one quantity over a series' lots.
#[derive(Debug, Clone)]
pub struct Chart {
    /// Used as the element id and the `data-chart` attribute.
    pub id: String,
    pub title: String,
    pub y_label: String,
    pub lots: Vec<String>,
    pub points: Vec<Point>,
    pub lines: Vec<Line>,
    /// Which marks the legend explains.
    pub legend: Vec<(Mark, &'static str)>,
    /// What the legend calls the dashed lines.
    pub limit_name: String,
}

/// The y range of a chart: every point and line value, with a margin.
pub(crate) fn range(c: &Chart) -> (f64, f64) {
    let values = c
        .points
        .iter()
        .map(|p| p.y)
        .chain(
            c.lines
                .iter()
                .flat_map(|l| l.values.iter().flatten().copied()),
        )
        .filter(|v| v.is_finite());
    let (lo, hi) = values.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
        (a.min(v), b.max(v))
    });
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    let span = hi - lo;
    let pad = if span > 0.0 {
        span * 0.08
    } else {
        lo.abs().max(1.0) * 0.01
    };
    (lo - pad, hi + pad)
}

/// Round tick positions covering lo..hi, about five of them.
fn ticks(lo: f64, hi: f64) -> Vec<f64> {
    let raw = (hi - lo) / 5.0;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * mag);
    let mut t = (lo / step).ceil() * step;
    let mut out = Vec::new();
    while t <= hi + step * 1e-9 && out.len() < 12 {
        out.push(t);
        t += step;
    }
    out
}

/// Geometry of the plotting area.
struct Frame {
    n: usize,
    lo: f64,
    hi: f64,
}

impl Frame {
    fn x(&self, i: usize) -> f64 {
        let inner = W - LEFT - RIGHT;
        LEFT + inner * (i as f64 + 0.5) / self.n.max(1) as f64
    }
    fn y(&self, v: f64) -> f64 {
        let inner = H - TOP - BOTTOM;
        TOP + inner * (1.0 - (v - self.lo) / (self.hi - self.lo))
    }
}

/// The chart as an `<svg>` element.
pub fn render(c: &Chart) -> String {
    let (lo, hi) = range(c);
    let f = Frame {
        n: c.lots.len(),
        lo,
        hi,
    };
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<svg class="chart" id="{id}" data-chart="{id}" viewBox="0 0 {W} {H}" role="img" aria-labelledby="{id}-t"><title id="{id}-t">{title}</title>"#,
        id = escape(&c.id),
        title = escape(&c.title)
    );
    axes(&mut s, c, &f);
    for l in &c.lines {
        line(&mut s, l, &f);
    }
    for p in &c.points {
        point(&mut s, p, &f);
    }
    legend(&mut s, c);
    s.push_str("</svg>");
    s
}

fn axes(s: &mut String, c: &Chart, f: &Frame) {
    let _ = write!(
        s,
        r#"<rect class="plot" x="{LEFT}" y="{TOP}" width="{}" height="{}"/>"#,
        W - LEFT - RIGHT,
        H - TOP - BOTTOM
    );
    for t in ticks(f.lo, f.hi) {
        let y = f.y(t);
        let _ = write!(
            s,
            r#"<line class="grid" x1="{LEFT}" x2="{}" y1="{y:.1}" y2="{y:.1}"/><text class="tick" x="{}" y="{:.1}" text-anchor="end">{}</text>"#,
            W - RIGHT,
            LEFT - 6.0,
            y + 4.0,
            escape(&super::fmt::axis(t))
        );
    }
    let every = c.lots.len().div_ceil(10).max(1);
    for (i, lot) in c.lots.iter().enumerate().filter(|(i, _)| i % every == 0) {
        let short: String = lot.chars().take(14).collect();
        let _ = write!(
            s,
            r#"<text class="tick" x="{:.1}" y="{}" text-anchor="middle">{}</text>"#,
            f.x(i),
            H - BOTTOM + 16.0,
            escape(&short)
        );
    }
    let _ = write!(
        s,
        r#"<text class="axis" x="{}" y="{}" text-anchor="middle">lot, in sampling order</text><text class="axis" transform="translate(14 {}) rotate(-90)" text-anchor="middle">{}</text>"#,
        LEFT + (W - LEFT - RIGHT) / 2.0,
        H - BOTTOM + 36.0,
        TOP + (H - TOP - BOTTOM) / 2.0,
        escape(&c.y_label)
    );
}

fn line(s: &mut String, l: &Line, f: &Frame) {
    let class = match l.style {
        LineStyle::Centre => "centre",
        LineStyle::Limit => "limit",
        LineStyle::Outer => "outer",
        LineStyle::Path => "path",
        LineStyle::PathDashed => "path dashed",
    };
    let half = (W - LEFT - RIGHT) / f.n.max(1) as f64 / 2.0;
    let stepped = matches!(
        l.style,
        LineStyle::Centre | LineStyle::Limit | LineStyle::Outer
    );
    let mut d = String::new();
    let mut pen_up = true;
    for (i, v) in l.values.iter().enumerate() {
        let Some(v) = v.filter(|v| v.is_finite()) else {
            pen_up = true;
            continue;
        };
        let (x, y) = (f.x(i), f.y(v));
        let cmd = if pen_up { 'M' } else { 'L' };
        if stepped {
            let _ = write!(d, "{cmd}{:.1} {y:.1}H{:.1}", x - half, x + half);
        } else {
            let _ = write!(d, "{cmd}{x:.1} {y:.1}");
        }
        pen_up = false;
    }
    if d.is_empty() {
        return;
    }
    let _ = write!(
        s,
        r#"<path class="{class}" d="{d}"><title>{}</title></path>"#,
        escape(&l.name)
    );
}

fn shape(mark: Mark, x: f64, y: f64) -> String {
    match mark {
        Mark::Baseline => {
            format!(r#"<circle class="m-baseline" cx="{x:.1}" cy="{y:.1}" r="3.6"/>"#)
        }
        Mark::Tested => format!(r#"<circle class="m-tested" cx="{x:.1}" cy="{y:.1}" r="3.6"/>"#),
        Mark::Flagged => format!(
            r#"<path class="m-flagged" d="M{x:.1} {:.1}L{:.1} {y:.1}L{x:.1} {:.1}L{:.1} {y:.1}Z"/>"#,
            y - 7.0,
            x + 7.0,
            y + 7.0,
            x - 7.0
        ),
        Mark::Up => format!(
            r#"<path class="m-up" d="M{x:.1} {:.1}L{:.1} {:.1}L{:.1} {:.1}Z"/>"#,
            y - 5.0,
            x + 4.5,
            y + 3.5,
            x - 4.5,
            y + 3.5
        ),
        Mark::Down => format!(
            r#"<path class="m-down" d="M{x:.1} {:.1}L{:.1} {:.1}L{:.1} {:.1}Z"/>"#,
            y + 5.0,
            x + 4.5,
            y - 3.5,
            x - 4.5,
            y - 3.5
        ),
    }
}

fn point(s: &mut String, p: &Point, f: &Frame) {
    if !p.y.is_finite() {
        return;
    }
    let (x, y) = (f.x(p.x), f.y(p.y));
    let _ = write!(
        s,
        "<g><title>{}</title>{}",
        escape(&p.tip),
        shape(p.mark, x, y)
    );
    if let Some(label) = &p.label {
        let _ = write!(
            s,
            r#"<text class="mark-label" x="{x:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
            y - 10.0,
            escape(label)
        );
    }
    s.push_str("</g>");
}

fn legend(s: &mut String, c: &Chart) {
    let mut x = LEFT + 4.0;
    let y = 14.0;
    for (mark, text) in &c.legend {
        s.push_str(&shape(*mark, x + 5.0, y));
        let _ = write!(
            s,
            r#"<text class="legend" x="{:.1}" y="{:.1}">{}</text>"#,
            x + 14.0,
            y + 4.0,
            escape(text)
        );
        x += 28.0 + CHAR_W * text.chars().count() as f64;
    }
    let mut shown: Vec<LineStyle> = Vec::new();
    for l in &c.lines {
        let (class, text) = match l.style {
            LineStyle::Centre => ("centre", l.name.as_str()),
            LineStyle::Limit => ("limit", c.limit_name.as_str()),
            LineStyle::Outer => ("outer", "limit, whole family"),
            LineStyle::Path | LineStyle::PathDashed => continue,
        };
        if shown.contains(&l.style) {
            continue;
        }
        shown.push(l.style);
        let _ = write!(
            s,
            r#"<path class="{class}" d="M{x:.1} {y:.1}h18"/><text class="legend" x="{:.1}" y="{:.1}">{}</text>"#,
            x + 22.0,
            y + 4.0,
            escape(text)
        );
        x += 34.0 + CHAR_W * text.chars().count() as f64;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_are_escaped_and_marks_have_shapes() {
        let c = Chart {
            id: "c1".into(),
            title: "<script>alert(1)</script>".into(),
            y_label: "a & b".into(),
            lots: vec!["<L1>".into(), "L2".into()],
            points: vec![
                Point {
                    x: 0,
                    y: 1.0,
                    mark: Mark::Baseline,
                    label: None,
                    tip: "\"q\"".into(),
                },
                Point {
                    x: 1,
                    y: 2.0,
                    mark: Mark::Flagged,
                    label: Some("A1".into()),
                    tip: "t".into(),
                },
            ],
            lines: vec![Line {
                name: "upper limit".into(),
                values: vec![Some(2.5), Some(2.6)],
                style: LineStyle::Limit,
            }],
            legend: vec![(Mark::Flagged, "flagged")],
            limit_name: "limit".into(),
        };
        let svg = render(&c);
        assert!(!svg.contains("<script>"));
        assert!(svg.contains("&lt;script&gt;") && svg.contains("&lt;L1&gt;"));
        assert!(svg.contains("m-flagged") && svg.contains("m-baseline"));
        assert!(svg.contains(r#"class="limit""#));
    }

    #[test]
    fn ticks_are_round_and_cover_the_range() {
        let t = ticks(0.13, 0.97);
        assert!(t.len() >= 3 && t[0] >= 0.13 && *t.last().unwrap() <= 0.97);
        assert!(
            t.iter()
                .all(|v| ((v * 100.0).round() - v * 100.0).abs() < 1e-9)
        );
    }
}
