//! Resolving a `[survey]` table into a [`Survey`]: every check of the inputs (with the
//! file, line and field of a bad value) and the conversion to Mpc units, per redshift bin
//! and tracer.

use toml::Spanned;

use super::{
    DEFAULT_KMAX_TREE_H_MPC, KmaxRule, MAX_PHOTO_Z_OVER_WIDTH, PerBin, RedshiftBin, Survey,
    SurveyTable, Tracer, TracerBin, TracerTable,
};
use crate::constants::FULL_SKY_DEG2;
use crate::cosmology::{Background, Growth};
use crate::error::{Error, Location, Result};
use crate::input::Source;
use crate::survey::bias;

/// The smallest survey area accepted, deg^2 (below it no Fourier mode of interest fits).
pub const MIN_AREA_DEG2: f64 = 0.1;

/// The largest |b2| and |b_s2| accepted (observed tracers have |b2| of a few).
pub const MAX_ABS_HIGHER_BIAS: f64 = 50.0;

/// The largest number density accepted, h^3 Mpc^-3 (far above any tracer; large values
/// stand for the noise-free limit).
pub const MAX_NBAR_H3_MPC3: f64 = 1e3;

pub(super) fn positive(v: f64, at: Location, field: &str, allowed: &str) -> Result<()> {
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
            if let Some(x) = v
                && !(x.is_finite() && x > 0.0)
            {
                return Err(Error::out_of_range(
                    src.find_key("survey.priors", field),
                    &format!("priors.{field}"),
                    x,
                    "a prior width (standard deviation) > 0 and finite",
                ));
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
        if let (Some(lo), Some(s)) = (kmin, &self.kmin_h_mpc)
            && lo >= kmax
        {
            return Err(Error::Conflict {
                at: src.at(s),
                message: format!(
                    "kmin_h_mpc = {} is not below kmax_h_mpc = {}: no Fourier modes would remain",
                    lo / h,
                    kmax / h
                ),
            });
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
