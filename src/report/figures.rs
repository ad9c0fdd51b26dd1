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
    let (r, g, b) = PALETTE[i % 7];
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

/// The legend box every figure uses: upper right, translucent white, thin grey border.
fn draw_legend<'a, DB, CT>(chart: &mut ChartContext<'a, DB, CT>) -> Result<()>
where
    DB: DrawingBackend + 'a,
    DB::ErrorType: 'static,
    CT: plotters::coord::CoordTranslate,
{
    chart
        .configure_series_labels()
        .label_font((FAMILY, 24).into_font())
        .background_style(WHITE.mix(0.85))
        .border_style(RGBColor(180, 180, 180))
        .position(SeriesLabelPosition::UpperRight)
        .draw()
        .map_err(draw_err)
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

fn draw_lines<DB: DrawingBackend>(
    area: &Area<'_, DB>,
    p: &LinePlot,
    x_override: Option<(f64, f64)>,
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
    let (y0, y1) = finite_range(ys, p.log_y).unwrap_or((1.0, 10.0));
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
            for band in &p.bands {
                let c = colour(band.colour);
                if band.hi > band.lo {
                    chart
                        .draw_series(std::iter::once(Rectangle::new(
                            [(x0, band.lo), (x1, band.hi)],
                            c.mix(0.18).filled(),
                        )))
                        .map_err(draw_err)?
                        .label(&band.label)
                        .legend(move |(x, y)| {
                            Rectangle::new([(x, y - 8), (x + 30, y + 8)], c.mix(0.35).filled())
                        });
                } else {
                    chart
                        .draw_series(LineSeries::new(
                            [(x0, band.lo), (x1, band.lo)],
                            c.stroke_width(3),
                        ))
                        .map_err(draw_err)?
                        .label(&band.label)
                        .legend(move |(x, y)| {
                            PathElement::new([(x, y), (x + 30, y)], c.stroke_width(3))
                        });
                }
            }
            for s in &p.series {
                let c = colour(s.colour);
                let pts: Vec<(f64, f64)> = s
                    .points
                    .iter()
                    .copied()
                    .filter(|q| {
                        q.0.is_finite()
                            && q.1.is_finite()
                            && (!p.log_x || q.0 > 0.0)
                            && (!p.log_y || q.1 > 0.0)
                    })
                    .collect();
                if pts.is_empty() {
                    continue;
                }
                let style = c.stroke_width(4);
                if s.dashed {
                    chart
                        .draw_series(DashedLineSeries::new(pts.clone(), 14, 8, style))
                        .map_err(draw_err)?
                        .label(&s.label)
                        .legend(move |(x, y)| {
                            PathElement::new([(x, y), (x + 30, y)], c.stroke_width(4))
                        });
                } else {
                    chart
                        .draw_series(LineSeries::new(pts.clone(), style))
                        .map_err(draw_err)?
                        .label(&s.label)
                        .legend(move |(x, y)| {
                            PathElement::new([(x, y), (x + 30, y)], c.stroke_width(4))
                        });
                }
                chart
                    .draw_series(pts.iter().map(|&q| Circle::new(q, 5, c.filled())))
                    .map_err(draw_err)?;
            }
            if !p.series.is_empty() || !p.bands.is_empty() {
                draw_legend(&mut chart)?;
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
    /// A plane: values on a grid (log10 colour scale) with an optional contour line.
    Plane(PlanePlot),
    /// Ellipses in a plane.
    Ellipses(EllipsePlot),
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

/// Writes `fig` as `stem.png` and `stem.svg` in `dir`.
///
/// # Errors
/// I/O errors and drawing failures.
pub fn write_figure(fig: &Figure, dir: &Path, stem: &str) -> Result<()> {
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
    Ok(())
}

fn render<DB: DrawingBackend>(fig: &Figure, root: &Area<'_, DB>) -> Result<()>
where
    DB::ErrorType: 'static,
{
    root.fill(&WHITE).map_err(draw_err)?;
    match fig {
        Figure::Lines(p) => draw_lines(root, p, None),
        Figure::TwoPanel(a, b) => {
            let (top, bottom) = root.split_vertically((SIZE.1 as f64 * 0.62) as u32);
            let xs = a
                .series
                .iter()
                .chain(&b.series)
                .flat_map(|s| s.points.iter().map(|q| q.0));
            let xr = finite_range(xs, a.log_x);
            draw_lines(&top, a, xr)?;
            draw_lines(&bottom, b, xr)
        }
        Figure::Plane(p) => draw_plane(root, p),
        Figure::Ellipses(p) => draw_ellipses(root, p),
    }
}

fn edges(c: &[f64]) -> Vec<f64> {
    // Geometric mid-points between log-spaced centres.
    let n = c.len();
    if n == 1 {
        return vec![c[0] / 1.2, c[0] * 1.2];
    }
    let mut e = Vec::with_capacity(n + 1);
    e.push(c[0] / (c[1] / c[0]).sqrt());
    for i in 0..n - 1 {
        e.push((c[i] * c[i + 1]).sqrt());
    }
    e.push(c[n - 1] * (c[n - 1] / c[n - 2]).sqrt());
    e
}

fn ramp(t: f64) -> RGBColor {
    // A perceptually ordered blue -> green -> yellow ramp of our own (light = small).
    let t = t.clamp(0.0, 1.0);
    let stops = [
        (255.0, 247.0, 188.0),
        (161.0, 218.0, 180.0),
        (65.0, 182.0, 196.0),
        (34.0, 94.0, 168.0),
        (12.0, 44.0, 90.0),
    ];
    let x = t * (stops.len() - 1) as f64;
    let i = (x.floor() as usize).min(stops.len() - 2);
    let f = x - i as f64;
    let mix = |a: f64, b: f64| (a + (b - a) * f) as u8;
    RGBColor(
        mix(stops[i].0, stops[i + 1].0),
        mix(stops[i].1, stops[i + 1].1),
        mix(stops[i].2, stops[i + 1].2),
    )
}

fn draw_plane<DB: DrawingBackend>(root: &Area<'_, DB>, p: &PlanePlot) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let font = |sz: u32| (FAMILY, sz).into_font();
    let (main, bar) = root.split_horizontally(1000);
    let ex = edges(&p.x);
    let ey = edges(&p.y);
    let logs: Vec<f64> = p
        .values
        .iter()
        .flatten()
        .filter(|v| v.is_finite() && **v > 0.0)
        .map(|v| v.log10())
        .collect();
    let (lo, hi) = logs
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        });
    let (lo, hi) = if lo < hi {
        (lo, hi)
    } else {
        (lo - 0.5, lo + 0.5)
    };
    let mut chart = ChartBuilder::on(&main)
        .margin(20)
        .x_label_area_size(80)
        .y_label_area_size(120)
        .caption(&p.title, font(34))
        .build_cartesian_2d(
            (ex[0]..ex[ex.len() - 1])
                .log_scale()
                .with_key_points(log_keys(ex[0], ex[ex.len() - 1])),
            (ey[0]..ey[ey.len() - 1])
                .log_scale()
                .with_key_points(log_keys(ey[0], ey[ey.len() - 1])),
        )
        .map_err(draw_err)?;
    chart
        .configure_mesh()
        .x_desc(&p.x_label)
        .y_desc(&p.y_label)
        .label_style(font(26))
        .axis_desc_style(font(30))
        .x_label_formatter(&|v| tick(*v, true))
        .y_label_formatter(&|v| tick(*v, true))
        .disable_mesh()
        .draw()
        .map_err(draw_err)?;
    for (iy, row) in p.values.iter().enumerate() {
        for (ix, &v) in row.iter().enumerate() {
            let c = if v.is_finite() && v > 0.0 {
                ramp((v.log10() - lo) / (hi - lo))
            } else {
                RGBColor(220, 220, 220)
            };
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(ex[ix], ey[iy]), (ex[ix + 1], ey[iy + 1])],
                    c.filled(),
                )))
                .map_err(draw_err)?;
        }
    }
    if let Some((label, pts)) = &p.curve {
        let pts: Vec<(f64, f64)> = pts
            .iter()
            .copied()
            .filter(|q| q.0.is_finite() && q.1.is_finite() && q.0 > 0.0 && q.1 > 0.0)
            .collect();
        if !pts.is_empty() {
            let c = colour(1);
            chart
                .draw_series(LineSeries::new(pts.clone(), c.stroke_width(5)))
                .map_err(draw_err)?
                .label(label)
                .legend(move |(x, y)| PathElement::new([(x, y), (x + 30, y)], c.stroke_width(5)));
            chart
                .draw_series(pts.iter().map(|&q| Circle::new(q, 6, c.filled())))
                .map_err(draw_err)?;
            draw_legend(&mut chart)?;
        }
    }
    // Colour bar.
    let mut cb = ChartBuilder::on(&bar)
        .margin_top(80)
        .margin_bottom(100)
        .margin_right(10)
        .y_label_area_size(110)
        .build_cartesian_2d(
            0.0..1.0,
            (10f64.powf(lo)..10f64.powf(hi))
                .log_scale()
                .with_key_points(log_keys(10f64.powf(lo), 10f64.powf(hi))),
        )
        .map_err(draw_err)?;
    cb.configure_mesh()
        .disable_x_axis()
        .disable_mesh()
        .y_desc(&p.value_label)
        .y_label_formatter(&|v| tick(*v, true))
        .label_style(font(22))
        .axis_desc_style(font(24))
        .draw()
        .map_err(draw_err)?;
    let n = 60;
    for i in 0..n {
        let a = lo + (hi - lo) * i as f64 / n as f64;
        let b = lo + (hi - lo) * (i + 1) as f64 / n as f64;
        cb.draw_series(std::iter::once(Rectangle::new(
            [(0.0, 10f64.powf(a)), (1.0, 10f64.powf(b))],
            ramp(i as f64 / (n - 1) as f64).filled(),
        )))
        .map_err(draw_err)?;
    }
    Ok(())
}

