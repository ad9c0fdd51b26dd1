//! The background and thermal quantities that the perturbation equations read, tabulated
//! once on a uniform grid in u = ln(eta) for O(1) look-up inside the right-hand sides.
//!
//! Per node: ln a with its exact derivative d ln a / d ln eta = eta aH, ln of the opacity
//! kappa' = d tau / d eta = n_e sigma_T a, the baryon sound speed squared c_s^2, each read
//! back by cubic Hermite interpolation. The derivatives of ln kappa' and c_s^2 are
//! fourth-order finite differences of the node values (the thermal tables are smooth on
//! this grid: the steepest feature, the reionization step, spans ~15 nodes).
//!
//! The baryon sound speed (e.g. Ma & Bertschinger 1995, Eq. 68) is
//! c_s^2 = (k_B T_b / mu c^2) (1 - (1/3) d ln T_b / d ln a), with mu the mean mass per
//! particle: mu = m_H (1 + f_He m_He/m_H) / (1 + f_He + x_e).

use rayon::prelude::*;

use crate::cmb::ThermalHistory;
use crate::constants::{C_M_S, HE_TO_H_MASS, K_BOLTZMANN, M_HYDROGEN};
use crate::cosmology::{Background, Cosmology};
use crate::error::{Error, Result};
use crate::numerics::uniform_derivatives;

/// Earliest tabulated conformal time, Mpc (a ~ 2e-9).
pub(crate) const ETA_MIN: f64 = 1.0e-3;
/// Nodes of the ln eta grid.
const N_NODES: usize = 12_000;

/// Background densities and rates at one conformal time.
#[derive(Debug, Clone, Copy)]
pub(crate) struct BackgroundAt {
    /// Conformal Hubble rate aH, 1/Mpc.
    pub hub: f64,
    /// Its derivative d(aH)/d eta, 1/Mpc^2.
    pub dhub: f64,
    /// (8 pi G / 3) a^2 rho for CDM, baryons, photons, neutrinos, 1/Mpc^2.
    pub rho_c: f64,
    /// Baryons.
    pub rho_b: f64,
    /// Photons.
    pub rho_g: f64,
    /// Massless neutrinos.
    pub rho_n: f64,
    /// Opacity kappa' = d tau / d eta, 1/Mpc.
    pub kappa: f64,
    /// d ln kappa' / d eta, 1/Mpc.
    pub dln_kappa: f64,
    /// Baryon sound speed squared (c = 1).
    pub cs2: f64,
    /// d c_s^2 / d eta, 1/Mpc.
    pub dcs2: f64,
    /// R = 4 rho_gamma / (3 rho_b) (Ma & Bertschinger's convention).
    pub r: f64,
}

/// Tables on the ln eta grid.
#[derive(Debug, Clone)]
pub(crate) struct Timeline {
    u0: f64,
    du: f64,
    inv_du: f64,
    lna: Vec<f64>,
    dlna: Vec<f64>,
    lnk: Vec<f64>,
    dlnk: Vec<f64>,
    cs2: Vec<f64>,
    dcs2: Vec<f64>,
    /// (H0/c)^2 Omega_i.
    om_c: f64,
    om_b: f64,
    om_g: f64,
    om_n: f64,
    om_l: f64,
    /// R a = (4/3) Omega_gamma / Omega_b.
    r_coef: f64,
    eta0: f64,
}

