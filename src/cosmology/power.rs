//! The linear matter power spectrum, normalized from A_s.
//!
//! delta_m(k, z) = M(k, z) Phi(k), with M(k, z) = (2/3) k^2 T(k) D(z) / (Omega_m H0^2)
//! (c = 1, D normalized to a in matter domination, T(k -> 0) = 1), so
//! P_m(k, z) = M(k, z)^2 P_Phi(k). This is the standard Poisson-equation normalization
//! (e.g. Dalal et al. 2008, Eq. 6). sigma(R, z) is the rms of the linear field in a
//! top-hat sphere of radius R. Lengths in Mpc, wavenumbers in 1/Mpc.

use crate::cosmology::eisenstein_hu::EisensteinHu;
use crate::cosmology::growth::Growth;
use crate::cosmology::params::Cosmology;
use crate::cosmology::primordial::Primordial;
use crate::numerics::{CubicSpline, GaussLegendre};

/// Which matter transfer function to use.
#[derive(Debug, Clone)]
pub enum Transfer {
    /// Eisenstein & Hu (1998) with baryon features.
    EisensteinHu(EisensteinHu),
    /// Eisenstein & Hu (1998) no-wiggle form.
    NoWiggle(EisensteinHu),
    /// A tabulated T(k) (from a Boltzmann solution): spline of T in ln k, k in 1/Mpc;
    /// T = 1 below the table, power-law continuation above it.
    Table(CubicSpline),
}

impl Transfer {
    /// T(k), k in 1/Mpc.
    pub fn eval(&self, k: f64) -> f64 {
        match self {
            Transfer::EisensteinHu(eh) => eh.transfer(k),
            Transfer::NoWiggle(eh) => eh.transfer_no_wiggle(k),
            Transfer::Table(s) => {
                let lk = k.ln();
                let xs = s.xs();
                if lk <= xs[0] {
                    s.eval(xs[0])
                } else if lk >= xs[xs.len() - 1] {
                    let last = xs[xs.len() - 1];
                    let slope = s.deriv(last) / s.eval(last);
                    s.eval(last) * ((lk - last) * slope).exp()
                } else {
                    s.eval(lk)
                }
            }
        }
    }

    /// A short name for output headers.
    pub fn name(&self) -> &'static str {
        match self {
            Transfer::EisensteinHu(_) => "eisenstein-hu",
            Transfer::NoWiggle(_) => "eisenstein-hu-no-wiggle",
            Transfer::Table(_) => "boltzmann",
        }
    }
}

/// Linear matter power at any redshift.
#[derive(Debug, Clone)]
pub struct LinearPower {
    transfer: Transfer,
    growth: Growth,
    primordial: Primordial,
    /// Omega_m (H0/c)^2 in 1/Mpc^2.
    om_h0sq: f64,
    h: f64,
}

impl LinearPower {
    /// Eisenstein-Hu linear power for a cosmology.
    pub fn eisenstein_hu(c: &Cosmology) -> Self {
        Self::with_transfer(c, Transfer::EisensteinHu(EisensteinHu::new(c)))
    }

    /// Linear power with a chosen transfer function.
    pub fn with_transfer(c: &Cosmology, transfer: Transfer) -> Self {
        let h0 = c.h0_over_c_mpc();
        Self {
            transfer,
            growth: Growth::new(c),
            primordial: Primordial::new(c),
            om_h0sq: c.omega_m() * h0 * h0,
            h: c.h(),
        }
    }

    /// The transfer function in use.
    pub fn transfer(&self) -> &Transfer {
        &self.transfer
    }

    /// The growth factor in use.
    pub fn growth(&self) -> &Growth {
        &self.growth
    }

    /// The primordial spectrum.
    pub fn primordial(&self) -> &Primordial {
        &self.primordial
    }

    /// M(k, z) = (2/3) k^2 T(k) D_md(z) / (Omega_m H0^2), k in 1/Mpc (dimensionless).
    pub fn m_factor(&self, k: f64, z: f64) -> f64 {
        2.0 / 3.0 * k * k * self.transfer.eval(k) * self.growth.d_md(z) / self.om_h0sq
    }

    /// P_m(k, z) in Mpc^3, k in 1/Mpc.
    pub fn p_mpc(&self, k: f64, z: f64) -> f64 {
        let m = self.m_factor(k, z);
        m * m * self.primordial.p_phi(k)
    }

    /// P_m in (Mpc/h)^3 for k in h/Mpc.
    pub fn p_hmpc(&self, k_h: f64, z: f64) -> f64 {
        self.p_mpc(k_h * self.h, z) * self.h.powi(3)
    }

    /// sigma(R, z) for a top-hat of radius R in Mpc.
    pub fn sigma_r(&self, r_mpc: f64, z: f64) -> f64 {
        let gl = GaussLegendre::new(12);
        let (lo, hi) = ((1e-6_f64).ln(), (400.0 / r_mpc).ln());
        let n_panels = 600;
        let d = (hi - lo) / n_panels as f64;
        let mut s = 0.0;
        for i in 0..n_panels {
            let a = lo + i as f64 * d;
            s += gl.integrate(a, a + d, |lk| {
                let k = lk.exp();
                let w = top_hat(k * r_mpc);
                k * k * k * self.p_mpc(k, z) * w * w
            });
        }
        (s / (2.0 * std::f64::consts::PI * std::f64::consts::PI)).sqrt()
    }

    /// sigma_8 at redshift z (R = 8 Mpc/h).
    pub fn sigma8(&self, z: f64) -> f64 {
        self.sigma_r(8.0 / self.h, z)
    }
}

/// Fourier transform of the top-hat window, 3 (sin x - x cos x) / x^3.
pub fn top_hat(x: f64) -> f64 {
    if x < 1e-3 {
        let x2 = x * x;
        1.0 - x2 / 10.0 + x2 * x2 / 280.0
    } else {
        3.0 * (x.sin() - x * x.cos()) / (x * x * x)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn top_hat_is_continuous() {
        let a = top_hat(0.999e-3);
        let b = top_hat(1.001e-3);
        assert!((a - b).abs() < 1e-9);
    }

    #[test]
    fn sigma8_planck_is_plausible() {
        // Planck 2018 quotes 0.811 with massive neutrinos; EH with massless ones gives
        // a value within a few percent (the precise check against camb is in tests/).
        let p = LinearPower::eisenstein_hu(&Cosmology::planck2018());
        let s8 = p.sigma8(0.0);
        assert!((s8 - 0.82).abs() < 0.03, "{s8}");
        let ratio = p.sigma8(1.0) / s8;
        assert!((ratio - p.growth().d_norm0(1.0)).abs() < 1e-10);
    }

    #[test]
    fn m_factor_is_poisson_equation() {
        let c = Cosmology::planck2018();
        let p = LinearPower::eisenstein_hu(&c);
        // At k -> 0, M = (2/3) k^2 D / (Omega_m H0^2).
        let k = 1e-5;
        let h0 = c.h0_over_c_mpc();
        let expect = 2.0 / 3.0 * k * k * p.growth().d_md(0.0) / (c.omega_m() * h0 * h0);
        assert!((p.m_factor(k, 0.0) / expect - 1.0).abs() < 1e-4);
    }
}
