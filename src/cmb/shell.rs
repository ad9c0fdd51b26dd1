//! The idealized finite-thickness last-scattering shell: analytic transfer functions
//! Delta^T_l(k) and Delta^E_l(k) for the bispectrum engine. This is a **model**, not the
//! full physics: no acoustic driving in T, no Doppler or ISW terms, no reionization, a
//! Gaussian visibility and a tight-coupling polarization source. It is the cheap,
//! controllable stand-in for the line-of-sight Boltzmann solver (same output type,
//! [`TransferTable`]).
//!
//! Conventions are those of [`crate::cmb::transfer`]: Delta^X_l(k) is the transfer from
//! the primordial potential Phi (P_Phi = (9/25) P_zeta) to a_lm, with
//! C^XY_l = (2/pi) Integral k^2 dk P_Phi(k) Delta^X_l(k) Delta^Y_l(k), dimensionless
//! Delta T / T; lengths in Mpc, wavenumbers in 1/Mpc.
//!
//! ## The shell
//! The visibility is replaced by a normalized Gaussian in comoving distance,
//!
//! ```text
//! W(chi) = exp[-(chi - chi_*)^2 / (2 sigma_chi^2)] / (sqrt(2 pi) sigma_chi),
//! ```
//!
//! centred on chi_*, the comoving distance to the visibility peak; by default
//! sigma_chi = FWHM / (2 sqrt(2 ln 2)) from the thermal history's visibility width.
//! sigma_chi = 0 is the zero-thickness limit W = delta(chi - chi_*).
//!
//! ## Temperature
//! The Sachs-Wolfe effect (Sachs & Wolfe 1967, ApJ 147, 73): on large scales
//! Delta T / T = -Phi / 3 for the potential Phi in matter domination (the sign convention
//! of Komatsu & Spergel 2001, PRD 63, 063002). With diffusion damping,
//!
//! ```text
//! Delta^T_l(k) = S D(k) Integral dchi W(chi) j_l(k chi),   S = -1/3,   D(k) = exp[-(k/k_D)^2].
//! ```
//!
//! The damping factor multiplies the **amplitude**, as the photon perturbations decay
//! as exp(-k^2/k_D^2) with the k_D of [`crate::cmb::thermal`] (Kaiser 1983, MNRAS 202,
//! 1169; Zaldarriaga & Harari 1995, PRD 52, 3276; Hu & White 1997, ApJ 479, 568), so
//! that power falls as C_l ~ exp[-2 (k/k_D)^2] ~ exp[-2 l^2 / (k_D chi_*)^2]. Damping can
//! be switched off.
//!
//! Check (zero thickness, no damping, n_s = 1, P_Phi = (9/25) 2 pi^2 A_s / k^3):
//! C_l = (2/pi) (9/25) 2 pi^2 A_s (1/9) Integral dk/k j_l(k chi_*)^2 and
//! Integral_0^inf dx/x j_l(x)^2 = 1 / (2 l (l+1)) (the Weber-Schafheitlin integral of
//! J_{l+1/2}^2 / x^2; Abramowitz & Stegun 11.4.33, equation number from memory), so
//! l (l+1) C_l / (2 pi) = A_s / 25, the Sachs-Wolfe plateau.
//!
//! ## E polarization (a model)
//! 1. **Dipole.** The tight-coupled photon-baryon fluid in matter domination with constant
//!    potentials oscillates about the Sachs-Wolfe value: the effective temperature is
//!    Theta_0 + Psi = S Phi cos(k r_s), r_s the comoving sound horizon. Photon
//!    continuity, Theta_0' = -k Theta_1 (Ma & Bertschinger 1995, ApJ 455, 7, eq. 63 with
//!    F_gamma = 4 Theta, constant potentials, r_s' = c_s), gives the dipole
//!
//!    ```text
//!    Theta_1 = S Phi c_s sin(k r_s),     c_s = 1 / sqrt(3 (1 + R_*)).
//!    ```
//!
//!    (The baryon-loaded amplitude (1 + 3R)/3 and the radiation driving are left out:
//!    the amplitude stays the Sachs-Wolfe one, as for T.)
//! 2. **Quadrupole and polarization in tight coupling** (Kaiser 1983; Zaldarriaga &
//!    Harari 1995; Hu & White 1997). To first order in k / tau', the Thomson collision
//!    terms of the l = 2 temperature and the l = 0, 2 polarization hierarchies of
//!    Ma & Bertschinger (1995, eqs. 63-64) balance the streaming source:
//!    G_0 = Pi / 2, G_2 = Pi / 10 and F_2 = (32/45) theta_gamma / tau' (16/27 without
//!    polarization: the polarization-corrected coefficient, the same physics that turns
//!    4/5 into 16/15 in k_D). With theta_gamma = 3 k Theta_1 this is
//!
//!    ```text
//!    Pi = Theta_2 + Theta_P0 + Theta_P2 = (5/2) Theta_2 = (4/3) (k / tau') Theta_1,
//!    ```
//!
//!    tau' = n_e sigma_T a the opacity (1/Mpc).
//! 3. **Projection.** The E-mode line-of-sight integral (Seljak & Zaldarriaga 1996, ApJ
//!    469, 437; Zaldarriaga & Seljak 1997, PRD 55, 1830, whose E sign convention this
//!    follows) is Delta^E_l = sqrt((l+2)!/(l-2)!) Integral d eta g(eta) (3/4) Pi
//!    j_l(x)/x^2, x = k (eta_0 - eta). The model replaces g by W, evaluates tau' at the
//!    visibility peak (tau'_*), and applies the same damping D(k):
//!
//!    ```text
//!    Delta^E_l(k) = S c_s (k / tau'_*) sin(k r_s) D(k) sqrt((l+2)(l+1) l (l-1))
//!                   Integral dchi W(chi) j_l(k chi) / (k chi)^2.
//!    ```
//!
//! Left out: the variation of tau' across the visibility (which really sets the
//! polarization amplitude, through the width of last scattering), baryon loading and
//! driving of the amplitude, the reionization bump, and any exact damping shape.
//! C^TE is the cross of the two transfers; since T carries no acoustic oscillation, it
//! follows sin(k r_s) rather than the true sin(k r_s) cos(k r_s). Measured with the
//! Planck 2018 defaults: D^EE_l peaks at l = 1031 at 0.053 of D^TT_10 (the real sky: ~0.05
//! of its plateau near l ~ 1000, from memory) — an order-of-magnitude model.
//!
//! ## Numerics
//! **k grid** ([`KGridSpec`], [`KGrid`]). Gauss-Legendre panels of width
//! pi / (chi_* + 6 sigma_chi), one half-period of j_l(k chi) at the far side of the shell,
//! from k = 0 to k_max, `nodes_per_panel` (default 5) nodes each: the node spacing is
//! about pi / (5 chi_*). k_max is the first of:
//! - damping on: min(5 k_D, k_thick): beyond 5 k_D the amplitude is below e^-25;
//! - damping off: min(k_thick, max(2 (l_max + 1/2) / chi_*, 0.4 / Mpc)),
//!
//! with k_thick = sqrt(((l_max + 1/2)/chi_*)^2 + (6 / sigma_chi)^2): a Gaussian shell
//! suppresses the radial wavenumber k_r = sqrt(k^2 - nu^2/chi^2) as exp(-k_r^2 sigma^2/2),
//! e^-18 at k_r sigma = 6. Only zero (or tiny) thickness without damping is truncated
//! ([`KCutoff::Multipole`]): its C_l misses the fraction 1 - sqrt(1 - nu^2/(k_max chi_*)^2)
//! (from the j_l envelope), 13% at l = l_max for k_max = 2 l_max / chi_*.
//!
//! Measured (tests below): zero thickness, no damping, n_s = 1, k_max = 30 (l_max + 1/2) /
//! chi_*: l (l+1) C_l / 2pi = A_s/25 to 1.7e-6 for l <= 30 and to the truncation estimate
//! (5.6e-4 at l = 1000) within 2e-8 for 30 <= l <= 1000. Default shell, l <= 1500:
//! 5 -> 8 nodes per panel changes C^TT and C^EE by <= 1.4e-6, 5 k_D -> 7 k_D and
//! 6/sigma -> 9/sigma by <= 1e-8. With damping the spectrum follows the envelope
//! estimate of the damping (see `damping_tail`) to 5e-6 for l <= 3000.
//!
//! Memory of a table: 16 n_k (l_max + 1) bytes (T and E); the default shell at
//! l_max = 5000 has n_k = 11 490 (k_max = 0.516/Mpc, set by the thickness): 0.92 GB.
//! [`ShellModel::spectra`] streams over k instead (l_max = 5000 in ~5 s of one core).
//!
//! **Radial (chi) quadrature.** sigma_chi = 0: the single node chi_*. Otherwise
//! Gauss-Legendre on chi_* +- 6 sigma_chi with
//! n(k) = ceil(theta/2 + 24 + 3 theta^(1/3)) nodes, theta = 6 k sigma_chi (the phase of
//! j_l(k chi) across the half-width; the Legendre degree needed for exp(i theta x) is
//! theta + O(theta^(1/3)), and 24 nodes carry the Gaussian's own bandwidth to ~1e-14),
//! taken from a precomputed ladder of rules (nothing is built in the loop), weights
//! W(chi_i) w_i renormalized to sum 1. Measured against three times as many nodes for
//! sigma_chi = 16, 100, 500 Mpc and 1e-3 <= k <= 0.8/Mpc: <= 3e-13 of the envelopes
//! 1/(k chi_*) (T) and sqrt((l+2)!/(l-2)!)/(k chi_*)^3 (E).
//!
//! Per (k, chi node) one call of [`sph_bessel_all_l`], up to l_top = x + 16 x^(1/3) + 16
//! (x = k chi; above it j_l(x) < 1e-24 of its envelope and the row is zero), parallel over
//! k with rayon, no allocation inside the k loop.
//!
//! **Radial grid for the bispectrum** ([`ShellModel::radial_grid`], [`RadialGridSpec`]).
//! Measured with the bispectrum engine's reduced bispectra (TTT, EEE, TTE; local and
//! equilateral; triangles from (10,10,10) to (l_max, l_max, l_max) and squeezed ones)
//! against grids 3-4 times denser and wider: default shell, l_max = 500 and 2000: 258
//! and 264 nodes, worst 1.2e-8 (local) and 6.2e-6 (equilateral, at (10,10,10)); with 4
//! instead of 6 nodes per panel 1.7e-6 / 5.8e-4 (l_max = 500) and 1.3e-5 / 4.5e-3
//! (2000); without the outer panels 2e-5 (local) but a factor 3 off for the broad
//! equilateral (10,10,10). Zero thickness without damping against the
//! Sachs-Wolfe limit b = -6 (C_l1 C_l2 + 2 perms) (Komatsu & Spergel 2001), l <= 100,
//! k_max = 0.1/Mpc: 312 nodes, worst 4.6e-4 (the finite width of the kernel).

