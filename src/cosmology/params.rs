//! Cosmological parameters: the validated [`Cosmology`] and its `[cosmology]` TOML table.
//!
//! The model is flat, with cold dark matter, baryons, photons, `N_eff` massless neutrino
//! species and dark energy with the CPL equation of state w(a) = w0 + wa (1 - a)
//! (Chevallier & Polarski 2001; Linder 2003). Densities are physical: `baryon_density_h2`
//! = Omega_b h^2, `cdm_density_h2` = Omega_c h^2.
//!
//! The `[cosmology]` keys of input files (and the same names in JSON echoes) are our own,
//! descriptive, with units where they have one:
//!
//! | key | meaning |
//! |---|---|
//! | `baryon_density_h2` | Omega_b h^2 |
//! | `cdm_density_h2` | Omega_c h^2 |
//! | `hubble_constant_km_s_mpc` | H0 in km/s/Mpc |
//! | `spectral_index` | n_s |
//! | `scalar_amplitude` | A_s at the pivot |
//! | `ln_1e10_scalar_amplitude` | ln(10^10 A_s), instead of `scalar_amplitude` |
//! | `pivot_k_per_mpc` | pivot wavenumber in 1/Mpc |
//! | `reionization_optical_depth` | Thomson optical depth to reionization |
//! | `cmb_temperature_k` | T_CMB today in kelvin |
//! | `effective_neutrino_number` | N_eff (massless species) |
//! | `helium_mass_fraction` | Y_He (default: the BBN rule below) |
//! | `dark_energy_w0`, `dark_energy_wa` | CPL w0, wa |
//!
//! The default is the Planck 2018 base-LCDM best fit for TT,TE,EE+lowE+lensing
//! (Planck Collaboration VI 2020, A&A 641, A6, Table 2, last column but one), with the
//! one massive neutrino of that fit replaced by massless ones (N_eff = 3.046), so our
//! Omega_m = 0.3138 rather than the quoted 0.3153.
//!
//! Helium: when `helium_mass_fraction` is not given, it follows the linear BBN fit
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
#[derive(Debug, Clone, Copy, PartialEq)]
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
    pub a_s: f64,
    /// Pivot scale in 1/Mpc.
    pub k_pivot_mpc: f64,
    /// Reionization optical depth.
    pub tau_reio: f64,
    /// CMB temperature today in kelvin.
    pub t_cmb_k: f64,
    /// Effective number of massless neutrino species.
    pub n_eff: f64,
    /// Primordial helium mass fraction.
    pub y_he: f64,
    /// Dark-energy equation of state today.
    pub w0: f64,
    /// Its derivative in the CPL form w = w0 + wa (1 - a).
    pub wa: f64,
}

