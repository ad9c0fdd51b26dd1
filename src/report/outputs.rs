//! The files of `ngreach run`: `summary.json`, one CSV per figure, a LaTeX table, the
//! figures, and the terminal summary. Everything is computed from a
//! [`crate::pipeline::RunResult`]; nothing here does physics beyond adding Fisher
//! matrices (the combiner).

use std::path::Path;

use serde_json::{Value, json};

use crate::cmb::bispectrum::FieldSet;
use crate::combine::{Crossover, crossover, improvement, log_slopes, sigmas};
use crate::error::{Error, Result};
use crate::fisher::FisherMatrix;
use crate::pipeline::RunResult;
use crate::report::figures::{
    Band, EllipsePlot, Figure, LinePlot, PlanePlot, Series, write_figure,
};
use crate::report::{format_sig, num, write_atomic};
use crate::survey::fisher::Probe;

/// Index of a probe in the survey engine's [P, B, P+B] arrays.
fn pidx(p: Probe) -> usize {
    match p {
        Probe::P => 0,
        Probe::B => 1,
        Probe::PB => 2,
    }
}

/// The field set used for "the CMB" in comparisons: T+E when computed, else the first.
fn cmb_reference_set(fields: &[FieldSet]) -> usize {
    fields.iter().position(|&f| f == FieldSet::TE).unwrap_or(0)
}

/// A crossover entry with its labels.
#[derive(Debug, Clone, serde::Serialize)]
pub struct CrossoverRow {
    /// CMB experiment.
    pub experiment: String,
    /// Survey.
    pub survey: String,
    /// Survey probe.
    pub probe: String,
    /// Shape.
    pub shape: String,
    /// The result.
    #[serde(flatten)]
    pub crossover: Crossover,
}

/// Computes all crossovers: for each experiment (T+E at its largest l_max on the grid),
/// survey, probe and shape, on marginalized sigmas.
pub fn crossovers(r: &RunResult) -> Vec<CrossoverRow> {
    let sc = &r.scenario;
    let mut out = Vec::new();
    for c in &r.cmb {
        let fs = cmb_reference_set(&c.forecast.field_sets);
        let f_cmb = c.forecast.fisher[fs].last().expect("non-empty l_max grid");
        let (_, cmb_marg) = sigmas(f_cmb);
        for s in &r.surveys {
            for &p in &sc.probes {
                for (is, shape) in sc.shapes.iter().enumerate() {
                    let sig: Vec<f64> = s
                        .forecast
                        .total
                        .iter()
                        .map(|t| t[pidx(p)].sigma_marginal_or_inf()[is])
                        .collect();
                    out.push(CrossoverRow {
                        experiment: c.experiment.name.clone(),
                        survey: s.survey.name.clone(),
                        probe: p.label().into(),
                        shape: shape.name(),
                        crossover: crossover(&sc.kmax_h_mpc, &sig, cmb_marg[is]),
                    });
                }
            }
        }
    }
    out
}

