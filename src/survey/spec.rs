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
//! is converted to Mpc.

use serde::Deserialize;
use toml::Spanned;

use crate::constants::FULL_SKY_DEG2;
use crate::cosmology::{Background, Growth, LinearPower};
use crate::error::{Error, Location, Result};
use crate::input::Source;
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

/// The smallest survey area accepted, deg^2 (below it no Fourier mode of interest fits).
pub const MIN_AREA_DEG2: f64 = 0.1;

/// The largest |b2| and |b_s2| accepted (observed tracers have |b2| of a few).
pub const MAX_ABS_HIGHER_BIAS: f64 = 50.0;

/// The largest number density accepted, h^3 Mpc^-3 (far above any tracer; large values
/// stand for the noise-free limit).
pub const MAX_NBAR_H3_MPC3: f64 = 1e3;

fn positive(v: f64, at: Location, field: &str, allowed: &str) -> Result<()> {
    if v.is_finite() && v > 0.0 {
        Ok(())
    } else {
        Err(Error::out_of_range(at, field, v, allowed))
    }
}

impl SurveyTable {
    /// Resolves the table with the background and growth of a cosmology.
    ///
    /// # Errors
    /// Located input errors.
    pub fn resolve(&self, src: &Source, bg: &Background, growth: &Growth) -> Result<Survey> {
        let h = bg.cosmology().h();
        let f_sky = match (&self.area_deg2, &self.f_sky) {
            (Some(_), Some(f)) => {
                return Err(Error::Conflict {
                    at: src.at(f),
                    message: "give either `area_deg2` or `f_sky`, not both".into(),
                });
            }
            (Some(a), None) => {
                let v = *a.get_ref();
                if !(MIN_AREA_DEG2..=FULL_SKY_DEG2 * (1.0 + 1e-9)).contains(&v) {
                    return Err(Error::out_of_range(
                        src.at(a),
                        "area_deg2",
                        v,
                        "0.1 <= area_deg2 <= 41253",
                    ));
                }
                v / FULL_SKY_DEG2
            }
            (None, Some(f)) => {
                let v = *f.get_ref();
                if !(MIN_AREA_DEG2 / FULL_SKY_DEG2..=1.0).contains(&v) {
                    return Err(Error::out_of_range(
                        src.at(f),
                        "f_sky",
                        v,
                        "2.5e-6 <= f_sky <= 1 (0.1 deg^2 to the full sky)",
                    ));
                }
                v
            }
            (None, None) => {
                return Err(Error::BadField {
                    at: src.locate_span(&self.z_edges.span()),
                    field: "area_deg2".into(),
                    message: "the survey needs `area_deg2` or `f_sky`".into(),
                });
            }
        };
        let edges = self.z_edges.get_ref();
        let at_edges = src.at(&self.z_edges);
        if edges.len() < 2 {
            return Err(Error::BadField {
                at: at_edges,
                field: "z_edges".into(),
                message: "give at least two edges (one bin)".into(),
            });
        }
        for w in edges.windows(2) {
            if !(w[0] >= 0.0 && w[1] > w[0] && w[1] <= 10.0) {
                return Err(Error::BadField {
                    at: at_edges,
                    field: "z_edges".into(),
                    message: format!(
                        "edges must increase strictly within 0 <= z <= 10; found {} then {}",
                        w[0], w[1]
                    ),
                });
            }
        }
        let bins: Vec<RedshiftBin> = edges
            .windows(2)
            .map(|w| {
                let v = bg.comoving_volume_shell(w[0], w[1], f_sky);
                RedshiftBin {
                    z_min: w[0],
                    z_max: w[1],
                    z_eff: volume_weighted_z(bg, w[0], w[1]),
                    volume_mpc3: v,
                }
            })
            .collect();
        if self.tracer.is_empty() {
            return Err(Error::BadField {
                at: at_edges,
                field: "tracer".into(),
                message: "add at least one [[survey.tracer]] table".into(),
            });
        }
        if self.tracer.len() > crate::survey::linalg::MAX_TRACERS {
            return Err(Error::BadField {
                at: at_edges,
                field: "tracer".into(),
                message: format!(
                    "{} tracers given; at most {} share a volume",
                    self.tracer.len(),
                    crate::survey::linalg::MAX_TRACERS
                ),
            });
        }
        let mut tracers: Vec<Tracer> = Vec::new();
        for (ti, t) in self.tracer.iter().enumerate() {
            let tr = resolve_tracer(t, ti, src, &bins, growth, h, f_sky)?;
            if tracers.iter().any(|o| o.name == tr.name) {
                return Err(Error::BadField {
                    at: src.find_key("survey.tracer", "name"),
                    field: "tracer.name".into(),
                    message: format!(
                        "two tracers are named `{}`; give each its own name",
                        tr.name
                    ),
                });
            }
            tracers.push(tr);
        }
        let p = &self.priors;
        for (field, v) in [
            ("b1", p.b1),
            ("b2", p.b2),
            ("bs2", p.bs2),
            ("p_shot", p.p_shot),
            ("b_shot", p.b_shot),
            ("b_shot_p", p.b_shot_p),
        ] {
            if let Some(x) = v {
                if !(x.is_finite() && x > 0.0) {
                    return Err(Error::out_of_range(
                        src.find_key("survey.priors", field),
                        &format!("priors.{field}"),
                        x,
                        "a prior width (standard deviation) > 0 and finite",
                    ));
                }
            }
        }
        let opt = |v: &Option<Spanned<f64>>,
                   d: f64,
                   field: &str,
                   lo: f64,
                   hi: f64,
                   allowed: &str|
         -> Result<f64> {
            match v {
                None => Ok(d),
                Some(s) => {
                    let x = *s.get_ref();
                    if x.is_finite() && x >= lo && x <= hi {
                        Ok(x)
                    } else {
                        Err(Error::out_of_range(src.at(s), field, x, allowed))
                    }
                }
            }
        };
        let redshift_error = opt(
            &self.redshift_error,
            0.0,
            "redshift_error",
            0.0,
            0.5,
            "0 <= redshift_error <= 0.5",
        )?;
        let sigma_v = opt(
            &self.velocity_dispersion_km_s,
            0.0,
            "velocity_dispersion_km_s",
            0.0,
            3000.0,
            "0 to 3000 km/s",
        )?;
        let kmin = match &self.kmin_h_mpc {
            None => None,
            Some(s) => Some(
                opt(
                    &Some(s.clone()),
                    0.0,
                    "kmin_h_mpc",
                    1e-5,
                    1.0,
                    "1e-5 <= kmin_h_mpc <= 1",
                )? * h,
            ),
        };
        let kmax = opt(
            &self.kmax_h_mpc,
            0.2,
            "kmax_h_mpc",
            1e-3,
            5.0,
            "1e-3 <= kmax_h_mpc <= 5",
        )? * h;
        if let (Some(lo), Some(s)) = (kmin, &self.kmin_h_mpc) {
            if lo >= kmax {
                return Err(Error::Conflict {
                    at: src.at(s),
                    message: format!(
                        "kmin_h_mpc = {} is not below kmax_h_mpc = {}: no Fourier modes would remain",
                        lo / h,
                        kmax / h
                    ),
                });
            }
        }
        let sigma_nl = opt(
            &self.sigma_nl,
            0.5,
            "sigma_nl",
            0.05,
            2.0,
            "0.05 <= sigma_nl <= 2",
        )?;
        let kmax_tree = opt(
            &self.kmax_tree_h_mpc,
            DEFAULT_KMAX_TREE_H_MPC,
            "kmax_tree_h_mpc",
            1e-3,
            5.0,
            "1e-3 <= kmax_tree_h_mpc <= 5",
        )? * h;
        // Overlapping photometric bins are not independent volumes: refuse them.
        if let Some(re) = &self.redshift_error {
            for b in &bins {
                let ratio = redshift_error * (1.0 + b.z_eff) / (b.z_max - b.z_min);
                if ratio > MAX_PHOTO_Z_OVER_WIDTH {
                    return Err(Error::BadField {
                        at: src.at(re),
                        field: "redshift_error".into(),
                        message: format!(
                            "bin z = {}-{}: sigma_z (1 + z) = {:.3} is {:.2} of the bin width (more than {MAX_PHOTO_Z_OVER_WIDTH}); the bins would overlap and are not independent volumes. Use wider bins or a smaller redshift_error",
                            b.z_min,
                            b.z_max,
                            redshift_error * (1.0 + b.z_eff),
                            ratio
                        ),
                    });
                }
            }
        }
        Ok(Survey {
            name: self
                .name
                .clone()
                .unwrap_or_else(|| src.path().display().to_string()),
            f_sky,
            bins,
            tracers,
            redshift_error,
            velocity_dispersion_km_s: sigma_v,
            kmin_mpc: kmin,
            kmax_rule: self.kmax_rule.unwrap_or(KmaxRule::Fixed),
            kmax_default_mpc: kmax,
            sigma_nl,
            kmax_tree_mpc: kmax_tree,
            covariance: self.covariance.unwrap_or_default(),
            response: self.response.unwrap_or_default(),
            real_space: self.real_space,
            nuisance: self.nuisance,
            priors: self.priors,
        })
    }
}