use rayon::prelude::*;
use serde::Serialize;

use crate::cmb::ThermalHistory;
use crate::cmb::transfer::{Field, RadialGrid, TransferTable};
use crate::cosmology::Primordial;
use crate::error::{Error, Location, Result};
use crate::numerics::GaussLegendre;
use crate::special::sph_bessel_all_l;

/// The Sachs-Wolfe source: Delta T / T = S Phi, S = -1/3 (Sachs & Wolfe 1967; Komatsu &
/// Spergel 2001 sign convention).
pub const SACHS_WOLFE: f64 = -1.0 / 3.0;

/// Highest l the shell model is built and tested for.
pub const MAX_LMAX: usize = 5000;

/// Half-width of the chi quadrature in units of sigma_chi.
const CHI_HALF_WIDTH_SIGMAS: f64 = 6.0;

/// FWHM of a Gaussian in units of its sigma: 2 sqrt(2 ln 2).
pub const FWHM_PER_SIGMA: f64 = 2.354_820_045_030_949_4;

/// Parameters of a shell model (all lengths comoving, Mpc).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ShellParams {
    /// Comoving distance to the centre of the shell (the visibility peak), Mpc.
    pub chi_star_mpc: f64,
    /// Gaussian width of the shell, Mpc (0: zero thickness).
    pub sigma_chi_mpc: f64,
    /// Damping wavenumber k_D in 1/Mpc; `None` switches damping off.
    pub k_damping_mpc: Option<f64>,
    /// Comoving sound horizon at last scattering, Mpc.
    pub sound_horizon_mpc: f64,
    /// Opacity tau' = n_e sigma_T a at the visibility peak, 1/Mpc.
    pub tau_dot_star_mpc: f64,
    /// Sound speed of the photon-baryon fluid at last scattering (units of c).
    pub sound_speed: f64,
}

/// How to damp.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize)]
pub enum Damping {
    /// k_D of the thermal history at z_*.
    #[default]
    Thermal,
    /// No damping.
    Off,
    /// This k_D, 1/Mpc.
    Wavenumber(f64),
}

/// Choices that override the thermal-history defaults in [`ShellModel::from_thermal`].
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct ShellOverrides {
    /// Shell width sigma_chi in Mpc (default: visibility FWHM / (2 sqrt(2 ln 2))).
    pub sigma_chi_mpc: Option<f64>,
    /// Damping (default: the thermal k_D).
    pub damping: Damping,
}

/// A validated shell model; see the module docs for the equations.
///
/// ```
/// use ngreach::cmb::shell::{KGridSpec, ShellModel, ShellParams};
/// let m = ShellModel::new(ShellParams {
///     chi_star_mpc: 13_870.0,
///     sigma_chi_mpc: 16.0,
///     k_damping_mpc: Some(0.14),
///     sound_horizon_mpc: 144.4,
///     tau_dot_star_mpc: 0.06,
///     sound_speed: 0.45,
/// })
/// .unwrap();
/// let table = m.transfer_table(50, &KGridSpec::default()).unwrap();
/// assert_eq!(table.lmax(), 50);
/// ```
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ShellModel {
    p: ShellParams,
}

/// Which criterion set k_max.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum KCutoff {
    /// Given explicitly.
    Override,
    /// A multiple of k_D (damping on).
    Damping,
    /// The thickness of the shell.
    Thickness,
    /// A multiple of l_max / chi_* (or the floor): the truncated, unconverged case.
    Multipole,
}

/// How to build the k grid (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct KGridSpec {
    /// Gauss-Legendre nodes per panel of width pi / (chi_* + 6 sigma_chi) (2..=32).
    pub nodes_per_panel: usize,
    /// With damping, k_max <= this times k_D.
    pub damping_cut: f64,
    /// k_max <= sqrt((nu_max/chi_*)^2 + (this / sigma_chi)^2) for sigma_chi > 0.
    pub thickness_cut: f64,
    /// Without damping, k_max <= max(this (l_max + 1/2) / chi_*, `undamped_floor_mpc`).
    pub undamped_factor: f64,
    /// See `undamped_factor`, 1/Mpc.
    pub undamped_floor_mpc: f64,
    /// Explicit k_max in 1/Mpc (overrides all the above).
    pub k_max_mpc: Option<f64>,
}

impl Default for KGridSpec {
    fn default() -> Self {
        Self {
            nodes_per_panel: 5,
            damping_cut: 5.0,
            thickness_cut: 6.0,
            undamped_factor: 2.0,
            undamped_floor_mpc: 0.4,
            k_max_mpc: None,
        }
    }
}

/// A k quadrature: nodes and weights for Integral_0^k_max dk.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct KGrid {
    /// Nodes, 1/Mpc, increasing.
    pub k: Vec<f64>,
    /// Weights, 1/Mpc.
    pub w: Vec<f64>,
    /// Upper end, 1/Mpc.
    pub k_max: f64,
    /// What set k_max.
    pub cutoff: KCutoff,
}

impl KGrid {
    /// Number of nodes.
    pub fn len(&self) -> usize {
        self.k.len()
    }
    /// True when empty (never, for a built grid).
    pub fn is_empty(&self) -> bool {
        self.k.is_empty()
    }
}

/// C^TT_l, C^EE_l, C^TE_l for l = 0..=lmax (dimensionless, Delta T / T; rows l < 2 zero).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ShellSpectra {
    /// Temperature.
    pub tt: Vec<f64>,
    /// E polarization.
    pub ee: Vec<f64>,
    /// Cross.
    pub te: Vec<f64>,
}

