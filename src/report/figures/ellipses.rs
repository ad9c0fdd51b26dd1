//! Ellipse figures: 68% and 95% contours of two-parameter Gaussian posteriors from the
//! marginalized covariance, drawn as outlines (solid 68%, dashed 95%) with the levels
//! written on one probe's contours, a zoomed second panel when the contours differ much
//! in size, and the legend in a strip under the axes.

use super::*;

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

/// The legend strip under a figure: rows of (label, how to draw the sample) entries.
fn legend_strip<DB: DrawingBackend>(
    strip: &Area<'_, DB>,
    rows: &[Vec<(String, RGBColor, bool)>],
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    for (ir, row) in rows.iter().enumerate() {
        let y = 18 + 34 * ir as i32;
        let mut x = 130;
        for (label, c, dashed) in row {
            if *dashed {
                for x0 in [x, x + 22] {
                    strip
                        .draw(&PathElement::new(
                            [(x0, y), (x0 + 14, y)],
                            c.stroke_width(3),
                        ))
                        .map_err(draw_err)?;
                }
            } else {
                strip
                    .draw(&PathElement::new([(x, y), (x + 36, y)], c.stroke_width(4)))
                    .map_err(draw_err)?;
            }
            strip
                .draw(&Text::new(
                    label.clone(),
                    (x + 46, y - 12),
                    (FAMILY, LEGEND_FONT).into_font(),
                ))
                .map_err(draw_err)?;
            x += 46 + (label.chars().count() as f64 * 0.6 * LEGEND_FONT as f64) as i32 + 36;
        }
    }
    Ok(())
}

/// One panel of ellipses over [-ext, ext] x [-eyt, eyt]; `levels`: write "68%" and
/// "95%" on the contours of the curve with index `levels`.
fn ellipse_panel<DB: DrawingBackend>(
    area: &Area<'_, DB>,
    root: &Area<'_, DB>,
    p: &EllipsePlot,
    curves: &[EllipseCurves],
    (ext, eyt): (f64, f64),
    caption: &str,
    levels: Option<usize>,
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let font = |sz: u32| (FAMILY, sz).into_font();
    let mut chart = ChartBuilder::on(area)
        .margin(15)
        .x_label_area_size(70)
        .y_label_area_size(110)
        .caption(caption, font(26))
        .build_cartesian_2d(-ext..ext, -eyt..eyt)
        .map_err(draw_err)?;
    chart
        .configure_mesh()
        .x_desc(&p.x_label)
        .y_desc(&p.y_label)
        .label_style(font(22))
        .axis_desc_style(font(26))
        .x_labels(5)
        .x_label_formatter(&|v| tick(*v, false))
        .y_label_formatter(&|v| tick(*v, false))
        .light_line_style(WHITE)
        .bold_line_style(RGBColor(225, 225, 225))
        .draw()
        .map_err(draw_err)?;
    // Outline contours only: 68% solid and thick, 95% dashed and thinner; each drawn
    // only where it lies inside the panel (a zoom shows pieces of larger contours).
    for (_, ci, one, two) in curves {
        let c = colour(*ci);
        for run in clip_runs(one, ext, eyt) {
            chart
                .draw_series(LineSeries::new(run, c.stroke_width(4)))
                .map_err(draw_err)?;
        }
        for run in clip_runs(two, ext, eyt) {
            chart
                .draw_series(DashedLineSeries::new(run, 16, 10, c.stroke_width(3)))
                .map_err(draw_err)?;
        }
    }
    if let Some((_, ci, one, two)) = levels.and_then(|i| curves.get(i)) {
        let c = colour(*ci);
        for (pts, text) in [(one, "68%"), (two, "95%")] {
            if let Some(q) = pts.iter().copied().max_by(|a, b| a.1.total_cmp(&b.1)) {
                let (px, py) = chart.backend_coord(&q);
                root.draw(&Text::new(text, (px + 4, py - 26), font(22).color(&c)))
                    .map_err(draw_err)?;
            }
        }
    }
    Ok(())
}

