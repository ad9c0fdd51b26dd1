//! The CMB lensing potential from our own Boltzmann solver: C_L^{phi phi} and
//! C_L^{T phi} (dimensionless; T as Delta T / T).
//!
//! The lensing potential of a source at the last-scattering distance chi_* (flat space;
//! e.g. Lewis & Challinor 2006, Phys. Rep. 429, 1, Eq. 4.8) is
//!
//! ```text
//! phi(n) = -2 Int_0^chi_* d chi (chi_* - chi) / (chi_* chi) Psi_W(chi n, eta_0 - chi)
//! ```
//!
//! with Psi_W = (phi + psi) / 2 the Weyl potential of the conformal Newtonian gauge,
//! taken from the solver's modes (`BoltzmannSolver::weyl_table`) on a grid of conformal
//! times (Gauss-Legendre panels in chi) and of wavenumbers (log-spaced, 1e-5 to 5 /Mpc;
//! a natural cubic spline in ln k at each time). Per unit primordial Phi,
//! Delta^phi_L(k) = Int d chi F(chi) Psi_W(k, eta_0 - chi) j_L(k chi),
//! F = -2 (chi_* - chi) / (chi_* chi), and C_L^{XY} = (2/pi) Int k^2 dk P_Phi Delta^X Delta^Y
//! as for the temperature.
//!
//! - L <= [`L_LOS`]: the full line-of-sight integral (every j_L by recurrence), on a k
//!   grid of its own for phi phi, and on the temperature transfer table's k grid for
//!   T phi.
//! - L > [`L_LOS`]: the Limber approximation with k = (L + 1/2) / chi (LoVerde & Afshordi
//!   2008, PRD 78, 123506): C_L^{phi phi} = Int d chi F^2 P_Phi(k) Psi_W^2 / chi^2, and,
//!   for T phi, the integrated Sachs-Wolfe source e^-tau (phi' + psi') = 2 e^-tau Psi_W'
//!   in place of one F Psi_W (the only part of T that correlates with phi on those scales).
//!   The Limber error at the switch is measured by the tests (both routes at L = L_LOS).

use rayon::prelude::*;

use crate::cmb::ThermalHistory;
use crate::cmb::boltzmann::{BoltzmannSolver, Settings, WeylTable};
use crate::cmb::transfer::{Field, TransferTable};
use crate::cosmology::{Background, Cosmology, Primordial};
use crate::error::Result;
use crate::numerics::{CubicSpline, GaussLegendre};
use crate::special::sph_bessel_all_l;

/// Highest L of the full line-of-sight integral; Limber above.
pub const L_LOS: usize = 100;
/// Wavenumber range of the Weyl-potential modes, 1/Mpc.
const K_MIN: f64 = 1.0e-5;
const K_MAX: f64 = 5.0;
/// Modes per decade of k.
const K_PER_DECADE: f64 = 40.0;
/// Width of the Gauss-Legendre panels in chi (Mpc) and nodes per panel.
const CHI_PANEL: f64 = 150.0;
const CHI_NODES: usize = 8;

/// The lensing-potential spectra, indexed by L from 0 to `lmax` (L = 0, 1 zero).
#[derive(Debug, Clone, PartialEq)]
pub struct LensingSpectra {
    /// C_L^{phi phi}.
    pub pp: Vec<f64>,
    /// C_L^{T phi} (T as Delta T / T).
    pub tp: Vec<f64>,
}

impl LensingSpectra {
    /// Highest L.
    pub fn lmax(&self) -> usize {
        self.pp.len().saturating_sub(1)
    }
}

/// The Weyl potential on the lensing grid, with what the projections need.
pub struct WeylSource {
    chi: Vec<f64>,
    /// Quadrature weights in chi, Mpc.
    w: Vec<f64>,
    /// F(chi) = -2 (chi_* - chi) / (chi_* chi).
    f: Vec<f64>,
    /// e^-tau at each chi node.
    emt: Vec<f64>,
    /// Psi_W and dPsi_W/d eta per chi node, as cubic splines in ln k.
    psi: Vec<CubicSpline>,
    dpsi: Vec<CubicSpline>,
    ln_k_min: f64,
    ln_k_max: f64,
    prim: Primordial,
}

