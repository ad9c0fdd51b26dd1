//! Figures: line plots with log axes and bands, two-panel plots, a plane (heat map with
//! a contour), and Fisher ellipses, drawn with plotters into PNG and SVG.
//!
//! No system fonts: DejaVu Sans (Bitstream Vera licence, `assets/fonts/`) is embedded and
//! registered with plotters' ab_glyph backend. The palette is colour-blind safe: the
//! eight colours of Okabe & Ito (2008, "Color Universal Design"), reordered so the first
//! four are distinguishable in greyscale too. Figures are 1200 x 900 pixels with 30-pixel
//! labels, legible at a proposal's column width (about 3.5 inches at 300 dpi).
//! Files are written to a temporary name and renamed, so an interrupted run never leaves
//! a half-written figure.

use std::path::Path;
use std::sync::Once;

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::FontStyle;

use crate::error::{Error, Result};

mod ellipses;
mod plane;
mod triangle;

pub use ellipses::{delta_chi2, ellipse_points};
pub use triangle::TrianglePlot;

const FONT: &[u8] = include_bytes!("../../assets/fonts/DejaVuSans.ttf");
const FAMILY: &str = "ngreach-sans";

/// The palette (RGB).
pub const PALETTE: [(u8, u8, u8); 8] = [
    (0, 114, 178),   // blue
    (213, 94, 0),    // vermillion
    (0, 158, 115),   // bluish green
    (204, 121, 167), // reddish purple
    (230, 159, 0),   // orange
    (86, 180, 233),  // sky blue
    (0, 0, 0),       // black
    (240, 228, 66),  // yellow (bands only)
];

/// Picture size in pixels.
pub const SIZE: (u32, u32) = (1200, 900);

static REGISTER: Once = Once::new();

fn register_font() {
    REGISTER.call_once(|| {
        // The embedded font is valid; failure would only mean text is not drawn.
        let _ = plotters::style::register_font(FAMILY, FontStyle::Normal, FONT);
    });
}

fn colour(i: usize) -> RGBColor {
    let (r, g, b) = PALETTE[i % LINE_COLOURS];
    RGBColor(r, g, b)
}

/// One line of a plot.
#[derive(Debug, Clone)]
pub struct Series {
    /// Legend label.
    pub label: String,
    /// (x, y) points; non-finite or non-positive (on log axes) points are skipped.
    pub points: Vec<(f64, f64)>,
    /// Palette index.
    pub colour: usize,
    /// Dashed line.
    pub dashed: bool,
}

/// A horizontal band (e.g. a CMB error level with its range over experiments).
#[derive(Debug, Clone)]
pub struct Band {
    /// Legend label.
    pub label: String,
    /// Lower edge.
    pub lo: f64,
    /// Upper edge (equal to `lo` for a line).
    pub hi: f64,
    /// Palette index.
    pub colour: usize,
}

/// A line plot.
#[derive(Debug, Clone)]
pub struct LinePlot {
    /// Title.
    pub title: String,
    /// x-axis label with unit.
    pub x_label: String,
    /// y-axis label with unit.
    pub y_label: String,
    /// Logarithmic x axis.
    pub log_x: bool,
    /// Logarithmic y axis.
    pub log_y: bool,
    /// Lines.
    pub series: Vec<Series>,
    /// Horizontal bands.
    pub bands: Vec<Band>,
}

fn finite_range(vals: impl Iterator<Item = f64>, log: bool) -> Option<(f64, f64)> {
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    for v in vals {
        if v.is_finite() && (!log || v > 0.0) {
            lo = lo.min(v);
            hi = hi.max(v);
        }
    }
    if lo > hi {
        return None;
    }
    if log {
        let (l, h) = (lo.log10(), hi.log10());
        let pad = ((h - l) * 0.08).max(0.05);
        Some((10f64.powf(l - pad), 10f64.powf(h + pad)))
    } else {
        let pad = ((hi - lo) * 0.08).max(1e-12 + hi.abs() * 0.05);
        Some((lo - pad, hi + pad))
    }
}

