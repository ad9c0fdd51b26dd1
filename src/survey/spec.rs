//! Survey descriptions: the `[survey]` TOML table, its validation, and the one-line quick
//! mode.
//!
//! A survey covers a sky fraction and is cut into redshift bins by their edges. One or
//! more tracers share the volume; per bin each tracer has a comoving number density (or a
//! surface density that is converted to one), a linear bias b1 (per bin, or
//! b1(z) = b0 / D(z)), a second-order bias b2 and a tidal bias b_s2 (defaults from
//! published relations, see [`crate::survey::bias`]), and the response p of its
//! non-Gaussian bias b_phi = 2 delta_c (b1 - p). Redshift errors sigma_z (1+z) and a
//! velocity dispersion damp the field along the line of sight.
//!
//! Units at this edge are the trade's: nbar in h^3 Mpc^-3, k in h/Mpc, areas in deg^2,
//! surface densities in deg^-2 per unit redshift, velocities in km/s. Inside, everything
//! is converted to Mpc. The checks and the conversion are in [`resolve`].

use serde::Deserialize;
use toml::Spanned;

use crate::cosmology::LinearPower;
use crate::error::{Error, Location, Result};
use crate::survey::bias;
use crate::survey::covariance::CovarianceModel;

/// Default validity of the tree-level model, h/Mpc (common practice for tree-level
/// bispectrum forecasts at z ~ 1, from memory).
pub const DEFAULT_KMAX_TREE_H_MPC: f64 = 0.3;

/// Largest sigma_z (1 + z_eff) / (bin width) for which bins are treated as independent
/// volumes: a Gaussian redshift error of this size moves about 0.8 sigma_z / width = 16%
/// of a bin's galaxies into its neighbours.
pub const MAX_PHOTO_Z_OVER_WIDTH: f64 = 0.2;

/// A number or one number per redshift bin.
#[derive(Debug, Clone, Deserialize)]
#[serde(untagged)]
pub enum PerBin {
    /// The same value in every bin.
    One(f64),
    /// One value per bin.
    Many(Vec<f64>),
}

/// How the maximum wavenumber depends on redshift.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum KmaxRule {
    /// The same k_max (h/Mpc) in every bin.
    Fixed,
    /// k_max(z) = k_max(0) D(0)/D(z) (the nonlinear scale recedes as the growth falls;
    /// common practice).
    Growth,
    /// k_max(z) capped where sigma(R = pi / (2 k), z) of the linear field reaches
    /// `sigma_nl` (common practice; sigma = 0.5 as in Sefusatti & Komatsu 2007, from memory).
    Sigma,
}

/// The `[[survey.tracer]]` table.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TracerTable {
    /// A label.
    pub name: Option<String>,
    /// Comoving number density per bin, h^3 Mpc^-3.
    pub nbar_h3_mpc3: Option<Spanned<PerBin>>,
    /// Surface density per unit redshift, deg^-2 (dN / dz / dOmega), per bin.
    pub surface_density_deg2: Option<Spanned<PerBin>>,
    /// Linear bias per bin.
    pub b1: Option<Spanned<PerBin>>,
    /// b1(z) = b0 / D(z), D normalized to 1 today.
    pub b0: Option<Spanned<f64>>,
    /// Second-order bias per bin (delta_g contains (b2/2) delta^2).
    pub b2: Option<Spanned<PerBin>>,
    /// Tidal bias per bin (Z2 contains b_s2 S2, S2 = mu_12^2 - 1/3).
    pub bs2: Option<Spanned<PerBin>>,
    /// Non-Gaussian bias response: b_phi = 2 delta_c (b1 - p).
    pub p: Option<Spanned<f64>>,
}

/// Which nuisance parameters are free (all by default).
#[derive(Debug, Clone, Copy, Deserialize, serde::Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct NuisanceSwitches {
    /// Linear bias per bin and tracer.
    #[serde(default = "yes")]
    pub b1: bool,
    /// Second-order bias per bin (bispectrum).
    #[serde(default = "yes")]
    pub b2: bool,
    /// Tidal bias per bin (bispectrum).
    #[serde(default = "yes")]
    pub bs2: bool,
    /// Power-spectrum shot-noise amplitude per bin and tracer.
    #[serde(default = "yes")]
    pub p_shot: bool,
    /// Bispectrum shot-noise amplitude of the 1/nbar^2 term per bin.
    #[serde(default = "yes")]
    pub b_shot: bool,
    /// Bispectrum shot-noise amplitude of the P_i/nbar term per bin, free of the P
    /// shot-noise amplitude (false: fixed at its Poisson value 1, the idealized model).
    #[serde(default = "yes")]
    pub b_shot_p: bool,
}

fn yes() -> bool {
    true
}

impl NuisanceSwitches {
    /// Every nuisance fixed at its fiducial value (the idealized case, for oracles and
    /// budgets that say so).
    pub fn all_fixed() -> Self {
        Self {
            b1: false,
            b2: false,
            bs2: false,
            p_shot: false,
            b_shot: false,
            b_shot_p: false,
        }
    }
}

