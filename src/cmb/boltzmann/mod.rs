//! A line-of-sight Boltzmann solver for the temperature and E-mode transfer functions
//! Delta^T_l(k), Delta^E_l(k), the unlensed C_l^TT, EE, TE and the matter transfer
//! function T(k), for flat LCDM with massless neutrinos and scalar adiabatic modes.
//!
//! (Module documentation with the equations follows in a later commit.)

mod cache;
mod dopri;
mod equations;
mod grids;
mod los;
mod modes;
mod spectra;
mod timeline;

pub use cache::{CacheOptions, CacheStatus, cache_file, cache_key, cached_transfer, read_table, write_table};
pub use spectra::{SampledSpectra, Spectra};

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
                    "the Boltzmann solver supports a cosmological constant only (w0 = -1, \
                     wa = 0), got w0 = {}, wa = {}: dark-energy perturbations are not modelled",
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
            &format!("boltzmann (line of sight, precision {})", self.settings.precision),
            k,
            w,
            lmax,
            vec![Field::T, Field::E],
            vec![t, e],
        )
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
            let n = ((self.settings.k_max_matter_mpc / k_last).ln() / (0.04 / self.settings.precision as f64))
                .ceil()
                .max(1.0) as usize;
            let extra: Vec<f64> = (1..=n)
                .map(|i| k_last * (self.settings.k_max_matter_mpc / k_last).powf(i as f64 / n as f64))
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
    /// ionization history fed into the opacity, the solver's C_l must match camb's far
    /// better than with ngreach's own thermal history, whose HeI recombination lacks the
    /// corrections camb always applies (see tests/boltzmann.rs). Reference: camb 2.0.5,
    /// tests/reference/thermal_camb.tsv (x_e, `matched` settings) and cl_camb.tsv.
    #[test]
    fn matches_camb_with_camb_ionization_history() {
        let c = Cosmology::planck2018();
        let bg = Background::new(&c);
        let th = ThermalHistory::new(&c, &bg).unwrap();
        let xe = rows(
            include_str!("../../../tests/reference/thermal_camb.tsv"),
            Some("xe_matched"),
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
            if l < 30 {
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
        eprintln!("with camb's x_e, 30 <= l <= 2500: worst TT {:?} EE {:?} TE/sqrt(TT EE) {:?}", worst[0], worst[1], worst[2]);
        assert!(worst[0].0.abs() < 3e-3 && worst[1].0.abs() < 3e-3 && worst[2].0.abs() < 3e-3);
    }
}