fn draw_err<E: std::fmt::Display>(e: E) -> Error {
    Error::Numerical {
        stage: "figure drawing",
        message: e.to_string(),
    }
}

type Area<'a, DB> = DrawingArea<DB, Shift>;

/// The legend box every figure uses: translucent white, thin grey border, at `pos`
/// (chosen from the data by [`legend_corner`] so it covers none of it).
fn draw_legend<'a, DB, CT>(
    chart: &mut ChartContext<'a, DB, CT>,
    pos: SeriesLabelPosition,
) -> Result<()>
where
    DB: DrawingBackend + 'a,
    DB::ErrorType: 'static,
    CT: plotters::coord::CoordTranslate,
{
    chart
        .configure_series_labels()
        .label_font((FAMILY, LEGEND_FONT).into_font())
        .legend_area_size(42)
        .background_style(WHITE.mix(0.9))
        .border_style(RGBColor(180, 180, 180))
        .position(pos)
        .draw()
        .map_err(draw_err)
}

const LEGEND_FONT: u32 = 24;

/// The legend's size as fractions of the plotting area (width, height), estimated from
/// the labels (DejaVu Sans averages about 0.6 em per character).
fn legend_fraction(labels: &[String], plot_px: (f64, f64)) -> (f64, f64) {
    let chars = labels.iter().map(|l| l.chars().count()).max().unwrap_or(0) as f64;
    let w = 42.0 + 20.0 + 10.0 + chars * 0.6 * LEGEND_FONT as f64;
    let h = 20.0 + labels.len() as f64 * (LEGEND_FONT as f64 * 1.25);
    (w / plot_px.0.max(1.0), h / plot_px.1.max(1.0))
}

/// The first corner (upper right, upper left, lower right, lower left) whose legend box
/// holds none of the data samples (coordinates normalized to [0, 1] over the axes), or
/// None when every corner is taken.
fn legend_corner(samples: &[(f64, f64)], w: f64, h: f64) -> Option<SeriesLabelPosition> {
    let m = 0.02;
    let corners = [
        (SeriesLabelPosition::UpperRight, 1.0 - w - m, 1.0 - h - m),
        (SeriesLabelPosition::UpperLeft, 0.0, 1.0 - h - m),
        (SeriesLabelPosition::LowerRight, 1.0 - w - m, 0.0),
        (SeriesLabelPosition::LowerLeft, 0.0, 0.0),
    ];
    corners.into_iter().find_map(|(pos, x0, y0)| {
        let free = !samples
            .iter()
            .any(|&(x, y)| x >= x0 && x <= x0 + w + m && y >= y0 && y <= y0 + h + m);
        (free && w < 1.0 && h < 1.0).then_some(pos)
    })
}

/// Maps a value to [0, 1] over an axis range.
fn unit(v: f64, lo: f64, hi: f64, log: bool) -> f64 {
    if log {
        (v.ln() - lo.ln()) / (hi.ln() - lo.ln())
    } else {
        (v - lo) / (hi - lo)
    }
}

/// The inverse of [`unit`].
fn from_unit(t: f64, lo: f64, hi: f64, log: bool) -> f64 {
    if log {
        (lo.ln() + t * (hi.ln() - lo.ln())).exp()
    } else {
        lo + t * (hi - lo)
    }
}

/// Samples along polylines (normalized coordinates), dense enough to find a legend box
/// that a line crosses.
fn sample_polyline(pts: &[(f64, f64)], out: &mut Vec<(f64, f64)>) {
    if pts.len() == 1 {
        out.push(pts[0]);
    }
    for w in pts.windows(2) {
        for i in 0..=40 {
            let t = i as f64 / 40.0;
            out.push((
                w[0].0 + t * (w[1].0 - w[0].0),
                w[0].1 + t * (w[1].1 - w[0].1),
            ));
        }
    }
}

/// Raises the top of an axis range so that everything at or below `top_data` sits under
/// a legend of height `h` (fraction) in an upper corner.
fn headroom(lo: f64, hi: f64, top_data: f64, h: f64, log: bool) -> f64 {
    let frac = (1.0 - h - 0.04).max(0.3);
    let t = unit(top_data, lo, hi, log).max(0.0);
    from_unit(t / frac, lo, hi, log).max(hi)
}

