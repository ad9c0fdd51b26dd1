//! `ngreach survey`: the 3D survey Fisher forecast, from a survey file or the quick mode.

use std::path::Path;

use serde_json::{Value, json};

use crate::cosmology::{Background, Cosmology, Growth, Primordial};
use crate::error::{Error, Location, Result};
use crate::input::{Source, parse_toml};
use crate::pipeline::linear_power_for;
use crate::report::{Report, num};
use crate::scenario::LinearPowerChoice;
use crate::shapes::Shape;
use crate::survey::fisher::{Probe, ShapeInput, SurveyForecast, SurveySettings, survey_fisher};
use crate::survey::{CovarianceModel, Survey, SurveyFile};

/// Typed options of `ngreach survey`.
#[derive(Debug, Clone)]
pub struct SurveyOptions {
    /// k_max grid in h/Mpc (None: the survey file's default).
    pub kmax_h_mpc: Option<Vec<f64>>,
    /// Probes to report.
    pub probes: Vec<Probe>,
    /// Shapes (f_NL parameters).
    pub shapes: Vec<Shape>,
    /// Also tau_NL from the power spectra (`tau_nl` in `--shapes`).
    pub tau_nl: bool,
    /// Linear matter power (`--linear-power`).
    pub linear_power: LinearPowerChoice,
    /// Covariance model (`--covariance`; None: the survey's own).
    pub covariance: Option<CovarianceModel>,
    /// Engine settings.
    pub settings: SurveySettings,
}

/// Quick-mode inputs.
#[derive(Debug, Clone, Copy)]
pub struct QuickInputs {
    /// Volume in (Gpc/h)^3.
    pub volume_gpc3_h3: f64,
    /// Redshift.
    pub z: f64,
    /// nbar in h^3 Mpc^-3.
    pub nbar_h3_mpc3: f64,
    /// Linear bias.
    pub b1: f64,
    /// No redshift-space distortions.
    pub real_space: bool,
}

/// Parses `--probes`.
///
/// # Errors
/// An unknown probe name.
pub fn parse_probes(list: &[String]) -> Result<Vec<Probe>> {
    list.iter()
        .map(|s| {
            Probe::parse(s).ok_or_else(|| Error::BadField {
                at: Location::Flag("--probes".into()),
                field: "probes".into(),
                message: format!("unknown probe `{s}`; use P, B or P+B"),
            })
        })
        .collect()
}

/// Parses `--shapes`.
///
/// # Errors
/// A shape that does not parse.
pub fn parse_shapes(list: &[String], flag: &str) -> Result<Vec<Shape>> {
    let mut out: Vec<Shape> = Vec::new();
    for s in list {
        // tau_NL is read by `lists_tau_nl`, not as a bispectrum shape.
        if crate::shapes::is_tau_nl(s) {
            continue;
        }
        let sh = Shape::parse(s, Location::Flag(flag.into()))?;
        if out.iter().any(|o| o.name() == sh.name()) {
            return Err(Error::BadField {
                at: Location::Flag(flag.into()),
                field: "shapes".into(),
                message: format!("shape `{}` is listed twice", sh.name()),
            });
        }
        out.push(sh);
    }
    Ok(out)
}

/// Loads a survey file (with its optional [cosmology] table, unless one is given).
///
/// # Errors
/// Input errors of the file.
pub fn load_survey(
    path: &Path,
    cosmo_override: Option<(&Cosmology, &str)>,
) -> Result<(Survey, Cosmology, String)> {
    let src = Source::read(path)?;
    let file: SurveyFile = parse_toml(&src)?;
    let (c, cs) = match (cosmo_override, &file.cosmology) {
        (Some((c, s)), _) => (c.clone(), s.to_string()),
        (None, Some(t)) => (t.resolve(&src)?, format!("{} [cosmology]", path.display())),
        (None, None) => (
            Cosmology::planck2018(),
            "built-in Planck 2018 base LCDM".into(),
        ),
    };
    let bg = Background::new(&c);
    let growth = Growth::new(&c);
    let s = file.survey.resolve(&src, &bg, &growth)?;
    Ok((s, c, cs))
}

