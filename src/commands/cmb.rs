//! `ngreach cmb`: the CMB bispectrum forecast for one experiment.

use serde_json::{Value, json};

use crate::cmb::bispectrum::{
    BispectrumPlan, CmbFisherInput, CmbForecast, FieldSet, cmb_fisher_with_plan,
};
use crate::cmb::boltzmann::CacheOptions;
use crate::cmb::collapsed::{CollapsedForecast, CollapsedSettings, tau_nl_fisher};
use crate::cmb::experiment::{Experiment, validate_lmax};
use crate::cmb::lensing::bias::{BIAS_NOTE, LensingBias};
use crate::cmb::lensing::isw_bispectrum::isw_lensing_for;
use crate::cmb::lensing::{CovarianceSpectra, cached_lensing};
use crate::cmb::thermal::ThermalHistory;
use crate::combine::{log_slopes, sigmas};
use crate::cosmology::{Background, Cosmology, Primordial};
use crate::error::{Error, Location, Result};
use crate::report::{Report, num};
use crate::scenario::TransferChoice;
use crate::shapes::Shape;

/// Typed options of `ngreach cmb`.
#[derive(Debug, Clone)]
pub struct CmbOptions {
    /// The experiment (after `--fsky`).
    pub experiment: Experiment,
    /// Transfer model.
    pub transfer: TransferChoice,
    /// Shell width override, Mpc.
    pub shell_width_mpc: Option<f64>,
    /// Diffusion damping in the shell model.
    pub damping: bool,
    /// l_max grid.
    pub lmax: Vec<usize>,
    /// Field sets.
    pub fields: Vec<FieldSet>,
    /// Shapes.
    pub shapes: Vec<Shape>,
    /// Also the collapsed-trispectrum amplitude tau_NL (`tau_nl` in `--shapes`).
    pub tau_nl: bool,
    /// Parallel loops.
    pub parallel: bool,
    /// Transfer-table cache of the Boltzmann solver (`--cache-dir`, `--no-cache`).
    pub cache: CacheOptions,
    /// Spectra of the covariance (`--spectra`).
    pub spectra: CovarianceSpectra,
    /// Fraction of the lensing-potential power removed (`--delensing`).
    pub delensing: f64,
}

/// Parses `--fields`.
///
/// # Errors
/// Unknown names.
pub fn parse_fields(list: &[String]) -> Result<Vec<FieldSet>> {
    list.iter()
        .map(|s| {
            FieldSet::parse(s).ok_or_else(|| Error::BadField {
                at: Location::Flag("--fields".into()),
                field: "fields".into(),
                message: format!("unknown field set `{s}`; use T, E or T+E"),
            })
        })
        .collect()
}

