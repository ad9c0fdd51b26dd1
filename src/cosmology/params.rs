//! Cosmological parameters: the validated [`Cosmology`] and its `[cosmology]` TOML table.
//!
//! The model is flat, with cold dark matter, baryons, photons, `N_eff` massless neutrino
//! species and dark energy with the CPL equation of state w(a) = w0 + wa (1 - a)
//! (Chevallier & Polarski 2001; Linder 2003). Densities are physical: `omega_b` =
//! Omega_b h^2, `omega_c` = Omega_c h^2.
//!
//! The default is the Planck 2018 base-LCDM best fit for TT,TE,EE+lowE+lensing
//! (Planck Collaboration VI 2020, A&A 641, A6, Table 2, last column but one), with the
//! one massive neutrino of that fit replaced by massless ones (N_eff = 3.046), so our
//! Omega_m = 0.3138 rather than the quoted 0.3153.
//!
//! Helium: when `Y_He` is not given, it follows the linear BBN fit
//! Y_He = 0.2454 + 0.0016 [(eta_10 - 6.13) + 100 (S - 1)], with eta_10 = 273.9 omega_b and
//! S = sqrt(1 + 7 (N_eff - 3.046) / 43): the slopes are those of Steigman 2007 (Annu. Rev.
//! Nucl. Part. Sci. 57, 463; from memory), anchored to the Planck 2018 BBN value
//! Y_P = 0.2454 at omega_b = 0.02237 (Planck 2018 VI, Sec. 7.6).

use serde::Deserialize;
use toml::Spanned;

use crate::constants::{self, NEUTRINO_PER_SPECIES};
use crate::error::{Error, Location, Result};
use crate::input::{Source, parse_toml};

/// Raw cosmological parameters, before validation.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct CosmoParams {
    /// Physical baryon density Omega_b h^2.
    pub omega_b: f64,
    /// Physical cold dark matter density Omega_c h^2.
    pub omega_c: f64,
    /// Dimensionless Hubble constant, H0 = 100 h km/s/Mpc.
    pub h: f64,
    /// Scalar spectral index.
    pub n_s: f64,
    /// Scalar amplitude of the curvature power spectrum at the pivot.
    #[serde(rename = "A_s")]
    pub a_s: f64,
    /// Pivot scale in 1/Mpc.
    pub k_pivot_mpc: f64,
    /// Reionization optical depth.
    pub tau_reio: f64,
    /// CMB temperature today in kelvin.
    #[serde(rename = "T_cmb_k")]
    pub t_cmb_k: f64,
    /// Effective number of massless neutrino species.
    #[serde(rename = "N_eff")]
    pub n_eff: f64,
    /// Primordial helium mass fraction.
    #[serde(rename = "Y_He")]
    pub y_he: f64,
    /// Dark-energy equation of state today.
    pub w0: f64,
    /// Its derivative in the CPL form w = w0 + wa (1 - a).
    pub wa: f64,
}

impl CosmoParams {
    /// Planck 2018 base-LCDM best fit (TT,TE,EE+lowE+lensing; Planck 2018 VI, Table 2),
    /// massless neutrinos with N_eff = 3.046.
    pub fn planck2018() -> Self {
        let omega_b = 0.02237;
        let n_eff = 3.046;
        Self {
            omega_b,
            omega_c: 0.1200,
            h: 0.6736,
            n_s: 0.9649,
            a_s: 3.044_f64.exp() * 1e-10,
            k_pivot_mpc: 0.05,
            tau_reio: 0.0544,
            t_cmb_k: 2.7255,
            n_eff,
            y_he: helium_bbn(omega_b, n_eff),
            w0: -1.0,
            wa: 0.0,
        }
    }
}

/// Helium mass fraction from the linear BBN fit stated in the module docs.
pub fn helium_bbn(omega_b: f64, n_eff: f64) -> f64 {
    let eta10 = 273.9 * omega_b;
    let s = (1.0 + 7.0 * (n_eff - 3.046) / 43.0).max(0.0).sqrt();
    0.2454 + 0.0016 * ((eta10 - 6.13) + 100.0 * (s - 1.0))
}

/// A validated flat cosmology with its derived density parameters.
#[derive(Debug, Clone, PartialEq)]
pub struct Cosmology {
    p: CosmoParams,
    omega_gamma: f64,
    omega_nu: f64,
}

impl Cosmology {
    /// Validates parameters.
    ///
    /// # Errors
    /// [`Error::OutOfRange`] naming the first offending field, or [`Error::Conflict`] when
    /// the matter and radiation densities leave no room for dark energy.
    pub fn new(p: CosmoParams) -> Result<Self> {
        Self::new_located(p, &|_| Location::Builtin)
    }

