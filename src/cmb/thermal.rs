//! Thermal history: recombination, reionization, optical depth, visibility and the
//! derived last-scattering scales.
//!
//! ## Recombination
//! Hydrogen follows the effective three-level atom of Seager, Sasselov & Scott (1999,
//! ApJ 523, L1, astro-ph/9909275, "SSS99"; details in 2000, ApJS 128, 407), with
//! x_H = n_{H+}/n_H and t = ln a:
//!
//! ```text
//! dx_H/dt = -C_H [x_e x_H n_H alpha_B - beta_B (1 - x_H) exp(-h nu_Lya / k T_m)] / H
//! C_H = [1 + K_H Lambda_2s1s n_H (1 - x_H)] / [1 + K_H (Lambda_2s1s + beta_B) n_H (1 - x_H)]
//! ```
//!
//! - alpha_B = F 10^-19 a t^b / (1 + c t^d) m^3/s, t = T_m / 10^4 K, a = 4.309,
//!   b = -0.6166, c = 0.6703, d = 0.5300: the case-B fit of Pequignot, Petitjean & Boisson
//!   (1991, A&A 251, 680), with the fudge factor F = 1.125 (see below);
//! - beta_B = alpha_B (2 pi m_e k T_m / h^2)^(3/2) exp(-B_2 / k T_m), B_2 = 3.4 eV the n = 2
//!   binding energy (detailed balance, so beta carries F too);
//! - K_H = lambda_Lya^3 / (8 pi H) (Lyman-alpha escape by redshifting, Peebles 1968,
//!   ApJ 153, 1) times 1 + A_1 G_1 + A_2 G_2, G_i = exp(-[(ln(1+z) - z_i)/w_i]^2),
//!   (A, z, w) = (-0.14, 7.28, 0.18) and (0.079, 6.73, 0.33): the correction function
//!   that Rubino-Martin, Chluba, Fendt & Wandelt (2010, MNRAS 403, 439) fitted to a full
//!   multilevel hydrogen atom (two-photon decays from higher levels, Lyman-series
//!   feedback and Raman scattering), used with F = 1.125 (the SSS99 value without the
//!   correction was 1.14); Lambda_2s1s = 8.2245809 s^-1 the 2s-1s two-photon rate.
//!
//! Effect of the hydrogen correction, against camb 2.0.5 at its default recombination:
//! z_* moved from 1090.33 to 1089.92 (camb default 1089.89, +2.1e-5), k_D by -0.52%
//! (now -1.3e-4 from camb's default, which adds a HeI rate fit of its own; against
//! camb's set of the same published constants every derived number agrees to 2e-6).
//!
//! Helium: HeIII -> HeII, and everything above T_r = 10^4 K (z ~ 3670), is in Saha
//! equilibrium (three-species Saha solved for n_e). HeII -> HeI below that follows the
//! SSS99 singlet three-level equation for x_He = n_{HeII}/n_He, with the escape of
//! 2^1P - 1^1S photons corrected as below, plus a second channel through the triplets:
//!
//! ```text
//! dx_He/dt = -C_He [x_e x_He n_H alpha_He - beta_He (1 - x_He) exp(-h nu_2s / k T_m)] / H
//!            -C_t  [x_e x_He n_H alpha_t - 3 beta_t (1 - x_He) exp(-h nu_23S / k T_m)] / H
//! C_He = [R_s + Lambda_He] / [R_s + Lambda_He + beta_He],  R_s = 3 A_s (p_s + p_con,s) e^-u
//! C_t  = R_t / (R_t + beta_t),                             R_t = A_t (p_t + p_con,t / 3) e^-u_t
//! ```
//!
//! - singlet: u = h (nu_2p - nu_2s) / k T_m (the 2^1P - 2^1S splitting), Lambda_He =
//!   51.3 s^-1, beta_He = 4 alpha_He (2 pi m_e k T_m / h^2)^(3/2) exp(-B_{2^1S} / k T_m),
//!   and alpha_He the singlet fit of Hummer & Storey (1998, MNRAS 297, 1073) as given in
//!   SSS99: alpha_He = q / [sqrt(T/T_2) (1 + sqrt(T/T_2))^(1-p) (1 + sqrt(T/T_1))^(1+p)],
//!   q = 10^-16.744 m^3/s, p = 0.711, T_1 = 10^5.114 K, T_2 = 3 K. R_s is the rate per
//!   2^1S atom at which 2^1P -> 1^1S photons are lost for good (A_s = 1.798287e9 s^-1,
//!   weights 3 : 1). With p_s = 1/tau_s and no p_con it is SSS99's Peebles factor
//!   (K_He = lambda^3 / 8 pi H).
//! - Sobolev escape (e.g. Seager, Sasselov & Scott 2000, ApJS 128, 407): p = (1 - e^-tau) /
//!   tau, tau = 3 A lambda^3 n_HeI / (8 pi H) for a line from the ground state to a level
//!   of weight 3 (Wong, Moss & Scott 2008).
//! - Hydrogen continuum opacity (Kholupenko, Ivanchik & Varshalovich 2007, MNRAS 378, L39;
//!   Switzer & Hirata 2008, PRD 77, 083006): neutral hydrogen photoionized by photons in the
//!   HeI line wings removes them before they re-excite helium. Fit of Wong, Moss & Scott
//!   (2008, MNRAS 386, 1023): p_con = 1 / (1 + a gamma^b), gamma = 3 A f_He (1 - x_He) c^2 /
//!   [8 pi^(3/2) sigma_H(nu) nu^2 Delta nu_D (1 - x_H)], Delta nu_D = nu (2 k T_m / m_He
//!   c^2)^(1/2); (a, b) = (0.36, 0.86) for the singlet, (0.66, 0.9) for the triplet. It
//!   vanishes smoothly as n_HI -> 0 (we use it at every x_H; no switch).
//! - Triplet channel (Switzer & Hirata 2008; Dubrovich & Grachev 2005,
//!   astro-ph/0501672): recombination to the triplets, alpha_t the Hummer & Storey triplet fit of the same
//!   form (q = 10^-16.306 m^3/s, p = 0.761), beta_t = (4/3) alpha_t (2 pi m_e k T_m /
//!   h^2)^(3/2) exp(-B_{2^3S} / k T_m), 2^3P_1 in equilibrium with 2^3S (u_t their
//!   splitting), decay by the intercombination line 2^3P_1 -> 1^1S (A_t = 177.58 s^-1).
//!
//! Effect of the helium corrections, measured against camb 2.0.5 with the same constants
//! (tests/reference/thermal_camb.tsv, `published`): without them x_e was up to 3.5% high
//! near z = 1800 (above 1% for 1550 < z < 2050) and k_D 0.13% high, which put the
//! unlensed TT damping tail 1.0% above camb at l = 2500. With them, x_e agrees to 2.1e-4
//! everywhere in 1350 < z < 2700 (worst near z = 2350).
//!
//! The matter temperature follows Compton heating by the CMB and adiabatic cooling
//! (e.g. SSS99 eq. 2; Peebles 1968):
//!
//! ```text
//! dT_m/dt = -2 T_m + (8 sigma_T a_R T_r^4 / 3 m_e c H) x_e / (1 + f_He + x_e) (T_r - T_m)
//! ```
//!
//! with f_He = n_He/n_H = Y / [(m_He/m_H)(1 - Y)] and x_e = x_H + f_He x_He.
//!
//! ### Stiffness
//! At early times the rates that pull x_H, x_He towards Saha equilibrium and T_m towards T_r
//! exceed H by up to ~10^7: the system is stiff. It is integrated in t = ln a with an
//! L-stable Rosenbrock method with an embedded error estimate (Shampine & Reichelt 1997;
//! see `stiff.rs`), which steps over the fast relaxation at the accuracy of the slow
//! solution. Nothing is switched: the full three-level equations run from T_r = 10^4 K,
//! starting from the Saha state (an equilibrium of the equations), to today. The variables
//! are the neutral fractions 1 - x_H and 1 - x_He, which keep full relative precision when
//! they are ~10^-11. The integrator stops on every node of a uniform ln a grid, and the
//! tables are cubic Hermite with fourth-order finite-difference derivatives of the node
//! values (the right-hand side itself, evaluated a hair off the slow manifold of a stiff
//! system, is a noisy derivative).
//!
//! ## Reionization
//! The common-practice tanh model in y = (1+z)^(3/2) (Lewis 2008, arXiv:0804.3865, App. B):
//!
//! ```text
//! x_e = x_rec + (f - x_rec) [1 + tanh((y_re - y) / Delta_y)] / 2 + f_He [1 + tanh((z_He - z) / Delta_He)] / 2
//! ```
//!
//! with f = 1 + f_He (hydrogen and first helium ionization together), Delta_y =
//! (3/2) (1 + z_re)^(1/2) Delta_z, Delta_z = 0.5, and helium's second reionization at
//! z_He = 3.5 of width Delta_He = 0.5. z_re is solved (Illinois false position) so that the
//! optical depth of the reionization electrons alone (the two tanh terms, without the
//! recombination residual), integrated from today, equals the input tau_reio; tau_reio = 0
//! switches reionization off. (camb keeps the recombination residual fixed at its value at
//! z_re + 8 Delta_z under the tanh, where we keep x_rec(z): x_e differs by ~1% of ~2e-4
//! for 9 < z < 12, which changes tau by less than 1e-6.)
//!
//! ## Derived quantities
//! - Opacity d tau / d eta = n_e sigma_T a (1/Mpc); optical depth tau(eta) = Integral_eta^eta0
//!   of it; visibility g = (d tau / d eta) e^-tau = -d e^-tau / d chi, normalized to unit
//!   integral over the conformal distance chi = eta_0 - eta.
//! - z_*: where the optical depth of the recombination history alone (reionization
//!   excluded) equals 1, the usual Boltzmann-code definition; the visibility peak is reported
//!   separately.
//! - r_s(z) = Integral_0^eta c_s d eta, c_s = 1 / sqrt(3 (1 + R)), R = 3 rho_b / 4 rho_gamma;
//!   theta_* = r_s(z_*) / D_M(z_*).
//! - z_drag: where the drag depth Integral (d tau / d eta) / R d eta (recombination history)
//!   equals 1.
//! - Diffusion damping (Kaiser 1983, MNRAS 202, 1169; Zaldarriaga & Harari 1995, PRD 52,
//!   3276; Hu & White 1997, ApJ 479, 568): k_D^-2 = Integral_0^eta d eta / [6 (1 + R) n_e
//!   sigma_T a] [R^2 / (1 + R) + 16/15], the 16/15 being the polarization correction.
//! - The visibility width: full width at half maximum of g in conformal distance (Mpc).
//!
//! Units: lengths in Mpc, wavenumbers in 1/Mpc, temperatures in kelvin; atomic rates in SI.