/// How to build the radial quadrature of the bispectrum's Integral r^2 dr
/// ([`ShellModel::radial_grid`]).
///
/// The p = 0 radial function X^0_l(r) = (2/pi) Integral k^2 dk Delta_l(k) j_l(k r) is the
/// shell seen through the damping and the k cut-off: for T roughly a Gaussian of width
/// w = sqrt(sigma_chi^2 + s_D^2 + 1/k_max^2) about chi_*, with s_D = sqrt(2)/k_D
/// (exp(-k^2/k_D^2) is a Gaussian smoothing of that width; 0 without damping) and 1/k_max
/// the width of the truncated delta function sin(k_max u)/(pi u), u = r - chi_*, that zero
/// thickness without damping leaves. For E the factor sin(k r_s)/k turns it into a
/// box-car from chi_* - r_s to chi_* + r_s with edges of width w. The functions with
/// p > 0 are broad, ~chi_*/l. The grid has
/// - a core chi_* +- (r_s + `core_widths` w) of Gauss-Legendre panels of width
///   `core_panel` min(w, pi/k_max), `nodes_per_panel` nodes each;
/// - outer panels from the core out to chi_* (1 -+ `outer_fraction`), each
///   `outer_growth` times wider than the one before, for the broad p > 0 functions of
///   low l;
/// - for a truncated delta (the transfer amplitude at k_max, D(k_max)
///   exp(-(sigma_chi k_max)^2 / 2), above 1e-3: no damping and a thin shell) no outer
///   panels (their coarse nodes would alias its 1/u tail) and a core half-width
///   L = r_s + max(`core_widths` w, `truncated_phase` / k_max) rounded up to
///   k_max L = (n + 1/2) pi, where the sine integral's leading tail cos(k_max L)/(k_max L)
///   vanishes.
///
/// The defaults are the measured choice of the module docs.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct RadialGridSpec {
    /// The core reaches r_s + this times w on either side of chi_*.
    pub core_widths: f64,
    /// Core panel width in units of min(w, pi/k_max).
    pub core_panel: f64,
    /// Gauss-Legendre nodes per panel (1..=32).
    pub nodes_per_panel: usize,
    /// The outer region reaches chi_* (1 -+ this), in [0, 0.9]; 0 for none.
    pub outer_fraction: f64,
    /// Width ratio of successive outer panels (> 1).
    pub outer_growth: f64,
    /// Truncated delta only: the core half-width is L = r_s + max(`core_widths` w,
    /// this / k_max), rounded up to k_max L = (n + 1/2) pi; the sine-integral tail left
    /// out is then O(1/(k_max L)^2).
    pub truncated_phase: f64,
}

impl Default for RadialGridSpec {
    fn default() -> Self {
        Self {
            core_widths: 6.0,
            core_panel: 3.0,
            nodes_per_panel: 6,
            outer_fraction: 0.5,
            outer_growth: 1.5,
            truncated_phase: 20.0 * std::f64::consts::PI,
        }
    }
}

/// Gauss-Legendre rules on [-6, 6] sigma with the Gaussian in the weights.
struct ChiPlan {
    /// (number of nodes, nodes u in units of sigma, normalized weights).
    rules: Vec<(usize, Vec<f64>, Vec<f64>)>,
    sigma: f64,
    /// Multiplier on the node count (1 in production; tests refine with it).
    scale: f64,
}

impl ChiPlan {
    /// Nodes needed at k (see the module docs).
    fn nodes_needed(&self, k: f64) -> usize {
        let theta = 6.0 * k * self.sigma;
        (self.scale * (0.5 * theta + 24.0 + 3.0 * theta.cbrt())).ceil() as usize
    }

    fn new(sigma: f64, k_max: f64) -> Self {
        Self::with_scale(sigma, k_max, 1.0)
    }

    fn with_scale(sigma: f64, k_max: f64, scale: f64) -> Self {
        if sigma == 0.0 {
            return Self {
                rules: vec![(1, vec![0.0], vec![1.0])],
                sigma,
                scale,
            };
        }
        let mut plan = Self {
            rules: Vec::new(),
            sigma,
            scale,
        };
        let top = plan.nodes_needed(k_max);
        let mut n = 24usize;
        loop {
            let gl = GaussLegendre::new(n);
            let u: Vec<f64> = gl.nodes.iter().map(|x| x * CHI_HALF_WIDTH_SIGMAS).collect();
            let mut w: Vec<f64> = gl
                .weights
                .iter()
                .zip(&u)
                .map(|(wi, ui)| wi * (-0.5 * ui * ui).exp())
                .collect();
            let s: f64 = w.iter().sum();
            for wi in &mut w {
                *wi /= s;
            }
            plan.rules.push((n, u, w));
            if n >= top {
                break;
            }
            // Ladder step of ~12%: at most that many extra nodes per k.
            n = (n + n / 8).max(n + 1);
        }
        plan
    }

    /// The smallest rule with at least the nodes needed at k.
    fn rule(&self, k: f64) -> (&[f64], &[f64]) {
        let need = if self.sigma == 0.0 {
            1
        } else {
            self.nodes_needed(k)
        };
        let r = self
            .rules
            .iter()
            .find(|r| r.0 >= need)
            .unwrap_or_else(|| &self.rules[self.rules.len() - 1]);
        (&r.1, &r.2)
    }
}

/// Highest l with j_l(x) above ~1e-24 of its envelope (Airy decay past the turning point:
/// j_l ~ exp(-(2/3) t^(3/2)) with t = (nu - x) / (x/2)^(1/3); at nu - x = 16 x^(1/3),
/// t = 20 and the factor is e^-60).
fn l_top(x: f64) -> usize {
    (x + 16.0 * x.cbrt() + 16.0).ceil() as usize
}

impl ShellModel {
    /// Validates the parameters.
    ///
    /// # Errors
    /// [`Error::OutOfRange`] for chi_* not positive, sigma_chi < 0 or 6 sigma_chi >= chi_*,
    /// a non-positive k_D, sound horizon < 0, tau'_* <= 0, or c_s outside (0, 1].
    pub fn new(p: ShellParams) -> Result<Self> {
        let at = || Location::Builtin;
        let check = |ok: bool, field: &str, v: f64, allowed: &str| {
            if ok && v.is_finite() {
                Ok(())
            } else {
                Err(Error::out_of_range(at(), field, v, allowed))
            }
        };
        check(p.chi_star_mpc > 0.0, "chi_star_mpc", p.chi_star_mpc, "> 0")?;
        check(
            p.sigma_chi_mpc >= 0.0 && CHI_HALF_WIDTH_SIGMAS * p.sigma_chi_mpc < p.chi_star_mpc,
            "sigma_chi_mpc",
            p.sigma_chi_mpc,
            "0 <= sigma_chi < chi_star / 6",
        )?;
        if let Some(kd) = p.k_damping_mpc {
            check(kd > 0.0, "k_damping_mpc", kd, "> 0")?;
        }
        check(
            p.sound_horizon_mpc >= 0.0,
            "sound_horizon_mpc",
            p.sound_horizon_mpc,
            ">= 0",
        )?;
        check(
            p.tau_dot_star_mpc > 0.0,
            "tau_dot_star_mpc",
            p.tau_dot_star_mpc,
            "> 0",
        )?;
        check(
            p.sound_speed > 0.0 && p.sound_speed <= 1.0,
            "sound_speed",
            p.sound_speed,
            "0 < c_s <= 1",
        )?;
        Ok(Self { p })
    }

    /// The shell of a thermal history: chi_* at the visibility peak, sigma_chi from the
    /// visibility FWHM, k_D and r_s at z_*, tau' at the visibility peak, and
    /// c_s = dr_s / d eta at z_* (central difference of r_s(z) and chi(z), dz = 0.5).
    ///
    /// # Errors
    /// As [`ShellModel::new`] for an override out of range (e.g. a negative width).
    pub fn from_thermal(th: &ThermalHistory, o: &ShellOverrides) -> Result<Self> {
        let s = th.summary();
        let sigma = o
            .sigma_chi_mpc
            .unwrap_or(s.visibility_fwhm_mpc / FWHM_PER_SIGMA);
        let k_d = match o.damping {
            Damping::Thermal => Some(s.k_damping_mpc),
            Damping::Off => None,
            Damping::Wavenumber(k) => Some(k),
        };
        let dz = 0.5;
        let z = s.z_star;
        let drs = th.sound_horizon(z + dz) - th.sound_horizon(z - dz);
        let dchi = th.comoving_distance(z + dz) - th.comoving_distance(z - dz);
        let c_s = -drs / dchi;
        Self::new(ShellParams {
            chi_star_mpc: s.chi_visibility_peak_mpc,
            sigma_chi_mpc: sigma,
            k_damping_mpc: k_d,
            sound_horizon_mpc: s.r_star_mpc,
            tau_dot_star_mpc: th.opacity(s.z_visibility_peak),
            sound_speed: c_s,
        })
        .map_err(|e| match e {
            Error::OutOfRange {
                field,
                value,
                allowed,
                ..
            } if field == "sigma_chi_mpc" => Error::OutOfRange {
                at: Location::Builtin,
                field: "shell width sigma_chi (Mpc)".into(),
                value,
                allowed,
            },
            other => other,
        })
    }

    /// The parameters.
    pub fn params(&self) -> &ShellParams {
        &self.p
    }
    /// chi_*, Mpc.
    pub fn chi_star_mpc(&self) -> f64 {
        self.p.chi_star_mpc
    }
    /// sigma_chi, Mpc.
    pub fn sigma_chi_mpc(&self) -> f64 {
        self.p.sigma_chi_mpc
    }
    /// k_D in 1/Mpc, or `None` without damping.
    pub fn k_damping_mpc(&self) -> Option<f64> {
        self.p.k_damping_mpc
    }

