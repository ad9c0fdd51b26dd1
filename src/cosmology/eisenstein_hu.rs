//! Eisenstein & Hu (1998) matter transfer function, with baryon acoustic features, and its
//! zero-baryon-oscillation ("no-wiggle") form.
//!
//! Eisenstein, D. J. & Hu, W. 1998, ApJ 496, 605 (astro-ph/9709112): Eqs. (2)-(24) for the
//! full fit, Eqs. (26), (28)-(31) for the no-wiggle form. Wavenumbers in 1/Mpc. The fit's
//! own drag redshift and sound horizon (z_d ~ 1020, s ~ 150 Mpc at Planck parameters)
//! differ from a Boltzmann code's by design; they are internal to the fit.

use crate::cosmology::params::Cosmology;

/// Precomputed coefficients of the Eisenstein-Hu fit for one cosmology.
#[derive(Debug, Clone)]
pub struct EisensteinHu {
    omh2: f64,
    f_b: f64,
    f_c: f64,
    theta: f64,
    k_eq: f64,
    z_eq: f64,
    z_d: f64,
    s: f64,
    k_silk: f64,
    alpha_c: f64,
    beta_c: f64,
    alpha_b: f64,
    beta_b: f64,
    beta_node: f64,
    // no-wiggle
    alpha_gamma: f64,
    s_nw: f64,
    h: f64,
}

impl EisensteinHu {
    /// Builds the fit from the cosmology's omega_b, omega_c, h and T_CMB.
    pub fn new(c: &Cosmology) -> Self {
        let omh2 = c.omega_m_h2();
        let obh2 = c.omega_b_h2();
        let f_b = obh2 / omh2;
        let f_c = c.omega_c_h2() / omh2;
        let theta = c.params().t_cmb_k / 2.7;
        let th2 = theta * theta;
        let th4 = th2 * th2;
        // Eq. (2), (3)
        let z_eq = 2.50e4 * omh2 / th4;
        let k_eq = 7.46e-2 * omh2 / th2;
        // Eq. (4)
        let b1 = 0.313 * omh2.powf(-0.419) * (1.0 + 0.607 * omh2.powf(0.674));
        let b2 = 0.238 * omh2.powf(0.223);
        let z_d = 1291.0 * omh2.powf(0.251) / (1.0 + 0.659 * omh2.powf(0.828))
            * (1.0 + b1 * obh2.powf(b2));
        // Eq. (5)
        let r_of = |z: f64| 31.5 * obh2 / th4 * (1000.0 / z);
        let r_d = r_of(z_d);
        let r_eq = r_of(z_eq);
        // Eq. (6)
        let s = 2.0 / (3.0 * k_eq)
            * (6.0 / r_eq).sqrt()
            * (((1.0 + r_d).sqrt() + (r_d + r_eq).sqrt()) / (1.0 + r_eq.sqrt())).ln();
        // Eq. (7)
        let k_silk = 1.6 * obh2.powf(0.52) * omh2.powf(0.73) * (1.0 + (10.4 * omh2).powf(-0.95));
        // Eq. (11)
        let a1 = (46.9 * omh2).powf(0.670) * (1.0 + (32.1 * omh2).powf(-0.532));
        let a2 = (12.0 * omh2).powf(0.424) * (1.0 + (45.0 * omh2).powf(-0.582));
        let alpha_c = a1.powf(-f_b) * a2.powf(-f_b.powi(3));
        // Eq. (12)
        let bb1 = 0.944 / (1.0 + (458.0 * omh2).powf(-0.708));
        let bb2 = (0.395 * omh2).powf(-0.0266);
        let beta_c = 1.0 / (1.0 + bb1 * (f_c.powf(bb2) - 1.0));
        // Eq. (14), (15)
        let y = (1.0 + z_eq) / (1.0 + z_d);
        let sq = (1.0 + y).sqrt();
        let g_y = y * (-6.0 * sq + (2.0 + 3.0 * y) * ((sq + 1.0) / (sq - 1.0)).ln());
        let alpha_b = 2.07 * k_eq * s * (1.0 + r_d).powf(-0.75) * g_y;
        // Eq. (24), (23)
        let beta_b = 0.5 + f_b + (3.0 - 2.0 * f_b) * ((17.2 * omh2).powi(2) + 1.0).sqrt();
        let beta_node = 8.41 * omh2.powf(0.435);
        // Eq. (31), (26)
        let alpha_gamma =
            1.0 - 0.328 * (431.0 * omh2).ln() * f_b + 0.38 * (22.3 * omh2).ln() * f_b * f_b;
        let s_nw = 44.5 * (9.83 / omh2).ln() / (1.0 + 10.0 * obh2.powf(0.75)).sqrt();
        Self {
            omh2,
            f_b,
            f_c,
            theta,
            k_eq,
            z_eq,
            z_d,
            s,
            k_silk,
            alpha_c,
            beta_c,
            alpha_b,
            beta_b,
            beta_node,
            alpha_gamma,
            s_nw,
            h: c.h(),
        }
    }