mod recombination;
mod reionization;
mod scales;

pub use recombination::FUDGE_H;
pub use reionization::{HE_REIO_DELTA_Z, HE_REIO_Z, REIO_DELTA_Z, Reionization};

use serde::Serialize;

use crate::cosmology::{Background, Cosmology};
use crate::error::{Error, Location, Result};
use crate::numerics::{GaussLegendre, UniformHermite};

use recombination::{Physics, solve_recombination};
use reionization::solve_reionization;

// ---- tables ----

/// Highest redshift of the tables; above it the plasma is in Saha equilibrium at T_r and
/// everything is evaluated directly.
pub(super) const Z_TABLE_MAX: f64 = 1.0e4;
/// Cells of the uniform ln a table (spacing 7.7e-4, i.e. about 0.15 Mpc of conformal time
/// at recombination).
pub(super) const N_CELLS: usize = 12_000;
/// Radiation temperature at which the recombination equations take over from Saha.
pub(super) const T_ODE_START_K: f64 = 1.0e4;

/// The derived numbers of a thermal history (all lengths comoving, in Mpc).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ThermalSummary {
    /// Redshift where the optical depth of the recombination history alone equals 1.
    pub z_star: f64,
    /// Comoving sound horizon at z_star, Mpc.
    pub r_star_mpc: f64,
    /// Comoving angular-diameter distance D_M(z_star), Mpc (flat: the comoving distance).
    pub d_m_star_mpc: f64,
    /// Acoustic angle r_star / D_M(z_star), radians.
    pub theta_star: f64,
    /// 100 theta_star.
    pub theta_star_100: f64,
    /// Redshift where the drag depth equals 1.
    pub z_drag: f64,
    /// Comoving sound horizon at z_drag, Mpc.
    pub r_drag_mpc: f64,
    /// Diffusion damping wavenumber at z_star, 1/Mpc.
    pub k_damping_mpc: f64,
    /// Redshift of the visibility peak.
    pub z_visibility_peak: f64,
    /// Conformal distance of the visibility peak, Mpc.
    pub chi_visibility_peak_mpc: f64,
    /// Full width at half maximum of the visibility in conformal distance, Mpc.
    pub visibility_fwhm_mpc: f64,
    /// Midpoint of hydrogen reionization.
    pub z_reio: f64,
    /// Optical depth of the reionization electrons (JSON `reionization_optical_depth`,
    /// the name of the input key).
    #[serde(rename = "reionization_optical_depth")]
    pub tau_reio: f64,
}