    /// Validates parameters, attributing errors with `at(field)`.
    ///
    /// # Errors
    /// As [`Cosmology::new`].
    pub fn new_located(p: CosmoParams, at: &dyn Fn(&str) -> Location) -> Result<Self> {
        let check = |field: &str, v: f64, lo: f64, hi: f64, allowed: &str| -> Result<()> {
            if v.is_finite() && v >= lo && v <= hi {
                Ok(())
            } else {
                Err(Error::out_of_range(at(field), field, v, allowed))
            }
        };
        check("omega_b", p.omega_b, 1e-3, 0.1, "0.001 <= omega_b <= 0.1")?;
        check("omega_c", p.omega_c, 0.0, 0.6, "0 <= omega_c <= 0.6")?;
        check("h", p.h, 0.2, 1.5, "0.2 <= h <= 1.5")?;
        if !(p.n_s > 0.5 && p.n_s < 1.5) {
            return Err(Error::out_of_range(
                at("n_s"),
                "n_s",
                p.n_s,
                "0.5 < n_s < 1.5",
            ));
        }
        check("A_s", p.a_s, 1e-11, 1e-7, "1e-11 <= A_s <= 1e-7")?;
        check(
            "k_pivot_mpc",
            p.k_pivot_mpc,
            1e-4,
            10.0,
            "1e-4 <= k_pivot_mpc <= 10 (1/Mpc)",
        )?;
        check("tau_reio", p.tau_reio, 0.0, 0.3, "0 <= tau_reio <= 0.3")?;
        check("T_cmb_k", p.t_cmb_k, 1.0, 5.0, "1 <= T_cmb_k <= 5 (kelvin)")?;
        check("N_eff", p.n_eff, 0.0, 10.0, "0 <= N_eff <= 10")?;
        check("Y_He", p.y_he, 0.0, 0.5, "0 <= Y_He <= 0.5")?;
        check("w0", p.w0, -3.0, -1.0 / 3.0, "-3 <= w0 <= -1/3")?;
        check("wa", p.wa, -3.0, 3.0, "-3 <= wa <= 3")?;
        if p.w0 + p.wa >= 0.0 {
            return Err(Error::Conflict {
                at: at("wa"),
                message: format!(
                    "w0 + wa = {} must be negative, or dark energy dominates at early times",
                    p.w0 + p.wa
                ),
            });
        }
        let omega_gamma = constants::omega_gamma(p.t_cmb_k);
        let omega_nu = NEUTRINO_PER_SPECIES * p.n_eff * omega_gamma;
        let om = (p.omega_b + p.omega_c + omega_gamma + omega_nu) / (p.h * p.h);
        if om >= 0.99 {
            return Err(Error::Conflict {
                at: at("h"),
                message: format!(
                    "Omega_m + Omega_r = {om:.4} leaves no dark energy in a flat universe; \
                     lower omega_b/omega_c or raise h"
                ),
            });
        }
        Ok(Self {
            p,
            omega_gamma,
            omega_nu,
        })
    }

    /// Planck 2018 default (see module docs).
    pub fn planck2018() -> Self {
        Self::new(CosmoParams::planck2018()).expect("built-in cosmology is valid")
    }