/// JSON echoes use the input-file key names (module docs), so that an echoed block can be
/// pasted back into a `[cosmology]` table.
impl serde::Serialize for CosmoParams {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        use serde::ser::SerializeStruct;
        let mut m = s.serialize_struct("cosmology", 12)?;
        m.serialize_field("baryon_density_h2", &self.omega_b)?;
        m.serialize_field("cdm_density_h2", &self.omega_c)?;
        m.serialize_field("hubble_constant_km_s_mpc", &(100.0 * self.h))?;
        m.serialize_field("spectral_index", &self.n_s)?;
        m.serialize_field("scalar_amplitude", &self.a_s)?;
        m.serialize_field("pivot_k_per_mpc", &self.k_pivot_mpc)?;
        m.serialize_field("reionization_optical_depth", &self.tau_reio)?;
        m.serialize_field("cmb_temperature_k", &self.t_cmb_k)?;
        m.serialize_field("effective_neutrino_number", &self.n_eff)?;
        m.serialize_field("helium_mass_fraction", &self.y_he)?;
        m.serialize_field("dark_energy_w0", &self.w0)?;
        m.serialize_field("dark_energy_wa", &self.wa)?;
        m.end()
    }
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
        check(
            "baryon_density_h2",
            p.omega_b,
            1e-3,
            0.1,
            "0.001 <= baryon_density_h2 <= 0.1",
        )?;
        check(
            "cdm_density_h2",
            p.omega_c,
            0.0,
            0.6,
            "0 <= cdm_density_h2 <= 0.6",
        )?;
        check(
            "hubble_constant_km_s_mpc",
            100.0 * p.h,
            20.0,
            150.0,
            "20 <= hubble_constant_km_s_mpc <= 150",
        )?;
        if !(p.n_s > 0.5 && p.n_s < 1.5) {
            return Err(Error::out_of_range(
                at("spectral_index"),
                "spectral_index",
                p.n_s,
                "0.5 < spectral_index < 1.5",
            ));
        }
        check(
            "scalar_amplitude",
            p.a_s,
            1e-11,
            1e-7,
            "1e-11 <= scalar_amplitude <= 1e-7",
        )?;
        check(
            "pivot_k_per_mpc",
            p.k_pivot_mpc,
            1e-4,
            10.0,
            "1e-4 <= pivot_k_per_mpc <= 10 (1/Mpc)",
        )?;
        check(
            "reionization_optical_depth",
            p.tau_reio,
            0.0,
            0.3,
            "0 <= reionization_optical_depth <= 0.3",
        )?;
        check(
            "cmb_temperature_k",
            p.t_cmb_k,
            1.0,
            5.0,
            "1 <= cmb_temperature_k <= 5 (kelvin)",
        )?;
        check(
            "effective_neutrino_number",
            p.n_eff,
            0.0,
            10.0,
            "0 <= effective_neutrino_number <= 10",
        )?;
        check(
            "helium_mass_fraction",
            p.y_he,
            0.0,
            0.5,
            "0 <= helium_mass_fraction <= 0.5",
        )?;
        check(
            "dark_energy_w0",
            p.w0,
            -3.0,
            -1.0 / 3.0,
            "-3 <= dark_energy_w0 <= -1/3",
        )?;
        check(
            "dark_energy_wa",
            p.wa,
            -3.0,
            3.0,
            "-3 <= dark_energy_wa <= 3",
        )?;
        if p.w0 + p.wa >= 0.0 {
            return Err(Error::Conflict {
                at: at("dark_energy_wa"),
                message: format!(
                    "dark_energy_w0 + dark_energy_wa = {} must be negative, or dark energy dominates at early times",
                    p.w0 + p.wa
                ),
            });
        }
        let omega_gamma = constants::omega_gamma(p.t_cmb_k);
        let omega_nu = NEUTRINO_PER_SPECIES * p.n_eff * omega_gamma;
        let om = (p.omega_b + p.omega_c + omega_gamma + omega_nu) / (p.h * p.h);
        if om >= 0.99 {
            return Err(Error::Conflict {
                at: at("hubble_constant_km_s_mpc"),
                message: format!(
                    "Omega_m + Omega_r = {om:.4} leaves no dark energy in a flat universe; \
                     lower baryon_density_h2/cdm_density_h2 or raise hubble_constant_km_s_mpc"
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
    pub baryon_density_h2: Option<Spanned<f64>>,
    /// Omega_c h^2.
    pub cdm_density_h2: Option<Spanned<f64>>,
    /// H0 in km/s/Mpc.
    pub hubble_constant_km_s_mpc: Option<Spanned<f64>>,
    /// n_s.
    pub spectral_index: Option<Spanned<f64>>,
    /// A_s.
    pub scalar_amplitude: Option<Spanned<f64>>,
    /// ln(10^10 A_s), instead of A_s.
    pub ln_1e10_scalar_amplitude: Option<Spanned<f64>>,
    /// Pivot in 1/Mpc.
    pub pivot_k_per_mpc: Option<Spanned<f64>>,
    /// Reionization optical depth.
    pub reionization_optical_depth: Option<Spanned<f64>>,
    /// CMB temperature in K.
    pub cmb_temperature_k: Option<Spanned<f64>>,
    /// N_eff.
    pub effective_neutrino_number: Option<Spanned<f64>>,
    /// Helium mass fraction.
    pub helium_mass_fraction: Option<Spanned<f64>>,
    /// CPL w0.
    pub dark_energy_w0: Option<Spanned<f64>>,
    /// CPL wa.
    pub dark_energy_wa: Option<Spanned<f64>>,
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
        p.omega_b = get(&self.baryon_density_h2, p.omega_b);
        p.omega_c = get(&self.cdm_density_h2, p.omega_c);
        p.h = get(&self.hubble_constant_km_s_mpc, 100.0 * p.h) / 100.0;
        p.n_s = get(&self.spectral_index, p.n_s);
        p.k_pivot_mpc = get(&self.pivot_k_per_mpc, p.k_pivot_mpc);
        p.tau_reio = get(&self.reionization_optical_depth, p.tau_reio);
        p.t_cmb_k = get(&self.cmb_temperature_k, p.t_cmb_k);
        p.n_eff = get(&self.effective_neutrino_number, p.n_eff);
        p.w0 = get(&self.dark_energy_w0, p.w0);
        p.wa = get(&self.dark_energy_wa, p.wa);
        match (&self.scalar_amplitude, &self.ln_1e10_scalar_amplitude) {
            (Some(_), Some(ln)) => {
                return Err(Error::Conflict {
                    at: source.at(ln),
                    message:
                        "give either `scalar_amplitude` or `ln_1e10_scalar_amplitude`, not both"
                            .into(),
                });
            }
            (Some(a), None) => p.a_s = *a.get_ref(),
            (None, Some(ln)) => {
                let v = *ln.get_ref();
                if !(1.0..=5.0).contains(&v) {
                    return Err(Error::out_of_range(
                        source.at(ln),
                        "ln_1e10_scalar_amplitude",
                        v,
                        "1 <= ln_1e10_scalar_amplitude <= 5",
                    ));
                }
                p.a_s = v.exp() * 1e-10;
            }
            (None, None) => {}
        }
        p.y_he = match &self.helium_mass_fraction {
            Some(y) => *y.get_ref(),
            None => helium_bbn(p.omega_b, p.n_eff),
        };
        let whole = Location::WholeFile(source.path().to_path_buf());
        let at = |field: &str| -> Location {
            let span = match field {
                "baryon_density_h2" => &self.baryon_density_h2,
                "cdm_density_h2" => &self.cdm_density_h2,
                "hubble_constant_km_s_mpc" => &self.hubble_constant_km_s_mpc,
                "spectral_index" => &self.spectral_index,
                "scalar_amplitude" => {
                    if self.scalar_amplitude.is_some() {
                        &self.scalar_amplitude
                    } else {
                        &self.ln_1e10_scalar_amplitude
                    }
                }
                "pivot_k_per_mpc" => &self.pivot_k_per_mpc,
                "reionization_optical_depth" => &self.reionization_optical_depth,
                "cmb_temperature_k" => &self.cmb_temperature_k,
                "effective_neutrino_number" => &self.effective_neutrino_number,
                "helium_mass_fraction" => &self.helium_mass_fraction,
                "dark_energy_w0" => &self.dark_energy_w0,
                "dark_energy_wa" => &self.dark_energy_wa,
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
        let src = Source::from_text(
            "c.toml",
            "[cosmology]\nhubble_constant_km_s_mpc = 70.0\nln_1e10_scalar_amplitude = 3.0\n",
        );
        let f: CosmologyFile = parse_toml(&src).unwrap();
        let c = f.cosmology.resolve(&src).unwrap();
        assert!((c.h() - 0.7).abs() < 1e-15);
        assert!((c.params().a_s - 3.0_f64.exp() * 1e-10).abs() < 1e-20);
        let src = Source::from_text(
            "c.toml",
            "[cosmology]\nscalar_amplitude = 2e-9\nln_1e10_scalar_amplitude = 3.0\n",
        );
        let f: CosmologyFile = parse_toml(&src).unwrap();
        let e = f.cosmology.resolve(&src).unwrap_err();
        assert!(e.to_string().contains("c.toml:3"), "{e}");
    }

    #[test]
    fn range_error_names_line() {
        let src = Source::from_text(
            "c.toml",
            "[cosmology]\n\nhubble_constant_km_s_mpc = -70.0\n",
        );
        let f: CosmologyFile = parse_toml(&src).unwrap();
        let e = f.cosmology.resolve(&src).unwrap_err();
        let msg = e.to_string();
        assert!(
            msg.contains("c.toml:3")
                && msg.contains("`hubble_constant_km_s_mpc`")
                && msg.contains("-70"),
            "{msg}"
        );
    }
}