/// Tick label: compact numbers (log axes carry their own key points, [`log_keys`]).
fn tick(v: f64, log: bool) -> String {
    if !v.is_finite() || (log && v <= 0.0) {
        return String::new();
    }
    let s = crate::report::format_sig(v, 4);
    crate::report::trim_zeros_public(&s)
}

/// Key points of a log axis over [a, b]: 1, 2, 5 times powers of ten, with 3, then 1.5
/// and 7, then every integer mantissa added while that leaves fewer than four labels.
fn log_keys(a: f64, b: f64) -> Vec<f64> {
    let (lo, hi) = (a.min(b), a.max(b));
    if !(lo > 0.0 && hi.is_finite()) {
        return Vec::new();
    }
    let pick = |mantissas: &[f64]| -> Vec<f64> {
        let mut out = Vec::new();
        let mut p = 10f64.powf(lo.log10().floor());
        while p <= hi * 1.000_001 {
            for &m in mantissas {
                let v = m * p;
                if v >= lo * 0.999_999 && v <= hi * 1.000_001 {
                    out.push(v);
                }
            }
            p *= 10.0;
        }
        out
    };
    for set in [
        &[1.0, 2.0, 5.0][..],
        &[1.0, 2.0, 3.0, 5.0],
        &[1.0, 1.5, 2.0, 3.0, 5.0, 7.0],
    ] {
        let k = pick(set);
        if k.len() >= 4 {
            return k;
        }
    }
    pick(&[1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0])
}

/// The points of a series that an axis pair can show.
fn drawable(s: &Series, log_x: bool, log_y: bool) -> Vec<(f64, f64)> {
    s.points
        .iter()
        .copied()
        .filter(|q| {
            q.0.is_finite() && q.1.is_finite() && (!log_x || q.0 > 0.0) && (!log_y || q.1 > 0.0)
        })
        .collect()
}