/// Runs the forecast and builds the report.
///
/// # Errors
/// Invalid k_max values; `--linear-power boltzmann` for a cosmology the Boltzmann solver
/// cannot handle (named at the flag), or its failure.
pub fn survey_report(
    survey: &Survey,
    c: &Cosmology,
    cosmo_source: &str,
    opts: &SurveyOptions,
) -> Result<(Report, SurveyForecast)> {
    let h = c.h();
    let kmax_h: Vec<f64> = match &opts.kmax_h_mpc {
        Some(v) => v.clone(),
        None => vec![survey.kmax_default_mpc / h],
    };
    let mut sorted = kmax_h.clone();
    sorted.sort_by(f64::total_cmp);
    for &k in &sorted {
        if !(k.is_finite() && (1e-3..=5.0).contains(&k)) {
            return Err(Error::out_of_range(
                Location::Flag("--kmax".into()),
                "kmax",
                k,
                "1e-3 <= kmax <= 5 h/Mpc",
            ));
        }
    }
    opts.linear_power
        .check(c, Location::Flag("--linear-power".into()), "linear_power")?;
    let bg = Background::new(c);
    let top_mpc = sorted.last().copied().unwrap_or(0.2) * h;
    let (power, power_meta) =
        linear_power_for(c, opts.linear_power, top_mpc, opts.settings.parallel)?;
    let prim = Primordial::new(c);
    let inputs: Vec<ShapeInput> = opts
        .shapes
        .iter()
        .map(|&s| ShapeInput::new(s, prim))
        .collect();
    let kmax_mpc: Vec<f64> = sorted.iter().map(|k| k * h).collect();
    let mut survey = survey.clone();
    if let Some(cv) = opts.covariance {
        survey.covariance = cv;
    }
    let survey = &survey;
    let fc = survey_fisher(survey, &power, &bg, &inputs, &kmax_mpc, &opts.settings);
    let mut r = Report::new("survey");
    let cov = survey.covariance;
    r.notes = vec![
        "k in h/Mpc; sigma(f_NL) in the CMB convention (growth normalized to a in matter domination)".into(),
        "sigma_conditional: other shapes fixed (the single-shape constraint); sigma_marginal: marginalized over the other shapes listed; both after marginalizing the per-bin nuisances".into(),
        cov.describe().into(),
        kmax_note(survey, h),
        "P: continuous Fisher integral from k_min; B: tree level with the second-order non-Gaussian bias, exact triangle sum over the first bins plus continuum quadrature, full orientation dependence; P+B: shared nuisances".into(),
        match survey.response {
            crate::survey::ResponseModel::FullShape => "scale-dependent bias (response: full-shape): the whole primordial bispectrum against each tracer's Lagrangian window (peak-background split; Desjacques, Jeong & Schmidt 2011), tending to (k / k_S)^Delta with the tracer's own k_S on large scales",
            crate::survey::ResponseModel::SqueezedCut => "scale-dependent bias (response: squeezed-cut): squeezed limit referenced to each tracer's own scale k_S (peak-background split), cut at k >= k_S for shapes with Delta > 0",
        }
        .into(),
        match opts.linear_power {
            LinearPowerChoice::EisensteinHu => "linear power: Eisenstein-Hu (1998) normalized from A_s",
            LinearPowerChoice::Boltzmann => "linear power: the Boltzmann solver's z = 0 matter transfer function, normalized from A_s",
        }
        .into(),
    ];
    for w in &fc.warnings {
        r.notes.push(format!("warning: {w}"));
    }
    r.summary
        .push(("covariance".into(), Value::String(cov.label().into())));
    r.summary.push((
        "kmax_meaning".into(),
        Value::String(kmax_meaning(survey).into()),
    ));
    if !fc.warnings.is_empty() {
        r.summary.push(("warnings".into(), json!(fc.warnings)));
    }
    r.inputs = json!({
        "cosmology": super::cosmology_json(c, cosmo_source),
        "survey": survey_json(survey, h),
        "kmax_h_mpc": sorted,
        "probes": opts.probes.iter().map(|p| p.label()).collect::<Vec<_>>(),
        "shapes": opts.shapes.iter().map(|s| s.name()).chain(opts.tau_nl.then(|| crate::shapes::TAU_NL.to_string())).collect::<Vec<_>>(),
        "settings": opts.settings,
        "covariance": cov.label(),
        "kmax_meaning": kmax_meaning(survey),
        "linear_power": power_meta,
    });
    r.columns = [
        "kmax_h_mpc",
        "probe",
        "shape",
        "sigma_conditional",
        "sigma_marginal",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    for (ik, &k) in sorted.iter().enumerate() {
        for &probe in &opts.probes {
            let f = &fc.total[ik][probe_index(probe)];
            let marg = f.sigma_marginal_or_inf();
            for (is, s) in opts.shapes.iter().enumerate() {
                r.rows.push(vec![
                    num(k),
                    Value::String(probe.label().into()),
                    Value::String(s.name()),
                    num(f.sigma_conditional(is)),
                    num(marg[is]),
                ]);
            }
        }
    }
    r.json_extra.push((
        "per_bin".into(),
        per_bin_json(&fc, &opts.probes, &sorted, h),
    ));
    r.json_extra.push((
        "fisher".into(),
        fisher_json(&fc.total, &opts.probes, &sorted),
    ));
    r.json_extra.push((
        "cross_covariance".into(),
        match cov {
            CovarianceModel::Gaussian => "P-B cross-covariance neglected (gaussian covariance)",
            CovarianceModel::Realistic => {
                "leading P-B cross-covariance 2 P B / N_k, through the whitened bispectrum (realistic covariance)"
            }
        }
        .into(),
    ));
    if opts.tau_nl {
        let tau = crate::survey::tau_nl::survey_tau_fisher(
            survey,
            &power,
            &bg,
            &kmax_mpc,
            &opts.settings,
            crate::survey::tau_nl::TauCovariance::Gaussian,
        );
        add_tau_rows(&mut r, &tau, &sorted);
    }
    Ok((r, fc))
}

/// What the `kmax_h_mpc` values mean for a survey.
pub fn kmax_meaning(s: &Survey) -> &'static str {
    match s.kmax_rule {
        crate::survey::KmaxRule::Growth => {
            "k_max(z = 0): each bin uses k_max(0) D(0)/D(z), capped at kmax_tree_h_mpc (per_bin kmax_used_h_mpc)"
        }
        crate::survey::KmaxRule::Sigma => {
            "k_max requested: each bin uses min(k_max, its sigma-rule scale, kmax_tree_h_mpc) (per_bin kmax_used_h_mpc)"
        }
        crate::survey::KmaxRule::Fixed => {
            "k_max in every bin, capped at kmax_tree_h_mpc (per_bin kmax_used_h_mpc)"
        }
    }
}

