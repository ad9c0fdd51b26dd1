//! `ngreach spectra`: CMB power spectra D^TT_l, D^EE_l, D^TE_l from a transfer model
//! (the idealized last-scattering shell of [`crate::cmb::shell`], or the Boltzmann
//! solver), unlensed, or lensed with `--lensed` (then also D^BB_l and the lensing
//! potential).
//!
//! D_l = l (l + 1) C_l / (2 pi) in microkelvin^2, with T_CMB of the cosmology.

use serde_json::{Value, json};

use crate::cmb::ThermalHistory;
use crate::cmb::boltzmann::CacheOptions;
use crate::cmb::shell::{Damping, FWHM_PER_SIGMA, KGridSpec, MAX_LMAX, ShellModel, ShellOverrides};
use crate::cosmology::{Background, Cosmology, Primordial};
use crate::error::{Error, Location, Result};
use crate::report::{Report, num};

/// Largest accepted `--shell-width`, Mpc.
pub const MAX_SHELL_WIDTH_MPC: f64 = 500.0;

/// The transfer model behind the spectra.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum TransferKind {
    /// The idealized finite-thickness last-scattering shell: Sachs-Wolfe temperature and
    /// a tight-coupling E-mode model (a model, not the full physics).
    Shell,
    /// The line-of-sight Boltzmann solution (cached): the full physics, unlensed.
    Full,
}

/// Typed options of `ngreach spectra`.
#[derive(Debug, Clone, PartialEq)]
pub struct SpectraOptions {
    /// Transfer model.
    pub transfer: TransferKind,
    /// Highest multipole.
    pub lmax: usize,
    /// Gaussian width sigma_chi of the shell in Mpc (`None`: from the visibility FWHM).
    pub shell_sigma_mpc: Option<f64>,
    /// Diffusion damping on or off.
    pub damping: bool,
    /// Transfer-table cache of the Boltzmann solver (`--cache-dir`, `--no-cache`).
    pub cache: CacheOptions,
    /// Lensed spectra (`--lensed`; full transfer only).
    pub lensed: bool,
}

/// Checks the options.
///
/// # Errors
/// [`Error::OutOfRange`] naming `--lmax` (outside [2, 5000]) or `--shell-width` (outside
/// [0, 500] Mpc, or not a number).
pub fn validate(o: &SpectraOptions) -> Result<()> {
    if !(2..=MAX_LMAX).contains(&o.lmax) {
        return Err(Error::out_of_range(
            Location::Flag("--lmax".into()),
            "lmax",
            o.lmax as f64,
            "2 <= lmax <= 5000",
        ));
    }
    if let Some(w) = o.shell_sigma_mpc
        && !(w.is_finite() && (0.0..=MAX_SHELL_WIDTH_MPC).contains(&w))
    {
        return Err(Error::out_of_range(
            Location::Flag("--shell-width".into()),
            "shell width (Gaussian sigma, Mpc)",
            w,
            "0 <= width <= 500 Mpc",
        ));
    }
    Ok(())
}