/// Draws a line plot. `steps`: the series are staircases (pairs of bin edges), drawn
/// without point markers.
fn draw_lines<DB: DrawingBackend>(
    area: &Area<'_, DB>,
    p: &LinePlot,
    x_override: Option<(f64, f64)>,
    steps: bool,
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let xs = p.series.iter().flat_map(|s| s.points.iter().map(|q| q.0));
    let ys = p
        .series
        .iter()
        .flat_map(|s| s.points.iter().map(|q| q.1))
        .chain(p.bands.iter().flat_map(|b| [b.lo, b.hi]));
    let (x0, x1) = x_override
        .or_else(|| finite_range(xs, p.log_x))
        .unwrap_or((1.0, 10.0));
    let (y0, mut y1) = finite_range(ys, p.log_y).unwrap_or((1.0, 10.0));
    // The legend goes into a corner the data leave empty; when none is, the y range
    // grows upward until the upper corners are.
    let labels: Vec<String> = p
        .bands
        .iter()
        .map(|b| b.label.clone())
        .chain(
            p.series
                .iter()
                .filter(|s| !drawable(s, p.log_x, p.log_y).is_empty())
                .map(|s| s.label.clone()),
        )
        .collect();
    let (w_px, h_px) = area.dim_in_pixel();
    let title_px = if p.title.is_empty() { 0.0 } else { 50.0 };
    let plot_px = (w_px as f64 - 160.0, h_px as f64 - 120.0 - title_px);
    let (lw, lh) = legend_fraction(&labels, plot_px);
    let samples = |y1: f64| -> Vec<(f64, f64)> {
        let mut v = Vec::new();
        for s in &p.series {
            let pts: Vec<(f64, f64)> = drawable(s, p.log_x, p.log_y)
                .into_iter()
                .map(|q| (unit(q.0, x0, x1, p.log_x), unit(q.1, y0, y1, p.log_y)))
                .collect();
            sample_polyline(&pts, &mut v);
        }
        for b in &p.bands {
            for i in 0..=40 {
                let x = i as f64 / 40.0;
                for j in 0..=8 {
                    let y = b.lo + (b.hi - b.lo) * j as f64 / 8.0;
                    if y.is_finite() && (!p.log_y || y > 0.0) {
                        v.push((x, unit(y, y0, y1, p.log_y)));
                    }
                }
            }
        }
        v
    };
    let pos = match legend_corner(&samples(y1), lw, lh) {
        Some(pos) => pos,
        None => {
            let top = p
                .series
                .iter()
                .flat_map(|s| drawable(s, p.log_x, p.log_y).into_iter().map(|q| q.1))
                .chain(p.bands.iter().map(|b| b.hi).filter(|v| v.is_finite()))
                .fold(y0, f64::max);
            y1 = headroom(y0, y1, top, lh, p.log_y);
            legend_corner(&samples(y1), lw, lh).unwrap_or(SeriesLabelPosition::UpperRight)
        }
    };
    let font = |sz: u32| (FAMILY, sz).into_font();
    let mut b = ChartBuilder::on(area);
    b.margin(20)
        .x_label_area_size(80)
        .y_label_area_size(120)
        .caption(&p.title, font(34));
    macro_rules! body {
        ($chart:expr) => {{
            let mut chart = $chart;
            chart
                .configure_mesh()
                .x_desc(&p.x_label)
                .y_desc(&p.y_label)
                .label_style(font(26))
                .axis_desc_style(font(30))
                .x_labels(7)
                .y_labels(6)
                .x_label_formatter(&|v| tick(*v, p.log_x))
                .y_label_formatter(&|v| tick(*v, p.log_y))
                .light_line_style(WHITE)
                .bold_line_style(RGBColor(215, 215, 215))
                .draw()
                .map_err(draw_err)?;
            for (ib, band) in p.bands.iter().enumerate() {
                // Outlined bands: a light fill plus both edges in the band's colour, solid
                // for even bands and dashed for odd ones, so overlapping bands stay
                // distinguishable.
                let c = colour(band.colour);
                let dashed = ib % 2 == 1;
                let edge = c.stroke_width(3);
                if band.hi > band.lo {
                    chart
                        .draw_series(std::iter::once(Rectangle::new(
                            [(x0, band.lo), (x1, band.hi)],
                            c.mix(0.10).filled(),
                        )))
                        .map_err(draw_err)?;
                }
                let edges: Vec<f64> = if band.hi > band.lo {
                    vec![band.lo, band.hi]
                } else {
                    vec![band.lo]
                };
                for (ie, &y) in edges.iter().enumerate() {
                    let line = [(x0, y), (x1, y)];
                    let anno = if dashed {
                        chart
                            .draw_series(DashedLineSeries::new(line, 18, 10, edge))
                            .map_err(draw_err)?
                    } else {
                        chart
                            .draw_series(LineSeries::new(line, edge))
                            .map_err(draw_err)?
                    };
                    if ie == 0 && dashed {
                        anno.label(&band.label).legend(move |(x, y)| {
                            let seg = |x0: i32, x1: i32, yy: i32| {
                                PathElement::new([(x0, yy), (x1, yy)], c.stroke_width(3))
                            };
                            EmptyElement::at((x, y))
                                + Rectangle::new([(0, -9), (30, 9)], c.mix(0.15).filled())
                                + seg(0, 11, -9)
                                + seg(19, 30, -9)
                                + seg(0, 11, 9)
                                + seg(19, 30, 9)
                        });
                    } else if ie == 0 {
                        anno.label(&band.label).legend(move |(x, y)| {
                            let seg =
                                |yy: i32| PathElement::new([(0, yy), (30, yy)], c.stroke_width(3));
                            EmptyElement::at((x, y))
                                + Rectangle::new([(0, -9), (30, 9)], c.mix(0.15).filled())
                                + seg(-9)
                                + seg(9)
                        });
                    }
                }
            }
            for s in &p.series {
                let c = colour(s.colour);
                let pts = drawable(s, p.log_x, p.log_y);
                if pts.is_empty() {
                    continue;
                }
                let style = c.stroke_width(4);
                // Dashed series carry square markers and a dashed legend key, solid ones
                // round markers: colour, dash and marker together tell series apart.
                if s.dashed {
                    chart
                        .draw_series(DashedLineSeries::new(pts.clone(), 14, 8, style))
                        .map_err(draw_err)?
                        .label(&s.label)
                        .legend(move |(x, y)| {
                            let seg = |a: i32, b: i32| {
                                PathElement::new([(x + a, y), (x + b, y)], c.stroke_width(4))
                            };
                            EmptyElement::at((0, 0))
                                + seg(0, 9)
                                + seg(15, 24)
                                + seg(30, 36)
                                + Rectangle::new([(x + 13, y - 5), (x + 23, y + 5)], c.filled())
                        });
                } else {
                    chart
                        .draw_series(LineSeries::new(pts.clone(), style))
                        .map_err(draw_err)?
                        .label(&s.label)
                        .legend(move |(x, y)| {
                            EmptyElement::at((0, 0))
                                + PathElement::new([(x, y), (x + 36, y)], c.stroke_width(4))
                                + Circle::new((x + 18, y), 5, c.filled())
                        });
                }
                if !steps {
                    if s.dashed {
                        chart
                            .draw_series(pts.iter().map(|&q| {
                                EmptyElement::at(q) + Rectangle::new([(-5, -5), (5, 5)], c.filled())
                            }))
                            .map_err(draw_err)?;
                    } else {
                        chart
                            .draw_series(pts.iter().map(|&q| Circle::new(q, 5, c.filled())))
                            .map_err(draw_err)?;
                    }
                }
            }
            if !labels.is_empty() {
                draw_legend(&mut chart, pos)?;
            }
        }};
    }
    match (p.log_x, p.log_y) {
        (true, true) => body!(
            b.build_cartesian_2d(
                (x0..x1).log_scale().with_key_points(log_keys(x0, x1)),
                (y0..y1).log_scale().with_key_points(log_keys(y0, y1))
            )
            .map_err(draw_err)?
        ),
        (true, false) => body!(
            b.build_cartesian_2d(
                (x0..x1).log_scale().with_key_points(log_keys(x0, x1)),
                y0..y1
            )
            .map_err(draw_err)?
        ),
        (false, true) => body!(
            b.build_cartesian_2d(
                x0..x1,
                (y0..y1).log_scale().with_key_points(log_keys(y0, y1))
            )
            .map_err(draw_err)?
        ),
        (false, false) => body!(b.build_cartesian_2d(x0..x1, y0..y1).map_err(draw_err)?),
    }
    Ok(())
}

