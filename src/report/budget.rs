//! Information budgets: where the Fisher information on each f_NL comes from.
//!
//! - cumulative (S/N)^2 for f_NL = 1 (the single-shape Fisher information F_ii) versus
//!   l_max per experiment and field set, and versus k_max per survey and probe;
//! - the share of a survey's information by redshift bin (at the largest k_max);
//! - the share by triangle class (squeezed, equilateral, flattened) of any list of
//!   per-triangle contributions, through [`triangle_class_budget`]: the classes are the
//!   Voronoi cells of the three corners of the triangle plane (x, y) = (k1/k3, k2/k3),
//!   k1 <= k2 <= k3: squeezed (0, 1), equilateral (1, 1), flattened (1/2, 1/2).

use crate::pipeline::RunResult;
use crate::report::artifacts::{Artifact, cmb_reference_set, headline_probe, own_lmax, pidx};
use crate::report::figures::{Figure, LinePlot, Series};
use crate::report::format_sig;
use crate::report::outputs::slug;
use crate::report::table::{Column, Table};
pub use crate::triangle_class::{ClassBudget, TriangleClass, triangle_class_budget};

/// The budget tables and figures of a run.
pub fn budgets(r: &RunResult) -> Vec<Artifact> {
    let mut v = information_vs_lmax(r);
    v.extend(information_vs_kmax(r));
    v.extend(information_by_bin(r));
    v
}

/// Cumulative (S/N)^2 versus l_max per experiment (every field set and shape).
pub fn information_vs_lmax(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let mut out = Vec::new();
    for c in &r.cmb {
        let mut t = Table::new(
            &format!("information_vs_lmax_{}", slug(&c.experiment.name)),
            &format!(
                "{}: cumulative (S/N)^2 for f_NL = 1 (single-shape Fisher information) versus l_max",
                c.experiment.name
            ),
            vec![
                Column::new("fields", "CMB field set"),
                Column::new("shape", "primordial shape"),
                Column::new("lmax", "l_max used (capped at the field's own l_max)"),
                Column::new("sn2_per_fnl2", "(S/N)^2 for f_NL = 1"),
                Column::new(
                    "share_of_final",
                    "(S/N)^2 over its value at the largest l_max",
                ),
            ],
        );
        let te = cmb_reference_set(&c.forecast.field_sets);
        let mut series = Vec::new();
        for (ifs, &fs) in c.forecast.field_sets.iter().enumerate() {
            let own = own_lmax(c, fs);
            for (is, shape) in sc.shapes.iter().map(|s| s.name()).enumerate() {
                let mut pts: Vec<(f64, f64)> = Vec::new();
                for (m, &l) in c.forecast.lmax.iter().enumerate() {
                    let used = l.min(own) as f64;
                    if pts.last().is_some_and(|p| p.0 == used) {
                        continue;
                    }
                    pts.push((used, c.forecast.fisher[ifs][m].get(is, is)));
                }
                let last = pts.last().map_or(f64::NAN, |p| p.1);
                for &(l, f) in &pts {
                    t.push(vec![
                        fs.label().into(),
                        shape.clone().into(),
                        (l as usize).into(),
                        f.into(),
                        (f / last).into(),
                    ]);
                }
                if ifs == te {
                    series.push(Series {
                        label: format!("{shape} ({})", fs.label()),
                        points: pts,
                        colour: is,
                        dashed: false,
                    });
                }
            }
        }
        out.push(cumulative_artifact(
            t,
            &c.experiment.name,
            "ℓₘₐₓ".into(),
            series,
        ));
    }
    out
}

