//! The plane figure: values on a (k_max, l_max) grid as a colour map on log axes, a
//! labelled colour bar, an overlaid curve, bounds drawn as arrows to the edge, and the
//! legend in a strip under the axes (over a filled plane it would cover data).

use super::*;

/// Key points of a colour bar over [a, b]: the log key points plus both ends (rounded
/// inward to two significant digits), so the labels span the whole range.
pub(super) fn bar_keys(a: f64, b: f64) -> Vec<f64> {
    let (lo, hi) = (a.min(b), a.max(b));
    if !(lo > 0.0 && hi.is_finite()) {
        return Vec::new();
    }
    let round = |x: f64, up: bool| {
        let q = 10f64.powf(1.0 - x.log10().floor());
        if up {
            (x * q).ceil() / q
        } else {
            (x * q).floor() / q
        }
    };
    let (l, h) = (round(lo, true), round(hi, false));
    let span = (hi / lo).ln().max(1e-12);
    let mut k: Vec<f64> = log_keys(lo, hi)
        .into_iter()
        .filter(|&v| (v / l).ln() / span > 0.08 && (h / v).ln() / span > 0.08)
        .collect();
    if l <= h {
        k.insert(0, l);
        if h > l {
            k.push(h);
        }
    }
    k
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

pub(super) fn ramp(t: f64) -> RGBColor {
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

pub(super) fn draw_plane<DB: DrawingBackend>(root: &Area<'_, DB>, p: &PlanePlot) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let font = |sz: u32| (FAMILY, sz).into_font();
    let (left, bar) = root.split_horizontally(1000);
    // The legend sits in a strip under the axes: over a filled plane it would cover data.
    let (main, strip) = left.split_vertically(SIZE.1 - 60);
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
    let c = colour(1);
    let mut legend: Vec<(String, bool)> = Vec::new();
    if let Some((label, pts)) = &p.curve {
        let pts: Vec<(f64, f64)> = pts
            .iter()
            .copied()
            .filter(|q| q.0.is_finite() && q.1.is_finite() && q.0 > 0.0 && q.1 > 0.0)
            .collect();
        if !pts.is_empty() {
            chart
                .draw_series(LineSeries::new(pts.clone(), c.stroke_width(5)))
                .map_err(draw_err)?;
            chart
                .draw_series(pts.iter().map(|&q| Circle::new(q, 6, c.filled())))
                .map_err(draw_err)?;
            legend.push((label.clone(), false));
        }
    }
    // Bounds: an arrow from the first grid column to the left edge, with its head on
    // the edge: the crossover lies somewhere left of the grid.
    let bounds: Vec<(f64, f64)> = p
        .bounds
        .iter()
        .copied()
        .filter(|q| q.0.is_finite() && q.1.is_finite() && q.0 > 0.0 && q.1 > 0.0)
        .collect();
    for &(k, l) in &bounds {
        let from = chart.backend_coord(&(k, l));
        let to = chart.backend_coord(&(ex[0], l));
        let head = (to.0 + 2, to.1);
        root.draw(&PathElement::new(
            [from, (head.0 + 14, head.1)],
            c.stroke_width(4),
        ))
        .map_err(draw_err)?;
        root.draw(&Polygon::new(
            vec![head, (head.0 + 20, head.1 - 11), (head.0 + 20, head.1 + 11)],
            c.filled(),
        ))
        .map_err(draw_err)?;
    }
    if !bounds.is_empty() {
        legend.push((
            format!(
                "crossover below the grid (kₘₐₓ ≤ {} h/Mpc)",
                tick(p.x.first().copied().unwrap_or(f64::NAN), false)
            ),
            true,
        ));
    }
    let mut x = 150;
    for (label, arrow) in &legend {
        let y = 25;
        if *arrow {
            strip
                .draw(&PathElement::new(
                    [(x + 8, y), (x + 40, y)],
                    c.stroke_width(4),
                ))
                .map_err(draw_err)?;
            strip
                .draw(&Polygon::new(
                    vec![(x, y), (x + 18, y - 10), (x + 18, y + 10)],
                    c.filled(),
                ))
                .map_err(draw_err)?;
        } else {
            strip
                .draw(&PathElement::new([(x, y), (x + 40, y)], c.stroke_width(5)))
                .map_err(draw_err)?;
            strip
                .draw(&Circle::new((x + 20, y), 6, c.filled()))
                .map_err(draw_err)?;
        }
        strip
            .draw(&Text::new(
                label.clone(),
                (x + 52, y - 13),
                (FAMILY, LEGEND_FONT).into_font(),
            ))
            .map_err(draw_err)?;
        x += 52 + (label.chars().count() as f64 * 0.6 * LEGEND_FONT as f64) as i32 + 40;
    }
    colour_bar(&bar, lo, hi, &p.value_label, (80, 100, 110))
}

/// A vertical log colour bar from 10^lo to 10^hi in `bar`, labelled `label`; `layout` is
/// (top margin, bottom margin, label area width) in pixels. Shared by the plane and
/// triangle-plane figures.
pub(super) fn colour_bar<DB: DrawingBackend>(
    bar: &Area<'_, DB>,
    lo: f64,
    hi: f64,
    label: &str,
    layout: (u32, u32, u32),
) -> Result<()> {
    let font = |sz: u32| (FAMILY, sz).into_font();
    let (top, bottom, label_area) = layout;
    let mut cb = ChartBuilder::on(bar)
        .margin_top(top)
        .margin_bottom(bottom)
        .margin_right(10)
        .y_label_area_size(label_area)
        .build_cartesian_2d(
            0.0..1.0,
            (10f64.powf(lo)..10f64.powf(hi))
                .log_scale()
                .with_key_points(bar_keys(10f64.powf(lo), 10f64.powf(hi))),
        )
        .map_err(draw_err)?;
    cb.configure_mesh()
        .disable_x_axis()
        .disable_mesh()
        .y_desc(label)
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn colour_bar_labels_span_the_range() {
        let k = bar_keys(1.77, 19.4);
        assert_eq!(k.first().copied(), Some(1.8));
        assert_eq!(k.last().copied(), Some(19.0));
        assert!(k.contains(&5.0) && k.contains(&10.0), "{k:?}");
    }
}