/// The whole `summary.json` object.
pub fn summary_json(r: &RunResult) -> Value {
    let sc = &r.scenario;
    let h = sc.cosmology.h();
    let shapes: Vec<String> = sc.shapes.iter().map(|s| s.name()).collect();
    // CMB rows.
    let mut cmb_rows = Vec::new();
    let mut cmb_fisher = Vec::new();
    for c in &r.cmb {
        let lm: Vec<f64> = c.forecast.lmax.iter().map(|&l| l as f64).collect();
        for (ifs, fs) in c.forecast.field_sets.iter().enumerate() {
            let mats = &c.forecast.fisher[ifs];
            for (is, shape) in shapes.iter().enumerate() {
                let info: Vec<f64> = mats.iter().map(|f| f.get(is, is)).collect();
                let slopes = log_slopes(&lm, &info);
                for (m, f) in mats.iter().enumerate() {
                    let (cond, marg) = sigmas(f);
                    cmb_rows.push(json!({
                        "experiment": c.experiment.name, "lmax": c.forecast.lmax[m], "fields": fs.label(), "shape": shape,
                        "sigma_conditional": num(cond[is]), "sigma_marginal": num(marg[is]), "log_slope": num(slopes[m]),
                    }));
                }
            }
            for (m, f) in mats.iter().enumerate() {
                cmb_fisher.push(json!({"experiment": c.experiment.name, "fields": fs.label(), "lmax": c.forecast.lmax[m], "parameters": f.names(), "matrix": f.rows()}));
            }
        }
    }
    // Survey rows.
    let mut survey_rows = Vec::new();
    let mut per_bin = Vec::new();
    let mut survey_fisher = Vec::new();
    for s in &r.surveys {
        for (ik, &k) in sc.kmax_h_mpc.iter().enumerate() {
            for &p in &sc.probes {
                let f = &s.forecast.total[ik][pidx(p)];
                let (cond, marg) = sigmas(f);
                for (is, shape) in shapes.iter().enumerate() {
                    survey_rows.push(json!({"survey": s.survey.name, "kmax_h_mpc": k, "probe": p.label(), "shape": shape,
                        "sigma_conditional": num(cond[is]), "sigma_marginal": num(marg[is])}));
                }
                survey_fisher.push(json!({"survey": s.survey.name, "kmax_h_mpc": k, "probe": p.label(), "parameters": f.names(), "matrix": f.rows()}));
            }
        }
        for b in &s.forecast.bins {
            let ik = sc.kmax_h_mpc.len() - 1;
            for &p in &sc.probes {
                let (cond, marg) = sigmas(&b.fisher[ik][pidx(p)]);
                for (is, shape) in shapes.iter().enumerate() {
                    per_bin.push(json!({"survey": s.survey.name, "z_min": b.bin.z_min, "z_max": b.bin.z_max, "z_eff": b.bin.z_eff,
                        "kmax_h_mpc": sc.kmax_h_mpc[ik], "kmax_used_h_mpc": b.kmax_used_mpc[ik] / h, "probe": p.label(), "shape": shape,
                        "sigma_conditional": num(cond[is]), "sigma_marginal": num(marg[is])}));
                }
            }
        }
    }
    // Joint rows and the compact summary rows.
    let mut joint_rows = Vec::new();
    let mut rows = Vec::new();
    for c in &r.cmb {
        let fs = cmb_reference_set(&c.forecast.field_sets);
        for s in &r.surveys {
            for &p in &sc.probes {
                for (m, &lm) in c.forecast.lmax.iter().enumerate() {
                    for (ik, &k) in sc.kmax_h_mpc.iter().enumerate() {
                        let fc = &c.forecast.fisher[fs][m];
                        let fsv = &s.forecast.total[ik][pidx(p)];
                        let j = fc.combine(fsv);
                        let (jc, jm) = sigmas(&j);
                        let (_, cm) = sigmas(fc);
                        let (_, sm) = sigmas(fsv);
                        for (is, shape) in shapes.iter().enumerate() {
                            let imp = improvement(&[cm[is], sm[is]], jm[is]);
                            joint_rows.push(json!({"experiment": c.experiment.name, "cmb_fields": c.forecast.field_sets[fs].label(), "survey": s.survey.name,
                                "probe": p.label(), "lmax": lm, "kmax_h_mpc": k, "shape": shape, "sigma_conditional": num(jc[is]),
                                "sigma_marginal": num(jm[is]), "improvement": num(imp)}));
                            if m + 1 == c.forecast.lmax.len() && ik + 1 == sc.kmax_h_mpc.len() {
                                rows.push(json!({"experiment": c.experiment.name, "survey": s.survey.name, "probe": p.label(), "shape": shape,
                                    "lmax": lm, "kmax_h_mpc": k, "sigma_cmb": num(cm[is]), "sigma_survey": num(sm[is]), "sigma_joint": num(jm[is]),
                                    "improvement": num(imp)}));
                            }
                        }
                    }
                }
            }
        }
    }
    let mut cross: Vec<Value> = crossovers(r)
        .into_iter()
        .map(|c| {
            json!({"experiment": c.experiment, "survey": c.survey, "probe": c.probe, "shape": c.shape,
                "kmax_h_mpc": c.crossover.kmax_h_mpc, "below_grid": c.crossover.below_grid,
                "cmb_sigma": num(c.crossover.cmb_sigma), "note": c.crossover.note})
        })
        .collect();
    crate::report::tau_outputs::extend_summary(
        r,
        &mut cmb_rows,
        &mut survey_rows,
        &mut joint_rows,
        &mut rows,
        &mut cross,
    );
    json!({
        "version": crate::VERSION,
        "units": [
            "k in h/Mpc; l dimensionless; sigma(f_NL) in the CMB convention (growth normalized to a in matter domination)",
            "sigma_conditional: other shapes fixed; sigma_marginal: marginalized over the other shapes; survey nuisances marginalized per bin",
            "CMB in comparisons: T+E at the largest l_max of the grid; crossover on marginalized sigma, ln-ln interpolation in k_max",
            "joint = CMB + survey Fisher matrices (independent probes); improvement = best single-probe sigma / joint sigma",
            "P-B cross-covariance neglected (Gaussian level)"
        ],
        "inputs": inputs_json(r),
        "rows": rows,
        "cmb": cmb_rows,
        "survey": survey_rows,
        "per_bin": per_bin,
        "joint": joint_rows,
        "crossover": cross,
        "fisher": {"cmb": cmb_fisher, "survey": survey_fisher},
        "tau_nl": crate::report::tau_outputs::summary_block(r),
    })
}

