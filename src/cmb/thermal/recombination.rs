//! The recombination network: hydrogen and helium three-level atoms with their
//! corrections, the matter temperature, Saha equilibrium, and the stiff integration
//! onto the ln a table (physics in the parent module's docs).

use crate::cmb::stiff::{Rosenbrock23, StiffOptions};
use crate::constants::{
    C_M_S, H_PLANCK, HE_TO_H_MASS, K_BOLTZMANN, M_ELECTRON, M_HYDROGEN, MPC_M, SIGMA_SB,
    SIGMA_THOMSON, critical_density_over_h2,
};
use crate::cosmology::Cosmology;
use crate::error::{Error, Result};
use crate::numerics::{UniformHermite, uniform_derivatives};

use super::{N_CELLS, T_ODE_START_K};

// ---- atomic data (SI; level positions as wavenumbers in 1/m, as listed in SSS99) ----

/// Hydrogen 2s -> 1s two-photon decay rate, s^-1.
const LAMBDA_H_2S1S: f64 = 8.224_580_9;
/// HeI 2^1S -> 1^1S two-photon decay rate, s^-1 (SSS99).
const LAMBDA_HE_2S1S: f64 = 51.3;
/// Hydrogen ionization energy / (h c), 1/m (13.598 eV).
const L_H_ION: f64 = 1.096_787_737e7;
/// Hydrogen Lyman-alpha, averaged over the two 2p levels, 1/m.
const L_H_ALPHA: f64 = 8.225_916_453e6;
/// HeI ionization energy / (h c), 1/m (Drake 1993, as in SSS99).
const L_HEI_ION: f64 = 1.983_107_72e7;
/// HeII ionization energy / (h c), 1/m.
const L_HEII_ION: f64 = 4.389_088_863e7;
/// HeI 2^1S level above the ground state, 1/m (Drake 1993).
const L_HE_2S: f64 = 1.662_774_34e7;
/// HeI 2^1P level above the ground state, 1/m (Drake 1993).
const L_HE_2P: f64 = 1.711_348_91e7;
/// HeI 2^3S level above the ground state, 1/m (Drake 1993).
const L_HE_2S_TRIPLET: f64 = 1.598_559_745e7;
/// HeI 2^3P_1 level above the ground state, 1/m (Drake 1993).
const L_HE_2P_TRIPLET: f64 = 1.690_878_308e7;
/// Einstein A of HeI 2^1P -> 1^1S, s^-1 (the value used by Wong, Moss & Scott 2008).
const A_HE_2P_SINGLET: f64 = 1.798_287e9;
/// Einstein A of the spin-forbidden HeI 2^3P_1 -> 1^1S line, s^-1 (Lach & Pachucki 2001,
/// PRA 64, 042510, as used by Switzer & Hirata 2008 and Wong, Moss & Scott 2008).
const A_HE_2P_TRIPLET: f64 = 177.58;
/// Hydrogen 1s photoionization cross-section at the HeI 2^1P - 1^1S line, m^2 (the value
/// that goes with the Wong, Moss & Scott 2008 fit below; from memory).
const SIGMA_H_AT_HE_2P_SINGLET: f64 = 1.436_289e-22;
/// The same at the HeI 2^3P_1 - 1^1S line, m^2 (as above; from memory).
const SIGMA_H_AT_HE_2P_TRIPLET: f64 = 1.484_872e-22;
/// Fit of the hydrogen-continuum escape term, A p_con = A / (1 + a gamma^b): (a, b) for the
/// singlet line, a from Kholupenko, Ivanchik & Varshalovich (2007), b = 0.86 from Wong,
/// Moss & Scott (2008), and for the triplet line (both from Wong, Moss & Scott 2008).
const HE_CONTINUUM_FIT_SINGLET: (f64, f64) = (0.36, 0.86);
const HE_CONTINUUM_FIT_TRIPLET: (f64, f64) = (0.66, 0.9);

