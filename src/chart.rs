//! Charts for people as PNG bytes (alert emails): the page's charts (`page::svg::Chart`: lot
//! means, spread or CUSUM with the engine's own limits) drawn by plotters.
//!
//! **This module does no I/O**: it takes numbers and returns the encoded image. The text is
//! drawn with DejaVu Sans compiled into the binary (the `dejavu` crate, through plotters'
//! `ab_glyph` backend), so no system font, font configuration or C library is needed. The
//! caller (`alert`) decides what to plot and where the bytes go.

use std::sync::OnceLock;

use plotters::chart::SeriesAnno;
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;
use plotters::style::FontStyle;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use crate::page::svg::{self, Chart, Line, LineStyle, Mark};

/// Width and height of the chart in pixels: readable in a mail client without scrolling.
pub const SIZE: (u32, u32) = (800, 400);

/// The font family name the chart's text uses (registered on first use).
const FAMILY: &str = "sans-serif";

#[derive(Debug, thiserror::Error, PartialEq)]
pub enum ChartError {
    #[error("nothing to plot: no lots")]
    Empty,
    #[error("cannot plot a value that is not a finite number ({what})")]
    NotFinite { what: &'static str },
    #[error("the embedded font could not be loaded")]
    Font,
    #[error("drawing the chart failed: {0}")]
    Draw(String),
    #[error("encoding the chart as PNG failed: {0}")]
    Encode(String),
}

fn register_font() -> Result<(), ChartError> {
    static REGISTERED: OnceLock<bool> = OnceLock::new();
    let ok = *REGISTERED.get_or_init(|| {
        plotters::style::register_font(FAMILY, FontStyle::Normal, dejavu::sans::regular()).is_ok()
    });
    if ok { Ok(()) } else { Err(ChartError::Font) }
}

fn draw_err(e: impl std::fmt::Display) -> ChartError {
    ChartError::Draw(e.to_string())
}

/// Renders a chart of `page::svg` (lot means, spread or CUSUM, with the engine's limits) as a
/// PNG: the same points, marks, lines and labels as the page's SVG, so an alert email and the
/// report show one picture. Returns the PNG file's bytes.
pub fn render_png(c: &Chart) -> Result<Vec<u8>, ChartError> {
    if c.lots.is_empty() {
        return Err(ChartError::Empty);
    }
    if c.points.iter().any(|p| !p.y.is_finite()) {
        return Err(ChartError::NotFinite { what: "point" });
    }
    register_font()?;
    let (w, h) = SIZE;
    let mut pixels = vec![0u8; (w * h * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut pixels, SIZE).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let (lo, hi) = svg::range(c);
        let n = c.lots.len();
        let mut chart = ChartBuilder::on(&root)
            .caption(&c.title, (FAMILY, 16))
            .margin(12)
            .x_label_area_size(44)
            .y_label_area_size(72)
            .build_cartesian_2d(-0.5f64..(n as f64 - 0.5), lo..hi)
            .map_err(draw_err)?;
        draw_mesh(&mut chart, c)?;
        let mut named: Vec<LineStyle> = Vec::new();
        for l in &c.lines {
            // Upper and lower limits share one legend entry.
            let first = !named.contains(&l.style);
            named.push(l.style);
            draw_line(&mut chart, l, c, first)?;
        }
        for mark in [
            Mark::Baseline,
            Mark::Tested,
            Mark::Up,
            Mark::Down,
            Mark::Flagged,
        ] {
            draw_marks(&mut chart, c, mark)?;
        }
        draw_labels(&mut chart, c)?;
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperLeft)
            .background_style(WHITE.mix(0.9))
            .border_style(INK.mix(0.4))
            .label_font((FAMILY, 12))
            .draw()
            .map_err(draw_err)?;
        root.present().map_err(draw_err)?;
    }
    encode_png(&pixels, w, h)
}

type Cart<'a, 'b> =
    ChartContext<'a, BitMapBackend<'b>, Cartesian2d<RangedCoordf64, RangedCoordf64>>;

const INK: RGBColor = RGBColor(31, 42, 48);
const TEAL: RGBColor = RGBColor(14, 110, 106);
const FLAG: RGBColor = RGBColor(185, 60, 11);
const LIMIT: RGBColor = RGBColor(79, 90, 97);