impl Timeline {
    /// Tabulates the background and thermal quantities of one cosmology. `xe_ratio(z)`, if
    /// given, multiplies the free-electron fraction in the opacity (a hook for comparisons
    /// against another recombination history).
    pub fn new(
        cosmo: &Cosmology,
        th: &ThermalHistory,
        bg: &Background,
        xe_ratio: Option<&dyn Fn(f64) -> f64>,
    ) -> Result<Self> {
        let eta0 = bg.conformal_age();
        let u0 = ETA_MIN.ln();
        let du = (eta0.ln() - u0) / (N_NODES - 1) as f64;
        let h0 = cosmo.h0_over_c_mpc();
        let hh = cosmo.h() * cosmo.h();
        let h02 = h0 * h0;
        let om_g = h02 * cosmo.omega_gamma_h2() / hh;
        let om_n = h02 * cosmo.omega_nu_h2() / hh;
        let om_b = h02 * cosmo.omega_baryon();
        let om_c = h02 * cosmo.omega_c_h2() / hh;
        let om_l = h02 * cosmo.omega_de();
        let hub_of = |a: f64| a * h0 * cosmo.e2_of_a(a).sqrt();
        let f_he = th.helium_fraction();
        let mu_num = M_HYDROGEN * (1.0 + f_he * HE_TO_H_MASS) * C_M_S * C_M_S;
        let eta_of = |i: usize| {
            if i + 1 == N_NODES {
                eta0
            } else {
                (u0 + i as f64 * du).exp()
            }
        };
        // Per node: ln a, d ln a / d ln eta, the opacity, T_b and x_e. Blocks of nodes run
        // in parallel; inside a block, Newton on eta(ln a) = target starts from the
        // previous node's root, and at a block's first node from the matter-plus-radiation
        // scale factor a = (Omega_m/4) s^2 + sqrt(Omega_r) s, s = eta H0 / c (converged
        // to 1e-13 either way).
        const BLOCK: usize = 1000;
        let om_m = cosmo.omega_m();
        let om_r = cosmo.omega_r();
        let block = |b: usize| -> Vec<[f64; 5]> {
            let i0 = b * BLOCK;
            let s0 = eta_of(i0) * h0;
            let mut x = (0.25 * om_m * s0 * s0 + om_r.sqrt() * s0).ln().min(0.0);
            (i0..(i0 + BLOCK).min(N_NODES))
                .map(|i| {
                    let eta = eta_of(i);
                    for _ in 0..60 {
                        let a = x.exp();
                        let f = bg.conformal_time_a(a) - eta;
                        let step = f * hub_of(a); // d eta / d ln a = 1 / (aH)
                        x -= step;
                        if step.abs() < 1e-13 {
                            break;
                        }
                    }
                    let xc = x.min(0.0);
                    let a = xc.exp();
                    let z = 1.0 / a - 1.0;
                    [
                        xc,
                        eta * hub_of(a),
                        th.opacity_eta(eta),
                        th.matter_temperature_k(z),
                        th.x_e(z),
                    ]
                })
                .collect()
        };
        let vals: Vec<[f64; 5]> = (0..N_NODES.div_ceil(BLOCK))
            .into_par_iter()
            .map(block)
            .collect::<Vec<_>>()
            .concat();
        let mut lna = Vec::with_capacity(N_NODES);
        let mut dlna = Vec::with_capacity(N_NODES);
        let mut lnk = Vec::with_capacity(N_NODES);
        let mut cs2 = Vec::with_capacity(N_NODES);
        let mut t_prev: Option<(f64, f64)> = None;
        for (i, &[x, dl, k, tb, xe]) in vals.iter().enumerate() {
            let eta = eta_of(i);
            lna.push(x);
            dlna.push(dl);
            let mut k = k;
            if let Some(f) = xe_ratio {
                k *= f(1.0 / x.min(0.0).exp() - 1.0);
            }
            if !(k > 0.0 && k.is_finite()) {
                return Err(Error::Numerical {
                    stage: "boltzmann timeline",
                    message: format!("opacity {k} at conformal time {eta} Mpc"),
                });
            }
            lnk.push(k.ln());
            // d ln T_b / d ln a from the previous node (first order is ample: the term is
            // a 1/3 correction to an already tiny sound speed).
            let dlt = match t_prev {
                Some((lt, la)) if (x - la).abs() > 0.0 => (tb.ln() - lt) / (x - la),
                _ => -1.0,
            };
            t_prev = Some((tb.ln(), x));
            cs2.push(K_BOLTZMANN * tb * (1.0 + f_he + xe) / mu_num * (1.0 - dlt / 3.0));
        }
        let dlnk = uniform_derivatives(&lnk, du);
        let dcs2 = uniform_derivatives(&cs2, du);
        Ok(Self {
            u0,
            du,
            inv_du: 1.0 / du,
            lna,
            dlna,
            lnk,
            dlnk,
            cs2,
            dcs2,
            om_c,
            om_b,
            om_g,
            om_n,
            om_l,
            r_coef: 4.0 / 3.0 * om_g / om_b,
            eta0,
        })
    }

    /// Conformal time today, Mpc.
    pub fn eta0(&self) -> f64 {
        self.eta0
    }