/// Hydrogen fudge factor on the case-B coefficient with the corrected Peebles factor
/// (Rubino-Martin, Chluba, Fendt & Wandelt 2010, MNRAS 403, 439: 1.125; SSS99 had 1.14
/// without the correction).
pub const FUDGE_H: f64 = 1.125;
/// The double-Gaussian correction of the Lyman-alpha escape factor K_H in ln(1 + z),
/// (amplitude, centre, width) of each Gaussian, fitted by Rubino-Martin, Chluba, Fendt &
/// Wandelt (2010) to the full multilevel treatment (two-photon transitions from higher
/// levels, Lyman-series feedback, Raman scattering).
const K_H_GAUSSIANS: [(f64, f64, f64); 2] = [(-0.14, 7.28, 0.18), (0.079, 6.73, 0.33)];
/// Pequignot, Petitjean & Boisson (1991) case-B fit.
const PPB: [f64; 4] = [4.309, -0.6166, 0.6703, 0.5300];
/// Hummer & Storey (1998) singlet HeI fit as in SSS99: q (m^3/s), p, T_1 (K), T_2 (K).
const HE_LOG10_Q: f64 = -16.744;
const HE_P: f64 = 0.711;
const HE_LOG10_T1: f64 = 5.114;
const HE_T2: f64 = 3.0;
/// Hummer & Storey (1998) fit for recombination to the HeI triplets, same form and T_1,
/// T_2 (as given by Wong, Moss & Scott 2008): q (m^3/s), p.
const HE_TRIPLET_LOG10_Q: f64 = -16.306;
const HE_TRIPLET_P: f64 = 0.761;

/// Physical constants of one cosmology and the right-hand side of the recombination ODE.
#[derive(Debug, Clone)]
pub(super) struct Physics {
    pub(super) cosmo: Cosmology,
    /// CMB temperature today, K.
    pub(super) t0: f64,
    /// n_He / n_H.
    pub(super) f_he: f64,
    /// Hydrogen nuclei today, m^-3.
    pub(super) n_h0: f64,
    /// H0 in 1/s.
    pub(super) h0_s: f64,
    /// n_H0 sigma_T in 1/Mpc: d tau / d eta = kappa0 x_e / a^2.
    pub(super) kappa0: f64,
    /// c / H0, Mpc.
    pub(super) d_h: f64,
    /// R = r_coef a.
    pub(super) r_coef: f64,
    /// 2 pi m_e k / h^2, m^-2 K^-1.
    pub(super) cr: f64,
    /// (8/3) sigma_T a_R / (m_e c), 1/(s K^4).
    pub(super) ct: f64,
    /// lambda_Lya^3 / (8 pi), m^3.
    pub(super) k_h: f64,
    /// lambda_{He 2^1P}^3 / (8 pi), m^3.
    pub(super) k_he: f64,
    /// lambda_{He 2^3P}^3 / (8 pi), m^3.
    pub(super) k_he_t: f64,
    /// 2 k / (m_He c^2), 1/K: (Doppler width / line frequency)^2 per kelvin.
    pub(super) doppler_he: f64,
    /// gamma of the continuum-opacity fit, singlet and triplet line, per unit
    /// (1 - x_He) / [(1 - x_H) Doppler width / frequency].
    pub(super) gamma_s: f64,
    pub(super) gamma_t: f64,
    // Level energies over k, K.
    pub(super) t_h_ion: f64,
    pub(super) t_h_2: f64,
    pub(super) t_lya: f64,
    pub(super) t_hei_ion: f64,
    pub(super) t_heii_ion: f64,
    pub(super) t_he_2s: f64,
    pub(super) t_he_2s_ion: f64,
    pub(super) t_he_ps: f64,
    pub(super) t_he_2st: f64,
    pub(super) t_he_2st_ion: f64,
    pub(super) t_he_pst: f64,
    /// Hummer & Storey fits: q (m^3/s) of the singlet and triplet, and T_1 (K).
    pub(super) he_q: f64,
    pub(super) he_q_t: f64,
    pub(super) he_t1: f64,
}

/// Saha-equilibrium ionization state.
#[derive(Debug, Clone, Copy)]
pub(super) struct SahaState {
    pub x_e: f64,
    pub x_h: f64,
    /// (n_HeII + n_HeIII) / n_He.
    pub x_he: f64,
}