/// Axes, tick labels (lot codes, values as people write them) and the horizontal grid.
fn draw_mesh(chart: &mut Cart, c: &Chart) -> Result<(), ChartError> {
    let n = c.lots.len();
    let labels = |x: &f64| -> String {
        let i = x.round();
        if (x - i).abs() > 1e-9 || i < 0.0 {
            return String::new();
        }
        c.lots
            .get(i as usize)
            .map(|l| l.chars().take(14).collect())
            .unwrap_or_default()
    };
    chart
        .configure_mesh()
        .disable_x_mesh()
        .light_line_style(WHITE)
        .x_labels(n.min(8))
        .x_label_formatter(&labels)
        .y_label_formatter(&|v: &f64| crate::page::fmt::axis(*v))
        .x_desc("lot, in sampling order")
        .y_desc(c.y_label.as_str())
        .label_style((FAMILY, 12))
        .axis_desc_style((FAMILY, 13))
        .draw()
        .map_err(draw_err)?;
    Ok(())
}

/// The short labels above points (alert openings, outliers, CUSUM signals).
fn draw_labels(chart: &mut Cart, c: &Chart) -> Result<(), ChartError> {
    chart
        .draw_series(c.points.iter().filter_map(|p| {
            let label = p.label.as_ref()?;
            let style = (FAMILY, 12)
                .into_font()
                .color(&INK)
                .pos(Pos::new(HPos::Center, VPos::Bottom));
            Some(EmptyElement::at((p.x as f64, p.y)) + Text::new(label.clone(), (0, -10), style))
        }))
        .map_err(draw_err)?;
    Ok(())
}

/// A line of the chart: limits and the centre step from lot to lot (dashed or dotted limits,
/// as on the page), paths join their points.
fn draw_line(chart: &mut Cart, l: &Line, c: &Chart, legend: bool) -> Result<(), ChartError> {
    let (color, width, dash) = match l.style {
        LineStyle::Centre => (TEAL, 2, None),
        LineStyle::Limit => (LIMIT, 2, Some(0.22)),
        LineStyle::Outer => (LIMIT, 1, Some(0.08)),
        LineStyle::Path => (INK, 1, None),
        LineStyle::PathDashed => (INK, 1, Some(0.12)),
    };
    let style = color.stroke_width(width);
    let mut pieces: Vec<Vec<(f64, f64)>> = Vec::new();
    let stepped = matches!(
        l.style,
        LineStyle::Centre | LineStyle::Limit | LineStyle::Outer
    );
    for (i, v) in l.values.iter().enumerate() {
        let x = i as f64;
        match v.filter(|v| v.is_finite()) {
            Some(v) if stepped => pieces.push(vec![(x - 0.5, v), (x + 0.5, v)]),
            Some(v) => match pieces.last_mut() {
                Some(last) if last.last().is_some_and(|p| p.0 == x - 1.0) => last.push((x, v)),
                _ => pieces.push(vec![(x, v)]),
            },
            None => {}
        }
    }
    let segments: Vec<Vec<(f64, f64)>> = match dash {
        None => pieces,
        Some(d) => pieces.iter().flat_map(|p| dashes(p, d)).collect(),
    };
    let name = match l.style {
        LineStyle::Limit => c.limit_name.clone(),
        LineStyle::Outer => "limit, whole family".into(),
        _ => l.name.clone(),
    };
    let drawn = chart
        .draw_series(segments.into_iter().map(|s| PathElement::new(s, style)))
        .map_err(draw_err)?;
    if legend && !matches!(l.style, LineStyle::Path | LineStyle::PathDashed) {
        drawn.label(name).legend(move |(x, y)| {
            let x2 = if dash.is_some() { x + 7 } else { x + 16 };
            PathElement::new([(x, y), (x2, y)], style)
        });
    }
    Ok(())
}