    /// The parameters.
    pub fn params(&self) -> &CosmoParams {
        &self.p
    }
    /// h.
    pub fn h(&self) -> f64 {
        self.p.h
    }
    /// H0 in km/s/Mpc.
    pub fn h0_km_s_mpc(&self) -> f64 {
        100.0 * self.p.h
    }
    /// H0/c in 1/Mpc.
    pub fn h0_over_c_mpc(&self) -> f64 {
        100.0 * self.p.h / constants::C_KM_S
    }
    /// Omega_b h^2.
    pub fn omega_b_h2(&self) -> f64 {
        self.p.omega_b
    }
    /// Omega_c h^2.
    pub fn omega_c_h2(&self) -> f64 {
        self.p.omega_c
    }
    /// Omega_m h^2 = omega_b + omega_c.
    pub fn omega_m_h2(&self) -> f64 {
        self.p.omega_b + self.p.omega_c
    }
    /// Omega_m today.
    pub fn omega_m(&self) -> f64 {
        self.omega_m_h2() / (self.p.h * self.p.h)
    }
    /// Omega_b today.
    pub fn omega_baryon(&self) -> f64 {
        self.p.omega_b / (self.p.h * self.p.h)
    }
    /// Omega_gamma h^2.
    pub fn omega_gamma_h2(&self) -> f64 {
        self.omega_gamma
    }
    /// Omega_nu h^2 (massless neutrinos).
    pub fn omega_nu_h2(&self) -> f64 {
        self.omega_nu
    }
    /// Omega_r today (photons plus massless neutrinos).
    pub fn omega_r(&self) -> f64 {
        (self.omega_gamma + self.omega_nu) / (self.p.h * self.p.h)
    }
    /// Omega_DE today (flatness).
    pub fn omega_de(&self) -> f64 {
        1.0 - self.omega_m() - self.omega_r()
    }
    /// Baryon fraction of the matter.
    pub fn baryon_fraction(&self) -> f64 {
        self.p.omega_b / self.omega_m_h2()
    }
    /// Dark-energy density relative to today, rho_DE(a)/rho_DE(1), CPL form.
    pub fn de_density_ratio(&self, a: f64) -> f64 {
        let (w0, wa) = (self.p.w0, self.p.wa);
        if w0 == -1.0 && wa == 0.0 {
            return 1.0;
        }
        a.powf(-3.0 * (1.0 + w0 + wa)) * (-3.0 * wa * (1.0 - a)).exp()
    }
    /// E(a)^2 = H(a)^2 / H0^2.
    pub fn e2_of_a(&self, a: f64) -> f64 {
        let a2 = a * a;
        self.omega_r() / (a2 * a2)
            + self.omega_m() / (a2 * a)
            + self.omega_de() * self.de_density_ratio(a)
    }
    /// d ln H / d ln a.
    pub fn dlnh_dlna(&self, a: f64) -> f64 {
        let a2 = a * a;
        let (w0, wa) = (self.p.w0, self.p.wa);
        let w = w0 + wa * (1.0 - a);
        let de = self.omega_de() * self.de_density_ratio(a);
        let num = -4.0 * self.omega_r() / (a2 * a2)
            - 3.0 * self.omega_m() / (a2 * a)
            - 3.0 * (1.0 + w) * de;
        0.5 * num / self.e2_of_a(a)
    }
    /// Scale factor of matter-radiation equality.
    pub fn a_equality(&self) -> f64 {
        self.omega_r() / self.omega_m()
    }
}

/// The `[cosmology]` table of an input file. Every key is optional; missing keys take the
/// Planck 2018 default.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CosmologyTable {
    /// Omega_b h^2.
    pub omega_b: Option<Spanned<f64>>,
    /// Omega_c h^2.
    pub omega_c: Option<Spanned<f64>>,
    /// h.
    pub h: Option<Spanned<f64>>,
    /// n_s.
    pub n_s: Option<Spanned<f64>>,
    /// A_s.
    #[serde(rename = "A_s")]
    pub a_s: Option<Spanned<f64>>,
    /// ln(10^10 A_s), instead of A_s.
    #[serde(rename = "ln10_10_A_s")]
    pub ln10_10_a_s: Option<Spanned<f64>>,
    /// Pivot in 1/Mpc.
    pub k_pivot_mpc: Option<Spanned<f64>>,
    /// Optical depth.
    pub tau_reio: Option<Spanned<f64>>,
    /// CMB temperature in K.
    #[serde(rename = "T_cmb_k")]
    pub t_cmb_k: Option<Spanned<f64>>,
    /// N_eff.
    #[serde(rename = "N_eff")]
    pub n_eff: Option<Spanned<f64>>,
    /// Helium mass fraction.
    #[serde(rename = "Y_He")]
    pub y_he: Option<Spanned<f64>>,
    /// w0.
    pub w0: Option<Spanned<f64>>,
    /// wa.
    pub wa: Option<Spanned<f64>>,
}

/// A file holding only a `[cosmology]` table.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CosmologyFile {
    /// The table.
    pub cosmology: CosmologyTable,
}