/// Cubic Hermite on one cell of width h at fraction t.
fn hermite(y0: f64, y1: f64, d0: f64, d1: f64, h: f64, t: f64) -> f64 {
    let t2 = t * t;
    let t3 = t2 * t;
    (2.0 * t3 - 3.0 * t2 + 1.0) * y0
        + (t3 - 2.0 * t2 + t) * h * d0
        + (-2.0 * t3 + 3.0 * t2) * y1
        + (t3 - t2) * h * d1
}

/// Derivative of [`hermite`] with respect to the cell variable.
fn hermite_deriv(y0: f64, y1: f64, d0: f64, d1: f64, h: f64, t: f64) -> f64 {
    let t2 = t * t;
    ((6.0 * t2 - 6.0 * t) * y0
        + (3.0 * t2 - 4.0 * t + 1.0) * h * d0
        + (-6.0 * t2 + 6.0 * t) * y1
        + (3.0 * t2 - 2.0 * t) * h * d1)
        / h
}

/// The thermal history of one cosmology: recombination, reionization, and the tables a
/// line-of-sight solver needs. See the module docs for the physics.
///
/// ```
/// use ngreach::cosmology::{Background, Cosmology};
/// use ngreach::cmb::ThermalHistory;
/// let c = Cosmology::planck2018();
/// let th = ThermalHistory::new(&c, &Background::new(&c)).unwrap();
/// let s = th.summary();
/// assert!((s.z_star - 1090.0).abs() < 2.0);
/// assert!((th.x_e(0.0) - (1.0 + 2.0 * th.reionization().f_he)).abs() < 1e-3);
/// ```
#[derive(Debug, Clone)]
pub struct ThermalHistory {
    phys: Physics,
    reio: Reionization,
    /// ln a of the first table node.
    lna0: f64,
    /// Uniform spacing in ln a.
    dlna: f64,
    /// Recombination x_e (no reionization) on the ln a grid.
    x_rec: UniformHermite,
    /// Matter temperature, K.
    t_mat: UniformHermite,
    /// Optical depth from today, all electrons.
    tau: UniformHermite,
    tau_nodes: Vec<f64>,
    /// Optical depth from today, recombination electrons only.
    tau_rec: UniformHermite,
    tau_rec_nodes: Vec<f64>,
    /// Drag depth from today (recombination electrons).
    tau_drag: UniformHermite,
    tau_drag_nodes: Vec<f64>,
    /// Conformal time on the ln a grid.
    eta_lna: UniformHermite,
    /// Conformal-time tables (increasing eta), Mpc.
    eta: Vec<f64>,
    opacity: Vec<f64>,
    d_opacity: Vec<f64>,
    visibility: Vec<f64>,
    d_visibility: Vec<f64>,
    exp_minus_tau: Vec<f64>,
    eta0: f64,
    gl4: GaussLegendre,
    gl8: GaussLegendre,
    gl16: GaussLegendre,
    summary: ThermalSummary,
}