/// Builds the spectra report.
///
/// # Errors
/// Invalid options; a thermal history that fails (see [`ThermalHistory::new`]).
pub fn spectra_report(c: &Cosmology, source: &str, o: &SpectraOptions) -> Result<Report> {
    validate(o)?;
    if o.lensed && o.transfer != TransferKind::Full {
        return Err(Error::Conflict {
            at: Location::Flag("--lensed".into()),
            message: "--lensed needs --transfer full (the lensing potential comes from the \
                      Boltzmann solver)"
                .into(),
        });
    }
    let bg = Background::new(c);
    let thermal = ThermalHistory::new(c, &bg)?;
    if o.transfer == TransferKind::Full {
        return full_report(c, source, o, &thermal, &bg);
    }
    let model = {
        ShellModel::from_thermal(
            &thermal,
            &ShellOverrides {
                sigma_chi_mpc: o.shell_sigma_mpc,
                damping: if o.damping {
                    Damping::Thermal
                } else {
                    Damping::Off
                },
            },
        )?
    };
    let spec = KGridSpec::default();
    let grid = model.k_grid(o.lmax, &spec)?;
    let prim = Primordial::new(c);
    let s = model.spectra_on(o.lmax, &grid, &prim)?;
    let t_uk = c.params().t_cmb_k * 1.0e6;
    let p = *model.params();
    let sigma = p.sigma_chi_mpc;

    let mut r = Report::new("spectra");
    r.notes = vec![
        format!(
            "dl_*_uk2: D_l = l(l+1) C_l / 2pi in microkelvin^2 (uK^2), unlensed, T_CMB = {} K; multipole: the multipole l of the row (inputs.lmax is the largest)",
            c.params().t_cmb_k
        ),
        "transfer: idealized last-scattering shell (a model, not the full physics): Sachs-Wolfe temperature Delta T/T = -Phi/3, tight-coupling E-mode model, Gaussian shell in comoving distance; no acoustic driving, Doppler, ISW or reionization in T".into(),
        match p.k_damping_mpc {
            Some(kd) => format!(
                "damping: exp(-(k/k_D)^2) on the amplitude, k_D = {kd:.6} 1/Mpc (power falls as exp(-2 (k/k_D)^2))"
            ),
            None => "damping: off".into(),
        },
        format!(
            "shell: chi_star = {:.3} Mpc, Gaussian sigma = {sigma:.4} Mpc (FWHM {:.4} Mpc); lengths in Mpc, wavenumbers in 1/Mpc",
            p.chi_star_mpc,
            sigma * FWHM_PER_SIGMA
        ),
    ];
    let k_d = p.k_damping_mpc.map_or(Value::Null, num);
    r.inputs = json!({
        "cosmology": super::cosmology_json(c, source),
        "transfer": o.transfer,
        "spectra": "unlensed",
        "lmax": o.lmax,
        "shell_sigma_mpc": num(sigma),
        "shell_fwhm_mpc": num(sigma * FWHM_PER_SIGMA),
        "shell_width_from": if o.shell_sigma_mpc.is_some() { "--shell-width" } else { "visibility FWHM / 2.3548" },
        "damping": o.damping,
        "k_damping_mpc": k_d,
        "chi_star_mpc": num(p.chi_star_mpc),
        "sound_horizon_mpc": num(p.sound_horizon_mpc),
        "tau_dot_star_per_mpc": num(p.tau_dot_star_mpc),
        "sound_speed": num(p.sound_speed),
        "t_cmb_k": num(c.params().t_cmb_k),
        "k_max_per_mpc": num(grid.k_max),
        "k_nodes": grid.len(),
        "k_max_set_by": grid.cutoff,
    });
    r.summary.push(("chi_star_mpc".into(), num(p.chi_star_mpc)));
    r.summary.push(("shell_sigma_mpc".into(), num(sigma)));
    if let Some(kd) = p.k_damping_mpc {
        r.summary.push(("k_damping_mpc".into(), num(kd)));
    }
    dl_rows(&mut r, o.lmax, t_uk, &s.tt, &s.ee, &s.te);
    Ok(r)
}