fn kmax_note(s: &Survey, h: f64) -> String {
    format!(
        "kmax_h_mpc = {}; tree-level cap {} h/Mpc",
        kmax_meaning(s),
        crate::report::format_sig(s.kmax_tree_mpc / h, 3)
    )
}

/// Adds the tau_NL rows (probe P, shape `tau_nl`) and the `tau_nl` JSON block.
pub fn add_tau_rows(
    r: &mut Report,
    tau: &crate::survey::tau_nl::TauSurveyForecast,
    kmax_h: &[f64],
) {
    r.notes.push(super::cmb::TAU_NL_NOTES[0].into());
    r.notes.push(format!(
        "survey tau_nl rows: power spectra only (stochastic scale-dependent bias, {} covariance); sigma_conditional with f_NL fixed, sigma_marginal marginalized over f_NL local (the power spectrum couples them)",
        tau.covariance.label()
    ));
    for (ik, &k) in kmax_h.iter().enumerate() {
        let (c, m) = tau.sigmas(ik);
        r.rows.push(vec![
            num(k),
            Value::String("P".into()),
            Value::String(crate::shapes::TAU_NL.into()),
            num(c),
            num(m),
        ]);
    }
    r.json_extra.push((
        "tau_nl".into(),
        json!({
            "covariance": tau.covariance.label(),
            "parameters": crate::survey::tau_nl::PARAMETERS,
            "fisher_cross_term_note": "the power spectrum carries both f_NL and tau_NL: F(tau_nl, fnl_local) is not zero; sigma_marginal marginalizes over fnl_local",
            "fisher": kmax_h.iter().enumerate().map(|(ik, &k)| json!({
                "kmax_h_mpc": k, "matrix": tau.total[ik].rows(),
            })).collect::<Vec<_>>(),
        }),
    ));
}