impl ThermalHistory {
    /// Solves the thermal history of `cosmo`; `bg` must be its background.
    ///
    /// # Errors
    /// [`Error::Conflict`] if `bg` belongs to another cosmology; [`Error::OutOfRange`] for a
    /// `tau_reio` that no reionization redshift in 0 < z_re < 50 gives;
    /// [`Error::Numerical`] if the recombination integration or a root search fails.
    pub fn new(cosmo: &Cosmology, bg: &Background) -> Result<Self> {
        if bg.cosmology() != cosmo {
            return Err(Error::Conflict {
                at: Location::Builtin,
                message: "the background passed to the thermal history was built for another \
                          cosmology; build both from the same Cosmology"
                    .into(),
            });
        }
        let phys = Physics::new(cosmo);
        let gl4 = GaussLegendre::new(4);
        let gl8 = GaussLegendre::new(8);
        let gl16 = GaussLegendre::new(16);
        let lna0 = -(1.0 + Z_TABLE_MAX).ln();
        let dlna = -lna0 / N_CELLS as f64;
        let n = N_CELLS + 1;
        let node = |i: usize| {
            if i == N_CELLS {
                0.0
            } else {
                lna0 + i as f64 * dlna
            }
        };

        // ---- recombination ----
        let (x_rec, t_mat) = solve_recombination(&phys, lna0, dlna)?;

        // ---- reionization ----
        let reio = solve_reionization(&phys, cosmo.params().tau_reio, &gl8)?;

        // ---- optical depths on the grid, cumulative from today ----
        let x_total = |lna: f64| -> f64 {
            let xr = x_rec.eval(lna);
            let z = (-lna).exp() - 1.0;
            let (w, _, wh, _) = reio.weights(z);
            xr + (reio.fraction - xr) * w + reio.f_he * wh
        };
        let mut tau_nodes = vec![0.0; n];
        let mut tau_rec_nodes = vec![0.0; n];
        let mut tau_drag_nodes = vec![0.0; n];
        for i in (0..N_CELLS).rev() {
            let (lo, hi) = (node(i), node(i + 1));
            let (mut s_all, mut s_rec, mut s_drag) = (0.0, 0.0, 0.0);
            let half = 0.5 * (hi - lo);
            let mid = 0.5 * (hi + lo);
            for (xg, wg) in gl4.nodes.iter().zip(&gl4.weights) {
                let l = mid + half * xg;
                let a = l.exp();
                let j_unit = phys.dtau_dlna(a, 1.0);
                let xr = x_rec.eval(l);
                s_all += wg * j_unit * x_total(l);
                s_rec += wg * j_unit * xr;
                s_drag += wg * j_unit * xr / (phys.r_coef * a);
            }
            tau_nodes[i] = tau_nodes[i + 1] + s_all * half;
            tau_rec_nodes[i] = tau_rec_nodes[i + 1] + s_rec * half;
            tau_drag_nodes[i] = tau_drag_nodes[i + 1] + s_drag * half;
        }
        let mut d_tau = vec![0.0; n];
        let mut d_tau_rec = vec![0.0; n];
        let mut d_tau_drag = vec![0.0; n];
        let mut eta_nodes = vec![0.0; n];
        let mut d_eta = vec![0.0; n];
        for i in 0..n {
            let l = node(i);
            let a = l.exp();
            let j_unit = phys.dtau_dlna(a, 1.0);
            let xr = x_rec.eval(l);
            d_tau[i] = -j_unit * x_total(l);
            d_tau_rec[i] = -j_unit * xr;
            d_tau_drag[i] = -j_unit * xr / (phys.r_coef * a);
            eta_nodes[i] = bg.conformal_time_a(a);
            d_eta[i] = phys.d_h / (a * phys.e_of_a(a));
        }
        let eta0 = eta_nodes[N_CELLS];
        let tau = UniformHermite::new(lna0, dlna, tau_nodes.clone(), d_tau);
        let tau_rec = UniformHermite::new(lna0, dlna, tau_rec_nodes.clone(), d_tau_rec);
        let tau_drag = UniformHermite::new(lna0, dlna, tau_drag_nodes.clone(), d_tau_drag);
        let eta_lna = UniformHermite::new(lna0, dlna, eta_nodes.clone(), d_eta);

        // ---- conformal-time tables for a line-of-sight solver ----
        let mut opacity = vec![0.0; n];
        let mut d_opacity = vec![0.0; n];
        let mut visibility = vec![0.0; n];
        let mut d_visibility = vec![0.0; n];
        let mut exp_minus_tau = vec![0.0; n];
        for i in 0..n {
            let l = node(i);
            let a = l.exp();
            let z = 1.0 / a - 1.0;
            let xr = x_rec.eval(l);
            let dxr = x_rec.deriv(l);
            let (w, dw, wh, dwh) = reio.weights(z);
            let x = xr + (reio.fraction - xr) * w + reio.f_he * wh;
            let dx = dxr * (1.0 - w) + (reio.fraction - xr) * dw + reio.f_he * dwh;
            let op = phys.kappa0 * x / (a * a);
            // d/d eta = (a E / d_H) d/d ln a.
            let dlna_deta = a * phys.e_of_a(a) / phys.d_h;
            let dop = phys.kappa0 * (dx - 2.0 * x) / (a * a) * dlna_deta;
            let emt = (-tau_nodes[i]).exp();
            opacity[i] = op;
            d_opacity[i] = dop;
            exp_minus_tau[i] = emt;
            visibility[i] = op * emt;
            // tau is counted from today, so d tau / d eta = -opacity.
            d_visibility[i] = (dop + op * op) * emt;
        }

        let mut th = Self {
            phys,
            reio,
            lna0,
            dlna,
            x_rec,
            t_mat,
            tau,
            tau_nodes,
            tau_rec,
            tau_rec_nodes,
            tau_drag,
            tau_drag_nodes,
            eta_lna,
            eta: eta_nodes,
            opacity,
            d_opacity,
            visibility,
            d_visibility,
            exp_minus_tau,
            eta0,
            gl4,
            gl8,
            gl16,
            summary: ThermalSummary {
                z_star: 0.0,
                r_star_mpc: 0.0,
                d_m_star_mpc: 0.0,
                theta_star: 0.0,
                theta_star_100: 0.0,
                z_drag: 0.0,
                r_drag_mpc: 0.0,
                k_damping_mpc: 0.0,
                z_visibility_peak: 0.0,
                chi_visibility_peak_mpc: 0.0,
                visibility_fwhm_mpc: 0.0,
                z_reio: 0.0,
                tau_reio: 0.0,
            },
        };
        th.summary = th.derive(bg)?;
        Ok(th)
    }

