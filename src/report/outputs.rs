//! The files of `ngreach run`: `summary.json`, one CSV per figure, a LaTeX table, the
//! figures, and the terminal summary. Everything is computed from a
//! [`crate::pipeline::RunResult`]; nothing here does physics beyond adding Fisher
//! matrices (the combiner).

use std::path::Path;

use serde_json::{Value, json};

use crate::combine::{Crossover, crossover, improvement, log_slopes, sigmas};
use crate::error::{Error, Result};
use crate::pipeline::RunResult;
use crate::report::artifacts::{Artifact, cmb_reference_set, pidx};
use crate::report::figures::write_figure;
use crate::report::table::TableFormat;
use crate::report::{num, write_atomic};

pub use crate::report::console::terminal_summary;
pub use crate::report::latex::latex_table;

/// A crossover entry with its labels: the headline crossover on single-shape sigmas
/// (other f_NL fixed, nuisances marginalized) for both probes, and the one on sigmas
/// marginalized over the other shapes beside it.
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
    /// On single-shape sigmas of both probes (the headline).
    pub crossover: Crossover,
    /// On sigmas marginalized over the other shapes, for both probes.
    pub crossover_marginal: Crossover,
}

/// Computes all crossovers: for each experiment (T+E at its largest l_max on the grid),
/// survey, probe and shape, on single-shape sigmas and on sigmas marginalized over the
/// other shapes (the same basis for the CMB and the survey in each).
pub fn crossovers(r: &RunResult) -> Vec<CrossoverRow> {
    let sc = &r.scenario;
    let mut out = Vec::new();
    for c in &r.cmb {
        let fs = cmb_reference_set(&c.forecast.field_sets);
        let f_cmb = c.forecast.fisher[fs].last().expect("non-empty l_max grid");
        let (cmb_single, cmb_marg) = sigmas(f_cmb);
        for s in &r.surveys {
            for &p in &sc.probes {
                for (is, shape) in sc.shapes.iter().enumerate() {
                    let (single, marg): (Vec<f64>, Vec<f64>) = s
                        .forecast
                        .total
                        .iter()
                        .map(|t| {
                            let f = &t[pidx(p)];
                            (f.sigma_conditional(is), f.sigma_marginal_or_inf()[is])
                        })
                        .unzip();
                    out.push(CrossoverRow {
                        experiment: c.experiment.name.clone(),
                        survey: s.survey.name.clone(),
                        probe: p.label().into(),
                        shape: shape.name(),
                        crossover: crossover(&sc.kmax_h_mpc, &single, cmb_single[is]),
                        crossover_marginal: crossover(&sc.kmax_h_mpc, &marg, cmb_marg[is]),
                    });
                }
            }
        }
    }
    out
}