/// A polyline cut into dashes `d` lot-widths long (gaps as long), on its x extent.
fn dashes(path: &[(f64, f64)], d: f64) -> Vec<Vec<(f64, f64)>> {
    let mut out = Vec::new();
    for w in path.windows(2) {
        let ((x0, y0), (x1, y1)) = (w[0], w[1]);
        let mut t = x0;
        while t < x1 {
            let e = (t + d).min(x1);
            let at = |x: f64| y0 + (y1 - y0) * (x - x0) / (x1 - x0);
            out.push(vec![(t, at(t)), (e, at(e))]);
            t += 2.0 * d;
        }
    }
    out
}

/// The points of one mark, drawn with that mark's shape.
fn draw_marks(chart: &mut Cart, c: &Chart, mark: Mark) -> Result<(), ChartError> {
    let points: Vec<(f64, f64)> = c
        .points
        .iter()
        .filter(|p| p.mark == mark)
        .map(|p| (p.x as f64, p.y))
        .collect();
    let Some(name) = c.legend.iter().find(|(m, _)| *m == mark).map(|(_, t)| *t) else {
        return Ok(());
    };
    let anno = match mark {
        Mark::Baseline => chart
            .draw_series(
                points
                    .iter()
                    .map(|&p| Circle::new(p, 4, TEAL.stroke_width(2))),
            )
            .map_err(draw_err)?,
        Mark::Tested => chart
            .draw_series(points.iter().map(|&p| Circle::new(p, 4, TEAL.filled())))
            .map_err(draw_err)?,
        Mark::Flagged => chart
            .draw_series(points.iter().map(|&p| {
                EmptyElement::at(p)
                    + Polygon::new(vec![(0, -8), (8, 0), (0, 8), (-8, 0)], FLAG.filled())
            }))
            .map_err(draw_err)?,
        Mark::Up => chart
            .draw_series(points.iter().map(|&p| {
                EmptyElement::at(p) + Polygon::new(vec![(0, -6), (5, 4), (-5, 4)], INK.filled())
            }))
            .map_err(draw_err)?,
        Mark::Down => chart
            .draw_series(points.iter().map(|&p| {
                EmptyElement::at(p)
                    + PathElement::new(vec![(0, 6), (5, -4), (-5, -4), (0, 6)], INK.stroke_width(1))
            }))
            .map_err(draw_err)?,
    };
    mark_legend(anno.label(name), mark);
    Ok(())
}

/// The legend entry of a mark: its shape.
fn mark_legend(anno: &mut SeriesAnno<BitMapBackend>, mark: Mark) {
    match mark {
        Mark::Baseline => anno.legend(|(x, y)| Circle::new((x + 8, y), 4, TEAL.stroke_width(2))),
        Mark::Tested => anno.legend(|(x, y)| Circle::new((x + 8, y), 4, TEAL.filled())),
        Mark::Flagged => anno.legend(|(x, y)| {
            Polygon::new(
                vec![(x + 8, y - 6), (x + 14, y), (x + 8, y + 6), (x + 2, y)],
                FLAG.filled(),
            )
        }),
        Mark::Up => anno.legend(|(x, y)| {
            Polygon::new(
                vec![(x + 8, y - 5), (x + 13, y + 4), (x + 3, y + 4)],
                INK.filled(),
            )
        }),
        Mark::Down => anno.legend(|(x, y)| {
            PathElement::new(
                vec![
                    (x + 8, y + 5),
                    (x + 13, y - 4),
                    (x + 3, y - 4),
                    (x + 8, y + 5),
                ],
                INK.stroke_width(1),
            )
        }),
    };
}