    /// The summary of derived quantities.
    pub fn summary(&self) -> &ThermalSummary {
        &self.summary
    }

    /// The reionization model with its solved redshift.
    pub fn reionization(&self) -> &Reionization {
        &self.reio
    }

    /// Helium to hydrogen number ratio f_He = n_He / n_H.
    pub fn helium_fraction(&self) -> f64 {
        self.phys.f_he
    }

    fn x_e_lna(&self, lna: f64) -> f64 {
        let z = (-lna).exp() - 1.0;
        let xr = self.x_rec_lna(lna);
        let (w, _, wh, _) = self.reio.weights(z);
        xr + (self.reio.fraction - xr) * w + self.reio.f_he * wh
    }

    fn x_rec_lna(&self, lna: f64) -> f64 {
        if lna < self.lna0 {
            self.phys.saha(lna.exp()).x_e
        } else {
            self.x_rec.eval(lna.min(0.0))
        }
    }

    /// Free electrons per hydrogen nucleus, x_e = n_e / n_H, at redshift z (recombination
    /// and reionization).
    pub fn x_e(&self, z: f64) -> f64 {
        self.x_e_lna(-(1.0 + z.max(0.0)).ln())
    }

    /// x_e of the recombination history alone (no reionization).
    pub fn x_e_recombination(&self, z: f64) -> f64 {
        self.x_rec_lna(-(1.0 + z.max(0.0)).ln())
    }