fn inputs_json(r: &RunResult) -> Value {
    let sc = &r.scenario;
    let h = sc.cosmology.h();
    json!({
        "scenario": sc.name,
        "source": sc.source,
        "cosmology": crate::commands::cosmology_json(&sc.cosmology, &sc.source),
        "shapes": sc.shapes.iter().map(|s| s.name()).chain(sc.tau_nl.then(|| crate::shapes::TAU_NL.to_string())).collect::<Vec<_>>(),
        "lmax": sc.lmax,
        "kmax_h_mpc": sc.kmax_h_mpc,
        "fields": sc.fields.iter().map(|f| f.label()).collect::<Vec<_>>(),
        "probes": sc.probes.iter().map(|p| p.label()).collect::<Vec<_>>(),
        "transfer": r.transfer,
        "linear_power": r.linear_power,
        "experiments": sc.experiments,
        "surveys": sc.surveys.iter().map(|s| json!({
            "name": s.name, "f_sky": s.f_sky, "redshift_error": s.redshift_error,
            "velocity_dispersion_km_s": s.velocity_dispersion_km_s, "kmax_rule": s.kmax_rule, "real_space": s.real_space,
            "bins": s.bins.iter().map(|b| json!({"z_min": b.z_min, "z_max": b.z_max, "z_eff": b.z_eff,
                "volume_gpc3_h3": b.volume_mpc3 * h.powi(3) / 1e9})).collect::<Vec<_>>(),
            "tracers": s.tracers.iter().map(|t| json!({"name": t.name, "p": t.p,
                "bins": t.bins.iter().map(|b| json!({"nbar_h3_mpc3": b.nbar_mpc3 / h.powi(3), "b1": b.b1, "b2": b.b2, "bs2": b.bs2, "b_phi": b.b_phi})).collect::<Vec<_>>()})).collect::<Vec<_>>(),
            "nuisance": s.nuisance, "priors": s.priors,
        })).collect::<Vec<_>>(),
        "output": sc.output,
    })
}

/// A CSV text with `#` comment lines (the version, then `notes`) above the header.
pub(crate) fn csv_text(header: &[&str], notes: &[&str], rows: &[Vec<String>]) -> String {
    csv(header, notes, rows)
}

/// A number for a CSV cell (`inf` when not finite).
pub(crate) fn fmt_value(x: f64) -> String {
    f(x)
}

fn csv(header: &[&str], notes: &[&str], rows: &[Vec<String>]) -> String {
    let mut s = format!("# ngreach {}\n", crate::VERSION);
    for n in notes {
        s.push_str(&format!("# {n}\n"));
    }
    s.push_str(&header.join(","));
    s.push('\n');
    for r in rows {
        s.push_str(&r.join(","));
        s.push('\n');
    }
    s
}

fn f(x: f64) -> String {
    if x.is_finite() {
        format!("{x}")
    } else {
        "inf".into()
    }
}