/// Volume-weighted mean redshift of a shell (double-exponential quadrature of the
/// `quadrature` crate; the weight chi^2 / H is smooth, so 1e-12 is reached quickly).
fn volume_weighted_z(bg: &Background, z0: f64, z1: f64) -> f64 {
    let w = |z: f64| {
        let chi = bg.comoving_distance(z);
        chi * chi / bg.hubble_over_c_mpc(z)
    };
    let norm = quadrature::integrate(w, z0, z1, 1e-12 * w(0.5 * (z0 + z1)) * (z1 - z0)).integral;
    let first = quadrature::integrate(|z| z * w(z), z0, z1, 1e-12 * w(0.5 * (z0 + z1)) * (z1 - z0))
        .integral;
    first / norm
}

fn per_bin(v: &Spanned<PerBin>, n: usize, field: &str, src: &Source) -> Result<Vec<f64>> {
    match v.get_ref() {
        PerBin::One(x) => Ok(vec![*x; n]),
        PerBin::Many(xs) if xs.len() == n => Ok(xs.clone()),
        PerBin::Many(xs) => Err(Error::BadField {
            at: src.at(v),
            field: field.into(),
            message: format!(
                "{} values given for {n} redshift bins; give one number or one per bin",
                xs.len()
            ),
        }),
    }
}

