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
use crate::cmb::transfer::{Field, TransferTable};
use crate::cosmology::Primordial;
use crate::error::{Error, Location, Result};
use crate::special::sph_bessel_all_l;

mod grids;
use grids::{ChiPlan, l_top};
pub use grids::{KCutoff, KGrid, KGridSpec, RadialGridSpec};

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
mod tests;
