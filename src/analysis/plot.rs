//! Figures as SVG and PNG (plotters). PNG text is drawn with DejaVu Sans,
//! shipped in `assets/fonts/` (licence beside it) and embedded in the binary,
//! so no system font is needed at run time. Colours are the Okabe–Ito
//! palette, distinguishable with the common forms of colour blindness
//! (Nature Methods 8, 441 (2011)).

use std::path::Path;
use std::sync::Once;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::AnalysisError;

/// Okabe–Ito colours, in the order used for states.
pub const PALETTE: [RGBColor; 8] = [
    RGBColor(0x00, 0x72, 0xB2), // blue
    RGBColor(0xD5, 0x5E, 0x00), // vermillion
    RGBColor(0x00, 0x9E, 0x73), // bluish green
    RGBColor(0xE6, 0x9F, 0x00), // orange
    RGBColor(0x56, 0xB4, 0xE9), // sky blue
    RGBColor(0xCC, 0x79, 0xA7), // reddish purple
    RGBColor(0xF0, 0xE4, 0x42), // yellow
    RGBColor(0x00, 0x00, 0x00), // black
];

static FONT: &[u8] = include_bytes!("../../assets/fonts/DejaVuSans.ttf");
const FAMILY: &str = "sans-serif";

fn register_font() {
    static ONCE: Once = Once::new();
    ONCE.call_once(|| {
        if plotters::style::register_font(FAMILY, FontStyle::Normal, FONT).is_err() {
            tracing::warn!("the embedded font could not be read; PNG text will be missing");
        }
    });
}

fn colour(j: usize) -> RGBColor {
    PALETTE[j % PALETTE.len()]
}

/// A line on a plot.
#[derive(Clone, Debug)]
pub struct Line {
    /// Legend text.
    pub label: String,
    /// Points (x, y).
    pub points: Vec<(f64, f64)>,
    /// Palette index.
    pub colour: usize,
    /// Dashed line.
    pub dashed: bool,
    /// Line width (px).
    pub width: u32,
}

/// A shaded band between two curves.
#[derive(Clone, Debug)]
pub struct Band {
    /// x values.
    pub x: Vec<f64>,
    /// Lower curve.
    pub lower: Vec<f64>,
    /// Upper curve.
    pub upper: Vec<f64>,
    /// Palette index.
    pub colour: usize,
}

/// A line chart with optional bands and bars.
#[derive(Clone, Debug, Default)]
pub struct Chart {
    /// Title.
    pub title: String,
    /// x-axis label with unit.
    pub x_label: String,
    /// y-axis label with unit.
    pub y_label: String,
    /// Bands drawn first.
    pub bands: Vec<Band>,
    /// Bars: (x0, x1, height), drawn in palette colour 0.
    pub bars: Vec<(f64, f64, f64)>,
    /// Legend text of the bars.
    pub bars_label: String,
    /// Lines.
    pub lines: Vec<Line>,
    /// Fixed y range, or from the data.
    pub y_range: Option<(f64, f64)>,
    /// Label the y axis with whole numbers (counts).
    pub y_integer: bool,
}

fn range(chart: &Chart) -> ((f64, f64), (f64, f64)) {
    let mut xs = (f64::INFINITY, f64::NEG_INFINITY);
    let mut ys = (f64::INFINITY, f64::NEG_INFINITY);
    let mut see = |x: f64, y: f64| {
        if x.is_finite() && y.is_finite() {
            xs = (xs.0.min(x), xs.1.max(x));
            ys = (ys.0.min(y), ys.1.max(y));
        }
    };
    for l in &chart.lines {
        for &(x, y) in &l.points {
            see(x, y);
        }
    }
    for b in &chart.bands {
        for ((x, lo), hi) in b.x.iter().zip(&b.lower).zip(&b.upper) {
            see(*x, *lo);
            see(*x, *hi);
        }
    }
    for &(x0, x1, h) in &chart.bars {
        see(x0, 0.0);
        see(x1, h);
    }
    if !xs.0.is_finite() {
        xs = (0.0, 1.0);
        ys = (0.0, 1.0);
    }
    if xs.1 <= xs.0 {
        xs.1 = xs.0 + 1.0;
    }
    if let Some(r) = chart.y_range {
        ys = r;
    } else {
        let pad = 0.05 * (ys.1 - ys.0).max(1e-9);
        ys = (ys.0 - pad, ys.1 + pad);
    }
    (xs, ys)
}

enum Sample {
    Bar,
    Line { dashed: bool, width: u32 },
}

struct Entry {
    text: String,
    colour: usize,
    sample: Sample,
}

fn legend_entries(chart: &Chart) -> Vec<Entry> {
    let mut v = Vec::new();
    if !chart.bars.is_empty() && !chart.bars_label.is_empty() {
        v.push(Entry {
            text: chart.bars_label.clone(),
            colour: 0,
            sample: Sample::Bar,
        });
    }
    for l in chart.lines.iter().filter(|l| !l.label.is_empty()) {
        v.push(Entry {
            text: l.label.clone(),
            colour: l.colour,
            sample: Sample::Line {
                dashed: l.dashed,
                width: l.width,
            },
        });
    }
    v
}

/// Break `text` at spaces into lines of at most `width` characters (longer words stay whole).
fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut lines = Vec::new();
    let mut cur = String::new();
    for word in text.split(' ') {
        if !cur.is_empty() && cur.chars().count() + 1 + word.chars().count() > width {
            lines.push(std::mem::take(&mut cur));
            cur.push_str("  ");
        } else if !cur.is_empty() {
            cur.push(' ');
        }
        cur.push_str(word);
    }
    lines.push(cur);
    lines
}