#[allow(clippy::too_many_arguments)] // all are needed to convert per-bin tracer inputs
fn resolve_tracer(
    t: &TracerTable,
    ti: usize,
    src: &Source,
    bins: &[RedshiftBin],
    growth: &Growth,
    h: f64,
    f_sky: f64,
) -> Result<Tracer> {
    let n = bins.len();
    let name = t
        .name
        .clone()
        .unwrap_or_else(|| format!("tracer {}", ti + 1));
    let whole = || Location::WholeFile(src.path().to_path_buf());
    let nbar_mpc3: Vec<f64> = match (&t.nbar_h3_mpc3, &t.surface_density_deg2) {
        (Some(_), Some(s)) => {
            return Err(Error::Conflict {
                at: src.at(s),
                message: format!(
                    "tracer `{name}`: give `nbar_h3_mpc3` or `surface_density_deg2`, not both"
                ),
            });
        }
        (Some(v), None) => per_bin(v, n, "nbar_h3_mpc3", src)?
            .iter()
            .map(|x| x * h.powi(3))
            .collect(),
        (None, Some(s)) => {
            let dens = per_bin(s, n, "surface_density_deg2", src)?;
            bins.iter()
                .zip(&dens)
                .map(|(b, d)| d * (b.z_max - b.z_min) * f_sky * FULL_SKY_DEG2 / b.volume_mpc3)
                .collect()
        }
        (None, None) => {
            return Err(Error::BadField {
                at: whole(),
                field: "nbar_h3_mpc3".into(),
                message: format!("tracer `{name}` needs `nbar_h3_mpc3` or `surface_density_deg2`"),
            });
        }
    };
    let at_n = t
        .nbar_h3_mpc3
        .as_ref()
        .or(t.surface_density_deg2.as_ref())
        .map_or_else(whole, |s| src.at(s));
    for &x in &nbar_mpc3 {
        if !(x.is_finite() && x > 0.0 && x / h.powi(3) <= MAX_NBAR_H3_MPC3) {
            return Err(Error::out_of_range(
                at_n.clone(),
                "nbar_h3_mpc3",
                x / h.powi(3),
                "0 < nbar <= 1000 h^3 Mpc^-3",
            ));
        }
    }
    let b1: Vec<f64> = match (&t.b1, &t.b0) {
        (Some(_), Some(b0)) => {
            return Err(Error::Conflict {
                at: src.at(b0),
                message: format!("tracer `{name}`: give `b1` or `b0`, not both"),
            });
        }
        (Some(v), None) => per_bin(v, n, "b1", src)?,
        (None, Some(b0)) => bins
            .iter()
            .map(|b| b0.get_ref() / growth.d_norm0(b.z_eff))
            .collect(),
        (None, None) => {
            return Err(Error::BadField {
                at: whole(),
                field: "b1".into(),
                message: format!("tracer `{name}` needs `b1` (per bin) or `b0` (b1 = b0 / D(z))"),
            });
        }
    };
    let at_b =
        t.b1.as_ref()
            .map(|s| src.at(s))
            .or(t.b0.as_ref().map(|s| src.at(s)))
            .unwrap_or_else(whole);
    for &x in &b1 {
        if !(x.is_finite() && x > 0.0 && x < 20.0) {
            return Err(Error::out_of_range(at_b.clone(), "b1", x, "0 < b1 < 20"));
        }
    }
    let b2 = match &t.b2 {
        Some(v) => per_bin(v, n, "b2", src)?,
        None => b1.iter().map(|&b| bias::b2_lazeyras(b)).collect(),
    };
    let bs2 = match &t.bs2 {
        Some(v) => per_bin(v, n, "bs2", src)?,
        None => b1.iter().map(|&b| bias::bs2_local_lagrangian(b)).collect(),
    };
    for (field, vals, spanned) in [("b2", &b2, &t.b2), ("bs2", &bs2, &t.bs2)] {
        for &x in vals.iter() {
            if !(x.is_finite() && x.abs() <= MAX_ABS_HIGHER_BIAS) {
                let at = spanned.as_ref().map_or_else(whole, |s| src.at(s));
                return Err(Error::out_of_range(at, field, x, "|b| <= 50"));
            }
        }
    }
    let p = match &t.p {
        Some(s) => {
            let v = *s.get_ref();
            if !(v.is_finite() && (0.0..=3.0).contains(&v)) {
                return Err(Error::out_of_range(src.at(s), "p", v, "0 <= p <= 3"));
            }
            v
        }
        None => 1.0,
    };
    Ok(Tracer {
        name,
        p,
        bins: (0..n)
            .map(|i| TracerBin {
                nbar_mpc3: nbar_mpc3[i],
                b1: b1[i],
                b2: b2[i],
                bs2: bs2[i],
                b_phi: bias::b_phi(b1[i], p),
            })
            .collect(),
    })
}