    /// The damping factor D(k) = exp(-(k/k_D)^2) on the amplitude (1 without damping).
    pub fn damping_factor(&self, k: f64) -> f64 {
        match self.p.k_damping_mpc {
            Some(kd) => (-(k / kd) * (k / kd)).exp(),
            None => 1.0,
        }
    }

    /// The E source factor S c_s (k / tau'_*) sin(k r_s) (module docs, E step 3).
    pub fn e_source(&self, k: f64) -> f64 {
        SACHS_WOLFE
            * self.p.sound_speed
            * (k / self.p.tau_dot_star_mpc)
            * (k * self.p.sound_horizon_mpc).sin()
    }

    fn check_lmax(lmax: usize) -> Result<()> {
        if (2..=MAX_LMAX).contains(&lmax) {
            Ok(())
        } else {
            Err(Error::out_of_range(
                Location::Builtin,
                "lmax",
                lmax as f64,
                "2 <= lmax <= 5000",
            ))
        }
    }

    /// The k quadrature for `lmax` (see the module docs for the rule).
    ///
    /// # Errors
    /// [`Error::OutOfRange`] for lmax outside [2, 5000] or an invalid `spec`.
    pub fn k_grid(&self, lmax: usize, spec: &KGridSpec) -> Result<KGrid> {
        Self::check_lmax(lmax)?;
        let bad = |f: &str, v: f64, a: &str| Err(Error::out_of_range(Location::Builtin, f, v, a));
        if !(2..=32).contains(&spec.nodes_per_panel) {
            return bad("nodes_per_panel", spec.nodes_per_panel as f64, "2..=32");
        }
        for (f, v) in [
            ("damping_cut", spec.damping_cut),
            ("thickness_cut", spec.thickness_cut),
            ("undamped_factor", spec.undamped_factor),
            ("undamped_floor_mpc", spec.undamped_floor_mpc),
        ] {
            if !(v.is_finite() && v > 0.0) {
                return bad(f, v, "> 0");
            }
        }
        let chi = self.p.chi_star_mpc;
        let sigma = self.p.sigma_chi_mpc;
        let k_l = (lmax as f64 + 0.5) / chi;
        let k_thick = if sigma > 0.0 {
            (k_l * k_l + (spec.thickness_cut / sigma).powi(2)).sqrt()
        } else {
            f64::INFINITY
        };
        let (k_max, cutoff) = if let Some(k) = spec.k_max_mpc {
            if !(k.is_finite() && k > 0.0) {
                return bad("k_max_mpc", k, "> 0");
            }
            (k, KCutoff::Override)
        } else if let Some(kd) = self.p.k_damping_mpc {
            let kd_cut = spec.damping_cut * kd;
            if kd_cut <= k_thick {
                (kd_cut, KCutoff::Damping)
            } else {
                (k_thick, KCutoff::Thickness)
            }
        } else {
            let k_m = (spec.undamped_factor * k_l).max(spec.undamped_floor_mpc);
            if k_m <= k_thick {
                (k_m, KCutoff::Multipole)
            } else {
                (k_thick, KCutoff::Thickness)
            }
        };
        let width = std::f64::consts::PI / (chi + CHI_HALF_WIDTH_SIGMAS * sigma);
        let n_panels = (k_max / width).ceil().max(1.0) as usize;
        let h = k_max / n_panels as f64;
        let gl = GaussLegendre::new(spec.nodes_per_panel);
        let mut k = Vec::with_capacity(n_panels * gl.len());
        let mut w = Vec::with_capacity(n_panels * gl.len());
        for p in 0..n_panels {
            let lo = p as f64 * h;
            for (x, wi) in gl.nodes.iter().zip(&gl.weights) {
                k.push(lo + 0.5 * h * (1.0 + x));
                w.push(0.5 * h * wi);
            }
        }
        Ok(KGrid {
            k,
            w,
            k_max,
            cutoff,
        })
    }

    /// sqrt((l+2)(l+1) l (l-1)) for l = 0..=lmax (0 for l < 2).
    fn spin2_factors(lmax: usize) -> Vec<f64> {
        (0..=lmax)
            .map(|l| {
                if l < 2 {
                    0.0
                } else {
                    let l = l as f64;
                    ((l + 2.0) * (l + 1.0) * l * (l - 1.0)).sqrt()
                }
            })
            .collect()
    }

    /// Delta^T_l(k), Delta^E_l(k) for l = 0..=lmax at one k into `t`, `e` (length lmax+1),
    /// with `j` as scratch (length lmax+1). No allocation.
    fn fill_row(
        &self,
        k: f64,
        plan: &ChiPlan,
        spin2: &[f64],
        j: &mut [f64],
        t: &mut [f64],
        e: &mut [f64],
    ) {
        let lmax = t.len() - 1;
        t.fill(0.0);
        e.fill(0.0);
        let (u, wu) = plan.rule(k);
        let mut l_used = 1;
        for (&ui, &wi) in u.iter().zip(wu) {
            let x = k * (self.p.chi_star_mpc + self.p.sigma_chi_mpc * ui);
            let top = l_top(x).min(lmax);
            l_used = l_used.max(top);
            sph_bessel_all_l(top as u32, x, &mut j[..=top]);
            let we = wi / (x * x);
            for ((tl, el), &jl) in t[2..=top]
                .iter_mut()
                .zip(e[2..=top].iter_mut())
                .zip(&j[2..=top])
            {
                *tl += wi * jl;
                *el += we * jl;
            }
        }
        let d = self.damping_factor(k);
        let st = SACHS_WOLFE * d;
        let se = self.e_source(k) * d;
        for l in 2..=l_used {
            t[l] *= st;
            e[l] *= se * spin2[l];
        }
    }

    /// The kernel width w = sqrt(sigma_chi^2 + 2/k_D^2 + 1/k_max^2) in Mpc (see
    /// [`RadialGridSpec`]).
    pub fn kernel_width_mpc(&self, k_max: f64) -> f64 {
        let sd2 = self.p.k_damping_mpc.map_or(0.0, |kd| 2.0 / (kd * kd));
        (self.p.sigma_chi_mpc.powi(2) + sd2 + 1.0 / (k_max * k_max)).sqrt()
    }

    /// A radial quadrature for the bispectrum's Integral r^2 dr that matches the k grid
    /// `grid` (see [`RadialGridSpec`]); nodes increasing, weights include r^2.
    ///
    /// # Errors
    /// [`Error::OutOfRange`] for an invalid `spec` or a grid without a positive k_max.
    pub fn radial_grid(&self, grid: &KGrid, spec: &RadialGridSpec) -> Result<RadialGrid> {
        let bad = |f: &str, v: f64, a: &str| Err(Error::out_of_range(Location::Builtin, f, v, a));
        if !(grid.k_max.is_finite() && grid.k_max > 0.0) {
            return bad("k_max", grid.k_max, "> 0");
        }
        if !(spec.core_widths.is_finite() && spec.core_widths > 0.0) {
            return bad("core_widths", spec.core_widths, "> 0");
        }
        if !(spec.core_panel.is_finite() && spec.core_panel > 0.0) {
            return bad("core_panel", spec.core_panel, "> 0");
        }
        if !(1..=32).contains(&spec.nodes_per_panel) {
            return bad("nodes_per_panel", spec.nodes_per_panel as f64, "1..=32");
        }
        if !(0.0..=0.9).contains(&spec.outer_fraction) {
            return bad("outer_fraction", spec.outer_fraction, "0 <= f <= 0.9");
        }
        if spec.outer_fraction > 0.0 && !(spec.outer_growth.is_finite() && spec.outer_growth > 1.0)
        {
            return bad("outer_growth", spec.outer_growth, "> 1");
        }
        if !(spec.truncated_phase.is_finite() && spec.truncated_phase >= 0.0) {
            return bad("truncated_phase", spec.truncated_phase, ">= 0");
        }
        let chi = self.p.chi_star_mpc;
        let w = self.kernel_width_mpc(grid.k_max);
        let h = spec.core_panel * w.min(std::f64::consts::PI / grid.k_max);
        // The E kernels sit at chi_* +- r_s (sin(k r_s) shifts j_l(k chi) by +- r_s).
        let mut half = self.p.sound_horizon_mpc + spec.core_widths * w;
        // Truncated delta (no damping, zero thickness): end the core where the sine
        // integral's tail, cos(k_max L) / (k_max L), vanishes, and add no outer panels
        // (their coarse nodes would alias the 1/u tail).
        let sk = self.p.sigma_chi_mpc * grid.k_max;
        let truncated = self.damping_factor(grid.k_max) * (-0.5 * sk * sk).exp() > 1e-3;
        if truncated {
            let pi = std::f64::consts::PI;
            let phase = grid.k_max * self.p.sound_horizon_mpc
                + (spec.core_widths * w * grid.k_max).max(spec.truncated_phase);
            half = ((phase / pi).floor() + 0.5) * pi / grid.k_max;
        }
        let outer_fraction = if truncated { 0.0 } else { spec.outer_fraction };
        let lo = (chi - half).max(0.05 * chi);
        let hi = chi + half;
        let n_core = ((hi - lo) / h).ceil().max(1.0) as usize;
        let hc = (hi - lo) / n_core as f64;
        // Panel edges: geometric below the core, uniform in it, geometric above.
        let outer = |start: f64, end: f64| -> Vec<f64> {
            // Edges from `start` towards `end` (exclusive of start).
            let mut edges = Vec::new();
            let dir = (end - start).signum();
            let mut width = hc;
            let mut e = start;
            while (end - e) * dir > 0.0 {
                width *= spec.outer_growth;
                e += dir * width;
                if (end - e) * dir < 0.5 * width {
                    e = end;
                }
                edges.push(e);
            }
            edges
        };
        let mut edges: Vec<f64> = Vec::new();
        if outer_fraction > 0.0 && chi * (1.0 - outer_fraction) < lo {
            let mut below = outer(lo, chi * (1.0 - outer_fraction));
            below.reverse();
            edges.extend(below);
        }
        edges.extend((0..=n_core).map(|i| lo + i as f64 * hc));
        if outer_fraction > 0.0 && chi * (1.0 + outer_fraction) > hi {
            edges.extend(outer(hi, chi * (1.0 + outer_fraction)));
        }
        let gl = GaussLegendre::new(spec.nodes_per_panel);
        let mut r = Vec::with_capacity(edges.len() * gl.len());
        let mut wr = Vec::with_capacity(edges.len() * gl.len());
        for e in edges.windows(2) {
            let half = 0.5 * (e[1] - e[0]);
            let mid = 0.5 * (e[1] + e[0]);
            for (x, wi) in gl.nodes.iter().zip(&gl.weights) {
                let ri = mid + half * x;
                r.push(ri);
                wr.push(half * wi * ri * ri);
            }
        }
        Ok(RadialGrid { r, w: wr })
    }