/// Runs the forecast and builds the report.
///
/// # Errors
/// Invalid grids; transfer failures.
pub fn cmb_report(
    c: &Cosmology,
    cosmo_source: &str,
    opts: &CmbOptions,
) -> Result<(Report, CmbForecast)> {
    let exp = &opts.experiment;
    let mut lmax = opts.lmax.clone();
    lmax.sort_unstable();
    lmax.dedup();
    validate_lmax(&lmax, exp.l_min)?;
    if opts.shell_width_mpc.is_some() && opts.transfer != TransferChoice::Shell {
        return Err(Error::Conflict {
            at: Location::Flag("--shell-width".into()),
            message: "--shell-width applies to --transfer shell only".into(),
        });
    }
    if !opts.damping && opts.transfer != TransferChoice::Shell {
        return Err(Error::Conflict {
            at: Location::Flag("--no-damping".into()),
            message: "--no-damping applies to --transfer shell only".into(),
        });
    }
    if !(0.0..=1.0).contains(&opts.delensing) || !opts.delensing.is_finite() {
        return Err(Error::out_of_range(
            Location::Flag("--delensing".into()),
            "delensing",
            opts.delensing,
            "0 <= F <= 1 (fraction of the lensing-potential power removed)",
        ));
    }
    if opts.spectra == CovarianceSpectra::Lensed && opts.transfer == TransferChoice::Shell {
        return Err(Error::Conflict {
            at: Location::Flag("--spectra".into()),
            message: "lensed spectra need the Boltzmann transfer (--transfer full); use \
                      --spectra unlensed with the shell model"
                .into(),
        });
    }
    if opts.spectra == CovarianceSpectra::Unlensed && opts.delensing != 0.0 {
        return Err(Error::Conflict {
            at: Location::Flag("--delensing".into()),
            message: "--delensing applies to --spectra lensed only".into(),
        });
    }
    let bg = Background::new(c);
    let top = *lmax.last().unwrap_or(&2000);
    let th = ThermalHistory::new(c, &bg)?;
    let (table, radial, meta) = match opts.transfer {
        TransferChoice::Shell => {
            crate::cmb::shell_transfer_for(&th, opts.shell_width_mpc, opts.damping, top)?
        }
        TransferChoice::Full => crate::cmb::full_transfer_for(c, &th, &bg, top, &opts.cache)?,
    };
    if opts.shapes.is_empty() && !opts.tau_nl {
        return Err(Error::BadField {
            at: Location::Flag("--shapes".into()),
            field: "shapes".into(),
            message: "list at least one shape or tau_nl".into(),
        });
    }
    // The radial functions of the local shape serve tau_NL when no shape is listed.
    let plan_shapes = if opts.shapes.is_empty() {
        vec![Shape::Local]
    } else {
        opts.shapes.clone()
    };
    let lensing = match opts.spectra {
        CovarianceSpectra::Lensed => Some(cached_lensing(
            c,
            &th,
            &bg,
            &table,
            top,
            opts.delensing,
            1,
            opts.parallel,
            &opts.cache,
        )?),
        CovarianceSpectra::Unlensed => None,
    };
    let lensing_cache = lensing.as_ref().map(|l| l.1.label());
    let lensing = lensing.map(|l| l.0);
    let inp = CmbFisherInput {
        transfer: &table,
        primordial: Primordial::new(c),
        shapes: &plan_shapes,
        experiment: exp,
        t_cmb_k: c.params().t_cmb_k,
        lmax_grid: &lmax,
        field_sets: &opts.fields,
        radial: &radial,
        parallel: opts.parallel,
        signal_cl: lensing.as_ref().map(|l| &l.lensed),
    };
    let (plan, radial_cache) = BispectrumPlan::new_cached(&inp, &opts.cache);
    let mut fc = cmb_fisher_with_plan(&plan, &lmax, opts.parallel);
    if opts.shapes.is_empty() {
        fc.shapes.clear();
        for v in &mut fc.fisher {
            for f in v.iter_mut() {
                *f = crate::fisher::FisherMatrix::zeros(&[]);
            }
        }
    }
    // The ISW-lensing bias needs the lensing potential of our Boltzmann solver.
    let lens_bias = if opts.transfer == TransferChoice::Full && !opts.shapes.is_empty() {
        let isw = isw_lensing_for(c, &th, &bg, &table, lensing.as_ref(), top, opts.parallel)?;
        Some(LensingBias::compute(
            &plan,
            &radial,
            &isw,
            opts.spectra.label(),
            opts.delensing,
            &lmax,
            opts.parallel,
        ))
    } else {
        None
    };
    let tau = if opts.tau_nl {
        Some(tau_nl_fisher(
            &plan,
            &radial,
            &Primordial::new(c),
            &lmax,
            &CollapsedSettings {
                parallel: opts.parallel,
                ..CollapsedSettings::default()
            },
        )?)
    } else {
        None
    };
    let mut r = Report::new("cmb");
    r.notes = vec![
        "sigma(f_NL) in the CMB convention; lmax dimensionless".into(),
        "sigma_conditional: other shapes fixed; sigma_marginal: marginalized over the other shapes listed".into(),
        "log_slope = d ln F_ii / d ln l_max of the conditional Fisher information (the S/N^2 scaling with resolution)".into(),
        format!("transfer: {}", table.label()),
        format!(
            "rows of a field set stop at its l_max (T {}, E {}, T+E the larger)",
            exp.lmax_t, exp.lmax_e
        ),
        match opts.spectra {
            CovarianceSpectra::Lensed => format!(
                "covariance: lensed C_l (our lensing potential, curved-sky correlation functions), delensing {} of C^phiphi removed",
                opts.delensing
            ),
            CovarianceSpectra::Unlensed => "covariance: unlensed C_l".into(),
        },
        BIAS_NOTE.into(),
        match &lens_bias {
            Some(b) => b.description(),
            None => "lensing_bias: not computed (needs --transfer full, the lensing potential of our Boltzmann solver)".into(),
        },
    ];
    if let Some(w) = radial_cache.warning("radial-function") {
        r.notes.push(format!("warning: {w}"));
    }
    r.inputs = json!({
        "cosmology": super::cosmology_json(c, cosmo_source),
        "experiment": exp,
        "transfer": meta,
        "lmax": lmax,
        "fields": opts.fields.iter().map(|f| f.label()).collect::<Vec<_>>(),
        "shapes": opts.shapes.iter().map(|s| s.name()).chain(opts.tau_nl.then(|| crate::shapes::TAU_NL.to_string())).collect::<Vec<_>>(),
        "cmb_spectra": opts.spectra.label(),
        "delensing": opts.delensing,
        "lensing_cache": lensing_cache,
        "radial_cache": radial_cache.label(),
        "radial_nodes": radial.len(),
        "k_nodes": table.k().len(),
    });
    r.columns = [
        "lmax",
        "fields",
        "shape",
        "sigma_conditional",
        "sigma_marginal",
        "log_slope",
        "lensing_bias",
        "lensing_bias_marginal",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    let lm: Vec<f64> = fc.lmax.iter().map(|&l| l as f64).collect();
    let mut mats = Vec::new();
    for (m, &l) in fc.lmax.iter().enumerate() {
        for (ifs, fs) in fc.field_sets.iter().enumerate() {
            // A field set's rows stop at its own l_max: beyond it the Fisher sum does
            // not grow, and a row labelled with a larger l_max would misstate what was
            // used.
            let field_top = match fs {
                FieldSet::T => exp.lmax_t,
                FieldSet::E => exp.lmax_e,
                FieldSet::TE => exp.lmax_t.max(exp.lmax_e),
            };
            if l > field_top {
                continue;
            }
            let f = &fc.fisher[ifs][m];
            let (cond, marg) = sigmas(f);
            let bias = lens_bias.as_ref().map(|b| b.bias(f, ifs, m));
            for (is, s) in opts.shapes.iter().enumerate() {
                let info: Vec<f64> = fc.fisher[ifs].iter().map(|x| x.get(is, is)).collect();
                let slope = log_slopes(&lm, &info)[m];
                r.rows.push(vec![
                    json!(l),
                    Value::String(fs.label().into()),
                    Value::String(s.name()),
                    num(cond[is]),
                    num(marg[is]),
                    num(slope),
                    bias.as_ref().map_or(Value::Null, |b| num(b.single[is])),
                    bias.as_ref().map_or(Value::Null, |b| num(b.joint[is])),
                ]);
            }
            mats.push(json!({"lmax": l, "fields": fs.label(), "parameters": f.names(), "matrix": f.rows()}));
        }
    }
    r.json_extra.push(("fisher".into(), Value::Array(mats)));
    if let Some(b) = &lens_bias {
        r.json_extra.push(("lensing_bias".into(), b.to_json()));
    }
    if let Some(t) = &tau {
        add_tau_rows(&mut r, t);
    }
    Ok((r, fc))
}

/// The notes that state the tau_NL convention (shared by the commands).
pub const TAU_NL_NOTES: [&str; 2] = [
    "tau_nl: collapsed-trispectrum amplitude, T_zeta = tau_NL [P_zeta(k1) P_zeta(k3) P_zeta(|k1+k2|) + 11 perms]; a single local source gives tau_NL = (6 f_NL / 5)^2 (Suyama & Yamaguchi 2008)",
    "CMB tau_nl rows: collapsed limit (modulation reconstruction, long modes 2 <= L <= long_lmax); no Fisher cross term with f_NL at a Gaussian fiducial, so sigma_conditional = sigma_marginal",
];

/// Adds the tau_NL rows (shape `tau_nl`) and the `tau_nl` JSON block to a `cmb` report.
fn add_tau_rows(r: &mut Report, t: &CollapsedForecast) {
    for n in TAU_NL_NOTES {
        r.notes.push(n.into());
    }
    let lm: Vec<f64> = t.lmax.iter().map(|&l| l as f64).collect();
    for (ifs, fs) in t.field_sets.iter().enumerate() {
        let slopes = log_slopes(&lm, &t.fisher[ifs]);
        for (m, &l) in t.lmax.iter().enumerate() {
            let f = t.fisher[ifs][m];
            let sigma = if f > 0.0 {
                1.0 / f.sqrt()
            } else {
                f64::INFINITY
            };
            r.rows.push(vec![
                json!(l),
                Value::String(fs.label().into()),
                Value::String(crate::shapes::TAU_NL.into()),
                num(sigma),
                num(sigma),
                num(slopes[m]),
                Value::Null,
                Value::Null,
            ]);
        }
    }
    r.json_extra.push((
        "tau_nl".into(),
        json!({
            "convention": TAU_NL_NOTES[0],
            "fisher_cross_term_with_fnl": 0.0,
            "cross_term_note": "bispectrum (cubic) and collapsed trispectrum (quartic) statistics are uncorrelated at a Gaussian fiducial",
            "long_lmax": t.long_lmax,
            "long_l_min": 2,
            "basis_rank": t.basis_rank,
            "radial_nodes": t.active_nodes,
            "per_field_set": t.field_sets.iter().enumerate().map(|(i, fs)| json!({
                "fields": fs.label(),
                "lmax": t.lmax,
                "fisher": t.fisher[i].iter().map(|&x| num(x)).collect::<Vec<_>>(),
                "fisher_per_long_l_at_top_lmax": t.per_long_l[i].iter().map(|&x| num(x)).collect::<Vec<_>>(),
                "reconstruction_noise_eff_per_long_l": t.noise_eff[i].iter().map(|&x| num(x)).collect::<Vec<_>>(),
            })).collect::<Vec<_>>(),
            "reconstruction_noise_definition": "N_L with F_L = f_sky (2L+1)/2 (C^a_L / N_L)^2, C^a_L the modulation power per unit tau_NL at the shell's peak node (dimensionless)",
        }),
    ));
}
