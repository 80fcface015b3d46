//! Charts for people: a series' recent lot means against its baseline, as PNG bytes.
//!
//! **This module does no I/O**: it takes numbers and returns the encoded image. The text is
//! drawn with DejaVu Sans compiled into the binary (the `dejavu` crate, through plotters'
//! `ab_glyph` backend), so no system font, font configuration or C library is needed. The
//! caller (`alert`) decides what to plot and where the bytes go.

use std::sync::OnceLock;

use plotters::prelude::*;
use plotters::style::FontStyle;

/// Width and height of the chart in pixels: readable in a mail client without scrolling.
pub const SIZE: (u32, u32) = (800, 400);

/// The font family name the chart's text uses (registered on first use).
const FAMILY: &str = "sans-serif";

/// One lot of the series, in series order.
#[derive(Debug, Clone, PartialEq)]
pub struct ChartPoint {
    /// The lot code, shown on the x axis.
    pub label: String,
    /// The lot's mean of the characteristic.
    pub mean: f64,
    /// The lot is one of the baseline's lots.
    pub baseline: bool,
    /// The lot's test was significant (it opened or joined an alert).
    pub alerting: bool,
}

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

/// Renders `points` (oldest first) as a line of lot means, with the baseline mean as a
/// horizontal line, a shaded band of ± `band` around it, baseline lots in grey, later lots
/// in blue and alerting lots as large red dots. Returns the PNG file's bytes.
pub fn render_series_png(
    points: &[ChartPoint],
    baseline_mean: f64,
    band: f64,
    title: &str,
) -> Result<Vec<u8>, ChartError> {
    if points.is_empty() {
        return Err(ChartError::Empty);
    }
    if !baseline_mean.is_finite() {
        return Err(ChartError::NotFinite {
            what: "baseline mean",
        });
    }
    if !band.is_finite() || band < 0.0 {
        return Err(ChartError::NotFinite { what: "band" });
    }
    if points.iter().any(|p| !p.mean.is_finite()) {
        return Err(ChartError::NotFinite { what: "lot mean" });
    }
    register_font()?;

    let (w, h) = SIZE;
    let mut pixels = vec![0u8; (w * h * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut pixels, SIZE).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;

        let (lo, hi) = y_range(points, baseline_mean, band);
        let n = points.len();
        let mut chart = ChartBuilder::on(&root)
            .caption(title, (FAMILY, 18))
            .margin(12)
            .x_label_area_size(48)
            .y_label_area_size(72)
            .build_cartesian_2d(-0.5f64..(n as f64 - 0.5), lo..hi)
            .map_err(draw_err)?;

        let labels = |x: &f64| -> String {
            let i = x.round();
            if (x - i).abs() > 1e-9 || i < 0.0 {
                return String::new();
            }
            points
                .get(i as usize)
                .map(|p| p.label.chars().take(14).collect())
                .unwrap_or_default()
        };
        chart
            .configure_mesh()
            .disable_x_mesh()
            .light_line_style(RGBColor(242, 242, 242))
            .x_labels(n.min(8))
            .x_label_formatter(&labels)
            .x_desc("lot (sampling order)")
            .y_desc("lot mean")
            .label_style((FAMILY, 13))
            .axis_desc_style((FAMILY, 14))
            .draw()
            .map_err(draw_err)?;

        let band_color = RGBColor(214, 226, 240);
        chart
            .draw_series(std::iter::once(Rectangle::new(
                [
                    (-0.5, baseline_mean - band),
                    (n as f64 - 0.5, baseline_mean + band),
                ],
                band_color.filled(),
            )))
            .map_err(draw_err)?
            .label("baseline mean ± band")
            .legend(move |(x, y)| {
                Rectangle::new([(x, y - 5), (x + 16, y + 5)], band_color.filled())
            });

        let green = RGBColor(30, 120, 60);
        chart
            .draw_series(LineSeries::new(
                [(-0.5, baseline_mean), (n as f64 - 0.5, baseline_mean)],
                green.stroke_width(2),
            ))
            .map_err(draw_err)?
            .label("baseline mean")
            .legend(move |(x, y)| PathElement::new([(x, y), (x + 16, y)], green.stroke_width(2)));

        let blue = RGBColor(40, 80, 160);
        chart
            .draw_series(LineSeries::new(
                points.iter().enumerate().map(|(i, p)| (i as f64, p.mean)),
                blue.stroke_width(1),
            ))
            .map_err(draw_err)?;
        let grey = RGBColor(140, 140, 140);
        chart
            .draw_series(
                points
                    .iter()
                    .enumerate()
                    .filter(|(_, p)| p.baseline && !p.alerting)
                    .map(|(i, p)| Circle::new((i as f64, p.mean), 3, grey.filled())),
            )
            .map_err(draw_err)?
            .label("baseline lot")
            .legend(move |(x, y)| Circle::new((x + 8, y), 3, grey.filled()));
        chart
            .draw_series(
                points
                    .iter()
                    .enumerate()
                    .filter(|(_, p)| !p.baseline && !p.alerting)
                    .map(|(i, p)| Circle::new((i as f64, p.mean), 3, blue.filled())),
            )
            .map_err(draw_err)?
            .label("tested lot")
            .legend(move |(x, y)| Circle::new((x + 8, y), 3, blue.filled()));
        chart
            .draw_series(
                points
                    .iter()
                    .enumerate()
                    .filter(|(_, p)| p.alerting)
                    .map(|(i, p)| Circle::new((i as f64, p.mean), 6, RED.filled())),
            )
            .map_err(draw_err)?
            .label("alerting lot")
            .legend(|(x, y)| Circle::new((x + 8, y), 5, RED.filled()));

        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperLeft)
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK.mix(0.4))
            .label_font((FAMILY, 12))
            .draw()
            .map_err(draw_err)?;
        root.present().map_err(draw_err)?;
    }
    encode_png(&pixels, w, h)
}

