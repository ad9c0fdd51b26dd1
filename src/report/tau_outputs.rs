//! The tau_NL outputs of `ngreach run`: rows with `shape = "tau_nl"` in `summary.json`
//! (CMB, survey, joint, headline rows and crossovers), the `tau_nl` block with the
//! convention, two figures (sigma(tau_NL) versus k_max with the CMB band; versus l_max
//! with the log slope) and the terminal lines. Only adds Fisher numbers (the combiner).

use std::path::Path;

use serde_json::{Value, json};

use crate::cmb::bispectrum::FieldSet;
use crate::combine::{crossover, improvement, log_slopes, tau_joint};
use crate::error::Result;
use crate::pipeline::{CmbResult, RunResult};
use crate::report::figures::{Band, Figure, LinePlot, Series, write_figure};
use crate::report::outputs::slug;
use crate::report::table::{Cell, Column, Table, TableFormat};
use crate::report::{format_sig, num, write_atomic};
use crate::shapes::{Shape, TAU_NL};

/// The convention and cross-term statements carried by every tau_NL output.
pub const NOTES: [&str; 4] = [
    "tau_nl: collapsed-trispectrum amplitude, T_zeta = tau_NL [P_zeta(k1) P_zeta(k3) P_zeta(|k1+k2|) + 11 perms]; a single local source gives tau_NL = (6 f_NL / 5)^2 (Suyama & Yamaguchi 2008)",
    "CMB tau_nl: collapsed limit (modulation reconstruction, long modes 2 <= L <= 30); no Fisher cross term with f_NL at a Gaussian fiducial (sigma_conditional = sigma_marginal)",
    "survey tau_nl: power spectra only (stochastic scale-dependent bias, Gaussian covariance); the power spectrum couples tau_NL and f_NL local: sigma_conditional fixes f_NL, sigma_marginal marginalizes over it",
    "joint tau_nl: CMB (tau, f_NL local from the bispectrum) + survey (tau, f_NL local) Fisher matrices, then f_NL local marginalized; crossover on sigma_marginal against the CMB's T+E at the largest l_max",
];

/// T+E when computed, else the first field set.
fn reference_set(fields: &[FieldSet]) -> usize {
    fields.iter().position(|&f| f == FieldSet::TE).unwrap_or(0)
}

fn sigma_of(f: f64) -> f64 {
    if f > 0.0 {
        1.0 / f.sqrt()
    } else {
        f64::INFINITY
    }
}

/// F(f_NL local, f_NL local) of the CMB bispectrum after marginalizing the other shapes
/// (field set `fs`, l_max index `m`); 0 when local is not among the shapes.
fn cmb_local_info(r: &RunResult, c: &CmbResult, fs: usize, m: usize) -> f64 {
    let Some(il) = r.scenario.shapes.iter().position(|s| *s == Shape::Local) else {
        return 0.0;
    };
    let s = c.forecast.fisher[fs][m].sigma_marginal_or_inf()[il];
    if s.is_finite() && s > 0.0 {
        1.0 / (s * s)
    } else {
        0.0
    }
}

