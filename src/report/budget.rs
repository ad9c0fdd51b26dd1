//! Information budgets: where the Fisher information on each f_NL comes from.
//!
//! - cumulative (S/N)^2 for f_NL = 1 (the single-shape Fisher information F_ii) versus
//!   l_max per experiment and field set, and versus k_max per survey and probe;
//! - the share of a survey's information by redshift bin (at the largest k_max);
//! - the share of a survey's bispectrum information by triangle class (squeezed,
//!   equilateral, flattened; [`crate::triangle_class`]) at the largest k_max, from the
//!   Gaussian covariance with the nuisances fixed ([`crate::survey::triangle_budget`]);
//! - the share of a CMB experiment's bispectrum information by (l1, l2, l3) configuration
//!   class ([`crate::cmb::config_budget`]), with the cell sum checked against the engine.

use crate::pipeline::RunResult;
use crate::report::artifacts::{Artifact, cmb_reference_set, headline_probe, own_lmax, pidx};
use crate::report::figures::{Figure, LinePlot, Series, TrianglePlot};
use crate::report::format_sig;
use crate::report::outputs::slug;
use crate::report::table::{Column, Table};
pub use crate::triangle_class::{ClassBudget, TriangleClass, triangle_class_budget};
use crate::triangle_class::{PLANE_CELLS, PlaneDensity};

/// The budget tables and figures of a run.
pub fn budgets(r: &RunResult) -> Vec<Artifact> {
    let mut v = information_vs_lmax(r);
    v.extend(information_vs_kmax(r));
    v.extend(information_by_bin(r));
    v.extend(information_by_class(r));
    v.extend(information_by_configuration(r));
    v
}

/// The class boundaries in words, for table descriptions and captions.
pub const CLASS_RULE: &str = "classes are the nearest corner of the plane (x, y) = (s1/s3, s2/s3), s1 <= s2 <= s3: squeezed (0, 1) where x <= 1/2 and y >= x + 1/2, equilateral (1, 1) where x > 1/2 and x + y > 3/2, flattened (1/2, 1/2) otherwise (sq, eq, fl in the figures; dashed lines: the class boundaries)";

fn class_columns() -> Vec<Column> {
    vec![
        Column::new(
            "squeezed_share",
            "share of the information in squeezed configurations",
        ),
        Column::new(
            "equilateral_share",
            "share of the information in equilateral configurations",
        ),
        Column::new(
            "flattened_share",
            "share of the information in flattened configurations",
        ),
    ]
}

fn plane_cells(planes: &[&PlaneDensity]) -> usize {
    planes.first().map_or(PLANE_CELLS, |p| p.cells)
}

fn plane_panels(shapes: &[String], planes: &[&PlaneDensity]) -> Vec<(String, Vec<f64>)> {
    shapes
        .iter()
        .zip(planes)
        .map(|(s, p)| (s.clone(), p.share.clone()))
        .collect()
}

/// Per survey: the share of the bispectrum information by triangle class at the largest
/// k_max (Gaussian covariance, nuisances fixed), with the triangle-plane figure.
pub fn information_by_class(r: &RunResult) -> Vec<Artifact> {
    let mut out = Vec::new();
    for s in &r.surveys {
        let Some(b) = &s.triangle_budget else {
            continue;
        };
        let kname = crate::report::kmax_name(&s.survey);
        let k = format_sig(b.kmax_h_mpc, 3);
        let mut cols = vec![
            Column::new("shape", "primordial shape"),
            Column::new("kmax_h_mpc", "survey k_max of the budget"),
        ];
        cols.extend(class_columns());
        cols.push(Column::new(
            "sn2_per_fnl2_gaussian",
            "bispectrum (S/N)^2 for f_NL = 1: Gaussian covariance, nuisances fixed (the sum the shares divide)",
        ));
        let mut t = Table::new(
            &format!("information_by_class_{}", slug(&s.survey.name)),
            &format!(
                "{}: share of the bispectrum single-shape Fisher information F_ii by triangle class at {kname} = {k} h/Mpc, from the Gaussian covariance with the nuisances fixed (with the realistic covariance and marginalized nuisances the information does not split by triangle); {CLASS_RULE}, with s = k; figure cells sum the nodes of the triangle quadrature (grey: no node, or below 1e-4 of the largest cell)",
                s.survey.name
            ),
            cols,
        );
        for (shape, c) in b.shapes.iter().zip(&b.classes) {
            t.push(vec![
                shape.clone().into(),
                b.kmax_h_mpc.into(),
                c.squeezed.into(),
                c.equilateral.into(),
                c.flattened.into(),
                c.total.into(),
            ]);
        }
        let planes: Vec<&PlaneDensity> = b.plane.iter().collect();
        out.push(Artifact {
            table: t,
            figure: Some(Figure::Triangles(TrianglePlot {
                title: format!(
                    "{}: B information per triangle, {kname} = {k} h/Mpc",
                    s.survey.name
                ),
                x_label: "k₁/k₃ (k₁ ≤ k₂ ≤ k₃)".into(),
                y_label: "k₂/k₃".into(),
                cells: plane_cells(&planes),
                panels: plane_panels(&b.shapes, &planes),
                value_label: "share of F_ii per cell (Gaussian cov., nuisances fixed)".into(),
            })),
        });
    }
    out
}