/// The y range: every mean and the whole band, with a margin so nothing sits on the frame.
fn y_range(points: &[ChartPoint], baseline_mean: f64, band: f64) -> (f64, f64) {
    let mut lo = baseline_mean - band;
    let mut hi = baseline_mean + band;
    for p in points {
        lo = lo.min(p.mean);
        hi = hi.max(p.mean);
    }
    let span = hi - lo;
    let pad = if span > 0.0 {
        span * 0.12
    } else {
        // All values equal and no band: a window around the value (or ±1 around zero).
        (baseline_mean.abs() * 0.01)
            .max(1e-9)
            .max(if baseline_mean == 0.0 { 1.0 } else { 0.0 })
    };
    (lo - pad, hi + pad)
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

    fn series() -> Vec<ChartPoint> {
        (0..30)
            .map(|i| ChartPoint {
                label: format!("AC-{:03}", i + 1),
                mean: 100.0
                    + if i >= 25 {
                        3.0
                    } else {
                        (i % 5) as f64 * 0.1 - 0.2
                    },
                baseline: i < 20,
                alerting: i >= 25,
            })
            .collect()
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
    fn renders_a_decodable_png_of_the_stated_size() {
        let bytes = render_series_png(&series(), 100.0, 0.9, "alder-cells / capacity_mah").unwrap();
        assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n");
        let (info, pixels) = decode(&bytes);
        assert_eq!((info.width, info.height), SIZE);
        // Not a blank canvas: the alerting dots are pure red, the text and axes dark.
        let px: Vec<&[u8]> = pixels.chunks(3).collect();
        assert!(
            px.iter().any(|p| p == &[255, 0, 0]),
            "no red alerting marker"
        );
        let dark = px.iter().filter(|p| p.iter().all(|&c| c < 60)).count();
        assert!(dark > 2000, "too little dark ink for axes and text: {dark}");
    }

    #[test]
    fn text_is_drawn_from_the_embedded_font() {
        // The same chart with and without a caption differs only where the title is drawn;
        // that proves glyphs reach the bitmap without any system font.
        let a = decode(&render_series_png(&series(), 100.0, 0.9, "").unwrap()).1;
        let b = decode(&render_series_png(&series(), 100.0, 0.9, "WWWW title").unwrap()).1;
        let differing = a.chunks(3).zip(b.chunks(3)).filter(|(x, y)| x != y).count();
        assert!(differing > 200, "caption drew {differing} pixels");
    }

    #[test]
    fn refuses_what_cannot_be_plotted() {
        assert_eq!(
            render_series_png(&[], 1.0, 0.1, "t"),
            Err(ChartError::Empty)
        );
        let mut s = series();
        s[3].mean = f64::NAN;
        assert!(matches!(
            render_series_png(&s, 1.0, 0.1, "t"),
            Err(ChartError::NotFinite { .. })
        ));
        assert!(matches!(
            render_series_png(&series(), f64::INFINITY, 0.1, "t"),
            Err(ChartError::NotFinite { .. })
        ));
    }

    #[test]
    fn a_flat_series_still_gets_a_range() {
        let flat = vec![
            ChartPoint {
                label: "L1".into(),
                mean: 5.0,
                baseline: true,
                alerting: false,
            };
            3
        ];
        let (lo, hi) = y_range(&flat, 5.0, 0.0);
        assert!(lo < 5.0 && hi > 5.0);
        assert!(render_series_png(&flat, 5.0, 0.0, "flat").is_ok());
    }
}