impl Default for NuisanceSwitches {
    fn default() -> Self {
        Self {
            b1: true,
            b2: true,
            bs2: true,
            p_shot: true,
            b_shot: true,
            b_shot_p: true,
        }
    }
}

/// Gaussian priors (1-sigma widths) on the nuisances, applied in every bin.
#[derive(Debug, Clone, Copy, Default, Deserialize, serde::Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct NuisancePriors {
    /// On b1.
    pub b1: Option<f64>,
    /// On b2.
    pub b2: Option<f64>,
    /// On b_s2.
    pub bs2: Option<f64>,
    /// On the P shot-noise amplitude (fiducial 1).
    pub p_shot: Option<f64>,
    /// On the B shot-noise amplitude of the 1/nbar^2 term (fiducial 1).
    pub b_shot: Option<f64>,
    /// On the B shot-noise amplitude of the P_i/nbar term (fiducial 1).
    pub b_shot_p: Option<f64>,
}

/// The `[survey]` table.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SurveyTable {
    /// A label.
    pub name: Option<String>,
    /// Sky area in deg^2 (or `f_sky`, not both).
    pub area_deg2: Option<Spanned<f64>>,
    /// Sky fraction.
    pub f_sky: Option<Spanned<f64>>,
    /// Redshift bin edges, increasing.
    pub z_edges: Spanned<Vec<f64>>,
    /// Redshift error sigma_z / (1 + z) (0 for spectroscopic).
    pub redshift_error: Option<Spanned<f64>>,
    /// Pairwise velocity dispersion for Fingers-of-God damping, km/s.
    pub velocity_dispersion_km_s: Option<Spanned<f64>>,
    /// Smallest wavenumber, h/Mpc (default: the bin's fundamental mode 2 pi / V^(1/3)).
    pub kmin_h_mpc: Option<Spanned<f64>>,
    /// How k_max depends on redshift.
    pub kmax_rule: Option<KmaxRule>,
    /// Default k_max in h/Mpc when no `--kmax` list is given.
    pub kmax_h_mpc: Option<Spanned<f64>>,
    /// For the `sigma` rule (and the nonlinear-scale warning): the rms of the linear
    /// field at which to stop.
    pub sigma_nl: Option<Spanned<f64>>,
    /// Validity of the tree-level model, h/Mpc: every bin's k_max is capped here
    /// (default 0.3).
    pub kmax_tree_h_mpc: Option<Spanned<f64>>,
    /// Covariance model: "realistic" (default) or "gaussian".
    pub covariance: Option<CovarianceModel>,
    /// Non-Gaussian bias response: "full-shape" (default) or "squeezed-cut".
    pub response: Option<crate::survey::ResponseModel>,
    /// Real space (no redshift-space distortions).
    #[serde(default)]
    pub real_space: bool,
    /// The tracers.
    pub tracer: Vec<TracerTable>,
    /// Free nuisances.
    #[serde(default)]
    pub nuisance: NuisanceSwitches,
    /// Priors on the nuisances.
    #[serde(default)]
    pub priors: NuisancePriors,
}

/// A file with a `[survey]` table and an optional `[cosmology]` table.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SurveyFile {
    /// The survey.
    pub survey: SurveyTable,
    /// Optional cosmology for stand-alone use.
    pub cosmology: Option<crate::cosmology::CosmologyTable>,
}

/// One redshift bin.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct RedshiftBin {
    /// Lower edge.
    pub z_min: f64,
    /// Upper edge.
    pub z_max: f64,
    /// Effective redshift (volume-weighted mean).
    pub z_eff: f64,
    /// Comoving volume in Mpc^3.
    pub volume_mpc3: f64,
}

/// One tracer in one bin, resolved.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct TracerBin {
    /// Comoving number density, Mpc^-3.
    pub nbar_mpc3: f64,
    /// Linear bias.
    pub b1: f64,
    /// Second-order bias.
    pub b2: f64,
    /// Tidal bias (Z2 convention b_s2 S2).
    pub bs2: f64,
    /// Non-Gaussian bias response b_phi = 2 delta_c (b1 - p).
    pub b_phi: f64,
}

/// A tracer over all bins.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Tracer {
    /// Label.
    pub name: String,
    /// p in b_phi = 2 delta_c (b1 - p).
    pub p: f64,
    /// Per-bin values.
    pub bins: Vec<TracerBin>,
}

/// A validated survey in internal units (Mpc).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Survey {
    /// Label.
    pub name: String,
    /// Sky fraction.
    pub f_sky: f64,
    /// Redshift bins.
    pub bins: Vec<RedshiftBin>,
    /// Tracers (at least one).
    pub tracers: Vec<Tracer>,
    /// sigma_z / (1 + z).
    pub redshift_error: f64,
    /// Velocity dispersion, km/s.
    pub velocity_dispersion_km_s: f64,
    /// k_min override in 1/Mpc.
    pub kmin_mpc: Option<f64>,
    /// k_max rule.
    pub kmax_rule: KmaxRule,
    /// Default k_max in 1/Mpc.
    pub kmax_default_mpc: f64,
    /// sigma threshold for the `sigma` rule and the nonlinear-scale warning.
    pub sigma_nl: f64,
    /// Cap on every bin's k_max (validity of the tree-level model), 1/Mpc.
    pub kmax_tree_mpc: f64,
    /// Covariance model.
    pub covariance: CovarianceModel,
    /// Non-Gaussian bias response model.
    pub response: crate::survey::ResponseModel,
    /// No redshift-space distortions.
    pub real_space: bool,
    /// Free nuisances.
    pub nuisance: NuisanceSwitches,
    /// Nuisance priors.
    pub priors: NuisancePriors,
}