/// The contract columns `multipole,dl_tt_uk2,dl_ee_uk2,dl_te_uk2`: the multipole l of
/// the row (not an l_max) and D_l = l(l+1) C_l / 2pi in microkelvin^2, l = 2..=lmax.
fn dl_rows(r: &mut Report, lmax: usize, t_uk: f64, tt: &[f64], ee: &[f64], te: &[f64]) {
    r.columns = ["multipole", "dl_tt_uk2", "dl_ee_uk2", "dl_te_uk2"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    for l in 2..=lmax {
        let f = (l * (l + 1)) as f64 / (2.0 * std::f64::consts::PI) * t_uk * t_uk;
        r.rows.push(vec![
            Value::from(l as u64),
            num(f * tt[l]),
            num(f * ee[l]),
            num(f * te[l]),
        ]);
    }
}

/// Spectra from the Boltzmann solver.
fn full_report(
    c: &Cosmology,
    source: &str,
    o: &SpectraOptions,
    th: &ThermalHistory,
    bg: &Background,
) -> Result<Report> {
    if o.shell_sigma_mpc.is_some() || !o.damping {
        return Err(Error::Conflict {
            at: Location::Flag("--transfer".into()),
            message: "--shell-width and --no-damping apply to --transfer shell only".into(),
        });
    }
    let (table, _radial, meta) = crate::cmb::full_transfer_for(c, th, bg, o.lmax, &o.cache)?;
    let prim = Primordial::new(c);
    let s = crate::cmb::boltzmann::Spectra::from_table(&table, &prim);
    let t_uk = c.params().t_cmb_k * 1.0e6;
    let mut r = Report::new("spectra");
    let kind = if o.lensed { "lensed" } else { "unlensed" };
    r.notes = vec![
        format!(
            "dl_*_uk2: D_l = l(l+1) C_l / 2pi in microkelvin^2 (uK^2), {kind}, T_CMB = {} K; multipole: the multipole l of the row (inputs.lmax is the largest)",
            c.params().t_cmb_k
        ),
        "transfer: line-of-sight Boltzmann solution (synchronous gauge, massless neutrinos)".into(),
    ];
    r.inputs = json!({"cosmology": super::cosmology_json(c, source), "transfer": o.transfer, "spectra": kind, "lmax": o.lmax, "solver": meta});
    if !o.lensed {
        dl_rows(&mut r, o.lmax, t_uk, &s.tt, &s.ee, &s.te);
        return Ok(r);
    }
    let lens = crate::cmb::lensing::lensing_of(c, th, bg, &table, o.lmax, 0.0, 1, true)?;
    let l = &lens.lensed;
    dl_rows(&mut r, o.lmax, t_uk, &l.tt, &l.ee, &l.te);
    r.notes.push("lensing: our linear lensing potential (line of sight to L = 100, Limber above) and the curved-sky correlation-function method (Challinor & Lewis 2005); dl_bb_uk2: lensing B modes only; dl_lensing_potential: [L(L+1)]^2 C_L^{phi phi} / 2pi of the lensing potential phi at L = multipole, dimensionless".into());
    r.columns.push("dl_bb_uk2".into());
    r.columns.push("dl_lensing_potential".into());
    for (row, ell) in r.rows.iter_mut().zip(2..) {
        let f = (ell * (ell + 1)) as f64 / (2.0 * std::f64::consts::PI);
        row.push(num(f * t_uk * t_uk * l.bb[ell]));
        row.push(num(f
            * f
            * 2.0
            * std::f64::consts::PI
            * lens.potential.pp[ell]));
    }
    Ok(r)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn opts(lmax: usize, w: Option<f64>) -> SpectraOptions {
        SpectraOptions {
            transfer: TransferKind::Shell,
            lmax,
            shell_sigma_mpc: w,
            damping: true,
            cache: CacheOptions::disabled(),
            lensed: false,
        }
    }

    #[test]
    fn validation_names_the_flag() {
        for (o, flag) in [
            (opts(1, None), "--lmax"),
            (opts(5001, None), "--lmax"),
            (opts(100, Some(-1.0)), "--shell-width"),
            (opts(100, Some(500.5)), "--shell-width"),
            (opts(100, Some(f64::NAN)), "--shell-width"),
        ] {
            let e = validate(&o).unwrap_err();
            assert!(e.is_input_error());
            assert!(e.to_string().contains(flag), "{e}");
        }
        for o in [opts(2, Some(0.0)), opts(5000, Some(500.0)), opts(100, None)] {
            validate(&o).unwrap();
        }
    }

    #[test]
    fn report_has_the_contract_columns() {
        let c = Cosmology::planck2018();
        let r = spectra_report(&c, "test", &opts(40, None)).unwrap();
        assert_eq!(
            r.columns,
            ["multipole", "dl_tt_uk2", "dl_ee_uk2", "dl_te_uk2"]
        );
        assert_eq!(r.rows.len(), 39);
        assert_eq!(r.rows[0][0], Value::from(2u64));
        assert!(r.inputs["chi_star_mpc"].as_f64().unwrap() > 13_000.0);
        assert!(r.inputs["k_damping_mpc"].as_f64().unwrap() > 0.1);
        // Low-l plateau ~ (A_s/25) T^2 ~ 6e2 uK^2, times the tilt at k ~ 1e-4/Mpc.
        let d2 = r.rows[0][1].as_f64().unwrap();
        assert!(d2 > 500.0 && d2 < 1000.0, "{d2}");
    }
}
