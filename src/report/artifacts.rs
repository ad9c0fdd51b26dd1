//! The tables and figures of a run, one function per kind. Each returns [`Artifact`]s:
//! a table (always written) and the figure drawn from the same numbers (written when the
//! scenario asks for figures). Nothing here writes files; [`super::outputs`] does.

use crate::cmb::bispectrum::FieldSet;
use crate::combine::{crossover, log_slopes};
use crate::fisher::FisherMatrix;
use crate::pipeline::{CmbResult, RunResult};
use crate::report::figures::{Band, EllipsePlot, Figure, LinePlot, PlanePlot, Series, delta_chi2};
use crate::report::format_sig;
use crate::report::outputs::slug;
use crate::report::table::{Column, Table};
use crate::survey::fisher::Probe;

/// A table and, optionally, the figure drawn from it (same stem).
#[derive(Debug, Clone)]
pub struct Artifact {
    /// The numbers.
    pub table: Table,
    /// The figure, if this kind has one.
    pub figure: Option<Figure>,
}

/// Index of a probe in the survey engine's [P, B, P+B] arrays.
pub fn pidx(p: Probe) -> usize {
    match p {
        Probe::P => 0,
        Probe::B => 1,
        Probe::PB => 2,
    }
}

/// The field set used for "the CMB" in comparisons: T+E when computed, else the first.
pub fn cmb_reference_set(fields: &[FieldSet]) -> usize {
    fields.iter().position(|&f| f == FieldSet::TE).unwrap_or(0)
}

/// The experiment's own l_max for a field set (T: l_max of temperature, E: of
/// polarization, T+E: the larger). Grid values above it add nothing: the engine caps
/// each field at its own l_max.
pub fn own_lmax(c: &CmbResult, fs: FieldSet) -> usize {
    match fs {
        FieldSet::T => c.experiment.lmax_t,
        FieldSet::E => c.experiment.lmax_e,
        FieldSet::TE => c.experiment.lmax_t.max(c.experiment.lmax_e),
    }
}

/// The survey probe shown where one probe stands for the survey: P+B when computed.
pub fn headline_probe(probes: &[Probe]) -> Option<Probe> {
    probes
        .iter()
        .copied()
        .find(|&p| p == Probe::PB)
        .or_else(|| probes.first().copied())
}

/// The greek-lettered label of sigma(f_NL <shape>).
fn sigma_label(shape: &str) -> String {
    format!("σ(f_NL {shape})")
}