    /// The transfer table (fields T, E) to `lmax` on the grid of `spec`.
    ///
    /// # Errors
    /// As [`ShellModel::k_grid`].
    pub fn transfer_table(&self, lmax: usize, spec: &KGridSpec) -> Result<TransferTable> {
        let grid = self.k_grid(lmax, spec)?;
        self.transfer_table_on(lmax, &grid)
    }

    /// The transfer table (fields T, E) to `lmax` on a given k grid.
    ///
    /// # Errors
    /// [`Error::OutOfRange`] for lmax outside [2, 5000]; [`Error::BadField`] for a grid
    /// with non-positive or non-finite nodes.
    pub fn transfer_table_on(&self, lmax: usize, grid: &KGrid) -> Result<TransferTable> {
        Self::check_lmax(lmax)?;
        Self::check_grid(grid)?;
        let n = lmax + 1;
        let plan = ChiPlan::new(self.p.sigma_chi_mpc, grid.k_max);
        let spin2 = Self::spin2_factors(lmax);
        let mut dt = vec![0.0; grid.len() * n];
        let mut de = vec![0.0; grid.len() * n];
        dt.par_chunks_mut(n)
            .zip(de.par_chunks_mut(n))
            .enumerate()
            .for_each_init(
                || vec![0.0; n],
                |j, (ik, (t, e))| self.fill_row(grid.k[ik], &plan, &spin2, j, t, e),
            );
        Ok(TransferTable::new(
            "shell",
            grid.k.clone(),
            grid.w.clone(),
            lmax,
            vec![Field::T, Field::E],
            vec![dt, de],
        ))
    }

    fn check_grid(grid: &KGrid) -> Result<()> {
        let ok = !grid.k.is_empty()
            && grid.k.len() == grid.w.len()
            && grid.k.iter().all(|k| k.is_finite() && *k > 0.0)
            && grid.w.iter().all(|w| w.is_finite());
        if ok {
            Ok(())
        } else {
            Err(Error::BadField {
                at: Location::Builtin,
                field: "k grid".into(),
                message: "needs matching, finite node and weight lists with k > 0".into(),
            })
        }
    }

    /// C^TT, C^EE, C^TE to `lmax`, streamed over the k grid of `spec` without storing the
    /// table (the same numbers as `transfer_table(..).cl(..)` up to summation order).
    ///
    /// # Errors
    /// As [`ShellModel::k_grid`].
    pub fn spectra(
        &self,
        lmax: usize,
        spec: &KGridSpec,
        prim: &Primordial,
    ) -> Result<ShellSpectra> {
        let grid = self.k_grid(lmax, spec)?;
        self.spectra_on(lmax, &grid, prim)
    }