impl WeylSource {
    /// Solves the Weyl potential of `cosmo` (a matter-only solver run of its own plus one
    /// mode per grid wavenumber).
    ///
    /// # Errors
    /// As [`BoltzmannSolver::new`] and [`BoltzmannSolver::weyl_table`].
    pub fn new(
        cosmo: &Cosmology,
        th: &ThermalHistory,
        bg: &Background,
        precision: u32,
        parallel: bool,
    ) -> Result<Self> {
        let settings = Settings {
            precision,
            lmax: 2,
            parallel,
            ..Settings::default()
        };
        let solver = BoltzmannSolver::new(cosmo, th, bg, settings)?;
        let chi_star = th.summary().d_m_star_mpc;
        let eta0 = th.conformal_age();
        let n_panels = (chi_star / CHI_PANEL).ceil() as usize;
        let gl = GaussLegendre::new(CHI_NODES);
        let pw = chi_star / n_panels as f64;
        let mut chi = Vec::new();
        let mut w = Vec::new();
        for p in 0..n_panels {
            let (x, ww) = gl.mapped(p as f64 * pw, (p + 1) as f64 * pw);
            chi.extend(x);
            w.extend(ww);
        }
        let n_k = ((K_MAX / K_MIN).log10() * K_PER_DECADE).ceil() as usize + 1;
        let ks: Vec<f64> = (0..n_k)
            .map(|i| K_MIN * (K_MAX / K_MIN).powf(i as f64 / (n_k - 1) as f64))
            .collect();
        // Conformal times increasing = chi decreasing.
        let etas: Vec<f64> = chi.iter().rev().map(|&c| eta0 - c).collect();
        let table: WeylTable = solver.weyl_table(&ks, &etas)?;
        let ln_k: Vec<f64> = ks.iter().map(|k| k.ln()).collect();
        let nc = chi.len();
        let mut psi = Vec::with_capacity(nc);
        let mut dpsi = Vec::with_capacity(nc);
        let mut emt = Vec::with_capacity(nc);
        for (ic, &c) in chi.iter().enumerate() {
            let ie = nc - 1 - ic;
            let row = |v: &[f64]| v[ie * n_k..(ie + 1) * n_k].to_vec();
            psi.push(CubicSpline::new(ln_k.clone(), row(&table.psi)));
            dpsi.push(CubicSpline::new(ln_k.clone(), row(&table.dpsi)));
            emt.push(th.exp_minus_tau_eta(eta0 - c));
        }
        let f = chi
            .iter()
            .map(|&c| -2.0 * (chi_star - c) / (chi_star * c))
            .collect();
        Ok(Self {
            chi,
            w,
            f,
            emt,
            psi,
            dpsi,
            ln_k_min: ln_k[0],
            ln_k_max: ln_k[n_k - 1],
            prim: Primordial::new(cosmo),
        })
    }

    /// (Psi_W, dPsi_W/d eta) at chi node `i` and wavenumber k: constant below the grid
    /// (super-horizon), zero above it (the truncation is measured by the tests).
    fn at(&self, i: usize, k: f64) -> (f64, f64) {
        let x = k.ln();
        if x > self.ln_k_max {
            return (0.0, 0.0);
        }
        let x = x.max(self.ln_k_min);
        (self.psi[i].eval(x), self.dpsi[i].eval(x))
    }

    /// Delta^phi_L(k) for L = 0..=lmax at each k (L-major rows: [ik * (lmax + 1) + L]).
    pub fn phi_transfer(&self, ks: &[f64], lmax: usize) -> Vec<f64> {
        let n = lmax + 1;
        let mut out = vec![0.0; ks.len() * n];
        out.par_chunks_mut(n).zip(ks).for_each(|(row, &k)| {
            let mut j = vec![0.0; n];
            for i in 0..self.chi.len() {
                let (p, _) = self.at(i, k);
                let a = self.w[i] * self.f[i] * p;
                if a == 0.0 {
                    continue;
                }
                sph_bessel_all_l(lmax as u32, k * self.chi[i], &mut j);
                for (o, &jl) in row.iter_mut().zip(&j) {
                    *o += a * jl;
                }
            }
        });
        out
    }