/// (a) sigma versus k_max per survey probe, with the CMB (T+E to T) as bands; one per
/// shape.
pub fn sigma_vs_kmax(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let mut out = Vec::new();
    for (is, shape) in sc.shapes.iter().map(|s| s.name()).enumerate() {
        let mut t = Table::new(
            &format!("sigma_vs_kmax_{}", slug(&shape)),
            &format!(
                "sigma(f_NL {shape}), single-shape (the other f_NL fixed, nuisances marginalized; the headline convention) with the shape-marginalized value beside it: survey probes versus k_max; CMB rows (T+E and T) at their largest l_max"
            ),
            vec![
                Column::new("kind", "survey or cmb"),
                Column::new("source", "survey or experiment name"),
                Column::new("probe", "survey probe (P, B, P+B) or CMB field set"),
                Column::new("kmax_h_mpc", "survey k_max (empty for CMB rows)"),
                Column::new("lmax", "CMB l_max used (empty for survey rows)"),
                Column::new(
                    "sigma_single",
                    "sigma(f_NL), single-shape (other f_NL fixed, nuisances marginalized): the plotted value",
                ),
                Column::new(
                    "sigma_marginal",
                    "sigma(f_NL), marginalized over the other shapes",
                ),
            ],
        );
        let mut series = Vec::new();
        for (isv, s) in r.surveys.iter().enumerate() {
            for (ip, &p) in sc.probes.iter().enumerate() {
                let pts: Vec<(f64, f64)> = sc
                    .kmax_h_mpc
                    .iter()
                    .enumerate()
                    .map(|(ik, &k)| (k, s.forecast.total[ik][pidx(p)].sigma_conditional(is)))
                    .collect();
                for (ik, &(k, v)) in pts.iter().enumerate() {
                    t.push(vec![
                        "survey".into(),
                        s.survey.name.clone().into(),
                        p.label().into(),
                        k.into(),
                        f64::NAN.into(),
                        v.into(),
                        s.forecast.total[ik][pidx(p)].sigma_marginal_or_inf()[is].into(),
                    ]);
                }
                // Colour by probe, dash (and marker) by survey; surveys beyond the second
                // move to the next three colours.
                series.push(Series {
                    label: format!("{} {}", s.survey.name, p.label()),
                    points: pts,
                    colour: ip + 3 * (isv / 2),
                    dashed: isv % 2 == 1,
                });
            }
        }
        let mut bands = Vec::new();
        for (ic, c) in r.cmb.iter().enumerate() {
            let te = cmb_reference_set(&c.forecast.field_sets);
            let tt = c
                .forecast
                .field_sets
                .iter()
                .position(|&x| x == FieldSet::T)
                .unwrap_or(te);
            let at = |ifs: usize| {
                c.forecast.fisher[ifs]
                    .last()
                    .map_or(f64::NAN, |m| m.sigma_conditional(is))
            };
            let at_marginal = |ifs: usize| {
                c.forecast.fisher[ifs]
                    .last()
                    .map_or(f64::NAN, |m| m.sigma_marginal_or_inf()[is])
            };
            let (lo, hi) = (at(te), at(tt));
            for (ifs, v) in [(te, lo), (tt, hi)] {
                let fs = c.forecast.field_sets[ifs];
                let grid = c.forecast.lmax.last().copied().unwrap_or(0);
                t.push(vec![
                    "cmb".into(),
                    c.experiment.name.clone().into(),
                    fs.label().into(),
                    f64::NAN.into(),
                    grid.min(own_lmax(c, fs)).into(),
                    v.into(),
                    at_marginal(ifs).into(),
                ]);
            }
            bands.push(Band {
                label: if te == tt {
                    format!(
                        "{} {}",
                        c.experiment.name,
                        c.forecast.field_sets[te].label()
                    )
                } else {
                    format!("{} (T+E to T)", c.experiment.name)
                },
                lo: lo.min(hi),
                hi: lo.max(hi),
                colour: ic,
            });
        }
        let free = crate::report::figures::band_colours(&series, bands.len());
        for (b, c) in bands.iter_mut().zip(free) {
            b.colour = c;
        }
        let figure = (!series.is_empty()).then(|| {
            Figure::Lines(LinePlot {
                title: format!("f_NL {shape}: survey versus CMB"),
                x_label: crate::report::kmax_axis_label(r.surveys.iter().map(|s| &s.survey)),
                y_label: format!("{}, single-shape", sigma_label(&shape)),
                log_x: true,
                log_y: true,
                series,
                bands,
            })
        });
        out.push(Artifact { table: t, figure });
    }
    out
}

/// Drops grid points above `own` and puts the value of the first grid point at or above
/// `own` at `own` itself (the engine caps the field there), so no curve runs past the
/// field's own l_max. Returns (l_max used, grid index) pairs.
fn capped_grid(lmax: &[usize], own: usize) -> Vec<(usize, usize)> {
    let mut out: Vec<(usize, usize)> = Vec::new();
    for (m, &l) in lmax.iter().enumerate() {
        let used = l.min(own);
        if out.last().is_some_and(|&(u, _)| u == used) {
            continue;
        }
        out.push((used, m));
    }
    out
}