/// What a figure draws.
#[derive(Debug, Clone)]
pub enum Figure {
    /// One line plot.
    Lines(LinePlot),
    /// Two line plots stacked (top 62%, bottom 38%) sharing the x range.
    TwoPanel(LinePlot, LinePlot),
    /// A line plot whose series are staircases: for each bin the points (x_lo, y) and
    /// (x_hi, y), drawn as steps without point markers (e.g. per redshift bin).
    Steps(LinePlot),
    /// A plane: values on a grid (log10 colour scale) with an optional contour line.
    Plane(PlanePlot),
    /// Ellipses in a plane.
    Ellipses(EllipsePlot),
    /// Shares of the information on the triangle plane, one panel per shape.
    Triangles(TrianglePlot),
}

/// A heat map over two log axes.
#[derive(Debug, Clone)]
pub struct PlanePlot {
    /// Title.
    pub title: String,
    /// x label.
    pub x_label: String,
    /// y label.
    pub y_label: String,
    /// Cell centres along x (increasing).
    pub x: Vec<f64>,
    /// Cell centres along y (increasing).
    pub y: Vec<f64>,
    /// values[iy][ix] (drawn in log10).
    pub values: Vec<Vec<f64>>,
    /// Colour-bar label.
    pub value_label: String,
    /// A curve to overlay (e.g. the crossover), with its legend label.
    pub curve: Option<(String, Vec<(f64, f64)>)>,
    /// Upper bounds on the curve's x at a y: the curve lies at or below this x, left of
    /// the grid (drawn as arrows to the plot's left edge, never as found points).
    pub bounds: Vec<(f64, f64)>,
}

