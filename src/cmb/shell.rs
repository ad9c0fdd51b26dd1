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
//! Integral_0^inf dx/x j_l(x)^2 = 1 / (2 l (l+1)) (Abramowitz & Stegun 11.4.33), so
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
//! follows sin(k r_s) rather than the true sin(k r_s) cos(k r_s). With the Planck 2018
//! defaults the measured D^EE_l peaks at l ~ 1100 at about 0.1 of the T plateau
//! A_s / 25 (the real sky: ~0.05 of its plateau) — an order-of-magnitude model.
//!
//! ## Numerics
//! **k grid** ([`KGridSpec`], [`KGrid`]). Gauss-Legendre panels of width
//! pi / (chi_* + 6 sigma_chi), one half-period of j_l(k chi) at the far side of the shell,
//! from k = 0 to k_max, `nodes_per_panel` (default 5) nodes each: the node spacing is
//! about pi / (5 chi_*), and a 5-node panel integrates the oscillating part of j_l^2
//! to ~1e-4 of one panel's integral. k_max is the first of:
//! - damping on: min(5 k_D, k_thick): beyond 5 k_D the amplitude is below e^-25;
//! - damping off: min(k_thick, max(2 (l_max + 1/2) / chi_*, 0.4 / Mpc)),
//!
//! with k_thick = sqrt(((l_max + 1/2)/chi_*)^2 + (6 / sigma_chi)^2): a Gaussian shell
//! suppresses the radial wavenumber k_r = sqrt(k^2 - nu^2/chi^2) as exp(-k_r^2 sigma^2/2),
//! e^-18 at k_r sigma = 6. Only zero thickness without damping is truncated: its C_l
//! converges as the missing fraction 1 - sqrt(1 - nu^2 / (k_max chi_*)^2) (from the j_l
//! envelope), 13% at l = l_max for k_max = 2 l_max / chi_*. Memory of a table:
//! 16 n_k (l_max + 1) bytes (T and E).
//!
//! **Radial (chi) quadrature.** sigma_chi = 0: the single node chi_*. Otherwise
//! Gauss-Legendre on chi_* +- 6 sigma_chi with n(k) = ceil(3 k sigma_chi + 24) nodes
//! (taken from a precomputed ladder of rules, so nothing is built in the loop), weights
//! W(chi_i) w_i renormalized to sum 1: the oscillation of j_l(k chi) across the interval
//! (6 k sigma radians on the half-width) plus the Gaussian's own bandwidth. Measured:
//! doubling n changes Delta_l by < 1e-12 of the envelope 1/(k chi_*).
//!
//! Per (k, chi node) one call of [`sph_bessel_all_l`], up to l_top = x + 16 x^(1/3) + 16
//! (x = k chi; above it j_l(x) < 1e-24 of its envelope and the row is zero), parallel over
//! k with rayon, no allocation inside the k loop.
//!
//! **Radial grid for the bispectrum** ([`ShellModel::radial_grid`]): see
//! [`RadialGridSpec`].

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
/// shell seen through the damping and the k cut-off: roughly a Gaussian of width
/// w = sqrt(sigma_chi^2 + s_D^2 + 1/k_max^2), with s_D = sqrt(2)/k_D (exp(-k^2/k_D^2) is a
/// Gaussian smoothing of that width; 0 without damping) and 1/k_max the width of the
/// truncated delta function sin(k_max u)/(pi u), u = r - chi_*, that zero thickness
/// without damping leaves. The grid has
/// - a core chi_* +- `core_widths` w of Gauss-Legendre panels of width
///   `core_panel` min(w, pi/k_max), `nodes_per_panel` nodes each;
/// - outer panels from the core out to chi_* (1 -+ `outer_fraction`), each
///   `outer_growth` times wider than the one before, for the broad p > 0 functions of low l.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct RadialGridSpec {
    /// Half-width of the core in units of w.
    pub core_widths: f64,
    /// Core panel width in units of min(w, pi/k_max).
    pub core_panel: f64,
    /// Gauss-Legendre nodes per panel (1..=32).
    pub nodes_per_panel: usize,
    /// The outer region reaches chi_* (1 -+ this), in [0, 0.9]; 0 for none.
    pub outer_fraction: f64,
    /// Width ratio of successive outer panels (> 1).
    pub outer_growth: f64,
}