impl Physics {
    pub(super) fn new(c: &Cosmology) -> Self {
        let p = c.params();
        let y = p.y_he;
        let f_he = y / (HE_TO_H_MASS * (1.0 - y));
        let n_h0 = critical_density_over_h2() * c.omega_b_h2() * (1.0 - y) / M_HYDROGEN;
        let h0_s = c.h() * 1.0e5 / MPC_M;
        let hc_k = H_PLANCK * C_M_S / K_BOLTZMANN;
        let a_rad = 4.0 * SIGMA_SB / C_M_S;
        let lya = 1.0 / L_H_ALPHA;
        let lhe = 1.0 / L_HE_2P;
        let lhe_t = 1.0 / L_HE_2P_TRIPLET;
        let eight_pi = 8.0 * std::f64::consts::PI;
        // gamma = 3 A f_He (1 - x_He) / [8 pi^(3/2) sigma c L^3 (Delta nu_D / nu) (1 - x_H)].
        let gamma = |a_line: f64, sigma: f64, l: f64| {
            3.0 * a_line * f_he
                / (eight_pi * std::f64::consts::PI.sqrt() * sigma * C_M_S * l * l * l)
        };
        Self {
            cosmo: c.clone(),
            t0: p.t_cmb_k,
            f_he,
            n_h0,
            h0_s,
            kappa0: n_h0 * SIGMA_THOMSON * MPC_M,
            d_h: 1.0 / c.h0_over_c_mpc(),
            r_coef: 0.75 * c.omega_b_h2() / c.omega_gamma_h2(),
            cr: 2.0 * std::f64::consts::PI * M_ELECTRON * K_BOLTZMANN / (H_PLANCK * H_PLANCK),
            ct: 8.0 / 3.0 * SIGMA_THOMSON * a_rad / (M_ELECTRON * C_M_S),
            k_h: lya * lya * lya / eight_pi,
            k_he: lhe * lhe * lhe / eight_pi,
            k_he_t: lhe_t * lhe_t * lhe_t / eight_pi,
            doppler_he: 2.0 * K_BOLTZMANN / (HE_TO_H_MASS * M_HYDROGEN * C_M_S * C_M_S),
            gamma_s: gamma(A_HE_2P_SINGLET, SIGMA_H_AT_HE_2P_SINGLET, L_HE_2P),
            gamma_t: gamma(A_HE_2P_TRIPLET, SIGMA_H_AT_HE_2P_TRIPLET, L_HE_2P_TRIPLET),
            t_h_ion: hc_k * L_H_ION,
            t_h_2: hc_k * (L_H_ION - L_H_ALPHA),
            t_lya: hc_k * L_H_ALPHA,
            t_hei_ion: hc_k * L_HEI_ION,
            t_heii_ion: hc_k * L_HEII_ION,
            t_he_2s: hc_k * L_HE_2S,
            t_he_2s_ion: hc_k * (L_HEI_ION - L_HE_2S),
            t_he_ps: hc_k * (L_HE_2P - L_HE_2S),
            t_he_2st: hc_k * L_HE_2S_TRIPLET,
            t_he_2st_ion: hc_k * (L_HEI_ION - L_HE_2S_TRIPLET),
            t_he_pst: hc_k * (L_HE_2P_TRIPLET - L_HE_2S_TRIPLET),
            he_q: 10f64.powf(HE_LOG10_Q),
            he_q_t: 10f64.powf(HE_TRIPLET_LOG10_Q),
            he_t1: 10f64.powf(HE_LOG10_T1),
        }
    }

    pub(super) fn e_of_a(&self, a: f64) -> f64 {
        self.cosmo.e2_of_a(a).sqrt()
    }

    /// d tau / d ln a for x_e electrons per H nucleus.
    pub(super) fn dtau_dlna(&self, a: f64, x_e: f64) -> f64 {
        self.kappa0 * self.d_h * x_e / (a * a * a * self.e_of_a(a))
    }