    /// The fit's drag redshift z_d (Eq. 4).
    pub fn z_drag(&self) -> f64 {
        self.z_d
    }

    /// The fit's sound horizon at the drag epoch in Mpc (Eq. 6).
    pub fn sound_horizon_mpc(&self) -> f64 {
        self.s
    }

    /// Matter-radiation equality redshift of the fit (Eq. 2).
    pub fn z_equality(&self) -> f64 {
        self.z_eq
    }

    /// Equality wavenumber in 1/Mpc (Eq. 3).
    pub fn k_equality_mpc(&self) -> f64 {
        self.k_eq
    }

    /// Eq. (19)-(20): the pressureless transfer shape.
    fn t0_tilde(&self, k: f64, alpha: f64, beta: f64) -> f64 {
        let q = k / (13.41 * self.k_eq);
        let l = (std::f64::consts::E + 1.8 * beta * q).ln();
        let c = 14.2 / alpha + 386.0 / (1.0 + 69.9 * q.powf(1.08));
        l / (l + c * q * q)
    }

    /// Full transfer function T(k) with baryon oscillations, k in 1/Mpc (Eq. 16).
    pub fn transfer(&self, k: f64) -> f64 {
        if k <= 0.0 {
            return 1.0;
        }
        let ks = k * self.s;
        // CDM part, Eq. (17)-(18)
        let f = 1.0 / (1.0 + (ks / 5.4).powi(4));
        let t_c = f * self.t0_tilde(k, 1.0, self.beta_c)
            + (1.0 - f) * self.t0_tilde(k, self.alpha_c, self.beta_c);
        // Baryon part, Eq. (21)-(22)
        let s_tilde = self.s / (1.0 + (self.beta_node / ks).powi(3)).cbrt();
        let x = k * s_tilde;
        let j0 = if x.abs() < 1e-6 {
            1.0 - x * x / 6.0
        } else {
            x.sin() / x
        };
        let t_b = (self.t0_tilde(k, 1.0, 1.0) / (1.0 + (ks / 5.2).powi(2))
            + self.alpha_b / (1.0 + (self.beta_b / ks).powi(3))
                * (-(k / self.k_silk).powf(1.4)).exp())
            * j0;
        self.f_b * t_b + self.f_c * t_c
    }

    /// No-wiggle transfer function, k in 1/Mpc (Eq. 29-31 with the shape parameter of
    /// Eq. 30).
    pub fn transfer_no_wiggle(&self, k: f64) -> f64 {
        if k <= 0.0 {
            return 1.0;
        }
        let omh = self.omh2 / self.h; // Omega_m h
        let gamma_eff = omh
            * (self.alpha_gamma
                + (1.0 - self.alpha_gamma) / (1.0 + (0.43 * k * self.s_nw).powi(4)));
        let q = k / self.h * self.theta * self.theta / gamma_eff;
        let l0 = (2.0 * std::f64::consts::E + 1.8 * q).ln();
        let c0 = 14.2 + 731.0 / (1.0 + 62.5 * q);
        l0 / (l0 + c0 * q * q)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn large_scale_limit_and_shape() {
        let eh = EisensteinHu::new(&Cosmology::planck2018());
        assert!((eh.transfer(1e-6) - 1.0).abs() < 1e-4);
        assert!((eh.transfer_no_wiggle(1e-6) - 1.0).abs() < 1e-4);
        // Wiggles oscillate about the no-wiggle curve by at most ~10% in 0.05-0.3/Mpc.
        for i in 0..100 {
            let k = 0.05 + 0.0025 * i as f64;
            let r = eh.transfer(k) / eh.transfer_no_wiggle(k);
            assert!((r - 1.0).abs() < 0.1, "k={k} r={r}");
        }
        // The fit's sound horizon is ~150 Mpc at Planck parameters (see conventions).
        assert!(
            (eh.sound_horizon_mpc() - 150.0).abs() < 3.0,
            "{}",
            eh.sound_horizon_mpc()
        );
    }
}
