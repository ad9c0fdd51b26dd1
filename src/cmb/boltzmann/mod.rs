//! A line-of-sight Boltzmann solver: the temperature and E-mode transfer functions
//! Delta^T_l(k), Delta^E_l(k) at every l, the unlensed C_l^TT, EE, TE, and the z = 0 matter
//! transfer function T(k), for flat LCDM (cold dark matter, baryons, photons, massless
//! neutrinos, a cosmological constant) and scalar adiabatic perturbations.
//!
//! ```no_run
//! use ngreach::cmb::ThermalHistory;
//! use ngreach::cmb::boltzmann::{BoltzmannSolver, Settings};
//! use ngreach::cosmology::{Background, Cosmology};
//! let c = Cosmology::planck2018();
//! let bg = Background::new(&c);
//! let th = ThermalHistory::new(&c, &bg).unwrap();
//! let solver = BoltzmannSolver::new(&c, &th, &bg, Settings::default()).unwrap();
//! let table = solver.transfer_table(); // every l, for the bispectrum engine
//! let cl = solver.cl_sampled().interpolate(); // C_l the cheap way
//! let t_of_k = solver.matter_transfer().unwrap(); // for cosmology::Transfer::Table
//! ```
//!
//! ## Gauge and equations
//! Synchronous gauge comoving with the cold dark matter, in the notation of Ma &
//! Bertschinger (1995, ApJ 455, 7, astro-ph/9506072; "MB95"): metric perturbations h and
//! eta, conformal time eta (context tells the two etas apart), ' = d/d eta, aH = a'/a,
//! rho~_i = (8 pi G / 3) a^2 rho_i, kappa' = a n_e sigma_T (the opacity),
//! R = 4 rho_gamma / (3 rho_b). Photons carry temperature multipoles F_l (delta_g = F_0,
//! theta_g = 3 k F_1 / 4, sigma_g = F_2 / 2) and polarization multipoles G_l, neutrinos F_l:
//!
//! ```text
//! aH h'  = 2 k^2 eta + 3 sum_i rho~_i delta_i                                (MB95 21a)
//! k^2 eta' = (3/2) sum_i rho~_i (1 + w_i) theta_i                            (MB95 21b)
//! delta_c' = -h'/2,   delta_b' = -theta_b - h'/2
//! theta_b' = -aH theta_b + c_s^2 k^2 delta_b + R kappa' (theta_g - theta_b)
//! delta_g' = -(4/3) theta_g - (2/3) h',   theta_g' = k^2 (delta_g/4 - sigma_g) + kappa' (theta_b - theta_g)
//! F_2' = (8/15) theta_g - (3/5) k F_3 + (4/15) h' + (8/5) eta' - (9/10) kappa' F_2 + (1/10) kappa' (G_0 + G_2)
//! F_l' = k/(2l+1) [l F_{l-1} - (l+1) F_{l+1}] - kappa' F_l                     (l >= 3)
//! G_l' = k/(2l+1) [l G_{l-1} - (l+1) G_{l+1}] + kappa' [-G_l + (Pi/2)(delta_l0 + delta_l2/5)],
//!        Pi = F_2 + G_0 + G_2                                                (MB95 63)
//! neutrinos: the photon equations without kappa' (MB95 49)
//! ```
//!
//! The Thomson collision term is complete: isotropic scattering, the Doppler term and the
//! anisotropic (quadrupole) scattering with its polarization dependence through Pi. The
//! hierarchies are truncated at l_max as MB95 Eq. 51,
//! F_L' = k F_{L-1} - (L+1)/eta F_L - kappa' F_L, with L = 20, 18, 16 (neutrinos, photon
//! temperature, polarization) at precision 1, 8 more per precision step. The baryon sound
//! speed c_s^2 = (k_B T_b / mu)(1 - (1/3) d ln T_b / d ln a) comes from the thermal
//! history. Dark-energy perturbations are not modelled, so w0 = -1, wa = 0 is required.
//!
//! ## Initial conditions
//! The adiabatic growing mode deep in radiation domination (MB95 Eq. 96, leading order in
//! k eta) at eta_ini = min(0.1 Mpc, 0.01/k), with MB95's constant C = -(5/6) Phi: outside
//! the horizon the metric eta tends to 2C, which equals minus the comoving curvature
//! perturbation zeta of the Komatsu-Spergel sign convention, and Phi = (3/5) zeta in
//! matter domination. Everything is per unit primordial Phi, the normalization of
//! [`TransferTable`] (src/cmb/transfer.rs): the Sachs-Wolfe limit is
//! Delta^T_l(k) -> -j_l(k chi_*)/3 (checked in tests/boltzmann.rs).
//!
//! ## Tight coupling and stiffness
//! Early on the photon-baryon slip relaxes at rate (1 + R) kappa', up to 10^6 times faster
//! than anything else. While max(k, aH) tau_c < eps_tca (tau_c = 1/kappa',
//! eps_tca = 0.02 / precision; and at the latest at the first line-of-sight node, where the
//! visibility is 1e-7 of its peak), the photons are a fluid tied to the baryons to first
//! order in tau_c (MB95 Sec. 5, written here for a general opacity history):
//!
//! ```text
//! s = theta_b - theta_g = tau_c N / (1 + R),   N = -aH theta_b + c_s^2 k^2 delta_b - k^2 delta_g / 4
//! s' = [-kappa''/kappa' + aH (R - 1)/(1 + R)] s
//!      + tau_c/(1 + R) [-(aH)' theta_b - aH k^2 delta_g/4 + k^2 (c_s^2 delta_b)' - k^2 delta_g'/4]
//! theta_b' = [-aH theta_b + c_s^2 k^2 delta_b + R k^2 (delta_g/4 - sigma_g) + R s'] / (1 + R)
//! theta_g' = -(theta_b' + aH theta_b - c_s^2 k^2 delta_b) / R + k^2 (delta_g/4 - sigma_g)
//! sigma_g = (16/45) tau_c (theta_g + k^2 alpha),   Pi = 5 sigma_g,   alpha = (h' + 6 eta')/(2 k^2)
//! ```
//!
//! (for tau_c ~ a^2 the s' equation reduces to MB95's). At the switch the photon
//! multipoles start from their tight-coupling values (F_2 = 2 sigma_g, G_0 = 5 F_2/4,
//! G_2 = F_2/4, F_3, G_1, G_3 to first order in k tau_c). The equations are integrated in
//! conformal time by Dormand-Prince 5(4) with its dense output (module `dopri`). An
//! explicit method needs steps below ~3.3 / ((1 + R) kappa') once tight coupling is off;
//! the switch criterion caps that stiffness ratio at ~(1 + R)/eps_tca for the remaining
//! time before recombination, and the step controller settles at the stability limit by
//! itself: about a thousand steps per mode (the 281 modes of l_max = 3000 take ~0.32 M
//! steps, 0.45 s of CPU). eps_tca = 0.02 instead of 0.01 saves 40% of the steps; the worst
//! deviations from camb in tests/boltzmann.rs moved by at most 1e-4 (TT 0.10% -> 0.11%,
//! EE and TE unchanged at the quoted digits) and D_220^TT by 2e-5 (measured).
//!
//! After recombination (once the visibility has dropped to 3e-4 of its peak) and once
//! k eta > 45 precision, photons and neutrinos are replaced by their non-oscillating
//! particular solution (radiation streaming, as proposed by Blas, Lesgourgues & Tram 2011,
//! JCAP 07, 034, arXiv:1104.2933): delta_r = 4 (aH h'/k^2 - eta), theta_r = -h'/2, no
//! shear or higher multipoles, h' solved together with Eq. 21a. Only the metric, CDM and
//! baryons are then integrated.
//!
//! ## Line of sight
//! Seljak & Zaldarriaga (1996, ApJ 469, 437, astro-ph/9603033) and, for polarization,
//! Zaldarriaga & Seljak (1997, PRD 55, 1830): integrating the Boltzmann equation along the
//! line of sight and trading powers of mu for derivatives of j_l,
//!
//! ```text
//! Delta^T_l(k) = Int d eta [ S0 j_l(x) + S1 j_l'(x) + S2 (j_l(x) + 3 j_l''(x)) / 2 ],  x = k (eta_0 - eta)
//! Delta^E_l(k) = sqrt((l+2)!/(l-2)!) Int d eta SE j_l(x) / x^2
//! S0 = g (delta_g/4 + alpha') + e^-tau (eta' + alpha''),   S1 = g (theta_b + k^2 alpha) / k
//! S2 = g Pi / 8,   SE = 3 g Pi / 16
//! ```
//!
//! with g = kappa' e^-tau the visibility. In Newtonian-gauge terms delta_g/4 + alpha' is
//! Theta_0 + psi, eta' + alpha'' is phi' + psi' (integrated Sachs-Wolfe) and
//! theta_b + k^2 alpha the Newtonian baryon velocity; alpha' and alpha'' follow
//! analytically from MB95 Eq. 21d: alpha' = eta - 2 aH alpha - (6/k^2) sum rho~ sigma
//! (photons and neutrinos). No derivative of the visibility or of Pi is needed.
//!
//! The time integral is a composite Gauss-Legendre rule (6 nodes per panel) whose nodes
//! are the output times of the mode integrations, so the sources are never interpolated
//! in time: panels of 10 / precision Mpc where g > g_max/10, 15 Mpc where g > g_max/100,
//! 25 Mpc in the tails, from g = 1e-7 g_max to 3e-4 g_max; then 45 Mpc panels over the
//! next 2500 Mpc (early ISW, used for k <= 0.06 precision /Mpc) and 120 Mpc panels to
//! today (late ISW, reionization, k <= 0.02 precision /Mpc), each cut-off tapered to
//! zero over 25% in k. The sources are computed for ~250 modes (log-spaced below
//! 1.2e-3 /Mpc, 1.5e-4 apart up to 0.006 /Mpc where the reionization sources oscillate in
//! k, 0.0025 apart at high k) and interpolated onto the projection grid (log-spaced, then
//! 1e-4 / precision apart, up to k_max chi_* = 2.1 l_max + 600 at precision 1, since the
//! k integral of C_l has a tail beyond k = l/chi_*) by cubic splines in k. Halving the
//! mode spacing changes C_l by at most 3e-4 (l < 30) and 4e-5 (l >= 30): that is the
//! error of the k interpolation.
//!
//! Two projections: [`BoltzmannSolver::transfer_table`] gives every l (all j_l at each x
//! by recurrences, eight nodes side by side, module `bessel_sum`; 5064 k x 3001 l at
//! l_max = 3000 in ~0.9 s of CPU), and [`BoltzmannSolver::cl_sampled`] computes ~150
//! multipoles (every l to 20, then steps of l/10 up to 25 / precision) with interpolated
//! Bessel tables; [`SampledSpectra::interpolate`] fills in every l by cubic splines of
//! l(l+1) C_l. Measured interpolation error against the every-l spectra: below 4e-4
//! (TT, EE, and TE relative to sqrt(TT EE)) for 2 <= l <= 2500.
//!
//! ## Spectra and the matter transfer function
//! C^XY_l = (2/pi) Int k^2 dk P_Phi(k) Delta^X_l Delta^Y_l ([`Spectra`]). The matter
//! transfer function follows from the synchronous-gauge (comoving) CDM + baryon density
//! today, T(k) = (3/2) Omega_m H0^2 delta_m(k, z = 0) / (k^2 D(0) Phi), D the growth factor
//! normalized to a in matter domination ([`Growth::d_md`]), so that
//! delta_m = (2/3) k^2 T(k) D(z) Phi / (Omega_m H0^2) and T -> 1 as k -> 0.
//!
//! ## Accuracy (measured; tests/boltzmann.rs prints the figures)
//! Against camb 2.0.5 at its default recombination (unlensed, massless neutrinos):
//! |Delta C/C| <= 0.11% for TT and EE at l < 30, <= 0.11% at 30 <= l <= 2000 and
//! <= 0.14% at 2000 < l <= 3000; TE within 0.13% of sqrt(TT EE); T(k) within 0.11% for
//! 1e-4 < k < 1 h/Mpc. With camb's x_e in the opacity instead of our thermal history
//! the solver matches camb to 0.19% at 30 <= l <= 2500. Precision 2 changes C_l
//! by at most 0.09% (TT), 0.07% (EE) and 0.12% of sqrt(TT EE) (TE) (the
//! convergence test in tests/boltzmann.rs). The Weyl potential for CMB lensing comes from
//! the same modes ([`BoltzmannSolver::weyl_table`], module `weyl`).
//!
//! ## Cost (l_max = 3000, precision 1; measured with stage timers and perf)
//! CPU time splits as: thermal history ~0.05 s (the recombination ODE, stopping on each
//! of ~10^4 table nodes; serial), timeline tables ~0.02 s, 281 mode integrations ~0.33 s
//! (322 k steps, in an AVX2 copy where the CPU has it: same bits), every-l projection
//! ~0.6 s with AVX-512 (~0.85 s with AVX2; 2.5e9 lane updates of the fused Bessel
//! recurrence, two thirds of them at k chi_* > l_max where all 198 recombination nodes
//! need every l), C_l ~0.03 s. Everything but the recombination ODE runs on the rayon
//! pool: the timeline in fixed blocks of nodes, the source splines per node, C_l in fixed
//! k blocks added in order (results do not depend on the thread count). Measured
//! trade-offs not taken: eps_tca = 0.03 saves 21% of the steps (0.1 s of CPU) but moves
//! the worst C_l^EE deviation from camb at 2000 < l <= 3000 from 0.14% to 0.21% (0.025:
//! 13%, 0.18%).
//!
//! ## Cache
//! [`cached_transfer`] stores tables in a binary file format of its own with a header,
//! length and FNV-1a checksum, keyed by a hash of the parameters (module `cache`).