    /// Three-species Saha equilibrium (H, HeI/HeII, HeII/HeIII) at T = T_r(a), solved for
    /// n_e by bisection (the residual is monotonic in x_e).
    pub(super) fn saha(&self, a: f64) -> SahaState {
        let t = self.t0 / a;
        let n_h = self.n_h0 / (a * a * a);
        let s = (self.cr * t).powf(1.5) / n_h;
        let s_h = s * (-self.t_h_ion / t).exp();
        // Statistical-weight factors 2 g_+/g_0: 1 for H, 4 for HeI -> HeII, 1 for HeII -> HeIII.
        let s_1 = 4.0 * s * (-self.t_hei_ion / t).exp();
        let s_2 = s * (-self.t_heii_ion / t).exp();
        let state = |x: f64| {
            let x_h = s_h / (x + s_h);
            let r1 = s_1 / x;
            let r2 = s_2 / x;
            let den = 1.0 + r1 + r1 * r2;
            let f2 = r1 / den;
            let f3 = r1 * r2 / den;
            (x_h, f2, f3, x_h + self.f_he * (f2 + 2.0 * f3))
        };
        let (mut lo, mut hi) = (0.0_f64, 1.0 + 2.0 * self.f_he);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if mid <= lo || mid >= hi {
                break;
            }
            if mid - state(mid).3 > 0.0 {
                hi = mid;
            } else {
                lo = mid;
            }
        }
        let x = 0.5 * (lo + hi);
        let (x_h, f2, f3, x_e) = state(x);
        SahaState {
            x_e,
            x_h,
            x_he: f2 + f3,
        }
    }

    /// Right-hand side of the recombination equations in t = ln a for the state
    /// (1 - x_H, 1 - x_He, T_m). The neutral fractions are the variables because they carry
    /// full relative precision at early times, where 1 - x_H ~ 1e-11: with x_H itself the
    /// rounding of 1 - x_H, multiplied by rates ~1e4 H, would make the derivatives noisy.
    pub(super) fn rhs(&self, lna: f64, y: &[f64; 3]) -> [f64; 3] {
        let a = lna.exp();
        let (y_h, y_he) = (y[0], y[1]);
        let (x_h, x_he) = (1.0 - y_h, 1.0 - y_he);
        let tm = y[2].max(1e-3);
        let tr = self.t0 / a;
        let n_h = self.n_h0 / (a * a * a);
        let hub = self.h0_s * self.e_of_a(a);
        let x_e = x_h + self.f_he * x_he;
        // (The powers below share their logarithms: x^p = exp(p ln x).)
        let crt = self.cr * tm;
        let saha = crt * crt.sqrt();

        // Hydrogen (SSS99 with the Pequignot et al. 1991 case-B fit).
        let ltt = (tm * 1e-4).ln();
        let alpha_h =
            FUDGE_H * 1e-19 * PPB[0] * (PPB[1] * ltt).exp() / (1.0 + PPB[2] * (PPB[3] * ltt).exp());
        let beta_h = alpha_h * saha * (-self.t_h_2 / tm).exp();
        let k_h = self.k_h / hub * k_h_correction(-lna);
        let n1s = n_h * y_h;
        let num = 1.0 + k_h * LAMBDA_H_2S1S * n1s;
        let den = 1.0 + k_h * (LAMBDA_H_2S1S + beta_h) * n1s;
        let c_h = if den > 0.0 { num / den } else { 1.0 };
        let d_yh =
            (x_e * x_h * n_h * alpha_h - beta_h * y_h * (-self.t_lya / tm).exp()) * c_h / hub;

        // Helium: the SSS99 singlet three-level atom, with the escape from 2^1P through the
        // Sobolev escape probability and the hydrogen continuum, plus the triplet channel.
        let sq0 = (tm / HE_T2).sqrt();
        let sq1 = (tm / self.he_t1).sqrt();
        let (l0, l1) = (sq0.ln_1p(), sq1.ln_1p());
        let alpha_he = self.he_q / (sq0 * ((1.0 - HE_P) * l0 + (1.0 + HE_P) * l1).exp());
        let beta_he = 4.0 * alpha_he * saha * (-self.t_he_2s_ion / tm).exp();
        // Ground-state HeI density; Doppler width over frequency; n_HeI / n_HI enters the
        // continuum-opacity parameter gamma.
        let n_he1 = self.f_he * n_h * y_he.max(0.0);
        let dop = (self.doppler_he * tm).sqrt();
        let he_over_h = if y_h > 0.0 {
            y_he.max(0.0) / (y_h * dop)
        } else {
            f64::INFINITY
        };
        // Singlet: the net 2^1P -> 1^1S rate per 2^1P atom is A (p_S + p_con) (Sobolev
        // escape plus absorption of line photons by H continuum; Kholupenko et al. 2007,
        // Wong et al. 2008), so the Peebles factor's escape rate K^-1 / n_1s becomes
        // 3 A (p_S + p_con) e^-u per 2^1S atom (2^1P and 2^1S in Boltzmann equilibrium,
        // statistical weights 3 : 1).
        let tau_s = 3.0 * A_HE_2P_SINGLET * self.k_he * n_he1 / hub;
        let esc_s = A_HE_2P_SINGLET
            * (sobolev_escape(tau_s)
                + continuum_escape(self.gamma_s * he_over_h, HE_CONTINUUM_FIT_SINGLET));
        let r_s = 3.0 * esc_s * (-self.t_he_ps / tm).exp();
        let c_he = (r_s + LAMBDA_HE_2S1S) / (r_s + LAMBDA_HE_2S1S + beta_he);
        let d_singlet = (x_e * x_he * n_h * alpha_he - beta_he * y_he * (-self.t_he_2s / tm).exp())
            * c_he
            / hub;
        // Triplet channel (Switzer & Hirata 2008; Wong et al. 2008): recombination to the
        // triplets, 2^3P_1 in Boltzmann equilibrium with 2^3S (both of weight 3), decay by
        // the 2^3P_1 -> 1^1S intercombination line with Sobolev and continuum escape (the
        // continuum term enters with 1/3, as fitted). Detailed balance from 2^3S carries
        // 2 g_HeII / g_23S = 4/3, and its population relative to 1^1S the weight 3.
        let alpha_t =
            self.he_q_t / (sq0 * ((1.0 - HE_TRIPLET_P) * l0 + (1.0 + HE_TRIPLET_P) * l1).exp());
        let beta_t = 4.0 / 3.0 * alpha_t * saha * (-self.t_he_2st_ion / tm).exp();
        let tau_t = 3.0 * A_HE_2P_TRIPLET * self.k_he_t * n_he1 / hub;
        let esc_t = A_HE_2P_TRIPLET
            * (sobolev_escape(tau_t)
                + continuum_escape(self.gamma_t * he_over_h, HE_CONTINUUM_FIT_TRIPLET) / 3.0);
        // C_t = r_t / (r_t + beta_t) with r_t = esc_t e^(-E_23P,23S / kT), written as a
        // ratio of the two exponentials so that it stays finite when both underflow.
        let c_t = 1.0
            / (1.0
                + 4.0 / 3.0 * alpha_t * saha * (-(self.t_he_2st_ion - self.t_he_pst) / tm).exp()
                    / esc_t);
        let d_triplet =
            (x_e * x_he * n_h * alpha_t - 3.0 * beta_t * y_he * (-self.t_he_2st / tm).exp()) * c_t
                / hub;
        let d_yhe = d_singlet + d_triplet;

        // Matter temperature: Compton coupling and adiabatic cooling.
        let tr2 = tr * tr;
        let dtm = -2.0 * tm + self.ct * tr2 * tr2 / hub * x_e / (1.0 + self.f_he + x_e) * (tr - tm);
        [d_yh, d_yhe, dtm]
    }

    /// c_s d eta / d ln a in Mpc.
    pub(super) fn sound_speed_deta(&self, a: f64) -> f64 {
        let r = self.r_coef * a;
        self.d_h / (a * self.e_of_a(a) * (3.0 * (1.0 + r)).sqrt())
    }
}