/// (b) sigma versus l_max for T, E, T+E with the log slope, per experiment and shape.
pub fn sigma_vs_lmax(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let mut out = Vec::new();
    for c in &r.cmb {
        for (is, shape) in sc.shapes.iter().map(|s| s.name()).enumerate() {
            let mut t = Table::new(
                &format!(
                    "sigma_vs_lmax_{}_{}",
                    slug(&c.experiment.name),
                    slug(&shape)
                ),
                &format!(
                    "{}: sigma(f_NL {shape}) versus l_max per field set (plotted: sigma_conditional, single-shape); each field stops at its own l_max",
                    c.experiment.name
                ),
                vec![
                    Column::new("fields", "CMB field set"),
                    Column::new(
                        "lmax",
                        "l_max used (the grid value capped at the field's own l_max)",
                    ),
                    Column::new(
                        "sigma_marginal",
                        "sigma(f_NL), marginalized over the other shapes",
                    ),
                    Column::new(
                        "sigma_conditional",
                        "sigma(f_NL), other shapes fixed (single-shape)",
                    ),
                    Column::new(
                        "sn2_per_fnl2",
                        "(S/N)^2 for f_NL = 1: the single-shape Fisher information F_ii",
                    ),
                    Column::new(
                        "log_slope",
                        "d ln F_ii / d ln l_max (single-shape); empty on a one-point grid",
                    ),
                ],
            );
            t.notes
                .push("log_slope: centred differences inside, one-sided at the ends".into());
            let mut top = Vec::new();
            let mut bottom = Vec::new();
            for (ifs, &fs) in c.forecast.field_sets.iter().enumerate() {
                let mats = &c.forecast.fisher[ifs];
                let grid = capped_grid(&c.forecast.lmax, own_lmax(c, fs));
                let lm: Vec<f64> = grid.iter().map(|&(l, _)| l as f64).collect();
                let info: Vec<f64> = grid.iter().map(|&(_, m)| mats[m].get(is, is)).collect();
                let sig: Vec<f64> = grid
                    .iter()
                    .map(|&(_, m)| mats[m].sigma_marginal_or_inf()[is])
                    .collect();
                let single: Vec<f64> = grid
                    .iter()
                    .map(|&(_, m)| mats[m].sigma_conditional(is))
                    .collect();
                let slope = log_slopes(&lm, &info);
                for (k, &(l, m)) in grid.iter().enumerate() {
                    t.push(vec![
                        fs.label().into(),
                        l.into(),
                        sig[k].into(),
                        mats[m].sigma_conditional(is).into(),
                        info[k].into(),
                        slope[k].into(),
                    ]);
                }
                top.push(Series {
                    label: fs.label().into(),
                    points: lm.iter().copied().zip(single).collect(),
                    colour: ifs,
                    dashed: false,
                });
                bottom.push(Series {
                    label: fs.label().into(),
                    points: lm.iter().copied().zip(slope).collect(),
                    colour: ifs,
                    dashed: false,
                });
            }
            let figure = Figure::TwoPanel(
                LinePlot {
                    title: format!("{}: f_NL {shape}", c.experiment.name),
                    x_label: "ℓₘₐₓ".into(),
                    y_label: format!("{}, single-shape", sigma_label(&shape)),
                    log_x: true,
                    log_y: true,
                    series: top,
                    bands: vec![],
                },
                LinePlot {
                    title: String::new(),
                    x_label: "ℓₘₐₓ".into(),
                    y_label: "d ln F/d ln ℓₘₐₓ, 1 shape".into(),
                    log_x: true,
                    log_y: false,
                    series: bottom,
                    bands: vec![],
                },
            );
            out.push(Artifact {
                table: t,
                figure: Some(figure),
            });
        }
    }
    out
}

/// (c) joint sigma over (k_max, l_max) with the crossover curve, per experiment, survey
/// and shape (T+E and the headline survey probe).
pub fn joint_planes(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let Some(pb) = headline_probe(&sc.probes) else {
        return Vec::new();
    };
    let mut out = Vec::new();
    for c in &r.cmb {
        let fs = cmb_reference_set(&c.forecast.field_sets);
        let grid = capped_grid(&c.forecast.lmax, own_lmax(c, c.forecast.field_sets[fs]));
        for s in &r.surveys {
            let sig_of = |is: usize| -> Vec<f64> {
                s.forecast
                    .total
                    .iter()
                    .map(|t| t[pidx(pb)].sigma_conditional(is))
                    .collect()
            };
            for (is, shape) in sc.shapes.iter().map(|s| s.name()).enumerate() {
                let mut t = Table::new(
                    &format!(
                        "joint_plane_{}_{}_{}",
                        slug(&c.experiment.name),
                        slug(&s.survey.name),
                        slug(&shape)
                    ),
                    &format!(
                        "{} ({}) + {} ({}): joint sigma(f_NL {shape}) over (l_max, k_max), single-shape (plotted, and the crossover curve) and marginalized over the other shapes",
                        c.experiment.name,
                        c.forecast.field_sets[fs].label(),
                        s.survey.name,
                        pb.label()
                    ),
                    vec![
                        Column::new("lmax", "CMB l_max used"),
                        Column::new("kmax_h_mpc", "survey k_max"),
                        Column::new(
                            "sigma_joint",
                            "joint sigma(f_NL), single-shape (other f_NL fixed, nuisances marginalized)",
                        ),
                        Column::new(
                            "sigma_joint_marginal",
                            "joint sigma(f_NL), marginalized over the other shapes",
                        ),
                    ],
                );
                let mut values = Vec::new();
                let mut curve = Vec::new();
                let mut bounds = Vec::new();
                for &(lm, m) in &grid {
                    let fc = &c.forecast.fisher[fs][m];
                    let mut row = Vec::new();
                    for (ik, &k) in sc.kmax_h_mpc.iter().enumerate() {
                        let joint = fc.combine(&s.forecast.total[ik][pidx(pb)]);
                        let v = joint.sigma_conditional(is);
                        row.push(v);
                        t.push(vec![
                            lm.into(),
                            k.into(),
                            v.into(),
                            joint.sigma_marginal_or_inf()[is].into(),
                        ]);
                    }
                    values.push(row);
                    let x = crossover(&sc.kmax_h_mpc, &sig_of(is), fc.sigma_conditional(is));
                    match (x.kmax_h_mpc, x.below_grid) {
                        (Some(k), false) => curve.push((k, lm as f64)),
                        (Some(k), true) => bounds.push((k, lm as f64)),
                        (None, _) => {}
                    }
                }
                let figure = Figure::Plane(PlanePlot {
                    title: format!(
                        "joint σ(f_NL {shape}): {} + {} {}",
                        c.experiment.name,
                        s.survey.name,
                        pb.label()
                    ),
                    x_label: crate::report::kmax_axis_label([&s.survey]),
                    y_label: format!("ℓₘₐₓ ({})", c.forecast.field_sets[fs].label()),
                    x: sc.kmax_h_mpc.clone(),
                    y: grid.iter().map(|&(l, _)| l as f64).collect(),
                    values,
                    value_label: "joint σ(f_NL), single-shape".into(),
                    curve: Some(("survey beats CMB (crossover)".into(), curve)),
                    bounds,
                });
                out.push(Artifact {
                    table: t,
                    figure: Some(figure),
                });
            }
        }
    }
    out
}