mod bessel_sum;
mod cache;
mod dopri;
mod equations;
mod grids;
mod los;
mod modes;
mod spectra;
mod timeline;
mod weyl;

pub use cache::{
    CacheOptions, CacheStatus, cache_file, cache_key, cached_transfer, read_table, write_table,
};
pub(crate) use cache::{Fnv1a, SOLVER_VERSION};
pub use spectra::{SampledSpectra, Spectra};
pub use weyl::WeylTable;

use crate::cmb::ThermalHistory;
use crate::cmb::transfer::{Field, TransferTable};
use crate::cosmology::{Background, Cosmology, Growth, Primordial};
use crate::error::{Error, Location, Result};
use crate::numerics::CubicSpline;

use equations::Layout;
use grids::{Nodes, Plan};
use timeline::Timeline;

/// Largest l_max the solver accepts.
pub const LMAX_LIMIT: usize = 6000;

/// Numerical settings of a solve.
#[derive(Debug, Clone, PartialEq)]
pub struct Settings {
    /// Precision level: 1 (default) or higher, which refines the k sampling, the time
    /// sampling, the l sampling, the hierarchy lengths and the tolerances together.
    pub precision: u32,
    /// Highest multipole of the transfer functions (2 <= lmax <= [`LMAX_LIMIT`]).
    pub lmax: usize,
    /// Largest k (1/Mpc) of the matter transfer function.
    pub k_max_matter_mpc: f64,
    /// Run the k loops on the rayon thread pool (false: one thread, same result).
    pub parallel: bool,
}