fn encode_png(rgb: &[u8], w: u32, h: u32) -> Result<Vec<u8>, ChartError> {
    let mut out = Vec::new();
    {
        let mut encoder = png::Encoder::new(&mut out, w, h);
        encoder.set_color(png::ColorType::Rgb);
        encoder.set_depth(png::BitDepth::Eight);
        let mut writer = encoder
            .write_header()
            .map_err(|e| ChartError::Encode(e.to_string()))?;
        writer
            .write_image_data(rgb)
            .map_err(|e| ChartError::Encode(e.to_string()))?;
        writer
            .finish()
            .map_err(|e| ChartError::Encode(e.to_string()))?;
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::page::svg::Point;

    fn chart(title: &str) -> Chart {
        let points = (0..30)
            .map(|i| Point {
                x: i,
                y: 100.0
                    + if i >= 25 {
                        3.0
                    } else {
                        (i % 5) as f64 * 0.1 - 0.2
                    },
                mark: if i < 20 {
                    Mark::Baseline
                } else if i >= 25 {
                    Mark::Flagged
                } else {
                    Mark::Tested
                },
                label: (i == 25).then(|| "A1".to_string()),
                tip: String::new(),
            })
            .collect();
        Chart {
            id: "c".into(),
            title: title.into(),
            y_label: "lot mean".into(),
            lots: (0..30).map(|i| format!("AC-{:03}", i + 1)).collect(),
            points,
            lines: vec![
                Line {
                    name: "baseline".into(),
                    values: vec![Some(100.0); 30],
                    style: LineStyle::Centre,
                },
                Line {
                    name: "upper limit".into(),
                    values: vec![Some(101.0); 30],
                    style: LineStyle::Limit,
                },
            ],
            legend: vec![
                (Mark::Baseline, "baseline lot"),
                (Mark::Tested, "tested, in control"),
                (Mark::Flagged, "flagged"),
            ],
            limit_name: "decision limit".into(),
        }
    }

    fn decode(bytes: &[u8]) -> (png::OutputInfo, Vec<u8>) {
        let decoder = png::Decoder::new(std::io::Cursor::new(bytes));
        let mut reader = decoder.read_info().unwrap();
        let mut buf = vec![0; reader.output_buffer_size().unwrap()];
        let info = reader.next_frame(&mut buf).unwrap();
        buf.truncate(info.buffer_size());
        (info, buf)
    }

    #[test]
    fn renders_a_decodable_png_with_the_flagged_marks() {
        let bytes = render_png(&chart("alder-cells / capacity_mah")).unwrap();
        assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n");
        let (info, pixels) = decode(&bytes);
        assert_eq!((info.width, info.height), SIZE);
        let px: Vec<&[u8]> = pixels.chunks(3).collect();
        let flag = [FLAG.0, FLAG.1, FLAG.2];
        assert!(
            px.iter().filter(|p| **p == flag).count() > 100,
            "no flagged diamonds"
        );
        let dark = px.iter().filter(|p| p.iter().all(|&c| c < 60)).count();
        assert!(dark > 2000, "too little dark ink for axes and text: {dark}");
    }

    #[test]
    fn a_cusum_chart_draws_both_paths_their_marks_and_h() {
        let mut c = chart("cedar-energy / capacity_mah: CUSUM path, alert A2");
        c.points = (0..30)
            .flat_map(|i| {
                let up = if i > 20 { (i - 20) as f64 * 1.5 } else { 0.0 };
                [(up, Mark::Up), (0.2, Mark::Down)].map(|(y, mark)| Point {
                    x: i,
                    y,
                    mark,
                    label: None,
                    tip: String::new(),
                })
            })
            .collect();
        c.lines = vec![Line {
            name: "h".into(),
            values: vec![Some(9.4); 30],
            style: LineStyle::Limit,
        }];
        c.legend = vec![(Mark::Up, "upward sum"), (Mark::Down, "downward sum")];
        let png = render_png(&c).unwrap();
        let (_, pixels) = decode(&png);
        let ink = [INK.0, INK.1, INK.2];
        assert!(
            pixels.chunks(3).filter(|p| *p == ink).count() > 300,
            "no CUSUM marks"
        );
    }

    #[test]
    fn text_is_drawn_from_the_embedded_font() {
        let a = decode(&render_png(&chart("")).unwrap()).1;
        let b = decode(&render_png(&chart("WWWW title")).unwrap()).1;
        let differing = a.chunks(3).zip(b.chunks(3)).filter(|(x, y)| x != y).count();
        assert!(differing > 200, "caption drew {differing} pixels");
    }

    #[test]
    fn refuses_what_cannot_be_plotted() {
        let mut c = chart("t");
        c.lots.clear();
        assert_eq!(render_png(&c), Err(ChartError::Empty));
        let mut c = chart("t");
        c.points[3].y = f64::NAN;
        assert!(matches!(render_png(&c), Err(ChartError::NotFinite { .. })));
    }
}