/// Delta chi^2 enclosing probability `p` for two Gaussian parameters: the inverse CDF of
/// the chi-square distribution with 2 degrees of freedom (statrs); 2.30 for 68.27% and
/// 6.18 for 95.45%.
pub fn delta_chi2(p: f64) -> f64 {
    use statrs::distribution::{ChiSquared, ContinuousCDF};
    ChiSquared::new(2.0).map_or(-2.0 * (1.0 - p).ln(), |d| d.inverse_cdf(p))
}

/// Points of the n-sigma ellipse of a 2x2 covariance (2D Gaussian: Delta chi^2 = 2.30
/// for 68.3%, 6.18 for 95.4%; e.g. Coe 2009, arXiv:0906.4123).
pub fn ellipse_points(cov: [f64; 3], delta_chi2: f64, n: usize) -> Vec<(f64, f64)> {
    let [a, b, c] = cov;
    let tr = 0.5 * (a + c);
    let det = (0.25 * (a - c) * (a - c) + b * b).sqrt();
    let (l1, l2) = (tr + det, (tr - det).max(0.0));
    let theta = 0.5 * (2.0 * b).atan2(a - c);
    let (s1, s2) = ((l1 * delta_chi2).sqrt(), (l2 * delta_chi2).sqrt());
    (0..=n)
        .map(|i| {
            let t = 2.0 * std::f64::consts::PI * i as f64 / n as f64;
            let (x, y) = (s1 * t.cos(), s2 * t.sin());
            (
                x * theta.cos() - y * theta.sin(),
                x * theta.sin() + y * theta.cos(),
            )
        })
        .collect()
}