impl Default for Settings {
    fn default() -> Self {
        Self {
            precision: 1,
            lmax: 2500,
            k_max_matter_mpc: 1.5,
            parallel: true,
        }
    }
}

impl Settings {
    fn validate(&self) -> Result<()> {
        if !(1..=4).contains(&self.precision) {
            return Err(Error::out_of_range(
                Location::Builtin,
                "precision",
                self.precision as f64,
                "1 <= precision <= 4",
            ));
        }
        if !(2..=LMAX_LIMIT).contains(&self.lmax) {
            return Err(Error::out_of_range(
                Location::Builtin,
                "lmax",
                self.lmax as f64,
                "2 <= lmax <= 6000",
            ));
        }
        if !(self.k_max_matter_mpc.is_finite() && (0.01..=20.0).contains(&self.k_max_matter_mpc)) {
            return Err(Error::out_of_range(
                Location::Builtin,
                "k_max_matter_mpc",
                self.k_max_matter_mpc,
                "0.01 <= k_max_matter_mpc <= 20 (1/Mpc)",
            ));
        }
        Ok(())
    }
}

/// The solved perturbations of one cosmology: sources on a conformal-time grid for a
/// few hundred k modes, ready to be projected.
#[derive(Debug, Clone)]
pub struct BoltzmannSolver {
    settings: Settings,
    plan: Plan,
    timeline: Timeline,
    nodes: Nodes,
    lay: Layout,
    sources: modes::SourceTable,
    prim: Primordial,
    f_b: f64,
    /// (3/2) Omega_m (H0/c)^2 / D_md(0): turns delta_m / k^2 into T(k).
    t_norm: f64,
}

