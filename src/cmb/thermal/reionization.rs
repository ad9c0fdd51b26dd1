//! Reionization: the tanh model and the search for its redshift from tau_reio.

use serde::Serialize;

use crate::error::{Error, Location, Result};
use crate::numerics::GaussLegendre;

use super::recombination::Physics;

// ---- reionization (common practice; Lewis 2008) ----

/// Width of hydrogen reionization in redshift at z_re.
pub const REIO_DELTA_Z: f64 = 0.5;
/// Redshift of helium's second reionization.
pub const HE_REIO_Z: f64 = 3.5;
/// Its width in redshift.
pub const HE_REIO_DELTA_Z: f64 = 0.5;
/// Search range for z_re.
const Z_RE_RANGE: (f64, f64) = (0.0, 50.0);

/// The reionization model and its solved redshift.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Reionization {
    /// False when tau_reio = 0: no reionization at all.
    pub enabled: bool,
    /// Midpoint redshift of hydrogen reionization (x_e = f/2), solved from tau_reio.
    pub z_re: f64,
    /// Width in redshift at z_re.
    pub delta_z: f64,
    /// Ionization after hydrogen reionization, electrons per H nucleus: 1 + f_He.
    pub fraction: f64,
    /// Redshift of helium's second reionization.
    pub z_he: f64,
    /// Its width in redshift.
    pub delta_z_he: f64,
    /// Helium to hydrogen number ratio f_He.
    pub f_he: f64,
    /// The optical depth of the reionization electrons (input).
    pub tau_reio: f64,
}

impl Reionization {
    pub(super) fn new(z_re: f64, f_he: f64, tau_reio: f64) -> Self {
        Self {
            enabled: true,
            z_re,
            delta_z: REIO_DELTA_Z,
            fraction: 1.0 + f_he,
            z_he: HE_REIO_Z,
            delta_z_he: HE_REIO_DELTA_Z,
            f_he,
            tau_reio,
        }
    }

    pub(super) fn disabled(f_he: f64) -> Self {
        Self {
            enabled: false,
            z_re: 0.0,
            tau_reio: 0.0,
            ..Self::new(0.0, f_he, 0.0)
        }
    }

    /// Weights of the two steps and their derivatives in ln a at redshift z:
    /// (w_H, dw_H/dlna, w_He, dw_He/dlna), w = [1 + tanh(...)]/2.
    pub(super) fn weights(&self, z: f64) -> (f64, f64, f64, f64) {
        if !self.enabled {
            return (0.0, 0.0, 0.0, 0.0);
        }
        let zp = 1.0 + z;
        let y = zp * zp.sqrt();
        let y_re = (1.0 + self.z_re).powf(1.5);
        let dy = 1.5 * (1.0 + self.z_re).sqrt() * self.delta_z;
        let u = (y_re - y) / dy;
        let th = u.tanh();
        let w = 0.5 * (1.0 + th);
        // du/dlna = -(dy/dlna)/Delta_y = 1.5 y / Delta_y.
        let dw = 0.5 * (1.0 - th * th) * 1.5 * y / dy;
        let uh = (self.z_he - z) / self.delta_z_he;
        let thh = uh.tanh();
        let wh = 0.5 * (1.0 + thh);
        let dwh = 0.5 * (1.0 - thh * thh) * zp / self.delta_z_he;
        (w, dw, wh, dwh)
    }

    /// Reionization electrons alone per H nucleus (no recombination residual).
    pub(super) fn electrons(&self, z: f64) -> f64 {
        let (w, _, wh, _) = self.weights(z);
        self.fraction * w + self.f_he * wh
    }

    /// Redshift above which the reionization terms are below 1e-10 of their size.
    pub(super) fn z_top(&self) -> f64 {
        let y_re = (1.0 + self.z_re).powf(1.5);
        let dy = 1.5 * (1.0 + self.z_re).sqrt() * self.delta_z;
        ((y_re + 12.0 * dy).powf(2.0 / 3.0) - 1.0).max(self.z_he + 12.0 * self.delta_z_he)
    }
}

/// Optical depth of the reionization electrons alone for a given model.
fn reionization_depth(phys: &Physics, r: &Reionization, gl: &GaussLegendre) -> f64 {
    let top = r.z_top();
    let n = (top / 0.1).ceil().max(1.0) as usize;
    let w = top / n as f64;
    let mut s = 0.0;
    for k in 0..n {
        let lo = k as f64 * w;
        s += gl.integrate(lo, lo + w, |z| {
            let zp = 1.0 + z;
            // d tau = kappa0 x (1+z)^2 d_H dz / E.
            phys.kappa0 * phys.d_h * r.electrons(z) * zp * zp / phys.e_of_a(1.0 / zp)
        });
    }
    s
}

/// Finds z_re for the input optical depth (Illinois false position on a bracket).
pub(super) fn solve_reionization(
    phys: &Physics,
    tau_reio: f64,
    gl: &GaussLegendre,
) -> Result<Reionization> {
    if tau_reio == 0.0 {
        return Ok(Reionization::disabled(phys.f_he));
    }
    let f = |z_re: f64| {
        reionization_depth(phys, &Reionization::new(z_re, phys.f_he, tau_reio), gl) - tau_reio
    };
    let (mut a, mut b) = Z_RE_RANGE;
    let (mut fa, mut fb) = (f(a), f(b));
    if fa > 0.0 || fb < 0.0 {
        return Err(Error::out_of_range(
            Location::Builtin,
            "reionization_optical_depth",
            tau_reio,
            &format!(
                "0 (no reionization) or {:.5} <= reionization_optical_depth <= {:.4} (z_re between {} and {})",
                fa + tau_reio,
                fb + tau_reio,
                Z_RE_RANGE.0,
                Z_RE_RANGE.1
            ),
        ));
    }
    let mut side = 0;
    let mut z = 0.5 * (a + b);
    for _ in 0..200 {
        z = (a * fb - b * fa) / (fb - fa);
        let fz = f(z);
        if fz.abs() < 1e-13 || (b - a) < 1e-10 {
            break;
        }
        if fz * fb > 0.0 {
            b = z;
            fb = fz;
            if side == -1 {
                fa *= 0.5;
            }
            side = -1;
        } else {
            a = z;
            fa = fz;
            if side == 1 {
                fb *= 0.5;
            }
            side = 1;
        }
    }
    if !z.is_finite() {
        return Err(Error::Numerical {
            stage: "reionization",
            message: "z_re search diverged".into(),
        });
    }
    Ok(Reionization::new(z, phys.f_he, tau_reio))
}
