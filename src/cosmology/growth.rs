//! Linear growth of matter perturbations from the growth ODE.
//!
//! For pressureless matter on sub-horizon scales, with ' = d/d ln a,
//! D'' + (2 + d ln H / d ln a) D' - (3/2) Omega_m(a) D = 0, where H(a) holds matter,
//! radiation (photons and massless neutrinos, treated as smooth) and CPL dark energy. The
//! integration starts at a = 1e-6, deep in radiation domination, on the exact growing
//! mode of a matter-plus-radiation universe, D = a + (2/3) a_eq (Meszaros 1974; e.g.
//! Dodelson & Schmidt 2020, Sec. 8.3). So D/a -> 1 for a_eq << a << a_DE: this is the
//! "matter-domination" normalization that f_NL in the CMB convention uses
//! ([`Growth::d_md`]). [`Growth::d_norm0`] is D(z)/D(0), and [`Growth::rate`] is
//! f = d ln D / d ln a. Fixed-step RK4 on 12000 steps in ln a, then cubic Hermite look-up;
//! the step error is below 1e-12.

use crate::cosmology::params::Cosmology;
use crate::numerics::UniformHermite;

const LN_A_START: f64 = -13.815_510_557_964_274; // ln 1e-6
const N_STEPS: usize = 12_000;

/// The linear growth factor of one cosmology.
#[derive(Debug, Clone)]
pub struct Growth {
    d: UniformHermite,
    d_today: f64,
    a_eq: f64,
}

impl Growth {
    /// Solves the growth ODE.
    pub fn new(cosmo: &Cosmology) -> Self {
        let c = cosmo;
        let a_eq = c.a_equality();
        let rhs = |lna: f64, y: [f64; 2]| -> [f64; 2] {
            let a = lna.exp();
            let e2 = c.e2_of_a(a);
            let om_a = c.omega_m() / (a * a * a) / e2;
            [y[1], -(2.0 + c.dlnh_dlna(a)) * y[1] + 1.5 * om_a * y[0]]
        };
        let a0 = LN_A_START.exp();
        let mut y = [a0 + 2.0 / 3.0 * a_eq, a0];
        let h = -LN_A_START / N_STEPS as f64;
        let mut ys = Vec::with_capacity(N_STEPS + 1);
        let mut dys = Vec::with_capacity(N_STEPS + 1);
        ys.push(y[0]);
        dys.push(y[1]);
        for i in 0..N_STEPS {
            let x = LN_A_START + i as f64 * h;
            let k1 = rhs(x, y);
            let k2 = rhs(
                x + 0.5 * h,
                [y[0] + 0.5 * h * k1[0], y[1] + 0.5 * h * k1[1]],
            );
            let k3 = rhs(
                x + 0.5 * h,
                [y[0] + 0.5 * h * k2[0], y[1] + 0.5 * h * k2[1]],
            );
            let k4 = rhs(x + h, [y[0] + h * k3[0], y[1] + h * k3[1]]);
            for j in 0..2 {
                y[j] += h / 6.0 * (k1[j] + 2.0 * k2[j] + 2.0 * k3[j] + k4[j]);
            }
            ys.push(y[0]);
            dys.push(y[1]);
        }
        let d_today = y[0];
        Self {
            d: UniformHermite::new(LN_A_START, h, ys, dys),
            d_today,
            a_eq,
        }
    }

    /// D(z) normalized to a in matter domination (D -> a for a_eq << a << a_DE).
    pub fn d_md(&self, z: f64) -> f64 {
        let lna = -(1.0 + z).ln();
        if lna < LN_A_START {
            // Before the start the growing mode is the Meszaros solution itself.
            return lna.exp() + 2.0 / 3.0 * self.a_eq;
        }
        self.d.eval(lna)
    }

    /// D(z)/D(0).
    pub fn d_norm0(&self, z: f64) -> f64 {
        self.d_md(z) / self.d_today
    }

    /// D(0) in the matter-domination normalization (about 0.79 for Planck 2018).
    pub fn d_md_today(&self) -> f64 {
        self.d_today
    }

    /// Growth rate f(z) = d ln D / d ln a.
    pub fn rate(&self, z: f64) -> f64 {
        let lna = -(1.0 + z).ln();
        if lna < LN_A_START {
            let a = lna.exp();
            return a / (a + 2.0 / 3.0 * self.a_eq);
        }
        self.d.deriv(lna) / self.d.eval(lna)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cosmology::params::CosmoParams;

    #[test]
    fn matter_era_normalization() {
        let c = Cosmology::planck2018();
        let g = Growth::new(&c);
        // At z = 30: D/a = 1 + (2/3) a_eq / a up to a small dark-energy correction.
        let a = 1.0 / 31.0;
        let expect = 1.0 + 2.0 / 3.0 * c.a_equality() / a;
        assert!((g.d_md(30.0) / a / expect - 1.0).abs() < 2e-3);
        // g(0) = D(0)/a(0) is about 0.79 (1/1.27) for Omega_m = 0.31 (common practice).
        assert!((g.d_md_today() - 0.79).abs() < 0.01, "{}", g.d_md_today());
    }

    #[test]
    fn lcdm_integral_solution() {
        // Without radiation, D(a) = (5/2) Om E(a) Integral_0^a da'/(a' E)^3 (Heath 1977).
        let mut p = CosmoParams::planck2018();
        p.n_eff = 0.0;
        p.t_cmb_k = 1.0;
        let c = Cosmology::new(p).unwrap();
        let g = Growth::new(&c);
        let gl = crate::numerics::GaussLegendre::new(200);
        for z in [0.0_f64, 0.5, 1.0, 3.0] {
            let a = 1.0 / (1.0 + z);
            let e = |a: f64| c.e2_of_a(a).sqrt();
            let int = gl.integrate(0.0, a, |x| {
                if x == 0.0 {
                    0.0
                } else {
                    1.0 / (x * e(x)).powi(3)
                }
            });
            let heath = 2.5 * c.omega_m() * e(a) * int;
            assert!(
                (g.d_md(z) / heath - 1.0).abs() < 2e-4,
                "z={z} {} {heath}",
                g.d_md(z)
            );
        }
    }

    #[test]
    fn rate_is_log_derivative() {
        let g = Growth::new(&Cosmology::planck2018());
        for z in [0.0, 0.3, 2.0] {
            let eps = 1e-4_f64;
            let lnd = |zz: f64| g.d_md(zz).ln();
            let lna = |zz: f64| -(1.0_f64 + zz).ln();
            let num =
                (lnd(z + eps) - lnd((z - eps).max(0.0))) / (lna(z + eps) - lna((z - eps).max(0.0)));
            assert!((num - g.rate(z)).abs() < 1e-4, "z={z}");
        }
    }
}