impl BoltzmannSolver {
    /// Integrates the perturbations of `cosmo` (with its thermal history and background).
    ///
    /// # Errors
    /// [`Error::OutOfRange`] for bad settings; [`Error::Conflict`] if the background was
    /// built for another cosmology or dark energy is not a cosmological constant;
    /// [`Error::Numerical`] if a mode integration fails.
    pub fn new(
        cosmo: &Cosmology,
        thermal: &ThermalHistory,
        bg: &Background,
        settings: Settings,
    ) -> Result<Self> {
        Self::build(cosmo, thermal, bg, settings, None)
    }

    /// As [`Self::new`], with the free-electron fraction of the opacity multiplied by
    /// `xe_ratio(z)` (used by the tests to feed in a reference library's ionization
    /// history).
    fn build(
        cosmo: &Cosmology,
        thermal: &ThermalHistory,
        bg: &Background,
        settings: Settings,
        xe_ratio: Option<&dyn Fn(f64) -> f64>,
    ) -> Result<Self> {
        settings.validate()?;
        if bg.cosmology() != cosmo {
            return Err(Error::Conflict {
                at: Location::Builtin,
                message: "the background passed to the Boltzmann solver was built for another \
                          cosmology; build it from the same Cosmology"
                    .into(),
            });
        }
        let p = cosmo.params();
        if p.w0 != -1.0 || p.wa != 0.0 {
            return Err(Error::Conflict {
                at: Location::Builtin,
                message: format!(
                    "the Boltzmann solver supports a cosmological constant only \
                     (dark_energy_w0 = -1, dark_energy_wa = 0), got dark_energy_w0 = {}, \
                     dark_energy_wa = {}: dark-energy perturbations are not modelled",
                    p.w0, p.wa
                ),
            });
        }
        let timeline = Timeline::new(cosmo, thermal, bg, xe_ratio)?;
        let eta0 = timeline.eta0();
        let chi_star = thermal.summary().d_m_star_mpc;
        let plan = Plan::new(settings.precision, settings.lmax, eta0, chi_star);
        let nodes = Nodes::new(thermal, &plan, xe_ratio, bg);
        let lay = Layout {
            l_nu: plan.l_nu,
            l_g: plan.l_g,
            l_p: plan.l_p,
        };
        let f_b = cosmo.baryon_fraction();
        let ks = grids::ode_k_grid(&plan, plan.k_min, plan.k_max);
        let sources = modes::solve_modes(
            &ks,
            &timeline,
            &nodes,
            &plan,
            lay,
            f_b,
            true,
            settings.parallel,
        )?;
        let h0 = cosmo.h0_over_c_mpc();
        let growth = Growth::new(cosmo);
        let t_norm = 1.5 * cosmo.omega_m() * h0 * h0 / growth.d_md(0.0);
        Ok(Self {
            settings,
            plan,
            timeline,
            nodes,
            lay,
            sources,
            prim: Primordial::new(cosmo),
            f_b,
            t_norm,
        })
    }