/// A file-name-safe version of a label.
pub fn slug(s: &str) -> String {
    let mut out = String::new();
    for ch in s.chars() {
        if ch.is_ascii_alphanumeric() {
            out.push(ch.to_ascii_lowercase());
        } else if ch == '=' || ch == '.' {
            out.push(if ch == '=' { '-' } else { 'p' });
        } else if !out.ends_with('_') {
            out.push('_');
        }
    }
    out.trim_matches('_').to_string()
}

/// Writes every output of a run into `dir`. Returns the file names written.
///
/// # Errors
/// I/O and drawing errors.
pub fn write_outputs(r: &RunResult, dir: &Path) -> Result<Vec<String>> {
    std::fs::create_dir_all(dir).map_err(|source| Error::Io {
        path: dir.to_path_buf(),
        source,
    })?;
    let sc = &r.scenario;
    let mut written = Vec::new();
    let shapes: Vec<String> = sc.shapes.iter().map(|s| s.name()).collect();
    let put = |name: &str, bytes: &[u8], written: &mut Vec<String>| -> Result<()> {
        write_atomic(&dir.join(name), bytes)?;
        written.push(name.to_string());
        Ok(())
    };
    // (a) sigma versus k_max per survey probe, with CMB bands, one figure per shape.
    for (is, shape) in shapes.iter().enumerate() {
        let mut series = Vec::new();
        let mut rows = Vec::new();
        for (isv, s) in r.surveys.iter().enumerate() {
            for (ip, &p) in sc.probes.iter().enumerate() {
                let pts: Vec<(f64, f64)> = sc
                    .kmax_h_mpc
                    .iter()
                    .enumerate()
                    .map(|(ik, &k)| (k, s.forecast.total[ik][pidx(p)].sigma_marginal_or_inf()[is]))
                    .collect();
                for &(k, v) in &pts {
                    rows.push(vec![s.survey.name.clone(), p.label().into(), f(k), f(v)]);
                }
                series.push(Series {
                    label: format!("{} {}", s.survey.name, p.label()),
                    points: pts,
                    colour: ip + 3 * isv,
                    dashed: isv % 2 == 1,
                });
            }
        }
        let mut bands = Vec::new();
        for (ic, c) in r.cmb.iter().enumerate() {
            let te = cmb_reference_set(&c.forecast.field_sets);
            let t = c
                .forecast
                .field_sets
                .iter()
                .position(|&x| x == FieldSet::T)
                .unwrap_or(te);
            let lo = c.forecast.fisher[te]
                .last()
                .map_or(f64::NAN, |m| m.sigma_marginal_or_inf()[is]);
            let hi = c.forecast.fisher[t]
                .last()
                .map_or(f64::NAN, |m| m.sigma_marginal_or_inf()[is]);
            bands.push(Band {
                label: format!("{} (T+E to T)", c.experiment.name),
                lo: lo.min(hi),
                hi: lo.max(hi),
                colour: 5 + ic,
            });
            rows.push(vec![
                format!("CMB {}", c.experiment.name),
                "T+E".into(),
                "".into(),
                f(lo),
            ]);
            rows.push(vec![
                format!("CMB {}", c.experiment.name),
                "T".into(),
                "".into(),
                f(hi),
            ]);
        }
        let stem = format!("sigma_vs_kmax_{}", slug(shape));
        put(&format!("{stem}.csv"), csv(&["source", "probe", "kmax_h_mpc", "sigma_marginal"], &[&format!("sigma(f_NL {shape}) marginalized over the other shapes; CMB rows at the largest l_max")], &rows).as_bytes(), &mut written)?;
        if sc.output.figures && !series.is_empty() {
            let fig = Figure::Lines(LinePlot {
                title: format!("f_NL {shape}: survey versus CMB"),
                x_label: "k_max [h/Mpc]".into(),
                y_label: "sigma(f_NL), marginalized".into(),
                log_x: true,
                log_y: true,
                series,
                bands,
            });
            write_figure(&fig, dir, &stem)?;
            written.push(format!("{stem}.png"));
            written.push(format!("{stem}.svg"));
        }
    }
    // (b) sigma versus l_max for T, E, T+E with the log slope, per experiment and shape.
    for c in &r.cmb {
        let lm: Vec<f64> = c.forecast.lmax.iter().map(|&l| l as f64).collect();
        for (is, shape) in shapes.iter().enumerate() {
            let mut top = Vec::new();
            let mut bottom = Vec::new();
            let mut rows = Vec::new();
            for (ifs, fs) in c.forecast.field_sets.iter().enumerate() {
                let mats = &c.forecast.fisher[ifs];
                let sig: Vec<f64> = mats.iter().map(|m| m.sigma_marginal_or_inf()[is]).collect();
                let info: Vec<f64> = mats.iter().map(|m| m.get(is, is)).collect();
                let slope = log_slopes(&lm, &info);
                for m in 0..lm.len() {
                    rows.push(vec![fs.label().into(), f(lm[m]), f(sig[m]), f(slope[m])]);
                }
                top.push(Series {
                    label: fs.label().into(),
                    points: lm.iter().copied().zip(sig).collect(),
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
            let stem = format!("sigma_vs_lmax_{}_{}", slug(&c.experiment.name), slug(shape));
            put(&format!("{stem}.csv"), csv(&["fields", "lmax", "sigma_marginal", "log_slope"], &[&format!("{}: sigma(f_NL {shape}); log_slope = d ln F / d ln l_max (conditional information)", c.experiment.name)], &rows).as_bytes(), &mut written)?;
            if sc.output.figures {
                let fig = Figure::TwoPanel(
                    LinePlot {
                        title: format!("{}: f_NL {shape}", c.experiment.name),
                        x_label: "l_max".into(),
                        y_label: "sigma(f_NL)".into(),
                        log_x: true,
                        log_y: true,
                        series: top,
                        bands: vec![],
                    },
                    LinePlot {
                        title: String::new(),
                        x_label: "l_max".into(),
                        y_label: "d ln F / d ln l_max".into(),
                        log_x: true,
                        log_y: false,
                        series: bottom,
                        bands: vec![],
                    },
                );
                write_figure(&fig, dir, &stem)?;
                written.push(format!("{stem}.png"));
                written.push(format!("{stem}.svg"));
            }
        }
    }
    // (c) joint sigma over (k_max, l_max) with the crossover contour; (d) ellipses.
    let pb = sc
        .probes
        .iter()
        .copied()
        .find(|&p| p == Probe::PB)
        .or_else(|| sc.probes.first().copied());
    if let Some(pb) = pb {
        for c in &r.cmb {
            let fs = cmb_reference_set(&c.forecast.field_sets);
            for s in &r.surveys {
                for (is, shape) in shapes.iter().enumerate() {
                    let mut values = Vec::new();
                    let mut rows = Vec::new();
                    let mut curve = Vec::new();
                    for (m, &lm) in c.forecast.lmax.iter().enumerate() {
                        let fc = &c.forecast.fisher[fs][m];
                        let mut row = Vec::new();
                        for (ik, &k) in sc.kmax_h_mpc.iter().enumerate() {
                            let v = fc
                                .combine(&s.forecast.total[ik][pidx(pb)])
                                .sigma_marginal_or_inf()[is];
                            row.push(v);
                            rows.push(vec![f(lm as f64), f(k), f(v)]);
                        }
                        values.push(row);
                        let sig: Vec<f64> = s
                            .forecast
                            .total
                            .iter()
                            .map(|t| t[pidx(pb)].sigma_marginal_or_inf()[is])
                            .collect();
                        if let Some(kx) =
                            crossover(&sc.kmax_h_mpc, &sig, fc.sigma_marginal_or_inf()[is])
                                .kmax_h_mpc
                        {
                            curve.push((kx, lm as f64));
                        }
                    }
                    let stem = format!(
                        "joint_plane_{}_{}_{}",
                        slug(&c.experiment.name),
                        slug(&s.survey.name),
                        slug(shape)
                    );
                    put(
                        &format!("{stem}.csv"),
                        csv(
                            &["lmax", "kmax_h_mpc", "sigma_joint_marginal"],
                            &[&format!(
                                "{} (T+E) + {} ({}), f_NL {shape}",
                                c.experiment.name,
                                s.survey.name,
                                pb.label()
                            )],
                            &rows,
                        )
                        .as_bytes(),
                        &mut written,
                    )?;
                    if sc.output.figures {
                        let fig = Figure::Plane(PlanePlot {
                            title: format!(
                                "joint sigma(f_NL {shape}): {} + {} {}",
                                c.experiment.name,
                                s.survey.name,
                                pb.label()
                            ),
                            x_label: "k_max [h/Mpc]".into(),
                            y_label: "l_max".into(),
                            x: sc.kmax_h_mpc.clone(),
                            y: c.forecast.lmax.iter().map(|&l| l as f64).collect(),
                            values,
                            value_label: "joint sigma(f_NL)".into(),
                            curve: Some(("survey beats CMB (crossover)".into(), curve)),
                        });
                        write_figure(&fig, dir, &stem)?;
                        written.push(format!("{stem}.png"));
                        written.push(format!("{stem}.svg"));
                    }
                }
                // (d) Fisher ellipses for pairs of shapes.
                for i in 0..shapes.len() {
                    for j in i + 1..shapes.len() {
                        let fc = c.forecast.fisher[fs].last().expect("grid");
                        let fsv = s.forecast.total.last().expect("grid")[pidx(pb)].clone();
                        let joint = fc.combine(&fsv);
                        let mut ell = Vec::new();
                        let mut rows = Vec::new();
                        for (label, m, col) in [
                            (format!("{} T+E", c.experiment.name), fc.clone(), 0usize),
                            (format!("{} {}", s.survey.name, pb.label()), fsv.clone(), 1),
                            ("joint".to_string(), joint, 2),
                        ] {
                            if let Some(cov) = pair_covariance(&m, i, j) {
                                rows.push(vec![label.clone(), f(cov[0]), f(cov[1]), f(cov[2])]);
                                ell.push((label, cov, col));
                            }
                        }
                        let stem = format!(
                            "ellipses_{}_{}_{}_{}",
                            slug(&c.experiment.name),
                            slug(&s.survey.name),
                            slug(&shapes[i]),
                            slug(&shapes[j])
                        );
                        put(&format!("{stem}.csv"), csv(&["probe", "cov_xx", "cov_xy", "cov_yy"], &[&format!("marginalized covariance of (f_NL {}, f_NL {}); ellipses at Delta chi^2 = 2.30 and 6.18", shapes[i], shapes[j])], &rows).as_bytes(), &mut written)?;
                        if sc.output.figures {
                            let fig = Figure::Ellipses(EllipsePlot {
                                title: format!(
                                    "1 and 2 sigma: {} + {}",
                                    c.experiment.name, s.survey.name
                                ),
                                x_label: format!("f_NL {}", shapes[i]),
                                y_label: format!("f_NL {}", shapes[j]),
                                ellipses: ell,
                            });
                            write_figure(&fig, dir, &stem)?;
                            written.push(format!("{stem}.png"));
                            written.push(format!("{stem}.svg"));
                        }
                    }
                }
            }
        }
    }
    // (e) per-redshift-bin information.
    for s in &r.surveys {
        let ik = sc.kmax_h_mpc.len() - 1;
        let mut series = Vec::new();
        let mut rows = Vec::new();
        for (is, shape) in shapes.iter().enumerate() {
            for (ip, &p) in sc.probes.iter().enumerate() {
                let pts: Vec<(f64, f64)> = s
                    .forecast
                    .bins
                    .iter()
                    .map(|b| {
                        (
                            b.bin.z_eff,
                            b.fisher[ik][pidx(p)].sigma_marginal_or_inf()[is],
                        )
                    })
                    .collect();
                for &(z, v) in &pts {
                    rows.push(vec![shape.clone(), p.label().into(), f(z), f(v)]);
                }
                if p == Probe::PB || sc.probes.len() == 1 {
                    series.push(Series {
                        label: format!("{shape} {}", p.label()),
                        points: pts,
                        colour: is,
                        dashed: ip % 2 == 1,
                    });
                }
            }
        }
        let stem = format!("per_bin_{}", slug(&s.survey.name));
        put(
            &format!("{stem}.csv"),
            csv(
                &["shape", "probe", "z_eff", "sigma_marginal"],
                &[&format!(
                    "{}: sigma(f_NL) per redshift bin at k_max = {} h/Mpc",
                    s.survey.name, sc.kmax_h_mpc[ik]
                )],
                &rows,
            )
            .as_bytes(),
            &mut written,
        )?;
        if sc.output.figures {
            let fig = Figure::Lines(LinePlot {
                title: format!(
                    "{}: information per redshift bin (k_max = {} h/Mpc)",
                    s.survey.name,
                    format_sig(sc.kmax_h_mpc[ik], 3)
                ),
                x_label: "z (bin effective redshift)".into(),
                y_label: "sigma(f_NL) per bin".into(),
                log_x: false,
                log_y: true,
                series,
                bands: vec![],
            });
            write_figure(&fig, dir, &stem)?;
            written.push(format!("{stem}.png"));
            written.push(format!("{stem}.svg"));
        }
    }
    crate::report::tau_outputs::write_outputs(r, dir, &mut written)?;
    if sc.output.latex {
        put("table.tex", latex_table(r).as_bytes(), &mut written)?;
    }
    let summary = serde_json::to_string_pretty(&summary_json(r)).unwrap_or_default() + "\n";
    put("summary.json", summary.as_bytes(), &mut written)?;
    Ok(written)
}

/// The marginalized 2x2 covariance [cxx, cxy, cyy] of parameters (i, j), if finite.
fn pair_covariance(m: &FisherMatrix, i: usize, j: usize) -> Option<[f64; 3]> {
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

/// The booktabs LaTeX table: shapes by probe, marginalized sigma(f_NL), crossover k_max.
pub fn latex_table(r: &RunResult) -> String {
    let sc = &r.scenario;
    let cross = crossovers(r);
    let mut cols: Vec<String> = r
        .cmb
        .iter()
        .map(|c| format!("{} T+E", tex(&c.experiment.name)))
        .collect();
    for s in &r.surveys {
        for p in &sc.probes {
            cols.push(format!("{} {}", tex(&s.survey.name), p.label()));
        }
    }
    let kx = sc.kmax_h_mpc.last().copied().unwrap_or(f64::NAN);
    let mut t = String::new();
    t.push_str(&format!(
        "% ngreach {} -- requires \\usepackage{{booktabs}}\n",
        crate::VERSION
    ));
    t.push_str("\\begin{table}\n\\centering\n");
    t.push_str(&format!(
        "\\caption{{Forecast marginalized $\\sigma(f_{{\\rm NL}})$ (CMB convention): CMB at $\\ell_{{\\max}} = {}$, surveys at $k_{{\\max}} = {}\\,h\\,{{\\rm Mpc}}^{{-1}}$; last column: the $k_{{\\max}}$ [$h\\,{{\\rm Mpc}}^{{-1}}$] at which the first survey's P+B beats the first CMB experiment.}}\n",
        sc.lmax.last().copied().unwrap_or(0),
        format_sig(kx, 3)
    ));
    t.push_str(&format!(
        "\\begin{{tabular}}{{l{}r}}\n\\toprule\n",
        "r".repeat(cols.len())
    ));
    t.push_str(&format!(
        "Shape & {} & $k_{{\\rm cross}}$ \\\\\n\\midrule\n",
        cols.join(" & ")
    ));
    for (is, shape) in sc.shapes.iter().enumerate() {
        let mut cells = Vec::new();
        for c in &r.cmb {
            let fs = cmb_reference_set(&c.forecast.field_sets);
            cells.push(fmt_tex(
                c.forecast.fisher[fs]
                    .last()
                    .map_or(f64::NAN, |m| m.sigma_marginal_or_inf()[is]),
            ));
        }
        for s in &r.surveys {
            for &p in &sc.probes {
                cells.push(fmt_tex(
                    s.forecast
                        .total
                        .last()
                        .map_or(f64::NAN, |t| t[pidx(p)].sigma_marginal_or_inf()[is]),
                ));
            }
        }
        let kc = cross
            .iter()
            .find(|c| c.shape == shape.name() && c.probe == "P+B")
            .map(|c| match c.crossover.kmax_h_mpc {
                Some(k) if c.crossover.below_grid => format!("$\\le {}$", format_sig(k, 2)),
                Some(k) => format_sig(k, 2),
                None => format!("$> {}$", format_sig(kx, 2)),
            })
            .unwrap_or_else(|| "--".into());
        t.push_str(&format!(
            "{} & {} & {} \\\\\n",
            tex(&shape.name()),
            cells.join(" & "),
            kc
        ));
    }
    t.push_str("\\bottomrule\n\\end{tabular}\n\\end{table}\n");
    t
}

fn tex(s: &str) -> String {
    s.replace('_', "\\_")
        .replace('&', "\\&")
        .replace('%', "\\%")
}

fn fmt_tex(x: f64) -> String {
    if x.is_finite() {
        crate::report::trim_zeros_public(&format_sig(x, 2))
    } else {
        "--".into()
    }
}

/// The compact terminal summary (fits 100 columns): per survey, shapes by probe
/// (marginalized sigma at the largest grid values) and the crossover k_max against each
/// CMB experiment.
pub fn terminal_summary(r: &RunResult) -> String {
    let sc = &r.scenario;
    let cross = crossovers(r);
    let mut out = String::new();
    let kx = sc.kmax_h_mpc.last().copied().unwrap_or(f64::NAN);
    out.push_str(&format!("ngreach {}: {}\n", crate::VERSION, sc.name));
    out.push_str(&format!(
        "sigma(f_NL), marginalized over the other shapes; CMB: T+E at l_max = {}; surveys at k_max = {} h/Mpc\n",
        sc.lmax.last().copied().unwrap_or(0),
        format_sig(kx, 3)
    ));
    let short = |s: &str, n: usize| -> String {
        if s.chars().count() <= n {
            s.to_string()
        } else {
            let first = s.split_whitespace().next().unwrap_or(s);
            first.chars().take(n).collect()
        }
    };
    for s in &r.surveys {
        out.push_str(&format!("\n{}\n", s.survey.name));
        let mut header = format!("{:<12}", "shape");
        for c in &r.cmb {
            header.push_str(&format!("{:>10}", short(&c.experiment.name, 9)));
        }
        for p in &sc.probes {
            header.push_str(&format!("{:>8}", p.label()));
        }
        for c in &r.cmb {
            header.push_str(&format!(
                "  {:<17}",
                format!("k_x vs {}", short(&c.experiment.name, 9))
            ));
        }
        out.push_str(header.trim_end());
        out.push('\n');
        for (is, shape) in sc.shapes.iter().enumerate() {
            let mut line = format!("{:<12}", short(&shape.name(), 12));
            for c in &r.cmb {
                let fs = cmb_reference_set(&c.forecast.field_sets);
                line.push_str(&format!(
                    "{:>10}",
                    cell(
                        c.forecast.fisher[fs]
                            .last()
                            .map_or(f64::NAN, |m| m.sigma_marginal_or_inf()[is])
                    )
                ));
            }
            for &p in &sc.probes {
                line.push_str(&format!(
                    "{:>8}",
                    cell(
                        s.forecast
                            .total
                            .last()
                            .map_or(f64::NAN, |t| t[pidx(p)].sigma_marginal_or_inf()[is])
                    )
                ));
            }
            for c in &r.cmb {
                let probe = if sc.probes.contains(&Probe::PB) {
                    "P+B"
                } else {
                    sc.probes[0].label()
                };
                let x = cross.iter().find(|x| {
                    x.experiment == c.experiment.name
                        && x.survey == s.survey.name
                        && x.shape == shape.name()
                        && x.probe == probe
                });
                let txt = match x.map(|x| (&x.crossover.kmax_h_mpc, x.crossover.below_grid)) {
                    Some((Some(k), false)) => format!("{} h/Mpc", format_sig(*k, 2)),
                    Some((Some(k), true)) => format!("<= {}", format_sig(*k, 2)),
                    Some((None, _)) => format!("> {}", format_sig(kx, 2)),
                    None => "-".into(),
                };
                line.push_str(&format!("  {txt:<17}"));
            }
            out.push_str(line.trim_end());
            out.push('\n');
        }
    }
    out.push_str(&crate::report::tau_outputs::terminal_lines(r));
    out
}

fn cell(x: f64) -> String {
    if x.is_finite() {
        crate::report::trim_zeros_public(&format_sig(x, 3))
    } else {
        "inf".into()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slugs_are_file_safe() {
        assert_eq!(slug("Meridian Wide"), "meridian_wide");
        assert_eq!(slug("delta=0.50"), "delta-0p50");
    }
}