    /// As [`ShellModel::spectra`] on a given k grid. Deterministic: fixed chunks of k
    /// are summed in parallel, then the chunk sums in order.
    ///
    /// # Errors
    /// As [`ShellModel::transfer_table_on`].
    pub fn spectra_on(&self, lmax: usize, grid: &KGrid, prim: &Primordial) -> Result<ShellSpectra> {
        Self::check_lmax(lmax)?;
        Self::check_grid(grid)?;
        let n = lmax + 1;
        let plan = ChiPlan::new(self.p.sigma_chi_mpc, grid.k_max);
        let spin2 = Self::spin2_factors(lmax);
        let chunk = 32usize.max(grid.len().div_ceil(256));
        let starts: Vec<usize> = (0..grid.len()).step_by(chunk).collect();
        let partial: Vec<Vec<f64>> = starts
            .par_iter()
            .map(|&s0| {
                let mut acc = vec![0.0; 3 * n];
                let mut j = vec![0.0; n];
                let mut t = vec![0.0; n];
                let mut e = vec![0.0; n];
                for ik in s0..(s0 + chunk).min(grid.len()) {
                    let k = grid.k[ik];
                    self.fill_row(k, &plan, &spin2, &mut j, &mut t, &mut e);
                    let a = 2.0 / std::f64::consts::PI * grid.w[ik] * k * k * prim.p_phi(k);
                    let (tt, rest) = acc.split_at_mut(n);
                    let (ee, te) = rest.split_at_mut(n);
                    for l in 2..n {
                        tt[l] += a * t[l] * t[l];
                        ee[l] += a * e[l] * e[l];
                        te[l] += a * t[l] * e[l];
                    }
                }
                acc
            })
            .collect();
        let mut acc = vec![0.0; 3 * n];
        for p in &partial {
            for (a, b) in acc.iter_mut().zip(p) {
                *a += b;
            }
        }
        Ok(ShellSpectra {
            tt: acc[..n].to_vec(),
            ee: acc[n..2 * n].to_vec(),
            te: acc[2 * n..].to_vec(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cmb::bispectrum::{BispectrumPlan, CmbFisherInput, FieldSet};
    use crate::cmb::experiment::Experiment;
    use crate::cosmology::{Background, Cosmology};
    use crate::shapes::Shape;
    use crate::special::sph_bessel;
    use std::f64::consts::{FRAC_PI_2, PI};
    use std::sync::OnceLock;

    const A_S: f64 = 2.1e-9;

    fn thermal() -> &'static ThermalHistory {
        static TH: OnceLock<ThermalHistory> = OnceLock::new();
        TH.get_or_init(|| {
            let c = Cosmology::planck2018();
            ThermalHistory::new(&c, &Background::new(&c)).unwrap()
        })
    }

    fn default_model() -> ShellModel {
        ShellModel::from_thermal(thermal(), &ShellOverrides::default()).unwrap()
    }

    /// The default shell with another width and damping.
    fn model(sigma: f64, kd: Option<f64>) -> ShellModel {
        ShellModel::new(ShellParams {
            sigma_chi_mpc: sigma,
            k_damping_mpc: kd,
            ..*default_model().params()
        })
        .unwrap()
    }

    fn scale_invariant() -> Primordial {
        Primordial::from_values(A_S, 1.0, 0.05)
    }

    /// l(l+1) C_l / 2pi in units of the Sachs-Wolfe plateau A_s / 25.
    fn plateau_units(c: &[f64], l: usize) -> f64 {
        let lf = l as f64;
        lf * (lf + 1.0) * c[l] / (2.0 * PI) / (A_S / 25.0)
    }

    /// The default shell (Planck 2018, thermal width and damping) to l = 1500, default grid.
    fn default_spectra() -> &'static ShellSpectra {
        static S: OnceLock<ShellSpectra> = OnceLock::new();
        S.get_or_init(|| {
            default_model()
                .spectra(
                    1500,
                    &KGridSpec::default(),
                    &Primordial::new(&Cosmology::planck2018()),
                )
                .unwrap()
        })
    }

    fn max_rel(a: &[f64], b: &[f64], scale: &[f64]) -> f64 {
        (2..a.len())
            .map(|l| ((a[l] - b[l]) / scale[l]).abs())
            .fold(0.0, f64::max)
    }

    #[test]
    fn thermal_defaults() {
        let s = thermal().summary();
        let m = default_model();
        let p = m.params();
        assert_eq!(p.chi_star_mpc, s.chi_visibility_peak_mpc);
        assert!((p.sigma_chi_mpc * FWHM_PER_SIGMA - s.visibility_fwhm_mpc).abs() < 1e-12);
        assert_eq!(p.k_damping_mpc, Some(s.k_damping_mpc));
        assert_eq!(p.sound_horizon_mpc, s.r_star_mpc);
        // c_s = 1/sqrt(3 (1 + R)), R = 3 rho_b / (4 rho_gamma) ~ 0.6 at z_*: c_s ~ 0.45.
        assert!(
            p.sound_speed > 0.44 && p.sound_speed < 0.47,
            "{}",
            p.sound_speed
        );
        // The opacity at the visibility peak: g = tau' e^-tau peaks near tau ~ 1, and
        // g_max ~ 1/(sqrt(2 pi) sigma) for a near-Gaussian visibility.
        let g_peak = 1.0 / ((2.0 * PI).sqrt() * p.sigma_chi_mpc);
        assert!(p.tau_dot_star_mpc > g_peak && p.tau_dot_star_mpc < 5.0 * g_peak);
        let off = ShellModel::from_thermal(
            thermal(),
            &ShellOverrides {
                sigma_chi_mpc: Some(0.0),
                damping: Damping::Off,
            },
        )
        .unwrap();
        assert_eq!(off.sigma_chi_mpc(), 0.0);
        assert_eq!(off.k_damping_mpc(), None);
        assert_eq!(off.damping_factor(1.0), 1.0);
    }

    /// (a) Zero thickness, no damping, n_s = 1: l(l+1) C_l / 2pi = A_s/25 (Sachs & Wolfe
    /// 1967; Integral_0^inf dx/x j_l^2 = 1/(2l(l+1)), Weber-Schafheitlin, A&S 11.4.33 from
    /// memory). With k_max =
    /// 30 (l_max + 1/2)/chi_* the truncated fraction is 5.6e-4 at l = 1000; the
    /// deficit must equal the envelope estimate 1 - sqrt(1 - nu^2/(k_max chi_*)^2)
    /// (the k-range convergence).
    #[test]
    fn sachs_wolfe_plateau() {
        let m = model(0.0, None);
        let spec = KGridSpec {
            undamped_factor: 30.0,
            undamped_floor_mpc: 1e-6,
            ..Default::default()
        };
        let g = m.k_grid(1000, &spec).unwrap();
        assert_eq!(g.cutoff, KCutoff::Multipole);
        let s = m.spectra_on(1000, &g, &scale_invariant()).unwrap();
        let x_max = g.k_max * m.chi_star_mpc();
        for l in [2, 3, 5, 10, 30, 100, 300, 600, 1000] {
            let dev = plateau_units(&s.tt, l) - 1.0;
            let nu = l as f64 + 0.5;
            let tail = 1.0 - (1.0 - (nu / x_max).powi(2)).sqrt();
            eprintln!(
                "SW plateau l = {l}: D_l / (A_s/25) - 1 = {dev:.3e}, truncation estimate {tail:.3e}"
            );
            assert!(dev.abs() < 1e-3, "l = {l}: {dev}");
            // Measured: |dev + tail| <= 1.6e-6 (2e-8 for l >= 30).
            assert!((dev + tail).abs() < 1e-5, "l = {l}: {dev} vs {tail}");
        }
    }

    /// (b) Damping: the power falls as exp(-2 (k/k_D)^2). Averaged over the j_l envelope
    /// 1/(x sqrt(x^2 - nu^2)) above the turning point (x = nu sec theta), the plateau
    /// becomes R(l) = Integral_0^(pi/2) cos(theta) exp(-2 (nu / (k_D chi_*))^2 sec^2(theta)),
    /// which is below the naive exp(-2 nu^2 / (k_D chi_*)^2) because the power at l comes
    /// from k >= nu/chi_*. Measured |D/R - 1| <= 5e-6 for 10 <= l <= 3000.
    #[test]
    fn damping_tail() {
        let kd = thermal().summary().k_damping_mpc;
        let m = model(0.0, Some(kd));
        let g = m.k_grid(3000, &KGridSpec::default()).unwrap();
        assert_eq!(g.cutoff, KCutoff::Damping);
        assert!((g.k_max - 5.0 * kd).abs() < 1e-12);
        let s = m.spectra_on(3000, &g, &scale_invariant()).unwrap();
        let xd = kd * m.chi_star_mpc();
        let gl = GaussLegendre::new(400);
        let mut last_ratio = f64::INFINITY;
        for l in [10, 100, 300, 500, 1000, 1500, 2000, 2500, 3000] {
            let nu = l as f64 + 0.5;
            let a = 2.0 * (nu / xd).powi(2);
            let r = gl.integrate(0.0, FRAC_PI_2, |t| {
                t.cos() * (-a / (t.cos() * t.cos())).exp()
            });
            let naive = (-2.0 * (l as f64 / xd).powi(2)).exp();
            let d = plateau_units(&s.tt, l);
            eprintln!("damping l = {l}: D = {d:.4e}, envelope estimate {r:.4e}, naive {naive:.4e}");
            assert!((d / r - 1.0).abs() < 2e-5, "l = {l}: {d} vs {r}");
            assert!(d < naive && d / naive < last_ratio && d / naive > 0.3);
            last_ratio = d / naive;
        }
        // Beyond l ~ k_D chi_* ~ 1970 the spectrum collapses.
        assert!(plateau_units(&s.tt, 3000) < 0.01 * plateau_units(&s.tt, 1000));
    }

    /// (c) A thicker shell suppresses high-l power, monotonically in the width at every l
    /// and increasingly with l (three widths, thermal damping).
    #[test]
    fn thickness_suppresses_high_l() {
        let kd = Some(thermal().summary().k_damping_mpc);
        let prim = scale_invariant();
        let lmax = 1200;
        let s: Vec<ShellSpectra> = [15.0, 30.0, 60.0]
            .iter()
            .map(|&w| {
                model(w, kd)
                    .spectra(lmax, &KGridSpec::default(), &prim)
                    .unwrap()
            })
            .collect();
        for l in 2..=lmax {
            assert!(s[1].tt[l] <= s[0].tt[l] * (1.0 + 1e-9), "l = {l}");
            assert!(s[2].tt[l] <= s[1].tt[l] * (1.0 + 1e-9), "l = {l}");
        }
        let mut prev = [1.0, 1.0];
        for l in (100..=lmax).step_by(100) {
            let r = [s[1].tt[l] / s[0].tt[l], s[2].tt[l] / s[1].tt[l]];
            assert!(
                r[0] < prev[0] && r[1] < prev[1],
                "l = {l}: {r:?} after {prev:?}"
            );
            prev = r;
        }
        // Measured at l = 1200: C(30)/C(15) = 0.73, C(60)/C(30) = 0.59.
        assert!(prev[0] < 0.85 && prev[1] < 0.75, "{prev:?}");
    }

    /// (d) Convergence in k spacing and k range. Measured (default shell, l <= 1000):
    /// 5 -> 8 nodes per panel changes C_l by <= 1.4e-6; 5 k_D -> 7 k_D and 6/sigma -> 9/sigma
    /// by <= 1e-8. Zero thickness without damping: 5 -> 8 nodes by <= 2e-6.
    #[test]
    fn k_grid_convergence() {
        let m = default_model();
        let prim = Primordial::new(&Cosmology::planck2018());
        let lmax = 1000;
        let a = m.spectra(lmax, &KGridSpec::default(), &prim).unwrap();
        let finer = m
            .spectra(
                lmax,
                &KGridSpec {
                    nodes_per_panel: 8,
                    ..Default::default()
                },
                &prim,
            )
            .unwrap();
        let wider = m
            .spectra(
                lmax,
                &KGridSpec {
                    damping_cut: 7.0,
                    thickness_cut: 9.0,
                    ..Default::default()
                },
                &prim,
            )
            .unwrap();
        let (dt, de) = (
            max_rel(&a.tt, &finer.tt, &a.tt),
            max_rel(&a.ee, &finer.ee, &a.ee),
        );
        let (rt, re) = (
            max_rel(&a.tt, &wider.tt, &a.tt),
            max_rel(&a.ee, &wider.ee, &a.ee),
        );
        eprintln!("k spacing: TT {dt:.2e} EE {de:.2e}; k range: TT {rt:.2e} EE {re:.2e}");
        assert!(dt < 1e-5 && de < 1e-5);
        assert!(rt < 1e-7 && re < 1e-7);
        let z = model(0.0, None);
        let spec = KGridSpec {
            undamped_factor: 4.0,
            ..Default::default()
        };
        let za = z.spectra(800, &spec, &prim).unwrap();
        let zb = z
            .spectra(
                800,
                &KGridSpec {
                    nodes_per_panel: 8,
                    ..spec
                },
                &prim,
            )
            .unwrap();
        let dz = max_rel(&za.tt, &zb.tt, &za.tt);
        eprintln!("k spacing, zero thickness: TT {dz:.2e}");
        assert!(dz < 1e-5);
    }

    /// The chi quadrature: the node rule n(k) against three times as many nodes.
    #[test]
    fn chi_quadrature_converged() {
        let lmax = 3000;
        let n = lmax + 1;
        let spin2 = ShellModel::spin2_factors(lmax);
        let mut j = vec![0.0; n];
        let mut rows = vec![vec![0.0; n]; 4];
        for sigma in [16.0, 100.0, 500.0] {
            let m = model(sigma, None);
            let p1 = ChiPlan::new(sigma, 0.8);
            let p3 = ChiPlan::with_scale(sigma, 0.8, 3.0);
            for k in [1e-3, 0.01, 0.05, 0.2, 0.3, 0.6, 0.8] {
                let (a, b) = rows.split_at_mut(2);
                let (t1, e1) = a.split_at_mut(1);
                let (t3, e3) = b.split_at_mut(1);
                m.fill_row(k, &p1, &spin2, &mut j, &mut t1[0], &mut e1[0]);
                m.fill_row(k, &p3, &spin2, &mut j, &mut t3[0], &mut e3[0]);
                let x = k * m.chi_star_mpc();
                let (mut et, mut ee) = (0.0f64, 0.0f64);
                for l in 2..n {
                    et = et.max((t1[0][l] - t3[0][l]).abs() * x / SACHS_WOLFE.abs());
                    let env = m.e_source(k).abs() * spin2[l] / (x * x * x);
                    ee = ee.max((e1[0][l] - e3[0][l]).abs() / env);
                }
                // Measured <= 3e-13 of the envelopes 1/x and spin2/x^3.
                assert!(
                    et < 1e-11 && ee < 1e-11,
                    "sigma {sigma} k {k}: {et:e} {ee:e}"
                );
            }
        }
    }

    #[test]
    fn thin_shell_tends_to_zero_thickness() {
        let k_d = thermal().summary().k_damping_mpc;
        let kd = Some(k_d);
        let prim = scale_invariant();
        let a = model(0.0, kd)
            .spectra(400, &KGridSpec::default(), &prim)
            .unwrap();
        let b = model(1e-3, kd)
            .spectra(
                400,
                &KGridSpec {
                    k_max_mpc: Some(5.0 * k_d),
                    ..Default::default()
                },
                &prim,
            )
            .unwrap();
        assert!(max_rel(&a.tt, &b.tt, &a.tt) < 1e-6);
        assert!(max_rel(&a.ee, &b.ee, &a.ee) < 1e-6);
    }

    #[test]
    fn table_matches_streamed_spectra() {
        let m = default_model();
        let prim = Primordial::new(&Cosmology::planck2018());
        let spec = KGridSpec::default();
        let t = m.transfer_table(200, &spec).unwrap();
        assert_eq!(t.label(), "shell");
        assert_eq!(t.fields(), &[Field::T, Field::E]);
        assert_eq!(t.k().len(), m.k_grid(200, &spec).unwrap().len());
        let s = m.spectra(200, &spec, &prim).unwrap();
        let (it, ie) = (
            t.field_index(Field::T).unwrap(),
            t.field_index(Field::E).unwrap(),
        );
        let scale: Vec<f64> =
            s.tt.iter()
                .zip(&s.ee)
                .map(|(a, b)| (a * b).sqrt())
                .collect();
        assert!(max_rel(&t.cl(&prim, it, it), &s.tt, &s.tt) < 1e-12);
        assert!(max_rel(&t.cl(&prim, ie, ie), &s.ee, &s.ee) < 1e-12);
        assert!(max_rel(&t.cl(&prim, it, ie), &s.te, &scale) < 1e-12);
        for ik in [0, t.k().len() / 2] {
            for f in [it, ie] {
                assert_eq!(t.get(f, 0, ik), 0.0);
                assert_eq!(t.get(f, 1, ik), 0.0);
            }
        }
        // Weights integrate dk exactly over [0, k_max].
        let sum: f64 = t.weights().iter().sum();
        assert!((sum / m.k_grid(200, &spec).unwrap().k_max - 1.0).abs() < 1e-13);
    }

    /// E sanity (order of magnitude): D^EE peaks near l ~ 1000 at a few percent of the T
    /// plateau; C^TE obeys |C^TE| <= sqrt(C^TT C^EE) and changes sign with sin(k r_s).
    #[test]
    fn e_mode_sanity() {
        let s = default_spectra();
        let d = |c: &[f64], l: usize| (l * (l + 1)) as f64 * c[l];
        let (peak_l, peak) = (2..=1500)
            .map(|l| (l, d(&s.ee, l)))
            .fold((0, 0.0), |a, b| if b.1 > a.1 { b } else { a });
        let ratio = peak / d(&s.tt, 10);
        eprintln!("D^EE peak at l = {peak_l}, {ratio:.4} of D^TT(10)");
        assert!((700..=1400).contains(&peak_l), "{peak_l}");
        assert!(ratio > 0.01 && ratio < 0.2, "{ratio}");
        let mut signs = [false; 2];
        for l in 2..=1500 {
            assert!(s.te[l].abs() <= (s.tt[l] * s.ee[l]).sqrt() * (1.0 + 1e-12));
            signs[usize::from(s.te[l] > 0.0)] = true;
        }
        assert!(signs[0] && signs[1]);
        // E is tiny on large scales (k / tau' -> 0).
        assert!(d(&s.ee, 10) < 1e-5 * d(&s.tt, 10));
    }

    #[test]
    fn l_top_bounds_the_bessel_rows() {
        for x in [0.05, 0.5, 3.0, 30.0, 300.0, 3000.0, 12_000.0] {
            let l = l_top(x);
            let v = sph_bessel(l as u32, x).abs();
            assert!(v * x.max(1.0) < 1e-24, "x = {x}, l = {l}: {v:e}");
        }
    }

    #[test]
    fn invalid_inputs_are_rejected() {
        let p = *default_model().params();
        for bad in [
            ShellParams {
                sigma_chi_mpc: -1.0,
                ..p
            },
            ShellParams {
                sigma_chi_mpc: p.chi_star_mpc / 5.0,
                ..p
            },
            ShellParams {
                chi_star_mpc: 0.0,
                ..p
            },
            ShellParams {
                k_damping_mpc: Some(0.0),
                ..p
            },
            ShellParams {
                tau_dot_star_mpc: -1.0,
                ..p
            },
            ShellParams {
                sound_speed: 1.5,
                ..p
            },
            ShellParams {
                sigma_chi_mpc: f64::NAN,
                ..p
            },
        ] {
            assert!(
                matches!(ShellModel::new(bad), Err(Error::OutOfRange { .. })),
                "{bad:?}"
            );
        }
        let e = ShellModel::from_thermal(
            thermal(),
            &ShellOverrides {
                sigma_chi_mpc: Some(-2.0),
                damping: Damping::Thermal,
            },
        )
        .unwrap_err();
        assert!(e.to_string().contains("shell width"), "{e}");
        let m = default_model();
        let spec = KGridSpec::default();
        for l in [0, 1, MAX_LMAX + 1] {
            assert!(m.k_grid(l, &spec).is_err());
            assert!(m.transfer_table(l, &spec).is_err());
        }
        assert!(
            m.k_grid(
                10,
                &KGridSpec {
                    nodes_per_panel: 1,
                    ..spec
                }
            )
            .is_err()
        );
        assert!(
            m.k_grid(
                10,
                &KGridSpec {
                    k_max_mpc: Some(-1.0),
                    ..spec
                }
            )
            .is_err()
        );
        let g = m.k_grid(10, &spec).unwrap();
        let rs = RadialGridSpec::default();
        assert!(
            m.radial_grid(
                &g,
                &RadialGridSpec {
                    outer_growth: 1.0,
                    ..rs
                }
            )
            .is_err()
        );
        assert!(
            m.radial_grid(
                &g,
                &RadialGridSpec {
                    nodes_per_panel: 0,
                    ..rs
                }
            )
            .is_err()
        );
    }

    #[test]
    fn radial_grid_layout() {
        let m = default_model();
        let g = m.k_grid(1000, &KGridSpec::default()).unwrap();
        let spec = RadialGridSpec::default();
        let rg = m.radial_grid(&g, &spec).unwrap();
        assert!(rg.r.windows(2).all(|w| w[1] > w[0]));
        assert!(rg.w.iter().all(|&w| w > 0.0));
        let chi = m.chi_star_mpc();
        let (lo, hi) = (
            chi * (1.0 - spec.outer_fraction),
            chi * (1.0 + spec.outer_fraction),
        );
        assert!(rg.r[0] > lo && rg.r[0] < lo + 0.01 * chi);
        assert!(*rg.r.last().unwrap() < hi && *rg.r.last().unwrap() > hi - 0.01 * chi);
        // Gauss-Legendre panels integrate r^2 exactly.
        let sum: f64 = rg.w.iter().sum();
        assert!((sum / ((hi.powi(3) - lo.powi(3)) / 3.0) - 1.0).abs() < 1e-12);
        // The core spacing resolves the kernel.
        let w = m.kernel_width_mpc(g.k_max);
        let core: Vec<f64> =
            rg.r.iter()
                .copied()
                .filter(|r| (r - chi).abs() < w)
                .collect();
        assert!(core.len() >= 6, "{}", core.len());
        // Truncated delta (zero thickness, no damping): core only, ending where
        // cos(k_max L) = 0. The weights integrate r^2 exactly, 2 chi^2 L + (2/3) L^3:
        // solve for L.
        let z = model(0.0, None);
        let gz = z.k_grid(1000, &KGridSpec::default()).unwrap();
        assert_eq!(gz.cutoff, KCutoff::Multipole);
        let rz = z.radial_grid(&gz, &spec).unwrap();
        let total: f64 = rz.w.iter().sum();
        let mut l = total / (2.0 * chi * chi);
        for _ in 0..20 {
            l -= (2.0 * chi * chi * l + 2.0 / 3.0 * l.powi(3) - total)
                / (2.0 * chi * chi + 2.0 * l * l);
        }
        let rs = z.params().sound_horizon_mpc;
        assert!(
            l * gz.k_max >= rs * gz.k_max + spec.truncated_phase - 1e-6,
            "{l}"
        );
        assert!(
            (l * gz.k_max).cos().abs() < 1e-6,
            "{}",
            (l * gz.k_max).cos()
        );
        assert!(rz.r[0] > chi - l && *rz.r.last().unwrap() < chi + l);
        assert!(rz.r.windows(2).all(|w| w[1] > w[0]));
    }

    fn bispectra(
        t: &TransferTable,
        rg: &RadialGrid,
        shapes: &[Shape],
        tri: &[[usize; 3]],
        fields: &[[usize; 3]],
    ) -> Vec<f64> {
        let lmax = t.lmax();
        let exp = Experiment::ideal(lmax);
        let inp = CmbFisherInput {
            transfer: t,
            primordial: scale_invariant(),
            shapes,
            experiment: &exp,
            t_cmb_k: 2.7255,
            lmax_grid: &[lmax],
            field_sets: &[FieldSet::T],
            radial: rg,
            parallel: true,
            signal_cl: None,
        };
        let plan = BispectrumPlan::new(&inp);
        let mut out = Vec::new();
        for s in 0..shapes.len() {
            for l in tri {
                for f in fields {
                    out.push(plan.reduced_bispectrum(s, *l, *f));
                }
            }
        }
        out
    }

    /// Zero thickness without damping is the Sachs-Wolfe limit of the local bispectrum,
    /// b_{l1 l2 l3} = -6 f_NL (C_l1 C_l2 + 2 perms) (Komatsu & Spergel 2001, with
    /// Delta_l = S j_l(k chi_*), X^0 -> S delta(r - chi_*) / chi_*^2, X^1(chi_*) = C_l / S).
    /// The recommended grid reproduces it through the truncated-delta kernel.
    #[test]
    fn radial_grid_sachs_wolfe_local_bispectrum() {
        let m = model(0.0, None);
        let lmax = 100;
        let spec = KGridSpec {
            undamped_floor_mpc: 0.1,
            ..Default::default()
        };
        let g = m.k_grid(lmax, &spec).unwrap();
        assert_eq!(g.cutoff, KCutoff::Multipole);
        let t = m.transfer_table_on(lmax, &g).unwrap();
        let cl = t.cl(&scale_invariant(), 0, 0);
        let tri = [
            [2, 2, 2],
            [10, 10, 10],
            [30, 60, 80],
            [5, 95, 98],
            [100, 100, 100],
        ];
        let sw: Vec<f64> = tri
            .iter()
            .map(|l| -6.0 * (cl[l[0]] * cl[l[1]] + cl[l[1]] * cl[l[2]] + cl[l[2]] * cl[l[0]]))
            .collect();
        // Measured worst |b / b_SW - 1|: 5.4e-4 (k_max L >= k_max r_s + 10 pi), 4.6e-4
        // (20 pi, the default), 4.6e-4 (40 pi): what is left is the finite width of the
        // kernel against the curvature of X^1 X^1 (the worst triangle is l = 100).
        for phase in [10.0, 20.0, 40.0] {
            let rs = RadialGridSpec {
                truncated_phase: phase * PI,
                ..Default::default()
            };
            let rg = m.radial_grid(&g, &rs).unwrap();
            let b = bispectra(&t, &rg, &[Shape::Local], &tri, &[[0, 0, 0]]);
            let worst = b
                .iter()
                .zip(&sw)
                .map(|(x, y)| (x / y - 1.0).abs())
                .fold(0.0, f64::max);
            eprintln!(
                "SW local bispectrum, k_max L >= {phase} pi (n_r = {}): worst {worst:.2e}",
                rg.len()
            );
            assert!(worst < 1e-3, "{phase}: {worst}");
        }
        // E legs (box-car kernels between chi_* -+ r_s): default against 80 pi.
        let fields = [[1, 1, 1], [0, 0, 1]];
        let long = RadialGridSpec {
            truncated_phase: 80.0 * PI,
            ..Default::default()
        };
        let a = bispectra(
            &t,
            &m.radial_grid(&g, &RadialGridSpec::default()).unwrap(),
            &[Shape::Local],
            &tri,
            &fields,
        );
        let b = bispectra(
            &t,
            &m.radial_grid(&g, &long).unwrap(),
            &[Shape::Local],
            &tri,
            &fields,
        );
        let worst = a
            .iter()
            .zip(&b)
            .map(|(x, y)| (x / y - 1.0).abs())
            .fold(0.0, f64::max);
        eprintln!("SW local bispectrum with E legs, 20 pi vs 80 pi: worst {worst:.2e}");
        assert!(worst < 1e-3, "{worst}");
    }

    /// The default radial grid against a much finer and wider one (local and
    /// equilateral, TTT, EEE, TTE), on a damped shell.
    #[test]
    fn radial_grid_convergence() {
        let m = model(16.0, Some(0.05));
        let lmax = 200;
        let g = m
            .k_grid(
                lmax,
                &KGridSpec {
                    k_max_mpc: Some(0.2),
                    ..Default::default()
                },
            )
            .unwrap();
        let t = m.transfer_table_on(lmax, &g).unwrap();
        let d = RadialGridSpec::default();
        let fine = RadialGridSpec {
            core_widths: 10.0,
            core_panel: 1.5,
            nodes_per_panel: 8,
            outer_fraction: 0.6,
            outer_growth: 1.3,
            truncated_phase: 0.0,
        };
        let shapes = [Shape::Local, Shape::Equilateral];
        let tri = [
            [10, 10, 10],
            [30, 60, 80],
            [100, 100, 100],
            [5, 190, 195],
            [200, 200, 200],
        ];
        let fields = [[0, 0, 0], [1, 1, 1], [0, 0, 1]];
        let rd = m.radial_grid(&g, &d).unwrap();
        let rf = m.radial_grid(&g, &fine).unwrap();
        let a = bispectra(&t, &rd, &shapes, &tri, &fields);
        let b = bispectra(&t, &rf, &shapes, &tri, &fields);
        let n = tri.len() * fields.len();
        for (s, name) in shapes.iter().enumerate() {
            let worst = (s * n..(s + 1) * n)
                .map(|i| (a[i] / b[i] - 1.0).abs())
                .fold(0.0, f64::max);
            eprintln!(
                "radial grid {} vs {} nodes, {name:?}: worst {worst:.2e}",
                rd.len(),
                rf.len()
            );
            assert!(worst < 1e-4, "{name:?}: {worst}");
        }
    }
}