    /// The settings.
    pub fn settings(&self) -> &Settings {
        &self.settings
    }

    /// Wavenumbers of the mode integrations, 1/Mpc.
    pub fn mode_k(&self) -> &[f64] {
        &self.sources.k
    }

    /// Accepted integration steps summed over all modes (a cost measure).
    pub fn mode_steps(&self) -> usize {
        self.sources.steps
    }

    /// Number of conformal-time nodes of the line-of-sight integrals.
    pub fn time_nodes(&self) -> usize {
        self.nodes.len()
    }

    /// The projection k grid (the transfer table's) and its quadrature weights.
    pub fn projection_k(&self) -> (Vec<f64>, Vec<f64>) {
        grids::fine_k_grid(&self.plan)
    }

    fn projection(&self) -> los::Projection<'_> {
        los::Projection {
            src: &self.sources,
            nodes: &self.nodes,
            plan: &self.plan,
            eta0: self.timeline.eta0(),
        }
    }

    /// Delta^T_l(k) and Delta^E_l(k) at every l from 0 to lmax (rows l < 2 are zero),
    /// per unit primordial Phi, on the projection k grid.
    pub fn transfer_table(&self) -> TransferTable {
        let (k, w) = grids::fine_k_grid(&self.plan);
        let lmax = self.settings.lmax;
        let (t, e) = self.projection().every_l(&k, lmax, self.settings.parallel);
        TransferTable::new(
            &format!(
                "boltzmann (line of sight, precision {})",
                self.settings.precision
            ),
            k,
            w,
            lmax,
            vec![Field::T, Field::E],
            vec![t, e],
        )
        .mark_k_truncated()
    }

    /// Unlensed C_l^TT, EE, TE at every l (through [`Self::transfer_table`]).
    pub fn cl(&self) -> Spectra {
        Spectra::from_table(&self.transfer_table(), &self.prim)
    }

    /// Unlensed C_l at sampled multipoles only (every l to 12, then steps up to 40 / precision),
    /// much cheaper than the every-l table; [`SampledSpectra::interpolate`] fills in the
    /// rest.
    pub fn cl_sampled(&self) -> SampledSpectra {
        let (k, w) = grids::fine_k_grid(&self.plan);
        let ls = grids::sampled_ls(self.settings.lmax, self.plan.l_step_max);
        let (t, e) = self.projection().sampled(&k, &ls, self.settings.parallel);
        let nl = ls.len();
        SampledSpectra {
            tt: spectra::sampled_cl(&k, &w, &self.prim, &t, &t, nl),
            ee: spectra::sampled_cl(&k, &w, &self.prim, &e, &e, nl),
            te: spectra::sampled_cl(&k, &w, &self.prim, &t, &e, nl),
            l: ls,
        }
    }

    /// The z = 0 matter transfer function T(k) as a natural cubic spline of T in ln k
    /// (k in 1/Mpc), normalized so that delta_m = (2/3) k^2 T(k) D(z) Phi / (Omega_m H0^2)
    /// with D normalized to a in matter domination; T -> 1 as k -> 0. Covers k from the
    /// smallest mode to `k_max_matter_mpc`, integrating the extra modes above the CMB
    /// range.
    ///
    /// # Errors
    /// [`Error::Numerical`] if a mode integration fails.
    pub fn matter_transfer(&self) -> Result<CubicSpline> {
        let mut ks = self.sources.k.clone();
        let mut dm = self.sources.delta_m.clone();
        let k_last = *ks.last().expect("modes exist");
        if self.settings.k_max_matter_mpc > k_last {
            let n = ((self.settings.k_max_matter_mpc / k_last).ln()
                / (0.04 / self.settings.precision as f64))
                .ceil()
                .max(1.0) as usize;
            let extra: Vec<f64> = (1..=n)
                .map(|i| {
                    k_last * (self.settings.k_max_matter_mpc / k_last).powf(i as f64 / n as f64)
                })
                .collect();
            let t = modes::solve_modes(
                &extra,
                &self.timeline,
                &self.nodes,
                &self.plan,
                self.lay,
                self.f_b,
                false,
                self.settings.parallel,
            )?;
            ks.extend(extra);
            dm.extend(t.delta_m);
        }
        let x: Vec<f64> = ks.iter().map(|k| k.ln()).collect();
        let y: Vec<f64> = ks
            .iter()
            .zip(&dm)
            .map(|(&k, &d)| d * self.t_norm / (k * k))
            .collect();
        Ok(CubicSpline::new(x, y))
    }
}