impl Survey {
    /// The one-bin survey of the quick mode: a volume in (Gpc/h)^3 at redshift z with one
    /// tracer of density nbar (h^3 Mpc^-3) and bias b1.
    ///
    /// # Errors
    /// Out-of-range values, attributed to their flags.
    pub fn quick(
        volume_gpc3_h3: f64,
        z: f64,
        nbar_h3: f64,
        b1: f64,
        real_space: bool,
        h: f64,
    ) -> Result<Self> {
        let flag = |f: &str| Location::Flag(f.to_string());
        positive(
            volume_gpc3_h3,
            flag("--volume"),
            "volume",
            "volume > 0 (Gpc/h)^3",
        )?;
        if !(z.is_finite() && (0.0..=10.0).contains(&z)) {
            return Err(Error::out_of_range(flag("--z"), "z", z, "0 <= z <= 10"));
        }
        positive(
            nbar_h3,
            flag("--nbar"),
            "nbar",
            "0 < nbar <= 1000 h^3 Mpc^-3",
        )?;
        if nbar_h3 > MAX_NBAR_H3_MPC3 {
            return Err(Error::out_of_range(
                flag("--nbar"),
                "nbar",
                nbar_h3,
                "0 < nbar <= 1000 h^3 Mpc^-3",
            ));
        }
        if !(b1.is_finite() && b1 > 0.0 && b1 < 20.0) {
            return Err(Error::out_of_range(flag("--b1"), "b1", b1, "0 < b1 < 20"));
        }
        let vol = volume_gpc3_h3 * 1e9 / h.powi(3);
        Ok(Self {
            name: "quick".into(),
            f_sky: 1.0,
            bins: vec![RedshiftBin {
                z_min: z,
                z_max: z,
                z_eff: z,
                volume_mpc3: vol,
            }],
            tracers: vec![Tracer {
                name: "tracer".into(),
                p: 1.0,
                bins: vec![TracerBin {
                    nbar_mpc3: nbar_h3 * h.powi(3),
                    b1,
                    b2: bias::b2_lazeyras(b1),
                    bs2: bias::bs2_local_lagrangian(b1),
                    b_phi: bias::b_phi(b1, 1.0),
                }],
            }],
            redshift_error: 0.0,
            velocity_dispersion_km_s: 0.0,
            kmin_mpc: None,
            kmax_rule: KmaxRule::Fixed,
            kmax_default_mpc: 0.2 * h,
            sigma_nl: 0.5,
            kmax_tree_mpc: DEFAULT_KMAX_TREE_H_MPC * h,
            covariance: CovarianceModel::default(),
            response: crate::survey::ResponseModel::default(),
            real_space,
            nuisance: NuisanceSwitches::default(),
            priors: NuisancePriors::default(),
        })
    }

    /// k_max in 1/Mpc for a bin, given the requested k_max (1/Mpc) and the linear power:
    /// the rule's value, capped at the validity of the tree-level model.
    pub fn kmax_for_bin(&self, requested_mpc: f64, bin: &RedshiftBin, power: &LinearPower) -> f64 {
        let k = match self.kmax_rule {
            KmaxRule::Fixed => requested_mpc,
            KmaxRule::Growth => requested_mpc / power.growth().d_norm0(bin.z_eff),
            KmaxRule::Sigma => requested_mpc.min(k_nonlinear(power, bin.z_eff, self.sigma_nl)),
        };
        k.min(self.kmax_tree_mpc)
    }

    /// True when the requested k_max is the value at z = 0 and bins scale it with z.
    pub fn kmax_scales_with_z(&self) -> bool {
        self.kmax_rule == KmaxRule::Growth
    }
}

/// The wavenumber (1/Mpc) at which sigma(R = pi / (2 k), z) reaches `sigma_nl`.
pub fn k_nonlinear(power: &LinearPower, z: f64, sigma_nl: f64) -> f64 {
    let (mut lo, mut hi) = (1e-3_f64.ln(), 10.0_f64.ln());
    for _ in 0..60 {
        let mid = 0.5 * (lo + hi);
        let k = mid.exp();
        if power.sigma_r(std::f64::consts::FRAC_PI_2 / k, z) < sigma_nl {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    (0.5 * (lo + hi)).exp()
}

mod resolve;

use resolve::positive;
pub use resolve::{MAX_ABS_HIGHER_BIAS, MAX_NBAR_H3_MPC3, MIN_AREA_DEG2};