/// Cumulative (S/N)^2 versus k_max per survey (every probe and shape).
pub fn information_vs_kmax(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let mut out = Vec::new();
    let head = headline_probe(&sc.probes);
    for s in &r.surveys {
        let mut t = Table::new(
            &format!("information_vs_kmax_{}", slug(&s.survey.name)),
            &format!(
                "{}: cumulative (S/N)^2 for f_NL = 1 (single-shape Fisher information, nuisances marginalized per bin) versus k_max",
                s.survey.name
            ),
            vec![
                Column::new("probe", "survey probe"),
                Column::new("shape", "primordial shape"),
                Column::new("kmax_h_mpc", "survey k_max"),
                Column::new("sn2_per_fnl2", "(S/N)^2 for f_NL = 1"),
                Column::new(
                    "share_of_final",
                    "(S/N)^2 over its value at the largest k_max",
                ),
            ],
        );
        let mut series = Vec::new();
        for &p in &sc.probes {
            for (is, shape) in sc.shapes.iter().map(|s| s.name()).enumerate() {
                let pts: Vec<(f64, f64)> = sc
                    .kmax_h_mpc
                    .iter()
                    .zip(&s.forecast.total)
                    .map(|(&k, f)| (k, f[pidx(p)].get(is, is)))
                    .collect();
                let last = pts.last().map_or(f64::NAN, |q| q.1);
                for &(k, f) in &pts {
                    t.push(vec![
                        p.label().into(),
                        shape.clone().into(),
                        k.into(),
                        f.into(),
                        (f / last).into(),
                    ]);
                }
                if Some(p) == head {
                    series.push(Series {
                        label: format!("{shape} ({})", p.label()),
                        points: pts,
                        colour: is,
                        dashed: false,
                    });
                }
            }
        }
        out.push(cumulative_artifact(
            t,
            &s.survey.name,
            crate::report::kmax_axis_label([&s.survey]),
            series,
        ));
    }
    out
}

/// The share of each survey's single-shape information by redshift bin at the largest
/// k_max (the total is the sum over bins).
pub fn information_by_bin(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let mut out = Vec::new();
    let Some(ik) = sc.kmax_h_mpc.len().checked_sub(1) else {
        return out;
    };
    for s in &r.surveys {
        let mut t = Table::new(
            &format!("information_by_bin_{}", slug(&s.survey.name)),
            &format!(
                "{}: share of the single-shape (S/N)^2 for f_NL = 1 by redshift bin at {} = {} h/Mpc",
                s.survey.name,
                crate::report::kmax_name(&s.survey),
                format_sig(sc.kmax_h_mpc[ik], 3)
            ),
            vec![
                Column::new("probe", "survey probe"),
                Column::new("shape", "primordial shape"),
                Column::new("z_min", "bin lower edge"),
                Column::new("z_max", "bin upper edge"),
                Column::new("sn2_per_fnl2", "(S/N)^2 for f_NL = 1 from this bin"),
                Column::new("share", "share of the sum over bins"),
            ],
        );
        for &p in &sc.probes {
            for (is, shape) in sc.shapes.iter().map(|s| s.name()).enumerate() {
                let f: Vec<f64> = s
                    .forecast
                    .bins
                    .iter()
                    .map(|b| b.fisher[ik][pidx(p)].get(is, is))
                    .collect();
                let sum: f64 = f.iter().sum();
                for (b, &fb) in s.forecast.bins.iter().zip(&f) {
                    t.push(vec![
                        p.label().into(),
                        shape.clone().into(),
                        b.bin.z_min.into(),
                        b.bin.z_max.into(),
                        fb.into(),
                        (if sum > 0.0 { fb / sum } else { f64::NAN }).into(),
                    ]);
                }
            }
        }
        out.push(Artifact {
            table: t,
            figure: None,
        });
    }
    out
}

/// The cumulative-information figure (log-log, single-shape (S/N)^2 for f_NL = 1) of one
/// experiment or survey, with its table.
fn cumulative_artifact(t: Table, name: &str, x_label: String, series: Vec<Series>) -> Artifact {
    Artifact {
        table: t,
        figure: Some(Figure::Lines(LinePlot {
            title: format!("{name}: cumulative information"),
            x_label,
            y_label: "(S/N)² for f_NL = 1 (single-shape)".into(),
            log_x: true,
            log_y: true,
            series,
            bands: vec![],
        })),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
}
