//! The homogeneous background: expansion rate, distances, conformal time, volumes.
//!
//! H(z) = H0 E(z), E^2 = Omega_r (1+z)^4 + Omega_m (1+z)^3 + Omega_DE f_DE(z) (flat;
//! photons plus massless neutrinos in Omega_r; CPL dark energy). The comoving distance
//! chi(a) = c Integral_a^1 da' / (a'^2 H(a')) and the conformal time
//! eta(a) = c Integral_0^a da' / (a'^2 H(a')) are tabulated once on a uniform grid in
//! ln a, by 8-point Gauss-Legendre per cell (exact to rounding for this smooth integrand),
//! and read back by cubic Hermite interpolation with the exact derivative
//! d chi / d ln a = -c / (a H). All lengths are in Mpc.

use crate::constants::{C_KM_S, FULL_SKY_DEG2};
use crate::cosmology::params::Cosmology;
use crate::numerics::{GaussLegendre, UniformHermite};

/// Smallest scale factor in the tables (z ~ 1e8, deep in radiation domination).
const LN_A_MIN: f64 = -18.5;
/// Cells of the ln a table.
const N_CELLS: usize = 6000;

/// Background quantities of one cosmology, tabulated.
#[derive(Debug, Clone)]
pub struct Background {
    cosmo: Cosmology,
    /// Conformal time eta(ln a) in Mpc.
    eta: UniformHermite,
    eta_today: f64,
}

impl Background {
    /// Tabulates the background.
    pub fn new(cosmo: &Cosmology) -> Self {
        let c = cosmo.clone();
        let dh = C_KM_S / c.h0_km_s_mpc();
        let integrand = |lna: f64| {
            let a = lna.exp();
            dh / (a * c.e2_of_a(a).sqrt())
        };
        let dx = -LN_A_MIN / N_CELLS as f64;
        let gl = GaussLegendre::new(8);
        // Below a_min the universe is radiation dominated: eta = a c / (H0 sqrt(Omega_r)).
        let a_min = LN_A_MIN.exp();
        let mut eta0 = a_min * dh / c.omega_r().sqrt();
        // First-order correction from matter: a^2 E = sqrt(Or) sqrt(1 + a/a_eq).
        eta0 *= 1.0 - 0.25 * a_min / c.a_equality();
        let mut y = Vec::with_capacity(N_CELLS + 1);
        let mut dy = Vec::with_capacity(N_CELLS + 1);
        let mut acc = eta0;
        for i in 0..=N_CELLS {
            let x = LN_A_MIN + i as f64 * dx;
            if i > 0 {
                acc += gl.integrate(x - dx, x, integrand);
            }
            y.push(acc);
            dy.push(integrand(x));
        }
        let eta_today = acc;
        let eta = UniformHermite::new(LN_A_MIN, dx, y, dy);
        Self {
            cosmo: c,
            eta,
            eta_today,
        }
    }

    /// The cosmology.
    pub fn cosmology(&self) -> &Cosmology {
        &self.cosmo
    }

    /// E(z) = H(z)/H0.
    pub fn e_of_z(&self, z: f64) -> f64 {
        self.cosmo.e2_of_a(1.0 / (1.0 + z)).sqrt()
    }

    /// H(z) in km/s/Mpc.
    pub fn hubble_km_s_mpc(&self, z: f64) -> f64 {
        self.cosmo.h0_km_s_mpc() * self.e_of_z(z)
    }

    /// H(z)/c in 1/Mpc.
    pub fn hubble_over_c_mpc(&self, z: f64) -> f64 {
        self.hubble_km_s_mpc(z) / C_KM_S
    }

    /// Conformal time (comoving horizon) at scale factor a, in Mpc.
    pub fn conformal_time_a(&self, a: f64) -> f64 {
        let lna = a.ln();
        if lna < LN_A_MIN {
            let dh = C_KM_S / self.cosmo.h0_km_s_mpc();
            return a * dh / self.cosmo.omega_r().sqrt()
                * (1.0 - 0.25 * a / self.cosmo.a_equality());
        }
        self.eta.eval(lna)
    }

    /// Conformal time at redshift z, in Mpc.
    pub fn conformal_time(&self, z: f64) -> f64 {
        self.conformal_time_a(1.0 / (1.0 + z))
    }