    /// Matter (baryon) temperature in kelvin; equal to the CMB temperature above the tables.
    pub fn matter_temperature_k(&self, z: f64) -> f64 {
        let lna = -(1.0 + z.max(0.0)).ln();
        if lna < self.lna0 {
            self.phys.t0 * (1.0 + z)
        } else {
            self.t_mat.eval(lna)
        }
    }

    /// Opacity d tau / d eta = n_e sigma_T a at redshift z, in 1/Mpc.
    pub fn opacity(&self, z: f64) -> f64 {
        let zp = 1.0 + z.max(0.0);
        self.phys.kappa0 * self.x_e(z) * zp * zp
    }

    /// Optical depth from today to redshift z (all electrons).
    pub fn optical_depth(&self, z: f64) -> f64 {
        let lna = -(1.0 + z.max(0.0)).ln();
        if lna >= self.lna0 {
            return self.tau.eval(lna);
        }
        // Beyond the table: add the Saha-plasma part.
        let extra = self.integrate_lna(lna, self.lna0, |l| {
            let a = l.exp();
            self.phys.dtau_dlna(a, self.phys.saha(a).x_e)
        });
        self.tau_nodes[0] + extra
    }

    /// Optical depth between two redshifts (either order).
    pub fn optical_depth_between(&self, z1: f64, z2: f64) -> f64 {
        (self.optical_depth(z2) - self.optical_depth(z1)).abs()
    }