/// Appends the tau_NL rows to the arrays of `summary.json`.
pub fn extend_summary(
    r: &RunResult,
    cmb_rows: &mut Vec<Value>,
    survey_rows: &mut Vec<Value>,
    joint_rows: &mut Vec<Value>,
    rows: &mut Vec<Value>,
    cross: &mut Vec<Value>,
) {
    let sc = &r.scenario;
    if !sc.tau_nl {
        return;
    }
    for c in &r.cmb {
        let Some(t) = &c.tau else { continue };
        let lm: Vec<f64> = t.lmax.iter().map(|&l| l as f64).collect();
        for (ifs, fs) in t.field_sets.iter().enumerate() {
            let slopes = log_slopes(&lm, &t.fisher[ifs]);
            for (m, &l) in t.lmax.iter().enumerate() {
                let s = sigma_of(t.fisher[ifs][m]);
                cmb_rows.push(json!({"experiment": c.experiment.name, "lmax": l, "fields": fs.label(), "shape": TAU_NL,
                    "sigma_conditional": num(s), "sigma_marginal": num(s), "log_slope": num(slopes[m])}));
            }
        }
    }
    for s in &r.surveys {
        let Some(t) = &s.tau else { continue };
        for (ik, &k) in sc.kmax_h_mpc.iter().enumerate() {
            let (c, m) = t.sigmas(ik);
            survey_rows.push(
                json!({"survey": s.survey.name, "kmax_h_mpc": k, "probe": "P", "shape": TAU_NL,
                "sigma_conditional": num(c), "sigma_marginal": num(m)}),
            );
        }
    }
    for c in &r.cmb {
        let Some(t) = &c.tau else { continue };
        let fs = reference_set(&t.field_sets);
        let n_l = t.lmax.len();
        for s in &r.surveys {
            let Some(st) = &s.tau else { continue };
            for (m, &lm) in t.lmax.iter().enumerate() {
                let f_loc = cmb_local_info(r, c, fs, m);
                let s_cmb = sigma_of(t.fisher[fs][m]);
                for (ik, &k) in sc.kmax_h_mpc.iter().enumerate() {
                    let (jc, jm) = tau_joint(t.fisher[fs][m], f_loc, &st.total[ik]);
                    let (_, s_sv) = st.sigmas(ik);
                    let imp = improvement(&[s_cmb, s_sv], jm);
                    joint_rows.push(json!({"experiment": c.experiment.name, "cmb_fields": t.field_sets[fs].label(), "survey": s.survey.name,
                        "probe": "P", "lmax": lm, "kmax_h_mpc": k, "shape": TAU_NL, "sigma_conditional": num(jc),
                        "sigma_marginal": num(jm), "improvement": num(imp)}));
                    if m + 1 == n_l && ik + 1 == sc.kmax_h_mpc.len() {
                        rows.push(json!({"experiment": c.experiment.name, "survey": s.survey.name, "probe": "P", "shape": TAU_NL,
                            "lmax": lm, "kmax_h_mpc": k, "sigma_cmb": num(s_cmb), "sigma_survey": num(s_sv), "sigma_joint": num(jm),
                            "improvement": num(imp)}));
                    }
                }
            }
            let sig: Vec<f64> = (0..sc.kmax_h_mpc.len()).map(|ik| st.sigmas(ik).1).collect();
            let target = sigma_of(t.fisher[fs].last().copied().unwrap_or(0.0));
            let x = crossover(&sc.kmax_h_mpc, &sig, target);
            cross.push(json!({"experiment": c.experiment.name, "survey": s.survey.name, "probe": "P", "shape": TAU_NL,
                "kmax_h_mpc": x.kmax_h_mpc, "below_grid": x.below_grid, "cmb_sigma": num(x.cmb_sigma), "note": x.note}));
        }
    }
}

/// The `tau_nl` block of `summary.json`: notes and the CMB engine's per-L details.
pub fn summary_block(r: &RunResult) -> Value {
    if !r.scenario.tau_nl {
        return Value::Null;
    }
    json!({
        "notes": NOTES,
        "fisher_cross_term_with_fnl_cmb": 0.0,
        "survey_covariance": r.surveys.iter().filter_map(|s| s.tau.as_ref().map(|t| json!({"survey": s.survey.name, "covariance": t.covariance.label()}))).collect::<Vec<_>>(),
        "cmb": r.cmb.iter().filter_map(|c| c.tau.as_ref().map(|t| json!({
            "experiment": c.experiment.name,
            "long_lmax": t.long_lmax,
            "basis_rank": t.basis_rank,
            "radial_nodes": t.active_nodes,
            "fields": t.field_sets.iter().map(|f| f.label()).collect::<Vec<_>>(),
            "fisher_per_long_l_at_top_lmax": t.per_long_l.iter().map(|v| v.iter().map(|&x| num(x)).collect::<Vec<_>>()).collect::<Vec<_>>(),
        }))).collect::<Vec<_>>(),
        "survey_fisher": r.surveys.iter().filter_map(|s| s.tau.as_ref().map(|t| json!({
            "survey": s.survey.name,
            "parameters": crate::survey::tau_nl::PARAMETERS,
            "kmax_h_mpc": r.scenario.kmax_h_mpc,
            "matrix": t.total.iter().map(|m| m.rows()).collect::<Vec<_>>(),
        }))).collect::<Vec<_>>(),
    })
}