/// Ellipses (1 and 2 sigma) for several probes in one parameter plane.
#[derive(Debug, Clone)]
pub struct EllipsePlot {
    /// Title.
    pub title: String,
    /// x label.
    pub x_label: String,
    /// y label.
    pub y_label: String,
    /// (label, 2x2 covariance [cxx, cxy, cyy], palette index).
    pub ellipses: Vec<(String, [f64; 3], usize)>,
}

/// Palette slots a line can get (the yellow last entry is for bands only).
pub const LINE_COLOURS: usize = 7;

/// Colours for `n` bands that no series of `series` uses (from the end of the palette),
/// cycling when the palette runs out.
pub fn band_colours(series: &[Series], n: usize) -> Vec<usize> {
    let used: Vec<usize> = series.iter().map(|s| s.colour % LINE_COLOURS).collect();
    let free: Vec<usize> = (0..LINE_COLOURS)
        .rev()
        .filter(|c| !used.contains(c))
        .collect();
    (0..n)
        .map(|i| {
            if free.is_empty() {
                i % LINE_COLOURS
            } else {
                free[i % free.len()]
            }
        })
        .collect()
}

/// Pairs of items of a figure that a reader could not tell apart: two series (in one
/// panel) with the same colour and dash (and so the same marker), a band with the colour
/// of a series, or two bands with the same colour and outline dash; ellipse sets with the
/// same colour. Empty when every item is distinguishable.
pub fn style_clashes(fig: &Figure) -> Vec<String> {
    let mut out = Vec::new();
    let mut lines = |p: &LinePlot| {
        let key = |c: usize| c % LINE_COLOURS;
        for (i, a) in p.series.iter().enumerate() {
            for b in &p.series[i + 1..] {
                if key(a.colour) == key(b.colour) && a.dashed == b.dashed {
                    out.push(format!("series '{}' and '{}'", a.label, b.label));
                }
            }
            for band in &p.bands {
                if key(a.colour) == key(band.colour) {
                    out.push(format!("series '{}' and band '{}'", a.label, band.label));
                }
            }
        }
        for (i, a) in p.bands.iter().enumerate() {
            for (j, b) in p.bands.iter().enumerate().skip(i + 1) {
                if key(a.colour) == key(b.colour) && i % 2 == j % 2 {
                    out.push(format!("bands '{}' and '{}'", a.label, b.label));
                }
            }
        }
    };
    match fig {
        Figure::Lines(p) | Figure::Steps(p) => lines(p),
        Figure::TwoPanel(a, b) => {
            lines(a);
            lines(b);
        }
        Figure::Ellipses(p) => {
            for (i, a) in p.ellipses.iter().enumerate() {
                for b in &p.ellipses[i + 1..] {
                    if a.2 % LINE_COLOURS == b.2 % LINE_COLOURS {
                        out.push(format!("ellipses '{}' and '{}'", a.0, b.0));
                    }
                }
            }
        }
        Figure::Plane(_) | Figure::Triangles(_) => {}
    }
    out
}

/// Writes `fig` as `stem.png` and `stem.svg` in `dir`; returns the SVG text.
///
/// # Errors
/// I/O errors and drawing failures.
pub fn write_figure(fig: &Figure, dir: &Path, stem: &str) -> Result<String> {
    register_font();
    let png = dir.join(format!("{stem}.png"));
    let svg = dir.join(format!("{stem}.svg"));
    let tmp_png = dir.join(format!(".{stem}.tmp.png"));
    {
        let root = BitMapBackend::new(&tmp_png, SIZE).into_drawing_area();
        render(fig, &root)?;
        root.present().map_err(draw_err)?;
    }
    let mut text = String::new();
    {
        let root = SVGBackend::with_string(&mut text, SIZE).into_drawing_area();
        render(fig, &root)?;
        root.present().map_err(draw_err)?;
    }
    crate::report::write_atomic(&svg, text.as_bytes())?;
    std::fs::rename(&tmp_png, &png).map_err(|source| Error::Io {
        path: png.clone(),
        source,
    })?;
    Ok(text)
}

