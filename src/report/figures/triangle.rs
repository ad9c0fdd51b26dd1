//! The triangle-plane figure: the share of the Fisher information per cell of the plane
//! (x, y) = (s1/s3, s2/s3), s1 <= s2 <= s3, one panel per shape with a shared log colour
//! scale and a labelled colour bar; the allowed region is outlined and the class
//! boundaries (squeezed, equilateral, flattened: the nearest corner) are dashed.

use super::plane::{colour_bar, ramp};
use super::*;

/// Panels of shares on the triangle plane.
#[derive(Debug, Clone)]
pub struct TrianglePlot {
    /// Title.
    pub title: String,
    /// x label (smallest over largest side).
    pub x_label: String,
    /// y label (middle over largest side).
    pub y_label: String,
    /// Cells per axis (x on [0, 1], y on [1/2, 1]).
    pub cells: usize,
    /// (panel title, share[iy * cells + ix]).
    pub panels: Vec<(String, Vec<f64>)>,
    /// Colour-bar label.
    pub value_label: String,
}

/// Shares below this fraction of the largest one are drawn in grey (the colour scale
/// spans four decades).
const FLOOR: f64 = 1e-4;

pub(super) fn draw_triangles<DB: DrawingBackend>(
    root: &Area<'_, DB>,
    p: &TrianglePlot,
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let font = |sz: u32| (FAMILY, sz).into_font();
    let (left, bar) = root.split_horizontally(990);
    let (head, body) = left.split_vertically(70);
    head.draw(&Text::new(p.title.clone(), (20, 18), font(32)))
        .map_err(draw_err)?;
    let max = p
        .panels
        .iter()
        .flat_map(|(_, v)| v.iter().copied())
        .filter(|v| v.is_finite())
        .fold(0.0, f64::max);
    let (lo, hi) = if max > 0.0 {
        ((max * FLOOR).log10(), max.log10())
    } else {
        (-4.0, 0.0)
    };
    let n = p.cells.max(1);
    let np = p.panels.len().max(1);
    let areas = body.split_evenly((1, np));
    for (ip, ((title, share), area)) in p.panels.iter().zip(areas.iter()).enumerate() {
        let mut chart = ChartBuilder::on(area)
            .margin(10)
            .margin_top(30)
            .x_label_area_size(90)
            .y_label_area_size(if ip == 0 { 100 } else { 40 })
            .caption(title, font(28))
            .build_cartesian_2d(0.0..1.0, 0.5..1.0)
            .map_err(draw_err)?;
        let mut mesh = chart.configure_mesh();
        mesh.disable_mesh()
            .x_desc(&p.x_label)
            .x_labels(3)
            .y_labels(3)
            .label_style(font(22))
            .axis_desc_style(font(26))
            .x_label_formatter(&|v| format!("{v:.1}"))
            .y_label_formatter(&|v| format!("{v:.2}"));
        if ip == 0 {
            mesh.y_desc(&p.y_label);
        }
        mesh.draw().map_err(draw_err)?;
        for iy in 0..n {
            for ix in 0..n {
                let (x0, x1) = (ix as f64 / n as f64, (ix + 1) as f64 / n as f64);
                let (y0, y1) = (
                    0.5 + iy as f64 / (2 * n) as f64,
                    0.5 + (iy + 1) as f64 / (2 * n) as f64,
                );
                // Cells wholly outside the allowed region stay white.
                if x0 >= y1 || x1 + y1 <= 1.0 {
                    continue;
                }
                let v = share.get(iy * n + ix).copied().unwrap_or(0.0);
                let c = if v > 0.0 && v.log10() >= lo {
                    ramp((v.log10() - lo) / (hi - lo).max(1e-12))
                } else {
                    RGBColor(225, 225, 225)
                };
                chart
                    .draw_series(std::iter::once(Rectangle::new(
                        [(x0, y0), (x1, y1)],
                        c.filled(),
                    )))
                    .map_err(draw_err)?;
            }
        }
        // The allowed region: y >= x, x + y >= 1, y <= 1.
        chart
            .draw_series(LineSeries::new(
                vec![(0.0, 1.0), (1.0, 1.0), (0.5, 0.5), (0.0, 1.0)],
                BLACK.stroke_width(3),
            ))
            .map_err(draw_err)?;
        // Class boundaries: y = x + 1/2 and x + y = 3/2, meeting at (1/2, 1).
        for seg in [
            vec![(0.25, 0.75), (0.5, 1.0)],
            vec![(0.5, 1.0), (0.75, 0.75)],
        ] {
            chart
                .draw_series(DashedLineSeries::new(seg, 12, 8, BLACK.stroke_width(3)))
                .map_err(draw_err)?;
        }
        for (label, at) in [
            ("sq", (0.04, 0.93)),
            ("eq", (0.8, 0.96)),
            ("fl", (0.42, 0.62)),
        ] {
            chart
                .draw_series(std::iter::once(Text::new(label, at, font(24))))
                .map_err(draw_err)?;
        }
    }
    colour_bar(&bar, lo, hi, &p.value_label, (90, 110, 150))
}