/// The marginalized 2x2 covariance [cxx, cxy, cyy] of parameters (i, j), if finite.
pub fn pair_covariance(m: &FisherMatrix, i: usize, j: usize) -> Option<[f64; 3]> {
    let informative: Vec<usize> = (0..m.len()).filter(|&k| m.get(k, k) > 0.0).collect();
    if !informative.contains(&i) || !informative.contains(&j) {
        return None;
    }
    let names: Vec<&str> = informative.iter().map(|&k| m.names()[k].as_str()).collect();
    let cov = m.select(&names).ok()?.inverse().ok()?;
    let a = informative.iter().position(|&k| k == i)?;
    let b = informative.iter().position(|&k| k == j)?;
    Some([cov.get(a, a), cov.get(a, b), cov.get(b, b)])
}

/// (d) 68% and 95% ellipses for pairs of shapes: CMB (T+E), survey (headline probe),
/// joint, at the largest grid values.
pub fn ellipses(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let shapes: Vec<String> = sc.shapes.iter().map(|s| s.name()).collect();
    let Some(pb) = headline_probe(&sc.probes) else {
        return Vec::new();
    };
    let (d68, d95) = (delta_chi2(0.682_689_492), delta_chi2(0.954_499_736));
    let mut out = Vec::new();
    for c in &r.cmb {
        let fs = cmb_reference_set(&c.forecast.field_sets);
        for s in &r.surveys {
            for i in 0..shapes.len() {
                for j in i + 1..shapes.len() {
                    let fc = c.forecast.fisher[fs].last().expect("non-empty l_max grid");
                    let fsv = &s.forecast.total.last().expect("non-empty k_max grid")[pidx(pb)];
                    let joint = fc.combine(fsv);
                    let mut t = Table::new(
                        &format!(
                            "ellipses_{}_{}_{}_{}",
                            slug(&c.experiment.name),
                            slug(&s.survey.name),
                            slug(&shapes[i]),
                            slug(&shapes[j])
                        ),
                        &format!(
                            "marginalized covariance of (f_NL {}, f_NL {}); ellipses at Delta chi^2 = {} (68%) and {} (95%)",
                            shapes[i],
                            shapes[j],
                            format_sig(d68, 3),
                            format_sig(d95, 3)
                        ),
                        vec![
                            Column::new("probe", "CMB field set, survey probe, or joint"),
                            Column::new("cov_xx", &format!("Var f_NL {}", shapes[i])),
                            Column::new("cov_xy", "covariance"),
                            Column::new("cov_yy", &format!("Var f_NL {}", shapes[j])),
                        ],
                    );
                    let mut ell = Vec::new();
                    for (label, m, col) in [
                        (
                            format!(
                                "{} {}",
                                c.experiment.name,
                                c.forecast.field_sets[fs].label()
                            ),
                            fc,
                            0usize,
                        ),
                        (format!("{} {}", s.survey.name, pb.label()), fsv, 1),
                        ("joint".to_string(), &joint, 2),
                    ] {
                        if let Some(cov) = pair_covariance(m, i, j) {
                            t.push(vec![
                                label.clone().into(),
                                cov[0].into(),
                                cov[1].into(),
                                cov[2].into(),
                            ]);
                            ell.push((label, cov, col));
                        }
                    }
                    let figure = Figure::Ellipses(EllipsePlot {
                        title: format!(
                            "68% and 95% (Δχ² = {}, {}): {} + {}",
                            format_sig(d68, 3),
                            format_sig(d95, 3),
                            c.experiment.name,
                            s.survey.name
                        ),
                        x_label: format!("f_NL {} (marginalized)", shapes[i]),
                        y_label: format!("f_NL {} (marginalized)", shapes[j]),
                        ellipses: ell,
                    });
                    out.push(Artifact {
                        table: t,
                        figure: Some(figure),
                    });
                }
            }
        }
    }
    out
}