impl CosmologyTable {
    /// Resolves the table against the Planck 2018 defaults and validates it. `source` is
    /// the file it came from (for error positions).
    ///
    /// # Errors
    /// [`Error::OutOfRange`] or [`Error::Conflict`] located at the offending line.
    pub fn resolve(&self, source: &Source) -> Result<Cosmology> {
        let mut p = CosmoParams::planck2018();
        let get = |v: &Option<Spanned<f64>>, d: f64| v.as_ref().map_or(d, |s| *s.get_ref());
        p.omega_b = get(&self.omega_b, p.omega_b);
        p.omega_c = get(&self.omega_c, p.omega_c);
        p.h = get(&self.h, p.h);
        p.n_s = get(&self.n_s, p.n_s);
        p.k_pivot_mpc = get(&self.k_pivot_mpc, p.k_pivot_mpc);
        p.tau_reio = get(&self.tau_reio, p.tau_reio);
        p.t_cmb_k = get(&self.t_cmb_k, p.t_cmb_k);
        p.n_eff = get(&self.n_eff, p.n_eff);
        p.w0 = get(&self.w0, p.w0);
        p.wa = get(&self.wa, p.wa);
        match (&self.a_s, &self.ln10_10_a_s) {
            (Some(_), Some(ln)) => {
                return Err(Error::Conflict {
                    at: source.at(ln),
                    message: "give either `A_s` or `ln10_10_A_s`, not both".into(),
                });
            }
            (Some(a), None) => p.a_s = *a.get_ref(),
            (None, Some(ln)) => {
                let v = *ln.get_ref();
                if !(1.0..=5.0).contains(&v) {
                    return Err(Error::out_of_range(
                        source.at(ln),
                        "ln10_10_A_s",
                        v,
                        "1 <= ln10_10_A_s <= 5",
                    ));
                }
                p.a_s = v.exp() * 1e-10;
            }
            (None, None) => {}
        }
        p.y_he = match &self.y_he {
            Some(y) => *y.get_ref(),
            None => helium_bbn(p.omega_b, p.n_eff),
        };
        let whole = Location::WholeFile(source.path().to_path_buf());
        let at = |field: &str| -> Location {
            let span = match field {
                "omega_b" => &self.omega_b,
                "omega_c" => &self.omega_c,
                "h" => &self.h,
                "n_s" => &self.n_s,
                "A_s" => {
                    if self.a_s.is_some() {
                        &self.a_s
                    } else {
                        &self.ln10_10_a_s
                    }
                }
                "k_pivot_mpc" => &self.k_pivot_mpc,
                "tau_reio" => &self.tau_reio,
                "T_cmb_k" => &self.t_cmb_k,
                "N_eff" => &self.n_eff,
                "Y_He" => &self.y_he,
                "w0" => &self.w0,
                "wa" => &self.wa,
                _ => &None,
            };
            span.as_ref().map_or(whole.clone(), |s| source.at(s))
        };
        Cosmology::new_located(p, &at)
    }
}

/// Reads a cosmology from a TOML file with a `[cosmology]` table.
///
/// # Errors
/// I/O, syntax, unknown-key and range errors, each naming the file and line.
pub fn load_cosmology_file(path: &std::path::Path) -> Result<Cosmology> {
    let source = Source::read(path)?;
    let file: CosmologyFile = parse_toml(&source)?;
    file.cosmology.resolve(&source)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_is_planck_2018() {
        let c = Cosmology::planck2018();
        assert!((c.omega_m() - 0.31377).abs() < 1e-4, "{}", c.omega_m());
        assert!((c.params().a_s - 2.0989e-9).abs() < 1e-12);
        // The default helium rule gives the Planck 2018 BBN value at its omega_b.
        assert!(
            (c.params().y_he - 0.2454).abs() < 2e-4,
            "{}",
            c.params().y_he
        );
        assert!((c.e2_of_a(1.0) - 1.0).abs() < 1e-14);
    }

    #[test]
    fn dlnh_matches_finite_difference() {
        let mut p = CosmoParams::planck2018();
        p.w0 = -0.9;
        p.wa = 0.2;
        let c = Cosmology::new(p).unwrap();
        for &a in &[1e-5, 1e-3, 0.1, 0.5, 1.0] {
            let eps = 1e-5;
            let num = (c.e2_of_a(a * (1.0 + eps)).ln() - c.e2_of_a(a * (1.0 - eps)).ln())
                / (2.0 * ((1.0 + eps) / (1.0 - eps)).ln());
            assert!((num - c.dlnh_dlna(a)).abs() < 1e-7, "a={a}");
        }
    }

    #[test]
    fn table_overrides_and_conflicts() {
        let src = Source::from_text("c.toml", "[cosmology]\nh = 0.7\nln10_10_A_s = 3.0\n");
        let f: CosmologyFile = parse_toml(&src).unwrap();
        let c = f.cosmology.resolve(&src).unwrap();
        assert_eq!(c.h(), 0.7);
        assert!((c.params().a_s - 3.0_f64.exp() * 1e-10).abs() < 1e-20);
        let src = Source::from_text("c.toml", "[cosmology]\nA_s = 2e-9\nln10_10_A_s = 3.0\n");
        let f: CosmologyFile = parse_toml(&src).unwrap();
        let e = f.cosmology.resolve(&src).unwrap_err();
        assert!(e.to_string().contains("c.toml:3"), "{e}");
    }

    #[test]
    fn range_error_names_line() {
        let src = Source::from_text("c.toml", "[cosmology]\n\nh = -0.7\n");
        let f: CosmologyFile = parse_toml(&src).unwrap();
        let e = f.cosmology.resolve(&src).unwrap_err();
        let msg = e.to_string();
        assert!(
            msg.contains("c.toml:3") && msg.contains("`h`") && msg.contains("-0.7"),
            "{msg}"
        );
    }
}