impl Default for RadialGridSpec {
    fn default() -> Self {
        Self {
            core_widths: 8.0,
            core_panel: 1.0,
            nodes_per_panel: 6,
            outer_fraction: 0.1,
            outer_growth: 1.5,
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
        let chi = self.p.chi_star_mpc;
        let w = self.kernel_width_mpc(grid.k_max);
        let h = spec.core_panel * w.min(std::f64::consts::PI / grid.k_max);
        // The E kernels sit at chi_* +- r_s (sin(k r_s) shifts j_l(k chi) by +- r_s).
        let half = self.p.sound_horizon_mpc + spec.core_widths * w;
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
        if spec.outer_fraction > 0.0 && chi * (1.0 - spec.outer_fraction) < lo {
            let mut below = outer(lo, chi * (1.0 - spec.outer_fraction));
            below.reverse();
            edges.extend(below);
        }
        edges.extend((0..=n_core).map(|i| lo + i as f64 * hc));
        if spec.outer_fraction > 0.0 && chi * (1.0 + spec.outer_fraction) > hi {
            edges.extend(outer(hi, chi * (1.0 + spec.outer_fraction)));
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
    use crate::cosmology::{Background, Cosmology};
    use std::sync::OnceLock;

    fn thermal() -> &'static ThermalHistory {
        static TH: OnceLock<ThermalHistory> = OnceLock::new();
        TH.get_or_init(|| {
            let c = Cosmology::planck2018();
            ThermalHistory::new(&c, &Background::new(&c)).unwrap()
        })
    }

    fn model(sigma: f64, kd: Option<f64>) -> ShellModel {
        let d = ShellModel::from_thermal(thermal(), &ShellOverrides::default()).unwrap();
        ShellModel::new(ShellParams {
            sigma_chi_mpc: sigma,
            k_damping_mpc: kd,
            ..*d.params()
        })
        .unwrap()
    }

    /// Max over l of |row(plan a) - row(plan b)| relative to the envelope of each field.
    fn chi_quadrature_error(
        m: &ShellModel,
        k: f64,
        lmax: usize,
        a: &ChiPlan,
        b: &ChiPlan,
    ) -> (f64, f64) {
        let n = lmax + 1;
        let spin2 = ShellModel::spin2_factors(lmax);
        let mut j = vec![0.0; n];
        let (mut t1, mut e1, mut t2, mut e2) =
            (vec![0.0; n], vec![0.0; n], vec![0.0; n], vec![0.0; n]);
        m.fill_row(k, a, &spin2, &mut j, &mut t1, &mut e1);
        m.fill_row(k, b, &spin2, &mut j, &mut t2, &mut e2);
        let x = k * m.chi_star_mpc();
        let d = m.damping_factor(k);
        let (mut et, mut ee) = (0.0f64, 0.0f64);
        for l in 2..n {
            et = et.max((t1[l] - t2[l]).abs() / (SACHS_WOLFE.abs() * d / x));
            let env_e = (m.e_source(k) * d).abs() * spin2[l] / (x * x * x) + 1e-300;
            ee = ee.max((e1[l] - e2[l]).abs() / env_e);
        }
        (et, ee)
    }

    #[test]
    fn probe2() {
        use std::time::Instant;
        let a_s = 2.1e-9;
        let prim = Primordial::from_values(a_s, 1.0, 0.05);
        let kd = thermal().summary().k_damping_mpc;
        // damping
        let m = model(0.0, Some(kd));
        let t0 = Instant::now();
        let s = m.spectra(3000, &KGridSpec::default(), &prim).unwrap();
        eprintln!("damped zero-thick lmax 3000: {:?}", t0.elapsed());
        let xd = kd * m.chi_star_mpc();
        let gl = GaussLegendre::new(400);
        for l in [10usize, 100, 300, 500, 1000, 1500, 2000, 2500, 3000] {
            let nu = l as f64 + 0.5;
            let a = 2.0 * (nu / xd).powi(2);
            let r = gl.integrate(0.0, std::f64::consts::FRAC_PI_2, |t| {
                t.cos() * (-a / (t.cos() * t.cos())).exp()
            });
            let d =
                l as f64 * (l as f64 + 1.0) * s.tt[l] / (2.0 * std::f64::consts::PI) / (a_s / 25.0);
            let naive = (-2.0 * (l as f64 / xd).powi(2)).exp();
            eprintln!(
                "l {l}: D {d:.5e} R {r:.5e} D/R-1 {:.3e} naive {naive:.4e} D/naive {:.4}",
                d / r - 1.0,
                d / naive
            );
        }
        // thickness
        let lmax = 2000;
        let mut cs = Vec::new();
        for sig in [10.0, 20.0, 40.0] {
            let m = model(sig, Some(kd));
            let t0 = Instant::now();
            let g = m.k_grid(lmax, &KGridSpec::default()).unwrap();
            cs.push(m.spectra_on(lmax, &g, &prim).unwrap());
            eprintln!(
                "sigma {sig}: nk {} kmax {} {:?}",
                g.len(),
                g.k_max,
                t0.elapsed()
            );
        }
        for l in (100..=2000).step_by(100) {
            eprintln!(
                "l {l}: {:.5e} {:.5e} {:.5e} r21 {:.4} r32 {:.4}",
                cs[0].tt[l],
                cs[1].tt[l],
                cs[2].tt[l],
                cs[1].tt[l] / cs[0].tt[l],
                cs[2].tt[l] / cs[1].tt[l]
            );
        }
        // convergence default
        let m = ShellModel::from_thermal(thermal(), &ShellOverrides::default()).unwrap();
        let prim = Primordial::new(&Cosmology::planck2018());
        let t0 = Instant::now();
        let a = m.spectra(2000, &KGridSpec::default(), &prim).unwrap();
        eprintln!("default lmax 2000 {:?}", t0.elapsed());
        let b = m
            .spectra(
                2000,
                &KGridSpec {
                    nodes_per_panel: 8,
                    ..Default::default()
                },
                &prim,
            )
            .unwrap();
        let c = m
            .spectra(
                2000,
                &KGridSpec {
                    damping_cut: 7.0,
                    thickness_cut: 9.0,
                    ..Default::default()
                },
                &prim,
            )
            .unwrap();
        let rel = |x: &[f64], y: &[f64], z: &[f64]| {
            (2..x.len())
                .map(|l| ((x[l] - y[l]) / z[l]).abs())
                .fold(0.0, f64::max)
        };
        eprintln!(
            "spacing: TT {:.2e} EE {:.2e} TE/sqrt {:.2e}",
            rel(&a.tt, &b.tt, &a.tt),
            rel(&a.ee, &b.ee, &a.ee),
            rel(
                &a.te,
                &b.te,
                &a.tt
                    .iter()
                    .zip(&a.ee)
                    .map(|(x, y)| (x * y).sqrt())
                    .collect::<Vec<_>>()
            )
        );
        eprintln!(
            "range: TT {:.2e} EE {:.2e}",
            rel(&a.tt, &c.tt, &a.tt),
            rel(&a.ee, &c.ee, &a.ee)
        );
        let mut best = (0, 0.0);
        for l in 2..=2000 {
            let d = l as f64 * (l as f64 + 1.0) * a.ee[l];
            if d > best.1 {
                best = (l, d);
            }
        }
        let d10 = 110.0 * a.tt[10];
        eprintln!("EE peak l {} ratio to D_TT(10) {:.4}", best.0, best.1 / d10);
    }

    #[test]
    fn probe() {
        for sigma in [16.0, 100.0, 500.0] {
            let m = model(sigma, None);
            let k_max = 0.8;
            let p1 = ChiPlan::new(sigma, k_max);
            let p2 = ChiPlan::with_scale(sigma, k_max, 2.0);
            let p3 = ChiPlan::with_scale(sigma, k_max, 3.0);
            for k in [1e-4, 1e-3, 0.01, 0.05, 0.1, 0.2, 0.3, 0.4, 0.6, 0.8] {
                let (et, ee) = chi_quadrature_error(&m, k, 5000, &p1, &p3);
                let (et2, _) = chi_quadrature_error(&m, k, 5000, &p2, &p3);
                eprintln!(
                    "sigma {sigma} k {k}: n = {} T {et:.2e} E {ee:.2e} (2 vs 3: {et2:.2e})",
                    p1.nodes_needed(k)
                );
            }
        }
    }
}