/// (label, palette index, 1-sigma points, 2-sigma points).
type EllipseCurves = (String, usize, Vec<(f64, f64)>, Vec<(f64, f64)>);

fn draw_ellipses<DB: DrawingBackend>(root: &Area<'_, DB>, p: &EllipsePlot) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let font = |sz: u32| (FAMILY, sz).into_font();
    let mut ext: f64 = 0.0;
    let mut eyt: f64 = 0.0;
    let curves: Vec<EllipseCurves> = p
        .ellipses
        .iter()
        .filter(|e| e.1.iter().all(|v| v.is_finite()) && e.1[0] > 0.0 && e.1[2] > 0.0)
        .map(|(l, cov, c)| {
            let one = ellipse_points(*cov, delta_chi2(0.682_689_492), 200);
            let two = ellipse_points(*cov, delta_chi2(0.954_499_736), 200);
            for q in &two {
                ext = ext.max(q.0.abs());
                eyt = eyt.max(q.1.abs());
            }
            (l.clone(), *c, one, two)
        })
        .collect();
    let (ext, eyt) = (
        if ext > 0.0 { ext * 1.15 } else { 1.0 },
        if eyt > 0.0 { eyt * 1.15 } else { 1.0 },
    );
    let mut chart = ChartBuilder::on(root)
        .margin(20)
        .x_label_area_size(80)
        .y_label_area_size(120)
        .caption(&p.title, font(34))
        .build_cartesian_2d(-ext..ext, -eyt..eyt)
        .map_err(draw_err)?;
    chart
        .configure_mesh()
        .x_desc(&p.x_label)
        .y_desc(&p.y_label)
        .label_style(font(26))
        .axis_desc_style(font(30))
        .x_label_formatter(&|v| tick(*v, false))
        .y_label_formatter(&|v| tick(*v, false))
        .light_line_style(WHITE)
        .draw()
        .map_err(draw_err)?;
    for (label, ci, one, two) in &curves {
        let c = colour(*ci);
        chart
            .draw_series(std::iter::once(Polygon::new(
                two.clone(),
                c.mix(0.12).filled(),
            )))
            .map_err(draw_err)?;
        chart
            .draw_series(std::iter::once(Polygon::new(
                one.clone(),
                c.mix(0.3).filled(),
            )))
            .map_err(draw_err)?;
        chart
            .draw_series(LineSeries::new(one.clone(), c.stroke_width(4)))
            .map_err(draw_err)?
            .label(label)
            .legend(move |(x, y)| PathElement::new([(x, y), (x + 30, y)], c.stroke_width(4)));
        chart
            .draw_series(LineSeries::new(two.clone(), c.stroke_width(2)))
            .map_err(draw_err)?;
    }
    if !curves.is_empty() {
        draw_legend(&mut chart)?;
    }
    Ok(())
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
    fn chi_square_levels() {
        // For 2 degrees of freedom the CDF is 1 - exp(-x/2) exactly.
        assert!((delta_chi2(0.682_689_492) - 2.2957).abs() < 1e-3);
        assert!((delta_chi2(0.954_499_736) - 6.1801).abs() < 1e-3);
    }

    #[test]
    fn ellipse_has_the_right_extent() {
        // Uncorrelated: the 1-sigma-in-2D ellipse reaches sqrt(2.30) sigma on each axis.
        let pts = ellipse_points([4.0, 0.0, 1.0], 2.30, 400);
        let mx = pts.iter().map(|p| p.0.abs()).fold(0.0, f64::max);
        let my = pts.iter().map(|p| p.1.abs()).fold(0.0, f64::max);
        assert!((mx - 2.0 * 2.30f64.sqrt()).abs() < 1e-3);
        assert!((my - 2.30f64.sqrt()).abs() < 1e-3);
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