fn render<DB: DrawingBackend>(fig: &Figure, root: &Area<'_, DB>) -> Result<()>
where
    DB::ErrorType: 'static,
{
    root.fill(&WHITE).map_err(draw_err)?;
    match fig {
        Figure::Lines(p) => draw_lines(root, p, None, false),
        Figure::Steps(p) => draw_lines(root, p, None, true),
        Figure::TwoPanel(a, b) => {
            let (top, bottom) = root.split_vertically((SIZE.1 as f64 * 0.62) as u32);
            let xs = a
                .series
                .iter()
                .chain(&b.series)
                .flat_map(|s| s.points.iter().map(|q| q.0));
            let xr = finite_range(xs, a.log_x);
            draw_lines(&top, a, xr, false)?;
            draw_lines(&bottom, b, xr, false)
        }
        Figure::Plane(p) => plane::draw_plane(root, p),
        Figure::Ellipses(p) => ellipses::draw_ellipses(root, p),
        Figure::Triangles(p) => triangle::draw_triangles(root, p),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_axis_key_points() {
        let close = |a: &[f64], b: &[f64]| {
            a.len() == b.len() && a.iter().zip(b).all(|(x, y)| (x / y - 1.0).abs() < 1e-12)
        };
        let k = log_keys(250.0, 3000.0);
        assert!(close(&k, &[300.0, 500.0, 1000.0, 2000.0, 3000.0]), "{k:?}");
        let k = log_keys(1.0, 1000.0);
        assert_eq!(k.len(), 10, "{k:?}");
        let k = log_keys(0.025, 0.11);
        assert!(close(&k, &[0.03, 0.05, 0.07, 0.1]), "{k:?}");
        let k = log_keys(40.0, 60.0);
        assert!(close(&k, &[40.0, 50.0, 60.0]), "{k:?}");
        assert!(log_keys(0.0, 10.0).is_empty());
    }

    #[test]
    fn legend_goes_where_the_data_are_not() {
        // Data along the top: a lower corner is chosen.
        let top: Vec<(f64, f64)> = (0..=20).map(|i| (i as f64 / 20.0, 0.95)).collect();
        assert!(matches!(
            legend_corner(&top, 0.3, 0.2),
            Some(SeriesLabelPosition::LowerRight)
        ));
        // Data everywhere: no corner.
        let all: Vec<(f64, f64)> = (0..=400)
            .map(|i| ((i % 20) as f64 / 19.0, (i / 20) as f64 / 19.0))
            .collect();
        assert!(legend_corner(&all, 0.3, 0.2).is_none());
        // Headroom puts the data under the legend.
        let y1 = headroom(1.0, 10.0, 10.0, 0.25, true);
        assert!(unit(10.0, 1.0, y1, true) <= 1.0 - 0.25);
    }

    #[test]
    fn writes_png_and_svg() {
        let dir = std::env::temp_dir().join(format!("ngreach-fig-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let fig = Figure::Lines(LinePlot {
            title: "test".into(),
            x_label: "k_max [h/Mpc]".into(),
            y_label: "sigma(f_NL)".into(),
            log_x: true,
            log_y: true,
            series: vec![Series {
                label: "P".into(),
                points: vec![(0.01, 10.0), (0.1, 3.0), (0.3, 2.0)],
                colour: 0,
                dashed: false,
            }],
            bands: vec![Band {
                label: "CMB".into(),
                lo: 4.0,
                hi: 6.0,
                colour: 1,
            }],
        });
        write_figure(&fig, &dir, "t").unwrap();
        let png = std::fs::read(dir.join("t.png")).unwrap();
        assert_eq!(&png[1..4], b"PNG");
        let svg = std::fs::read_to_string(dir.join("t.svg")).unwrap();
        assert!(svg.contains("<svg") && svg.contains("sigma(f_NL)"));
        std::fs::remove_dir_all(&dir).ok();
    }
}