/// Per experiment: the share of the CMB bispectrum information by (l1, l2, l3)
/// configuration class at the budget's l_max, every field set and shape, with the check
/// against the engine and the triangle-plane figure of the reference field set.
pub fn information_by_configuration(r: &RunResult) -> Vec<Artifact> {
    let mut out = Vec::new();
    for c in &r.cmb {
        let Some(b) = &c.config_budget else { continue };
        let mut cols = vec![
            Column::new("fields", "CMB field set"),
            Column::new("shape", "primordial shape"),
            Column::new(
                "lmax",
                "l_max of the budget (capped at each field's own l_max)",
            ),
        ];
        cols.extend(class_columns());
        cols.push(Column::new(
            "sn2_per_fnl2",
            "(S/N)^2 for f_NL = 1 summed over multipole cells (the sum the shares divide)",
        ));
        cols.push(Column::new(
            "sn2_per_fnl2_engine",
            "(S/N)^2 for f_NL = 1 from the Fisher engine at the same l_max",
        ));
        cols.push(Column::new(
            "cell_sum_over_engine",
            "cell sum over the engine's value (the accuracy of the budget's multipole cells)",
        ));
        let mut t = Table::new(
            &format!("information_by_configuration_{}", slug(&c.experiment.name)),
            &format!(
                "{}: share of the CMB bispectrum single-shape Fisher information F_ii by (l1, l2, l3) configuration class at l_max = {} (the covariance is diagonal in the triplets, so the shares are exact up to the cells: {} cells of consecutive multipoles, one multipole each below l = {}, at most {} wide, exact 3j weights per cell triple, bispectrum at each cell triple's weighted centre); {CLASS_RULE}, with s = l; the figure shows the reference field set (grey cells: below 1e-4 of the largest)",
                c.experiment.name,
                b.lmax,
                b.cells,
                crate::cmb::config_budget::BUDGET_L_FINE,
                b.max_cell_width
            ),
            cols,
        );
        for row in &b.rows {
            let cb = &row.classes;
            t.push(vec![
                row.field_set.label().into(),
                row.shape.clone().into(),
                b.lmax.into(),
                cb.squeezed.into(),
                cb.equilateral.into(),
                cb.flattened.into(),
                cb.total.into(),
                row.engine_information.into(),
                (cb.total / row.engine_information).into(),
            ]);
        }
        let te = cmb_reference_set(&c.forecast.field_sets);
        let fs = c.forecast.field_sets.get(te).copied();
        let rows: Vec<_> = b.rows.iter().filter(|x| Some(x.field_set) == fs).collect();
        let shapes: Vec<String> = rows.iter().map(|x| x.shape.clone()).collect();
        let planes: Vec<&PlaneDensity> = rows.iter().map(|x| &x.plane).collect();
        out.push(Artifact {
            table: t,
            figure: Some(Figure::Triangles(TrianglePlot {
                title: format!(
                    "{}: bispectrum information per configuration, {} at ℓₘₐₓ = {}",
                    c.experiment.name,
                    fs.map_or("", |f| f.label()),
                    b.lmax
                ),
                x_label: "ℓ₁/ℓ₃ (ℓ₁ ≤ ℓ₂ ≤ ℓ₃)".into(),
                y_label: "ℓ₂/ℓ₃".into(),
                cells: plane_cells(&planes),
                panels: plane_panels(&shapes, &planes),
                value_label: "share of F_ii per cell".into(),
            })),
        });
    }
    out
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