    /// Optical depth of the recombination electrons alone (reionization excluded), from
    /// today to z (inside the tables, z <= 10^4).
    pub fn optical_depth_recombination(&self, z: f64) -> f64 {
        self.tau_rec.eval(-(1.0 + z.clamp(0.0, Z_TABLE_MAX)).ln())
    }

    /// Drag depth Integral (d tau / d eta) / R d eta from today to z (recombination
    /// electrons; z <= 10^4).
    pub fn drag_depth(&self, z: f64) -> f64 {
        self.tau_drag.eval(-(1.0 + z.clamp(0.0, Z_TABLE_MAX)).ln())
    }

    /// Composite Gauss-Legendre over ln a, panels no wider than 0.25.
    fn integrate_lna(&self, lo: f64, hi: f64, mut f: impl FnMut(f64) -> f64) -> f64 {
        if hi <= lo {
            return 0.0;
        }
        let n = ((hi - lo) / 0.25).ceil().max(1.0) as usize;
        let w = (hi - lo) / n as f64;
        (0..n)
            .map(|k| {
                let a = lo + k as f64 * w;
                self.gl8.integrate(a, a + w, &mut f)
            })
            .sum()
    }
    /// Comoving distance to z from the thermal tables' conformal time, Mpc (z <= 10^4).
    pub fn comoving_distance(&self, z: f64) -> f64 {
        self.eta0 - self.eta_lna.eval(-(1.0 + z.clamp(0.0, Z_TABLE_MAX)).ln())
    }

    /// Conformal time today, Mpc.
    pub fn conformal_age(&self) -> f64 {
        self.eta0
    }

    // ---- conformal-time tables ----

    /// Conformal times of the tables, increasing, Mpc (from z = 10^4 to today).
    pub fn eta_table(&self) -> &[f64] {
        &self.eta
    }

    /// Opacity d tau / d eta on [`Self::eta_table`], 1/Mpc.
    pub fn opacity_table(&self) -> &[f64] {
        &self.opacity
    }

    /// Its derivative d^2 tau / d eta^2, 1/Mpc^2.
    pub fn opacity_derivative_table(&self) -> &[f64] {
        &self.d_opacity
    }

    /// Visibility g = (d tau / d eta) e^-tau on [`Self::eta_table`], 1/Mpc.
    pub fn visibility_table(&self) -> &[f64] {
        &self.visibility
    }