/// Multiplier of the Peebles K_H at ln(1 + z) = `ln1pz` (Rubino-Martin et al. 2010).
fn k_h_correction(ln1pz: f64) -> f64 {
    1.0 + K_H_GAUSSIANS
        .iter()
        .map(|&(amp, centre, width)| {
            let u = (ln1pz - centre) / width;
            amp * (-u * u).exp()
        })
        .sum::<f64>()
}

/// Sobolev escape probability of a line of optical depth tau, (1 - e^-tau) / tau (e.g.
/// Seager, Sasselov & Scott 2000, ApJS 128, 407).
fn sobolev_escape(tau: f64) -> f64 {
    if tau < 1e-8 {
        1.0 - 0.5 * tau.max(0.0)
    } else {
        -(-tau).exp_m1() / tau
    }
}

/// Extra escape probability of HeI line photons through photoionization of neutral
/// hydrogen within the line, p_con = 1 / (1 + a gamma^b) (Kholupenko, Ivanchik &
/// Varshalovich 2007, MNRAS 378, L39; fit form and coefficients as in Wong, Moss & Scott
/// 2008, MNRAS 386, 1023). gamma grows as n_HeI / n_HI: no neutral hydrogen, no term.
fn continuum_escape(gamma: f64, (a, b): (f64, f64)) -> f64 {
    if gamma.is_finite() {
        1.0 / (1.0 + a * gamma.powf(b))
    } else {
        0.0
    }
}

