//! The primordial curvature and potential power spectra.
//!
//! Delta_zeta^2(k) = A_s (k/k_p)^(n_s - 1), P_zeta = 2 pi^2 Delta_zeta^2 / k^3; the Bardeen
//! potential in matter domination is Phi = (3/5) zeta, so P_Phi = (9/25) P_zeta. k in 1/Mpc.

use crate::cosmology::params::Cosmology;

/// The primordial power spectra of one cosmology.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Primordial {
    a_s: f64,
    n_s: f64,
    k_pivot: f64,
}

impl Primordial {
    /// From a cosmology's A_s, n_s and pivot.
    pub fn new(c: &Cosmology) -> Self {
        let p = c.params();
        Self {
            a_s: p.a_s,
            n_s: p.n_s,
            k_pivot: p.k_pivot_mpc,
        }
    }

    /// From explicit values (k_pivot in 1/Mpc).
    pub fn from_values(a_s: f64, n_s: f64, k_pivot: f64) -> Self {
        Self { a_s, n_s, k_pivot }
    }

    /// A_s.
    pub fn a_s(&self) -> f64 {
        self.a_s
    }
    /// n_s.
    pub fn n_s(&self) -> f64 {
        self.n_s
    }
    /// Pivot in 1/Mpc.
    pub fn k_pivot(&self) -> f64 {
        self.k_pivot
    }

    /// Dimensionless curvature power Delta_zeta^2(k).
    pub fn delta2_zeta(&self, k: f64) -> f64 {
        self.a_s * (k / self.k_pivot).powf(self.n_s - 1.0)
    }

    /// P_zeta(k) in Mpc^3.
    pub fn p_zeta(&self, k: f64) -> f64 {
        2.0 * std::f64::consts::PI * std::f64::consts::PI * self.delta2_zeta(k) / (k * k * k)
    }

    /// P_Phi(k) in Mpc^3, Phi = (3/5) zeta.
    pub fn p_phi(&self, k: f64) -> f64 {
        0.36 * self.p_zeta(k)
    }
}