/// The l_max each field of a field set actually used at grid value `grid` (the grid value
/// capped at the experiment's own l_max of that field), as (T, E) JSON values, null for a
/// field not in the set.
fn fields_used(
    c: &crate::pipeline::CmbResult,
    fs: crate::cmb::bispectrum::FieldSet,
    grid: usize,
) -> (Value, Value) {
    use crate::cmb::bispectrum::FieldSet;
    let t = Value::from(grid.min(c.experiment.lmax_t));
    let e = Value::from(grid.min(c.experiment.lmax_e));
    match fs {
        FieldSet::T => (t, Value::Null),
        FieldSet::E => (Value::Null, e),
        FieldSet::TE => (t, e),
    }
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
                    let bias = c.lensing.as_ref().map(|b| b.bias(f, ifs, m));
                    cmb_rows.push(json!({
                        "experiment": c.experiment.name, "lmax": c.forecast.lmax[m], "fields": fs.label(), "shape": shape,
                        "lmax_t_used": fields_used(c, *fs, c.forecast.lmax[m]).0, "lmax_e_used": fields_used(c, *fs, c.forecast.lmax[m]).1,
                        "sigma_conditional": num(cond[is]), "sigma_marginal": num(marg[is]), "log_slope": num(slopes[m]),
                        "lensing_bias": bias.as_ref().map_or(Value::Null, |b| num(b.single[is])),
                        "lensing_bias_marginal": bias.as_ref().map_or(Value::Null, |b| num(b.joint[is])),
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
                        let (cc, cm) = sigmas(fc);
                        let (sc_, sm) = sigmas(fsv);
                        for (is, shape) in shapes.iter().enumerate() {
                            // Single-shape sigma (other f_NL fixed, nuisances marginalized)
                            // in sigma_cmb / sigma_survey / sigma_joint; marginalized over the
                            // other shapes beside them, as in the headline rows.
                            let imp_single = improvement(&[cc[is], sc_[is]], jc[is]);
                            let imp_marg = improvement(&[cm[is], sm[is]], jm[is]);
                            joint_rows.push(json!({"experiment": c.experiment.name, "cmb_fields": c.forecast.field_sets[fs].label(), "survey": s.survey.name,
                                "probe": p.label(), "lmax": lm, "kmax_h_mpc": k, "shape": shape, "sigma_conditional": num(jc[is]),
                                "lmax_t_used": fields_used(c, c.forecast.field_sets[fs], lm).0, "lmax_e_used": fields_used(c, c.forecast.field_sets[fs], lm).1,
                                "sigma_marginal": num(jm[is]), "sigma_cmb": num(cc[is]), "sigma_survey": num(sc_[is]), "sigma_joint": num(jc[is]),
                                "sigma_cmb_marginal": num(cm[is]), "sigma_survey_marginal": num(sm[is]), "sigma_joint_marginal": num(jm[is]),
                                "improvement": num(imp_single), "improvement_marginal": num(imp_marg)}));
                            if m + 1 == c.forecast.lmax.len() && ik + 1 == sc.kmax_h_mpc.len() {
                                // Headline: single-shape sigma (other f_NL fixed, nuisances
                                // marginalized); marginalized over the other shapes beside it.
                                rows.push(json!({"experiment": c.experiment.name, "survey": s.survey.name, "probe": p.label(), "shape": shape,
                                    "lmax": lm, "kmax_h_mpc": k, "sigma_cmb": num(cc[is]), "sigma_survey": num(sc_[is]), "sigma_joint": num(jc[is]),
                                    "lmax_t_used": fields_used(c, c.forecast.field_sets[fs], lm).0, "lmax_e_used": fields_used(c, c.forecast.field_sets[fs], lm).1,
                                    "sigma_cmb_marginal": num(cm[is]), "sigma_survey_marginal": num(sm[is]), "sigma_joint_marginal": num(jm[is]),
                                    "improvement": num(imp_single), "covariance": s.forecast.covariance.label()}));
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
                "cmb_sigma": num(c.crossover.cmb_sigma), "note": c.crossover.note,
                "kmax_marginal_h_mpc": c.crossover_marginal.kmax_h_mpc, "below_grid_marginal": c.crossover_marginal.below_grid,
                "cmb_sigma_marginal": num(c.crossover_marginal.cmb_sigma), "note_marginal": c.crossover_marginal.note})
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
            "sigma_conditional: other shapes fixed; sigma_marginal: marginalized over the other shapes; survey nuisances marginalized per bin (b1 and the P shot-noise amplitude per tracer; with B also b2, b_s2 and the B shot-noise amplitude; the theoretical-error amplitudes with the realistic covariance; each unless switched off in [survey.nuisance]; b_phi follows b1 and p, not free)",
            "CMB in comparisons: T+E at the largest l_max of the grid; ln-ln interpolation in k_max",
            "lmax: the grid value; lmax_t_used / lmax_e_used: the l_max each field actually used (the grid value capped at the experiment's own l_max of that field; null when the field is not in the set)",
            "crossover: kmax_h_mpc, below_grid, cmb_sigma, note on single-shape sigmas of both probes (other f_NL fixed, nuisances marginalized; the headline); kmax_marginal_h_mpc, below_grid_marginal, cmb_sigma_marginal, note_marginal on sigmas marginalized over the other shapes",
            "joint = CMB + survey Fisher matrices (independent probes); improvement = best single-probe sigma / joint sigma",
            "rows and joint: sigma_cmb, sigma_survey, sigma_joint are single-shape constraints (other f_NL fixed, nuisances marginalized), improvement between them; *_marginal (and improvement_marginal) are marginalized over the other shapes; joint sigma_conditional / sigma_marginal repeat sigma_joint / sigma_joint_marginal",
            "survey covariance per survey in inputs.surveys[].covariance and rows[].covariance (realistic: Gaussian + theoretical error + leading P-B cross-covariance; gaussian: P and B independent Gaussian)",
            "kmax_h_mpc: see inputs.surveys[].kmax_meaning (k_max(z = 0) for growth-rule surveys); each bin's k_max in per_bin[].kmax_used_h_mpc",
            crate::cmb::lensing::bias::BIAS_NOTE
        ],
        "inputs": inputs_json(r),
        "rows": rows,
        "cmb": cmb_rows,
        "survey": survey_rows,
        "per_bin": per_bin,
        "joint": joint_rows,
        "crossover": cross,
        "fisher": {"cmb": cmb_fisher, "survey": survey_fisher},
        "information": information_json(r),
        "tau_nl": crate::report::tau_outputs::summary_block(r),
        "cmb_lensing_bias": r.cmb.iter().map(|c| json!({"experiment": c.experiment.name,
            "terms": c.lensing.as_ref().map_or(Value::Null, |b| b.to_json())})).collect::<Vec<_>>(),
    })
}