/// The pieces of a closed polyline that lie inside [-ext, ext] x [-eyt, eyt].
fn clip_runs(pts: &[(f64, f64)], ext: f64, eyt: f64) -> Vec<Vec<(f64, f64)>> {
    let inside = |q: &(f64, f64)| q.0.abs() <= ext && q.1.abs() <= eyt;
    let mut runs: Vec<Vec<(f64, f64)>> = Vec::new();
    let mut cur: Vec<(f64, f64)> = Vec::new();
    for q in pts {
        if inside(q) {
            cur.push(*q);
        } else if !cur.is_empty() {
            runs.push(std::mem::take(&mut cur));
        }
    }
    if !cur.is_empty() {
        runs.push(cur);
    }
    runs.retain(|r| r.len() > 1);
    runs
}

pub(super) fn draw_ellipses<DB: DrawingBackend>(root: &Area<'_, DB>, p: &EllipsePlot) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let (d68, d95) = (delta_chi2(0.682_689_492), delta_chi2(0.954_499_736));
    let curves: Vec<EllipseCurves> = p
        .ellipses
        .iter()
        .filter(|e| e.1.iter().all(|v| v.is_finite()) && e.1[0] > 0.0 && e.1[2] > 0.0)
        .map(|(l, cov, c)| {
            (
                l.clone(),
                *c,
                ellipse_points(*cov, d68, 720),
                ellipse_points(*cov, d95, 720),
            )
        })
        .collect();
    let extent = |c: &EllipseCurves| -> (f64, f64) {
        c.3.iter().fold((0.0, 0.0), |(x, y), q| {
            (f64::max(x, q.0.abs()), f64::max(y, q.1.abs()))
        })
    };
    let pad = |(x, y): (f64, f64)| -> (f64, f64) {
        (
            if x > 0.0 { x * 1.15 } else { 1.0 },
            if y > 0.0 { y * 1.15 } else { 1.0 },
        )
    };
    let full = curves
        .iter()
        .map(extent)
        .fold((0.0, 0.0), |a, b| (f64::max(a.0, b.0), f64::max(a.1, b.1)));
    // The smallest ellipse sets a zoom when the largest would shrink it to a dot.
    let small = curves
        .iter()
        .map(extent)
        .min_by(|a, b| (a.0 * a.1).total_cmp(&(b.0 * b.1)));
    let zoom = small.filter(|s| s.0 < 0.3 * full.0 && s.1 < 0.3 * full.1);
    let widest =
        (0..curves.len()).max_by(|&a, &b| extent(&curves[a]).0.total_cmp(&extent(&curves[b]).0));
    let titled = root
        .titled(&p.title, (FAMILY, 32).into_font())
        .map_err(draw_err)?;
    let (panels, strip) = titled.split_vertically(titled.dim_in_pixel().1 - 80);
    match zoom {
        Some(z) => {
            let (left, right) = panels.split_horizontally(SIZE.0 / 2);
            ellipse_panel(&left, root, p, &curves, pad(full), "all probes", widest)?;
            // In the zoom, the 68% and 95% labels go on the largest contour that fits.
            let zext = pad(z);
            let fits = (0..curves.len())
                .filter(|&i| {
                    let e = extent(&curves[i]);
                    e.0 <= zext.0 && e.1 <= zext.1
                })
                .max_by(|&a, &b| extent(&curves[a]).0.total_cmp(&extent(&curves[b]).0));
            let factor = (full.0 / z.0).min(full.1 / z.1);
            ellipse_panel(
                &right,
                root,
                p,
                &curves,
                zext,
                &format!("zoom ×{}", crate::report::format_sig(factor, 2)),
                fits,
            )?;
        }
        None => ellipse_panel(&panels, root, p, &curves, pad(full), "", widest)?,
    }
    let grey = RGBColor(90, 90, 90);
    let probes: Vec<(String, RGBColor, bool)> = curves
        .iter()
        .map(|c| (c.0.clone(), colour(c.1), false))
        .collect();
    let levels = vec![
        (
            format!("68% (Δχ² = {})", crate::report::format_sig(d68, 3)),
            grey,
            false,
        ),
        (
            format!("95% (Δχ² = {})", crate::report::format_sig(d95, 3)),
            grey,
            true,
        ),
    ];
    legend_strip(&strip, &[probes, levels])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn contours_are_clipped_to_the_panel() {
        let pts = ellipse_points([100.0, 0.0, 1.0], 2.3, 720);
        let runs = clip_runs(&pts, 5.0, 10.0);
        assert!(runs.len() >= 2, "top and bottom arcs");
        assert!(runs.iter().flatten().all(|q| q.0.abs() <= 5.0));
        assert_eq!(clip_runs(&pts, 100.0, 100.0).len(), 1);
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
}