/// (e) sigma per redshift bin at the largest k_max, drawn as steps over each bin.
pub fn per_bin(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let h = sc.cosmology.h();
    let mut out = Vec::new();
    let Some(ik) = sc.kmax_h_mpc.len().checked_sub(1) else {
        return out;
    };
    for s in &r.surveys {
        let mut t = Table::new(
            &format!("per_bin_{}", slug(&s.survey.name)),
            &format!(
                "{}: sigma(f_NL) per redshift bin at {} = {} h/Mpc (each bin's own k_max in kmax_used_h_mpc; nuisances marginalized per bin)",
                s.survey.name,
                crate::report::kmax_name(&s.survey),
                format_sig(sc.kmax_h_mpc[ik], 3)
            ),
            vec![
                Column::new("shape", "primordial shape"),
                Column::new("probe", "survey probe"),
                Column::new("z_min", "bin lower edge"),
                Column::new("z_max", "bin upper edge"),
                Column::new("z_eff", "bin effective redshift"),
                Column::new("kmax_used_h_mpc", "k_max used in the bin"),
                Column::new(
                    "sigma_marginal",
                    "sigma(f_NL) from this bin alone, marginalized over the other shapes",
                ),
                Column::new(
                    "sigma_conditional",
                    "sigma(f_NL) from this bin alone, single-shape",
                ),
            ],
        );
        let mut series = Vec::new();
        for (is, shape) in sc.shapes.iter().map(|s| s.name()).enumerate() {
            for (ip, &p) in sc.probes.iter().enumerate() {
                let mut pts = Vec::new();
                for b in &s.forecast.bins {
                    let m = &b.fisher[ik][pidx(p)];
                    let v = m.sigma_conditional(is);
                    t.push(vec![
                        shape.clone().into(),
                        p.label().into(),
                        b.bin.z_min.into(),
                        b.bin.z_max.into(),
                        b.bin.z_eff.into(),
                        (b.kmax_used_mpc[ik] / h).into(),
                        m.sigma_marginal_or_inf()[is].into(),
                        v.into(),
                    ]);
                    pts.push((b.bin.z_min, v));
                    pts.push((b.bin.z_max, v));
                }
                if Some(p) == headline_probe(&sc.probes) {
                    series.push(Series {
                        label: format!("{shape} {}", p.label()),
                        points: pts,
                        colour: is,
                        dashed: ip % 2 == 1,
                    });
                }
            }
        }
        let figure = Figure::Steps(LinePlot {
            title: format!(
                "{}: σ(f_NL) per redshift bin ({} = {} h/Mpc)",
                s.survey.name,
                crate::report::kmax_name(&s.survey),
                format_sig(sc.kmax_h_mpc[ik], 3)
            ),
            x_label: "z (bin edges)".into(),
            y_label: "σ(f_NL) of the bin alone, single-shape".into(),
            log_x: false,
            log_y: true,
            series,
            bands: vec![],
        });
        out.push(Artifact {
            table: t,
            figure: Some(figure),
        });
    }
    out
}

/// Every table and figure of a run, in a fixed order.
pub fn all(r: &RunResult) -> Vec<Artifact> {
    let mut v = sigma_vs_kmax(r);
    v.extend(sigma_vs_lmax(r));
    v.extend(joint_planes(r));
    v.extend(ellipses(r));
    v.extend(per_bin(r));
    v.extend(crate::report::budget::budgets(r));
    v
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grid_stops_at_the_fields_own_lmax() {
        assert_eq!(
            capped_grid(&[500, 1000, 2000, 3000], 1500),
            vec![(500, 0), (1000, 1), (1500, 2)]
        );
        assert_eq!(capped_grid(&[500, 1000], 3000), vec![(500, 0), (1000, 1)]);
        assert_eq!(capped_grid(&[500, 1000], 400), vec![(400, 0)]);
    }
}