    /// Neutrino fraction of the radiation, R_nu = rho_nu / (rho_gamma + rho_nu).
    pub fn r_nu(&self) -> f64 {
        self.om_n / (self.om_g + self.om_n)
    }

    /// Everything at conformal time `eta` (clamped to the table range).
    #[inline]
    pub fn at(&self, eta: f64) -> BackgroundAt {
        let u = eta.max(ETA_MIN).ln();
        let s = ((u - self.u0) * self.inv_du).clamp(0.0, (N_NODES - 1) as f64);
        let i = (s as usize).min(N_NODES - 2);
        let t = s - i as f64;
        let t2 = t * t;
        let t3 = t2 * t;
        let h00 = 2.0 * t3 - 3.0 * t2 + 1.0;
        let h10 = t3 - 2.0 * t2 + t;
        let h01 = -2.0 * t3 + 3.0 * t2;
        let h11 = t3 - t2;
        let du = self.du;
        let herm = |y: &[f64], d: &[f64]| {
            h00 * y[i] + h10 * du * d[i] + h01 * y[i + 1] + h11 * du * d[i + 1]
        };
        let d00 = 6.0 * t2 - 6.0 * t;
        let d10 = 3.0 * t2 - 4.0 * t + 1.0;
        let d11 = 3.0 * t2 - 2.0 * t;
        let herm_d = |y: &[f64], d: &[f64]| {
            (d00 * (y[i] - y[i + 1]) + d10 * du * d[i] + d11 * du * d[i + 1]) * self.inv_du
        };
        let a = herm(&self.lna, &self.dlna).exp();
        let inv_eta = 1.0 / eta.max(ETA_MIN);
        let lnk = herm(&self.lnk, &self.dlnk);
        let dlnk_du = herm_d(&self.lnk, &self.dlnk);
        let cs2 = herm(&self.cs2, &self.dcs2);
        let dcs2_du = herm_d(&self.cs2, &self.dcs2);
        let a2 = a * a;
        let rho_c = self.om_c / a;
        let rho_b = self.om_b / a;
        let rho_g = self.om_g / a2;
        let rho_n = self.om_n / a2;
        let rho_l = self.om_l * a2;
        let hub2 = rho_c + rho_b + rho_g + rho_n + rho_l;
        let hub = hub2.sqrt();
        // d(aH)/d eta = -(1/2) sum_i (1 + 3 w_i) rho~_i (Friedmann; a^2 (8 pi G/3)(rho + 3P)).
        let dhub = -0.5 * (rho_c + rho_b + 2.0 * (rho_g + rho_n) - 2.0 * rho_l);
        BackgroundAt {
            hub,
            dhub,
            rho_c,
            rho_b,
            rho_g,
            rho_n,
            kappa: lnk.exp(),
            dln_kappa: dlnk_du * inv_eta,
            cs2: cs2.max(0.0),
            dcs2: dcs2_du * inv_eta,
            r: self.r_coef / a,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn table_reproduces_background() {
        let c = Cosmology::planck2018();
        let bg = Background::new(&c);
        let th = ThermalHistory::new(&c, &bg).unwrap();
        let tl = Timeline::new(&c, &th, &bg, None).unwrap();
        for &z in &[1e6, 3e4, 3000.0, 1100.0, 500.0, 10.0, 0.5, 0.0] {
            let a = 1.0 / (1.0 + z);
            let eta = bg.conformal_time_a(a);
            let b = tl.at(eta);
            assert!((b.r / (tl.r_coef / a) - 1.0).abs() < 1e-8, "z={z}: a");
            let hub = a * c.h0_over_c_mpc() * c.e2_of_a(a).sqrt();
            assert!((b.hub / hub - 1.0).abs() < 1e-8, "z={z}");
            let k = th.opacity_eta(eta);
            assert!((b.kappa / k - 1.0).abs() < 1e-6, "z={z}: {} {k}", b.kappa);
            // d(aH)/d eta = (aH)^2 (1 + d ln H / d ln a).
            let dh = hub * hub * (1.0 + c.dlnh_dlna(a));
            assert!((b.dhub / dh - 1.0).abs() < 1e-8, "z={z}");
        }
        // Before helium and hydrogen recombination the opacity scales as a^-2.
        let eta = bg.conformal_time(2e5);
        let b = tl.at(eta);
        assert!((b.dln_kappa / (-2.0 * b.hub) - 1.0).abs() < 1e-3);
    }
}
