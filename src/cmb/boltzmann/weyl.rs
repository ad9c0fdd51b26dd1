//! The Weyl potential Psi_W(k, eta) = (phi + psi) / 2 on a grid of modes and conformal
//! times: the source of the CMB lensing potential (src/cmb/lensing/potential.rs). Each
//! mode is integrated through the same phases as the line-of-sight modes (tight
//! coupling, full hierarchies, radiation streaming); the potential is read off the
//! synchronous-gauge state through the Newtonian-gauge combination eta + alpha' (see
//! `Mode::weyl`), at the requested times, without interpolation in time.

use rayon::prelude::*;

use super::BoltzmannSolver;
use super::modes::{Workspace, integrate_mode};
use crate::error::{Error, Location, Result};

/// (Psi_W, dPsi_W / d eta) at one time.
type Pair = (f64, f64);

/// Psi_W and its conformal-time derivative on (eta, k), per unit primordial Phi.
#[derive(Debug, Clone, PartialEq)]
pub struct WeylTable {
    /// Wavenumbers, 1/Mpc, increasing.
    pub k: Vec<f64>,
    /// Conformal times, Mpc, increasing.
    pub eta: Vec<f64>,
    /// Psi_W at [i_eta * nk + i_k].
    pub psi: Vec<f64>,
    /// d Psi_W / d eta (1/Mpc), same layout.
    pub dpsi: Vec<f64>,
}

impl BoltzmannSolver {
    /// Integrates one mode per `k` (increasing, 1/Mpc) and records the Weyl potential at
    /// the conformal times `eta` (increasing, inside (0, eta_0], Mpc).
    ///
    /// # Errors
    /// [`Error::OutOfRange`] for unsorted or out-of-range grids; [`Error::Numerical`] if a
    /// mode integration fails.
    pub fn weyl_table(&self, k: &[f64], eta: &[f64]) -> Result<WeylTable> {
        let eta0 = self.timeline.eta0();
        let sorted = |v: &[f64]| v.windows(2).all(|w| w[0] < w[1]);
        if k.is_empty() || !sorted(k) || k[0] <= 0.0 {
            return Err(Error::out_of_range(
                Location::Builtin,
                "weyl k grid",
                k.first().copied().unwrap_or(f64::NAN),
                "non-empty, increasing, positive",
            ));
        }
        if eta.is_empty()
            || !sorted(eta)
            || eta[0] <= 0.0
            || eta[eta.len() - 1] > eta0 * (1.0 + 1e-12)
        {
            return Err(Error::out_of_range(
                Location::Builtin,
                "weyl eta grid",
                eta.first().copied().unwrap_or(f64::NAN),
                "non-empty, increasing, inside (0, eta_0]",
            ));
        }
        let t_out: Vec<f64> = eta.iter().map(|&e| e.min(eta0)).collect();
        let (nk, ne) = (k.len(), eta.len());
        let job = |ws: &mut Workspace, kk: f64| -> Result<Vec<Pair>> {
            let mut out = vec![(0.0, 0.0); ne];
            integrate_mode(
                kk,
                &self.timeline,
                &self.nodes,
                &t_out,
                &self.plan,
                self.lay,
                self.f_b,
                ws,
                |mode, phase, i, t, y, dy| out[i] = mode.weyl(phase, t, y, dy),
            )?;
            Ok(out)
        };
        let order: Vec<usize> = (0..nk).rev().collect();
        let lay = self.lay;
        let results: Vec<(usize, Result<Vec<Pair>>)> = if self.settings.parallel {
            order
                .par_iter()
                .with_max_len(1)
                .map_init(|| Workspace::new(lay), |ws, &i| (i, job(ws, k[i])))
                .collect()
        } else {
            let mut ws = Workspace::new(lay);
            order.iter().map(|&i| (i, job(&mut ws, k[i]))).collect()
        };
        let mut psi = vec![0.0; nk * ne];
        let mut dpsi = vec![0.0; nk * ne];
        for (ik, r) in results {
            for (ie, (p, d)) in r?.into_iter().enumerate() {
                psi[ie * nk + ik] = p;
                dpsi[ie * nk + ik] = d;
            }
        }
        Ok(WeylTable {
            k: k.to_vec(),
            eta: eta.to_vec(),
            psi,
            dpsi,
        })
    }
}