    /// Its derivative dg / d eta, 1/Mpc^2.
    pub fn visibility_derivative_table(&self) -> &[f64] {
        &self.d_visibility
    }

    /// e^-tau on [`Self::eta_table`].
    pub fn exp_minus_tau_table(&self) -> &[f64] {
        &self.exp_minus_tau
    }

    /// Cell and fraction for a conformal time inside the tables.
    fn locate_eta(&self, eta: f64) -> (usize, f64, f64) {
        let n = self.eta.len();
        let k = self.eta.partition_point(|&e| e <= eta).clamp(1, n - 1);
        let i = k - 1;
        let h = self.eta[i + 1] - self.eta[i];
        (i, ((eta - self.eta[i]) / h).clamp(0.0, 1.0), h)
    }

    /// Scale factor at conformal time `eta` before the tables (matter plus radiation,
    /// exact there to ~1e-12): a = (Omega_m/4) (eta/d_H)^2 + sqrt(Omega_r) eta/d_H.
    fn early_scale_factor(&self, eta: f64) -> f64 {
        let c = &self.phys.cosmo;
        let s = eta / self.phys.d_h;
        0.25 * c.omega_m() * s * s + c.omega_r().sqrt() * s
    }

    /// Opacity d tau / d eta at conformal time `eta` (Mpc), 1/Mpc. Before the tables the
    /// plasma is in Saha equilibrium at T_r and the opacity is evaluated directly.
    pub fn opacity_eta(&self, eta: f64) -> f64 {
        if eta < self.eta[0] {
            let a = self.early_scale_factor(eta.max(0.0)).max(1e-30);
            return self.phys.kappa0 * self.phys.saha(a).x_e / (a * a);
        }
        let (i, t, h) = self.locate_eta(eta.min(self.eta0));
        hermite(
            self.opacity[i],
            self.opacity[i + 1],
            self.d_opacity[i],
            self.d_opacity[i + 1],
            h,
            t,
        )
    }

    /// Derivative of the opacity with respect to conformal time, 1/Mpc^2 (inside the tables;
    /// clamped to their range).
    pub fn opacity_derivative_eta(&self, eta: f64) -> f64 {
        let (i, t, h) = self.locate_eta(eta.clamp(self.eta[0], self.eta0));
        hermite_deriv(
            self.opacity[i],
            self.opacity[i + 1],
            self.d_opacity[i],
            self.d_opacity[i + 1],
            h,
            t,
        )
    }

    /// Visibility g(eta) = (d tau / d eta) e^-tau, 1/Mpc, as the product of the
    /// interpolated opacity and e^-tau (accurate also where g is exponentially small).
    /// Zero before the tables (there tau > 10^3).
    pub fn visibility_eta(&self, eta: f64) -> f64 {
        if eta < self.eta[0] {
            return 0.0;
        }
        self.opacity_eta(eta) * self.exp_minus_tau_eta(eta)
    }

    /// Visibility as a function of the conformal distance chi = eta_0 - eta,
    /// g(chi) = -d e^-tau / d chi, 1/Mpc; Integral_0^inf g d chi = 1.
    pub fn visibility_chi(&self, chi: f64) -> f64 {
        self.visibility_eta(self.eta0 - chi)
    }

    /// Optical depth from conformal time `eta` to today (inside the tables; clamped).
    pub fn optical_depth_eta(&self, eta: f64) -> f64 {
        // d tau / d eta = -opacity.
        let (i, t, h) = self.locate_eta(eta.clamp(self.eta[0], self.eta0));
        hermite(
            self.tau_nodes[i],
            self.tau_nodes[i + 1],
            -self.opacity[i],
            -self.opacity[i + 1],
            h,
            t,
        )
    }

    /// e^-tau(eta), with tau the optical depth from eta to today; zero before the tables.
    pub fn exp_minus_tau_eta(&self, eta: f64) -> f64 {
        if eta < self.eta[0] {
            return 0.0;
        }
        (-self.optical_depth_eta(eta)).exp()
    }
}

#[cfg(test)]
mod tests;