/// The information budgets (cumulative (S/N)^2 versus l_max and k_max, shares by
/// redshift bin) as one entry per table: its name, description and rows.
fn information_json(r: &RunResult) -> Value {
    json!(
        crate::report::budget::budgets(r)
            .iter()
            .map(
                |a| json!({"table": a.table.stem, "description": a.table.description,
                "rows": a.table.to_json_rows()})
            )
            .collect::<Vec<_>>()
    )
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
            "covariance": s.covariance.label(), "response": s.response.label(), "kmax_tree_h_mpc": s.kmax_tree_mpc / h, "kmax_meaning": crate::commands::survey::kmax_meaning(s),
            "bins": s.bins.iter().map(|b| json!({"z_min": b.z_min, "z_max": b.z_max, "z_eff": b.z_eff,
                "volume_gpc3_h3": b.volume_mpc3 * h.powi(3) / 1e9})).collect::<Vec<_>>(),
            "tracers": s.tracers.iter().map(|t| json!({"name": t.name, "p": t.p,
                "bins": t.bins.iter().map(|b| json!({"nbar_h3_mpc3": b.nbar_mpc3 / h.powi(3), "b1": b.b1, "b2": b.b2, "bs2": b.bs2, "b_phi": b.b_phi})).collect::<Vec<_>>()})).collect::<Vec<_>>(),
            "nuisance": s.nuisance, "priors": s.priors,
        })).collect::<Vec<_>>(),
        "output": sc.output,
    })
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

/// What `write_outputs_with` writes besides the fixed set.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct OutputOptions {
    /// File format of the tables.
    pub tables: TableFormat,
    /// Write `report.html`.
    pub report: bool,
}

impl Default for OutputOptions {
    fn default() -> Self {
        Self {
            tables: TableFormat::Csv,
            report: true,
        }
    }
}

/// Writes every output of a run into `dir` with the default options (CSV tables and the
/// report page). Returns the file names written.
///
/// # Errors
/// I/O and drawing errors.
pub fn write_outputs(r: &RunResult, dir: &Path) -> Result<Vec<String>> {
    write_outputs_with(r, dir, &OutputOptions::default())
}

/// The provenance every table file carries (ECSV `meta`) or points to (`tables.json`).
fn provenance(r: &RunResult) -> Value {
    json!({"generator": format!("ngreach {}", crate::VERSION), "version": crate::VERSION,
        "scenario": r.scenario.name, "source": r.scenario.source,
        "inputs": "the resolved inputs are in summary.json (key `inputs`)"})
}

/// Writes every output of a run into `dir`: the tables (CSV with a `tables.json`
/// sidecar, or ECSV), the figures (PNG and SVG), the Fisher matrices (`fisher/*.npy`),
/// `table.tex`, `summary.json` and `report.html`. Returns the file names written.
///
/// # Errors
/// I/O and drawing errors.
pub fn write_outputs_with(r: &RunResult, dir: &Path, opts: &OutputOptions) -> Result<Vec<String>> {
    std::fs::create_dir_all(dir).map_err(|source| Error::Io {
        path: dir.to_path_buf(),
        source,
    })?;
    let sc = &r.scenario;
    let mut written = Vec::new();
    let put = |name: &str, bytes: &[u8], written: &mut Vec<String>| -> Result<()> {
        write_atomic(&dir.join(name), bytes)?;
        written.push(name.to_string());
        Ok(())
    };
    let prov = provenance(r);
    let mut artifacts: Vec<Artifact> = crate::report::artifacts::all(r);
    artifacts.extend(crate::report::lensing_outputs::bias_tables(r));
    let mut svgs: Vec<(String, String, String)> = Vec::new();
    for a in &artifacts {
        let t = &a.table;
        put(
            &t.file_name(opts.tables),
            t.render(opts.tables, &prov).as_bytes(),
            &mut written,
        )?;
        if let (true, Some(fig)) = (sc.output.figures, &a.figure) {
            let svg = write_figure(fig, dir, &t.stem)?;
            written.push(format!("{}.png", t.stem));
            written.push(format!("{}.svg", t.stem));
            svgs.push((t.stem.clone(), svg, t.description.clone()));
        }
    }
    written.extend(crate::report::matrices::write_matrices(
        r,
        dir,
        opts.tables,
    )?);
    let tau_tables = crate::report::tau_outputs::write_outputs(
        r,
        dir,
        (opts.tables, &prov),
        &mut written,
        &mut svgs,
    )?;
    if sc.output.latex {
        put("table.tex", latex_table(r).as_bytes(), &mut written)?;
    }
    let summary = summary_json(r);
    let text = serde_json::to_string_pretty(&summary).unwrap_or_default() + "\n";
    put("summary.json", text.as_bytes(), &mut written)?;
    let mut sidecar = prov.clone();
    sidecar["tables"] = json!(
        artifacts
            .iter()
            .map(|a| &a.table)
            .chain(&tau_tables)
            .map(|t| t.describe(opts.tables))
            .collect::<Vec<_>>()
    );
    sidecar["fisher_matrices"] = json!(format!("{}/index.json", crate::report::matrices::FOLDER));
    let text = serde_json::to_string_pretty(&sidecar).unwrap_or_default() + "\n";
    put("tables.json", text.as_bytes(), &mut written)?;
    if opts.report {
        let page = crate::report::html::run_page(r, &summary, &svgs, opts.tables, &written);
        put("report.html", page.as_bytes(), &mut written)?;
    }
    Ok(written)
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