/// Writes `sigma_vs_kmax_tau_nl` and `sigma_vs_lmax_<experiment>_tau_nl` (CSV, and PNG
/// and SVG when figures are on), appending the file names to `written`.
///
/// # Errors
/// I/O and drawing errors.
///
/// Each figure written is added to `figures` as (stem, SVG text, caption) for the report
/// page.
pub fn write_outputs(
    r: &RunResult,
    dir: &Path,
    (format, prov): (TableFormat, &Value),
    written: &mut Vec<String>,
    figures: &mut Vec<(String, String, String)>,
) -> Result<Vec<Table>> {
    let sc = &r.scenario;
    let mut tables = Vec::new();
    if !sc.tau_nl {
        return Ok(tables);
    }
    let mut put = |name: &str, bytes: &[u8]| -> Result<()> {
        write_atomic(&dir.join(name), bytes)?;
        written.push(name.to_string());
        Ok(())
    };
    let mut figs: Vec<(String, Figure, String)> = Vec::new();
    // sigma(tau_NL) versus k_max: survey P with the CMB band (T+E to T).
    let mut series = Vec::new();
    let mut rows = Vec::new();
    for (isv, s) in r.surveys.iter().enumerate() {
        let Some(t) = &s.tau else { continue };
        let pts: Vec<(f64, f64)> = sc
            .kmax_h_mpc
            .iter()
            .enumerate()
            .map(|(ik, &k)| (k, t.sigmas(ik).1))
            .collect();
        for &(k, v) in &pts {
            rows.push(vec![
                Cell::Text(s.survey.name.clone()),
                "P".into(),
                Cell::Float(k),
                Cell::Float(v),
            ]);
        }
        series.push(Series {
            label: format!("{} P", s.survey.name),
            points: pts,
            colour: 3 * isv,
            dashed: isv % 2 == 1,
        });
    }
    let mut bands = Vec::new();
    for (ic, c) in r.cmb.iter().enumerate() {
        let Some(t) = &c.tau else { continue };
        let te = reference_set(&t.field_sets);
        let tt = t
            .field_sets
            .iter()
            .position(|&x| x == FieldSet::T)
            .unwrap_or(te);
        let lo = sigma_of(t.fisher[te].last().copied().unwrap_or(0.0));
        let hi = sigma_of(t.fisher[tt].last().copied().unwrap_or(0.0));
        bands.push(Band {
            label: format!("{} (T+E to T)", c.experiment.name),
            lo: lo.min(hi),
            hi: lo.max(hi),
            colour: 5 + ic,
        });
        rows.push(vec![
            Cell::Text(format!("CMB {}", c.experiment.name)),
            "T+E".into(),
            Cell::Float(f64::NAN),
            Cell::Float(lo),
        ]);
        rows.push(vec![
            Cell::Text(format!("CMB {}", c.experiment.name)),
            "T".into(),
            Cell::Float(f64::NAN),
            Cell::Float(hi),
        ]);
    }
    let free = crate::report::figures::band_colours(&series, bands.len());
    for (b, c) in bands.iter_mut().zip(free) {
        b.colour = c;
    }
    let stem = format!("sigma_vs_kmax_{}", slug(TAU_NL));
    let mut t = Table::new(
        &stem,
        "sigma(tau_NL); survey rows marginalized over f_NL local (power spectra, Gaussian covariance); CMB rows at the largest l_max (collapsed trispectrum), empty k_max",
        vec![
            Column::new("source", "survey, or CMB experiment"),
            Column::new(
                "probe",
                "P: the survey's power spectra; T+E or T: the CMB fields",
            ),
            Column::new("kmax_h_mpc", "k_max of the survey rows"),
            Column::new("sigma_marginal", "sigma(tau_NL)"),
        ],
    );
    t.notes = vec![NOTES[0].into(), NOTES[1].into(), NOTES[2].into()];
    rows.into_iter().for_each(|row| t.push(row));
    put(&t.file_name(format), t.render(format, prov).as_bytes())?;
    tables.push(t);
    if !series.is_empty() {
        figs.push((
            stem,
            Figure::Lines(LinePlot {
                title: "tau_NL: survey versus CMB".into(),
                x_label: crate::report::kmax_axis_label(r.surveys.iter().map(|s| &s.survey)),
                y_label: "sigma(tau_NL), marginalized over f_NL local".into(),
                log_x: true,
                log_y: true,
                series,
                bands,
            }),
            "sigma(tau_NL) versus k_max: each survey's power spectra (marginalized over f_NL local, Gaussian covariance) with each CMB experiment's collapsed-trispectrum sigma at its largest l_max as a band from T+E to T".into(),
        ));
    }
    // sigma(tau_NL) versus l_max with the log slope, per experiment.
    for c in &r.cmb {
        let Some(t) = &c.tau else { continue };
        let lm: Vec<f64> = t.lmax.iter().map(|&l| l as f64).collect();
        let (mut top, mut bottom, mut rows) = (Vec::new(), Vec::new(), Vec::new());
        for (ifs, fs) in t.field_sets.iter().enumerate() {
            let sig: Vec<f64> = t.fisher[ifs].iter().map(|&f| sigma_of(f)).collect();
            let slope = log_slopes(&lm, &t.fisher[ifs]);
            for m in 0..lm.len() {
                rows.push(vec![
                    fs.label().into(),
                    Cell::Int(t.lmax[m] as i64),
                    Cell::Float(sig[m]),
                    Cell::Float(slope[m]),
                ]);
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
        let stem = format!(
            "sigma_vs_lmax_{}_{}",
            slug(&c.experiment.name),
            slug(TAU_NL)
        );
        let mut tbl = Table::new(
            &stem,
            &format!(
                "{}: sigma(tau_NL), collapsed trispectrum; log_slope = d ln F / d ln l_max",
                c.experiment.name
            ),
            vec![
                Column::new("fields", "CMB fields"),
                Column::new("lmax", "l_max"),
                Column::new("sigma_marginal", "sigma(tau_NL)"),
                Column::new("log_slope", "d ln F / d ln l_max"),
            ],
        );
        tbl.notes = vec![NOTES[0].into(), NOTES[1].into()];
        rows.into_iter().for_each(|row| tbl.push(row));
        put(&tbl.file_name(format), tbl.render(format, prov).as_bytes())?;
        tables.push(tbl);
        figs.push((
            stem,
            Figure::TwoPanel(
                LinePlot {
                    title: format!("{}: tau_NL", c.experiment.name),
                    x_label: "l_max".into(),
                    y_label: "sigma(tau_NL)".into(),
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
            ),
            format!(
                "{}: sigma(tau_NL) from the collapsed CMB trispectrum versus l_max per field set, with the log slope d ln F / d ln l_max",
                c.experiment.name
            ),
        ));
    }
    if sc.output.figures {
        for (stem, fig, caption) in figs {
            let svg = write_figure(&fig, dir, &stem)?;
            written.push(format!("{stem}.png"));
            written.push(format!("{stem}.svg"));
            figures.push((stem, svg, caption));
        }
    }
    Ok(tables)
}

/// Terminal lines: per survey, sigma(tau_NL) of each CMB experiment (T+E, largest
/// l_max), of the survey's power spectra (marginalized over f_NL local), joint, and the
/// crossover k_max.
pub fn terminal_lines(r: &RunResult) -> String {
    let sc = &r.scenario;
    if !sc.tau_nl {
        return String::new();
    }
    let mut out = String::from(
        "\nsigma(tau_NL) (tau_NL = (6 f_NL/5)^2 for one local source): CMB T+E collapsed trispectrum; survey P marginalized over f_NL local\n",
    );
    for s in &r.surveys {
        let Some(st) = &s.tau else { continue };
        let nk = sc.kmax_h_mpc.len();
        let (_, s_sv) = st.sigmas(nk - 1);
        for c in &r.cmb {
            let Some(t) = &c.tau else { continue };
            let fs = reference_set(&t.field_sets);
            let m = t.lmax.len() - 1;
            let s_cmb = sigma_of(t.fisher[fs][m]);
            let (_, jm) = tau_joint(
                t.fisher[fs][m],
                cmb_local_info(r, c, fs, m),
                &st.total[nk - 1],
            );
            let sig: Vec<f64> = (0..nk).map(|ik| st.sigmas(ik).1).collect();
            let x = crossover(&sc.kmax_h_mpc, &sig, s_cmb);
            let kx = match (x.kmax_h_mpc, x.below_grid) {
                (Some(k), false) => format!("{} h/Mpc", format_sig(k, 2)),
                (Some(k), true) => format!("<= {}", format_sig(k, 2)),
                (None, _) => format!("> {}", format_sig(sc.kmax_h_mpc[nk - 1], 2)),
            };
            out.push_str(&format!(
                "{} vs {}: CMB {}, survey P {}, joint {}; k_x {}\n",
                s.survey.name,
                c.experiment.name,
                format_sig(s_cmb, 3),
                format_sig(s_sv, 3),
                format_sig(jm, 3),
                kx
            ));
        }
    }
    out
}