/// Integrates the recombination equations and tabulates x_e and T_m on the ln a grid.
///
/// The integrator stops at every node, so the tabulated values are integration results
/// (no interpolation between steps); the derivatives for the Hermite tables are
/// fourth-order finite differences of the node values, which stay clean where the
/// right-hand side, evaluated slightly off the slow manifold of the stiff system, is not.
pub(super) fn solve_recombination(
    phys: &Physics,
    lna0: f64,
    dlna: f64,
) -> Result<(UniformHermite, UniformHermite)> {
    let n = N_CELLS + 1;
    let node = |i: usize| {
        if i == N_CELLS {
            0.0
        } else {
            lna0 + i as f64 * dlna
        }
    };
    let mut xe = vec![0.0; n];
    let mut tm = vec![0.0; n];
    let lna_ode = (phys.t0 / T_ODE_START_K).ln().max(lna0);
    // Saha part (T_m = T_r).
    let mut i = 0;
    while i < n && node(i) <= lna_ode {
        let a = node(i).exp();
        xe[i] = phys.saha(a).x_e;
        tm[i] = phys.t0 / a;
        i += 1;
    }
    let s0 = phys.saha(lna_ode.exp());
    let y0 = [1.0 - s0.x_h, 1.0 - s0.x_he, phys.t0 / lna_ode.exp()];
    let opt = StiffOptions {
        rtol: 1e-7,
        atol: [1e-11, 1e-11, 1e-9],
        h_init: 1e-4,
        h_max: 0.02,
        max_steps: 200_000,
    };
    let mut rhs = |t: f64, y: &[f64; 3]| phys.rhs(t, y);
    let mut ode = Rosenbrock23::new(&mut rhs, lna_ode, y0, opt);
    for k in i..n {
        ode.advance_to(&mut rhs, node(k))
            .map_err(|m| Error::Numerical {
                stage: "recombination",
                message: m,
            })?;
        let y = ode.state();
        xe[k] = (1.0 - y[0]) + phys.f_he * (1.0 - y[1]);
        tm[k] = y[2];
    }
    let dxe = uniform_derivatives(&xe, dlna);
    let dtm = uniform_derivatives(&tm, dlna);
    Ok((
        UniformHermite::new(lna0, dlna, xe, dxe),
        UniformHermite::new(lna0, dlna, tm, dtm),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn helium_escape_probabilities() {
        // Sobolev: 1 for an optically thin line, 1/tau for a thick one, continuous at the
        // series switch.
        assert_eq!(sobolev_escape(0.0), 1.0);
        assert!((sobolev_escape(1e3) - 1e-3).abs() < 1e-15);
        for tau in [0.99e-8, 1.01e-8] {
            assert!((sobolev_escape(tau) - (1.0 - 0.5 * tau)).abs() < 1e-15);
        }
        assert!((sobolev_escape(1.0) - (1.0 - (-1.0f64).exp())).abs() < 1e-15);
        // Continuum: every photon escapes without helium (gamma = 0), none without
        // neutral hydrogen (gamma -> infinity); decreasing in between.
        for fit in [HE_CONTINUUM_FIT_SINGLET, HE_CONTINUUM_FIT_TRIPLET] {
            assert_eq!(continuum_escape(0.0, fit), 1.0);
            assert_eq!(continuum_escape(f64::INFINITY, fit), 0.0);
            assert!(continuum_escape(1.0, fit) > continuum_escape(10.0, fit));
        }
    }
}