fn draw<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, chart: &Chart) -> Result<(), String>
where
    DB::ErrorType: 'static,
{
    let e = |x: DrawingAreaErrorKind<DB::ErrorType>| x.to_string();
    root.fill(&WHITE).map_err(e)?;
    let (xs, ys) = range(chart);
    // The legend goes in a column right of the plot, so it never hides data.
    let entries = legend_entries(chart);
    let (w, _) = root.dim_in_pixel();
    let longest = entries
        .iter()
        .map(|l| l.text.chars().count())
        .max()
        .unwrap_or(0) as f64;
    let legend_w = if entries.is_empty() {
        0
    } else {
        ((longest * 6.8 + 46.0) as u32).min(w * 17 / 50)
    };
    let (plot_area, legend_area) = root.split_horizontally(w - legend_w);
    let mut c = ChartBuilder::on(&plot_area)
        .caption(&chart.title, (FAMILY, 20))
        .margin(12)
        .margin_right(36)
        .x_label_area_size(48)
        .y_label_area_size(70)
        .build_cartesian_2d(xs.0..xs.1, ys.0..ys.1)
        .map_err(e)?;
    let integer = |v: &f64| format!("{v:.0}");
    let mut mesh = c.configure_mesh();
    mesh.x_desc(&chart.x_label)
        .y_desc(&chart.y_label)
        .label_style((FAMILY, 14))
        .axis_desc_style((FAMILY, 16))
        .light_line_style(WHITE.mix(0.0))
        .bold_line_style(BLACK.mix(0.08));
    if chart.y_integer {
        mesh.y_label_formatter(&integer);
    }
    mesh.draw().map_err(e)?;
    for b in &chart.bands {
        let mut pts: Vec<(f64, f64)> =
            b.x.iter()
                .zip(&b.upper)
                .filter(|(x, y)| x.is_finite() && y.is_finite())
                .map(|(x, y)| (*x, *y))
                .collect();
        let lower: Vec<(f64, f64)> =
            b.x.iter()
                .zip(&b.lower)
                .filter(|(x, y)| x.is_finite() && y.is_finite())
                .map(|(x, y)| (*x, *y))
                .collect();
        pts.extend(lower.into_iter().rev());
        c.draw_series(std::iter::once(Polygon::new(
            pts,
            colour(b.colour).mix(0.22).filled(),
        )))
        .map_err(e)?;
    }
    if !chart.bars.is_empty() {
        let col = colour(0);
        c.draw_series(
            chart
                .bars
                .iter()
                .map(|&(x0, x1, h)| Rectangle::new([(x0, 0.0), (x1, h)], col.mix(0.75).filled())),
        )
        .map_err(e)?;
    }
    for l in &chart.lines {
        let col = colour(l.colour);
        let style = col.stroke_width(l.width);
        let pts: Vec<(f64, f64)> = l
            .points
            .iter()
            .copied()
            .filter(|(x, y)| x.is_finite() && y.is_finite())
            .collect();
        if l.dashed {
            c.draw_series(DashedLineSeries::new(pts, 7, 5, style))
                .map_err(e)?;
        } else {
            c.draw_series(LineSeries::new(pts, style)).map_err(e)?;
        }
    }
    let max_chars = ((legend_w as f64 - 40.0) / 6.8).max(8.0) as usize;
    let mut y = 56;
    for l in &entries {
        let col = colour(l.colour);
        match l.sample {
            Sample::Bar => {
                legend_area
                    .draw(&Rectangle::new(
                        [(4, y - 6), (26, y + 6)],
                        col.mix(0.75).filled(),
                    ))
                    .map_err(e)?;
            }
            Sample::Line { dashed, width } => {
                let st = col.stroke_width(width);
                let segs: &[(i32, i32)] = if dashed {
                    &[(4, 9), (12, 17), (20, 26)]
                } else {
                    &[(4, 26)]
                };
                for &(a, b) in segs {
                    legend_area
                        .draw(&PathElement::new(vec![(a, y), (b, y)], st))
                        .map_err(e)?;
                }
            }
        }
        let style = TextStyle::from((FAMILY, 14).into_font()).color(&BLACK).pos(
            plotters::style::text_anchor::Pos::new(
                plotters::style::text_anchor::HPos::Left,
                plotters::style::text_anchor::VPos::Center,
            ),
        );
        for line in wrap(&l.text, max_chars) {
            legend_area
                .draw(&Text::new(line, (34, y), style.clone()))
                .map_err(e)?;
            y += 18;
        }
        y += 4;
    }
    root.present().map_err(e)?;
    Ok(())
}

/// Write `chart` as `<base>.svg` and `<base>.png`, `size` pixels.
pub fn write(chart: &Chart, base: &Path, size: (u32, u32)) -> Result<(), AnalysisError> {
    register_font();
    let svg = base.with_extension("svg");
    let png = base.with_extension("png");
    {
        let root = SVGBackend::new(&svg, size).into_drawing_area();
        draw(&root, chart).map_err(|m| AnalysisError::Output(format!("{}: {m}", svg.display())))?;
    }
    {
        let root = BitMapBackend::new(&png, size).into_drawing_area();
        draw(&root, chart).map_err(|m| AnalysisError::Output(format!("{}: {m}", png.display())))?;
    }
    Ok(())
}