    /// C_L^{phi phi} by the full line-of-sight integral for L = 0..=lmax.
    pub fn pp_los(&self, lmax: usize) -> Vec<f64> {
        let (ks, wk) = los_k_grid();
        let n = lmax + 1;
        let d = self.phi_transfer(&ks, lmax);
        let mut c = vec![0.0; n];
        for (ik, (&k, &w)) in ks.iter().zip(&wk).enumerate() {
            let a = 2.0 / std::f64::consts::PI * w * k * k * self.prim.p_phi(k);
            for (l, cl) in c.iter_mut().enumerate() {
                let v = d[ik * n + l];
                *cl += a * v * v;
            }
        }
        c
    }

    /// C_L^{phi phi} (Limber) at one L.
    pub fn pp_limber(&self, l: usize) -> f64 {
        let nu = l as f64 + 0.5;
        (0..self.chi.len())
            .map(|i| {
                let c = self.chi[i];
                let k = nu / c;
                let (p, _) = self.at(i, k);
                self.w[i] * self.f[i] * self.f[i] * p * p * self.prim.p_phi(k) / (c * c)
            })
            .sum()
    }

    /// C_L^{T phi} (Limber, integrated Sachs-Wolfe part of T) at one L.
    pub fn tp_limber(&self, l: usize) -> f64 {
        let nu = l as f64 + 0.5;
        (0..self.chi.len())
            .map(|i| {
                let c = self.chi[i];
                let k = nu / c;
                let (p, dp) = self.at(i, k);
                self.w[i] * 2.0 * self.emt[i] * dp * self.f[i] * p * self.prim.p_phi(k) / (c * c)
            })
            .sum()
    }

    /// C_L^{T phi} by the full line of sight for L = 0..=lmax (lmax <= the table's), with
    /// the temperature transfer functions of `table` on its own k grid (k <= 0.3 /Mpc).
    pub fn tp_los(&self, table: &TransferTable, lmax: usize) -> Vec<f64> {
        let lmax = lmax.min(table.lmax());
        let n = lmax + 1;
        let ft = table.field_index(Field::T).expect("table holds T");
        let nk = table.k().partition_point(|&k| k <= LOS_K_MAX);
        let d = self.phi_transfer(&table.k()[..nk], lmax);
        let mut c = vec![0.0; n];
        for (ik, (&k, &w)) in table.k()[..nk].iter().zip(table.weights()).enumerate() {
            let a = 2.0 / std::f64::consts::PI * w * k * k * self.prim.p_phi(k);
            let t = table.row(ft, ik);
            for (l, cl) in c.iter_mut().enumerate() {
                *cl += a * t[l] * d[ik * n + l];
            }
        }
        c
    }

    /// Both spectra to `lmax`: line of sight to [`L_LOS`] (T phi on `table`'s k grid),
    /// Limber above.
    pub fn spectra(&self, table: &TransferTable, lmax: usize) -> LensingSpectra {
        let l_los = L_LOS.min(lmax);
        let mut pp = self.pp_los(l_los);
        let mut tp = self.tp_los(table, l_los);
        tp.resize(l_los + 1, 0.0);
        for l in l_los + 1..=lmax {
            pp.push(self.pp_limber(l));
            tp.push(self.tp_limber(l));
        }
        for v in [&mut pp, &mut tp] {
            for x in v.iter_mut().take(2) {
                *x = 0.0;
            }
        }
        LensingSpectra { pp, tp }
    }
}

/// Largest k of the line-of-sight integrals, 1/Mpc: for L <= L_LOS beyond it only
/// chi < L_LOS / k = 330 Mpc contributes, where the lensing kernel is negligible.
const LOS_K_MAX: f64 = 0.3;

/// The k grid of the line-of-sight phi phi integral and its trapezoid weights: log-spaced
/// from 1e-5 to 1e-3 /Mpc, then 1e-4 apart to 0.1 /Mpc and 5e-4 apart to LOS_K_MAX.
fn los_k_grid() -> (Vec<f64>, Vec<f64>) {
    let mut k: Vec<f64> = (0..40)
        .map(|i| 1e-5 * 100f64.powf(i as f64 / 40.0))
        .collect();
    let mut x = 1e-3;
    while x < 0.1 {
        k.push(x);
        x += 1e-4;
    }
    while x <= LOS_K_MAX {
        k.push(x);
        x += 5e-4;
    }
    let n = k.len();
    let mut w = vec![0.0; n];
    for i in 0..n - 1 {
        let h = 0.5 * (k[i + 1] - k[i]);
        w[i] += h;
        w[i + 1] += h;
    }
    (k, w)
}