    /// Conformal time today, eta_0, in Mpc.
    pub fn conformal_age(&self) -> f64 {
        self.eta_today
    }

    /// Comoving (line-of-sight) distance to redshift z, in Mpc.
    pub fn comoving_distance(&self, z: f64) -> f64 {
        self.eta_today - self.conformal_time(z)
    }

    /// Angular-diameter distance to z, in Mpc (flat).
    pub fn angular_diameter_distance(&self, z: f64) -> f64 {
        self.comoving_distance(z) / (1.0 + z)
    }

    /// Luminosity distance to z, in Mpc.
    pub fn luminosity_distance(&self, z: f64) -> f64 {
        self.comoving_distance(z) * (1.0 + z)
    }

    /// Comoving volume between z1 and z2 over a sky fraction, in Mpc^3.
    pub fn comoving_volume_shell(&self, z1: f64, z2: f64, f_sky: f64) -> f64 {
        let (c1, c2) = (self.comoving_distance(z1), self.comoving_distance(z2));
        4.0 * std::f64::consts::PI / 3.0 * (c2.powi(3) - c1.powi(3)).abs() * f_sky
    }

    /// Comoving volume between z1 and z2 over an area in square degrees, in Mpc^3.
    pub fn comoving_volume_area(&self, z1: f64, z2: f64, area_deg2: f64) -> f64 {
        self.comoving_volume_shell(z1, z2, area_deg2 / FULL_SKY_DEG2)
    }

    /// Redshift at which the comoving distance equals `chi` (Mpc), by bisection on the
    /// monotonic table.
    pub fn z_of_comoving_distance(&self, chi: f64) -> f64 {
        let target = self.eta_today - chi;
        if target <= 0.0 {
            return f64::INFINITY;
        }
        let (mut lo, mut hi) = (LN_A_MIN - 20.0, 0.0_f64);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if self.conformal_time_a(mid.exp()) < target {
                lo = mid;
            } else {
                hi = mid;
            }
            if hi - lo < 1e-14 {
                break;
            }
        }
        1.0 / (0.5 * (lo + hi)).exp() - 1.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cosmology::params::CosmoParams;

    #[test]
    fn einstein_de_sitter_limit() {
        // Omega_m ~ 1 with negligible radiation: chi = 2 c/H0 (1 - 1/sqrt(1+z)).
        let mut p = CosmoParams::planck2018();
        p.h = 0.4;
        p.omega_c = 0.16 * 0.985 - p.omega_b;
        p.n_eff = 0.0;
        p.t_cmb_k = 1.0;
        let c = Cosmology::new(p).unwrap();
        let bg = Background::new(&c);
        let dh = C_KM_S / 40.0;
        for z in [0.5_f64, 2.0, 10.0] {
            let om = c.omega_m();
            // Compare with a direct high-order quadrature instead of the EdS formula, since
            // Omega_DE = 0.015 is not zero.
            let g = GaussLegendre::new(64);
            let direct = g.integrate(0.0, z, |zz| {
                dh / ((om * (1.0 + zz).powi(3) + c.omega_r() * (1.0 + zz).powi(4) + c.omega_de())
                    .sqrt())
            });
            let got = bg.comoving_distance(z);
            assert!((got / direct - 1.0).abs() < 1e-9, "z={z} {got} {direct}");
        }
    }

    #[test]
    fn inverse_distance() {
        let bg = Background::new(&Cosmology::planck2018());
        for z in [0.01, 0.7, 3.0, 1089.0] {
            let chi = bg.comoving_distance(z);
            let z2 = bg.z_of_comoving_distance(chi);
            assert!((z2 / z - 1.0).abs() < 1e-8, "{z} {z2}");
        }
    }

    #[test]
    fn volume_of_full_sky_shell() {
        let bg = Background::new(&Cosmology::planck2018());
        let v = bg.comoving_volume_area(0.0, 1.0, FULL_SKY_DEG2);
        let chi = bg.comoving_distance(1.0);
        assert!((v / (4.0 / 3.0 * std::f64::consts::PI * chi.powi(3)) - 1.0).abs() < 1e-12);
    }
}