/// The z = 0 matter transfer function of `cosmo` alone, for the survey side: a
/// matter-only solve (thermal history, then the modes of the smallest CMB plan, l_max =
/// 2, and the extra matter modes up to `k_max_mpc`, without any line-of-sight
/// projection). Same normalization and accuracy as [`BoltzmannSolver::matter_transfer`]
/// (0.11% against camb for 1e-4 < k < 1 h/Mpc, tests/boltzmann.rs); under a second
/// (measured 0.4 to 0.8 s on two shared cores for k_max = 1.5 /Mpc, thermal history
/// included).
///
/// # Errors
/// As [`ThermalHistory::new`] and [`BoltzmannSolver::new`] (e.g. dark energy other than
/// a cosmological constant); [`Error::OutOfRange`] for `k_max_mpc` outside [0.01, 20].
pub fn matter_transfer_of(
    cosmo: &Cosmology,
    precision: u32,
    k_max_mpc: f64,
    parallel: bool,
) -> Result<CubicSpline> {
    let settings = Settings {
        precision,
        lmax: 2,
        k_max_matter_mpc: k_max_mpc,
        parallel,
    };
    settings.validate()?;
    let bg = Background::new(cosmo);
    let th = ThermalHistory::new(cosmo, &bg)?;
    BoltzmannSolver::new(cosmo, &th, &bg, settings)?.matter_transfer()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Rows of a whitespace-separated reference table (comment lines skipped).
    fn rows(text: &str, prefix: Option<&str>) -> Vec<Vec<f64>> {
        text.lines()
            .filter(|l| !l.starts_with('#') && !l.trim().is_empty())
            .filter_map(|l| match prefix {
                Some(p) => l.strip_prefix(p),
                None => Some(l),
            })
            .filter_map(|l| l.split_whitespace().map(|v| v.parse().ok()).collect())
            .collect()
    }

    /// Stage check (methods.md, "debugging against a reference library"): with camb's
    /// ionization history fed into the opacity, the solver's C_l must match camb's: this
    /// separates the solver from the thermal history (which now agrees with camb's x_e
    /// to 2e-4, so both routes give about 0.1%). Reference: camb 2.0.5,
    /// tests/reference/thermal_camb.tsv (x_e, `default` settings) and cl_camb.tsv.
    #[test]
    fn matches_camb_with_camb_ionization_history() {
        let c = Cosmology::planck2018();
        let bg = Background::new(&c);
        let th = ThermalHistory::new(&c, &bg).unwrap();
        let xe = rows(
            include_str!("../../../tests/reference/thermal_camb.tsv"),
            Some("xe_default"),
        );
        let ratio: Vec<(f64, f64)> = xe.iter().map(|r| (r[0], r[1] / th.x_e(r[0]))).collect();
        let f = |z: f64| {
            let j = ratio.partition_point(|r| r.0 <= z);
            if j == 0 || j == ratio.len() {
                return 1.0;
            }
            let ((z0, r0), (z1, r1)) = (ratio[j - 1], ratio[j]);
            r0 + (r1 - r0) * (z - z0) / (z1 - z0)
        };
        let settings = Settings {
            lmax: 2500,
            ..Settings::default()
        };
        let s = BoltzmannSolver::build(&c, &th, &bg, settings, Some(&f)).unwrap();
        let cl = s.cl_sampled().interpolate();
        let camb = rows(include_str!("../../../tests/reference/cl_camb.tsv"), None);
        let mut worst = [(0.0_f64, 0usize); 3];
        for r in &camb {
            let l = r[0] as usize;
            if !(30..=2500).contains(&l) {
                continue;
            }
            let d = [
                cl.tt[l] / r[1] - 1.0,
                cl.ee[l] / r[2] - 1.0,
                (cl.te[l] - r[3]) / (r[1] * r[2]).sqrt(),
            ];
            for i in 0..3 {
                if d[i].abs() > worst[i].0.abs() {
                    worst[i] = (d[i], l);
                }
            }
        }
        eprintln!(
            "with camb's x_e, 30 <= l <= 2500: worst TT {:?} EE {:?} TE/sqrt(TT EE) {:?}",
            worst[0], worst[1], worst[2]
        );
        assert!(worst[0].0.abs() < 3e-3 && worst[1].0.abs() < 3e-3 && worst[2].0.abs() < 3e-3);
    }
}