/// Index of a probe in the engine's [P, B, P+B] arrays.
pub fn probe_index(p: Probe) -> usize {
    match p {
        Probe::P => 0,
        Probe::B => 1,
        Probe::PB => 2,
    }
}

fn survey_json(s: &Survey, h: f64) -> Value {
    json!({
        "name": s.name,
        "f_sky": s.f_sky,
        "redshift_error": s.redshift_error,
        "velocity_dispersion_km_s": s.velocity_dispersion_km_s,
        "kmax_rule": s.kmax_rule,
        "sigma_nl": s.sigma_nl,
        "kmax_tree_h_mpc": s.kmax_tree_mpc / h,
        "covariance": s.covariance.label(),
        "response": s.response.label(),
        "real_space": s.real_space,
        "nuisance": s.nuisance,
        "priors": s.priors,
        "bins": s.bins.iter().map(|b| json!({
            "z_min": b.z_min, "z_max": b.z_max, "z_eff": b.z_eff,
            "volume_gpc3_h3": b.volume_mpc3 * h.powi(3) / 1e9,
        })).collect::<Vec<_>>(),
        "tracers": s.tracers.iter().map(|t| json!({
            "name": t.name,
            "p": t.p,
            "bins": t.bins.iter().map(|b| json!({
                "nbar_h3_mpc3": b.nbar_mpc3 / h.powi(3), "b1": b.b1, "b2": b.b2, "bs2": b.bs2, "b_phi": b.b_phi,
            })).collect::<Vec<_>>(),
        })).collect::<Vec<_>>(),
    })
}

fn per_bin_json(fc: &SurveyForecast, probes: &[Probe], kmax_h: &[f64], h: f64) -> Value {
    Value::Array(
        fc.bins
            .iter()
            .map(|b| {
                let rows: Vec<Value> = kmax_h
                    .iter()
                    .enumerate()
                    .flat_map(|(ik, &k)| {
                        probes.iter().flat_map(move |&p| {
                            let f = &b.fisher[ik][probe_index(p)];
                            let marg = f.sigma_marginal_or_inf();
                            fc.shapes.iter().enumerate().map(move |(is, s)| {
                                json!({
                                    "kmax_h_mpc": k,
                                    "kmax_used_h_mpc": b.kmax_used_mpc[ik] / h,
                                    "probe": p.label(),
                                    "shape": s,
                                    "sigma_conditional": num(f.sigma_conditional(is)),
                                    "sigma_marginal": num(marg[is]),
                                })
                            })
                        })
                    })
                    .collect();
                json!({
                    "z_min": b.bin.z_min, "z_max": b.bin.z_max, "z_eff": b.bin.z_eff,
                    "kmin_h_mpc": b.kmin_mpc / h, "kf_h_mpc": b.kf_mpc / h,
                    "kmax_used_h_mpc": b.kmax_used_mpc.iter().map(|k| k / h).collect::<Vec<_>>(),
                    "k_nonlinear_h_mpc": b.k_nonlinear_mpc / h,
                    "responses": b.responses.iter().map(|t| json!({
                        "b_phi": t.b_phi, "b_phi_delta": t.b_phi_delta,
                        "r_lagrangian_mpc_over_h": num(t.r_lagrangian_mpc * h),
                        "k_s_h_mpc": t.k_s_mpc.iter().map(|k| num(k / h)).collect::<Vec<_>>(),
                    })).collect::<Vec<_>>(),
                    "rows": rows,
                })
            })
            .collect(),
    )
}

fn fisher_json(
    total: &[[crate::fisher::FisherMatrix; 3]],
    probes: &[Probe],
    kmax_h: &[f64],
) -> Value {
    Value::Array(
        kmax_h
            .iter()
            .enumerate()
            .flat_map(|(ik, &k)| {
                probes.iter().map(move |&p| {
                    let f = &total[ik][probe_index(p)];
                    json!({"kmax_h_mpc": k, "probe": p.label(), "parameters": f.names(), "matrix": f.rows()})
                })
            })
            .collect(),
    )
}
