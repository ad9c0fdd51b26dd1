//! The power-spectrum Fisher integrand of one bin (multi-tracer).
//!
//! C_ab(k, mu) = K_a K_b D^2 P_lin(k) + delta_ab / nbar_a, K_a = b1_a + Delta b_a(k) +
//! f mu^2 (Kaiser 1987), D = exp[-k^2 mu^2 sigma^2 / 2];
//! F_ij = V / (8 pi^2) Integral_{-1}^{1} d mu Integral k^2 dk Tr[C^-1 d_i C C^-1 d_j C]
//! (Tegmark 1997; multi-tracer as in Seljak 2009, McDonald & Seljak 2009), the continuous
//! form, on Gauss-Legendre panels with an edge at every k_max. With the theoretical error
//! the mode amplitudes of [`crate::survey::covariance`] enter as d C = u_a(k) E_P(k)
//! C_signal(k, mu) and their projections are accumulated beside F.

use rayon::prelude::*;

use crate::cosmology::LinearPower;
use crate::numerics::GaussLegendre;
use crate::survey::covariance::{ErrorModes, Pieces, TheoryError};
use crate::survey::layout::Layout;
use crate::survey::linalg::{MAX_TRACERS, Small, invert_small, matmul_small, trace_prod};
use crate::survey::response::{ShapeInput, TracerResponse};

/// One tracer's fiducial values for P.
#[derive(Debug, Clone, Copy)]
pub struct PowerTracer {
    /// Linear bias.
    pub b1: f64,
    /// 1 / nbar, Mpc^3.
    pub inv_n: f64,
}

/// Everything the P integrand of one bin needs.
pub struct PowerBin<'a> {
    /// Redshift.
    pub z: f64,
    /// Growth rate (0 in real space).
    pub f: f64,
    /// Damping sigma^2, Mpc^2.
    pub damp2: f64,
    /// Volume, Mpc^3.
    pub volume: f64,
    /// k_min, 1/Mpc.
    pub kmin: f64,
    /// Tracers.
    pub tracers: &'a [PowerTracer],
    /// Their responses.
    pub responses: &'a [TracerResponse],
    /// Parameter layout.
    pub lay: Layout,
    /// Shapes.
    pub shapes: &'a [ShapeInput],
    /// Linear power.
    pub power: &'a LinearPower,
    /// Theoretical error (envelope, modes), when the covariance is realistic.
    pub theory: Option<(&'a TheoryError, &'a ErrorModes)>,
    /// Gauss-Legendre nodes per k panel, panels per decade, mu nodes on [0, 1].
    pub nodes: (usize, usize, usize),
    /// Run panels in parallel.
    pub parallel: bool,
}

impl PowerBin<'_> {
    /// The P Fisher pieces per k_max slot (slot s holds the panels that end in
    /// (kmax_used[s-1], kmax_used[s]]); the caller sums them cumulatively.
    pub fn slots(&self, kmax_used: &[f64], kmax_top: f64) -> Vec<Pieces> {
        let n = self.lay.n();
        let r = self.theory.map_or(0, |(_, m)| m.len());
        let nt = self.tracers.len();
        let (k_nodes, per_decade, mu_nodes) = self.nodes;
        let decades = (kmax_top / self.kmin).log10().max(1e-6);
        let n_panels = ((decades * per_decade as f64).ceil() as usize).max(4);
        let mut edges: Vec<f64> = crate::numerics::log_grid(self.kmin, kmax_top, n_panels + 1);
        for &k in kmax_used {
            if k > self.kmin && k < kmax_top {
                edges.push(k);
            }
        }
        edges.sort_by(f64::total_cmp);
        edges.dedup_by(|a, b| (*a - *b).abs() <= 1e-12 * b.abs());
        let glk = GaussLegendre::new(k_nodes);
        let glm = GaussLegendre::new(mu_nodes);
        let (mu_x, mu_w) = glm.mapped(0.0, 1.0);
        let d0 = self.power.growth().d_norm0(self.z);
        let panel = |ip: usize| -> Pieces {
            let mut acc = Pieces::zeros(n, r);
            let (ks, kw) = glk.mapped(edges[ip], edges[ip + 1]);
            let mut dc = vec![[0.0f64; MAX_TRACERS * MAX_TRACERS]; n];
            let mut mats = vec![[0.0f64; MAX_TRACERS * MAX_TRACERS]; n];
            let mut active: Vec<usize> = Vec::with_capacity(n);
            let mut dbs = vec![[0.0f64; MAX_TRACERS]; self.shapes.len()];
            let mut v = vec![0.0; n];
            let mut modes: Vec<(usize, f64)> = Vec::new();
            for (&k, &wk) in ks.iter().zip(&kw) {
                let plin = self.power.p_mpc(k, self.z);
                let mk = self.power.m_factor(k, self.z);
                for (is, s) in self.shapes.iter().enumerate() {
                    for (t, resp) in self.responses.iter().enumerate() {
                        dbs[is][t] = resp.b_phi * resp.alpha(s, is, k, mk);
                    }
                }
                let eps = self
                    .theory
                    .map_or(0.0, |(te, _)| te.amp_p * te.relative(k, d0));
                v.iter_mut().for_each(|x| *x = 0.0);
                let mut e = 0.0;
                for (&mu, &wm) in mu_x.iter().zip(&mu_w) {
                    let mu2 = mu * mu;
                    let d2 = (-k * k * mu2 * self.damp2).exp();
                    let mut kk = [0.0f64; MAX_TRACERS];
                    for (x, t) in kk.iter_mut().zip(self.tracers) {
                        *x = t.b1 + self.f * mu2;
                    }
                    let mut c: Small = [0.0; MAX_TRACERS * MAX_TRACERS];
                    let mut csig: Small = [0.0; MAX_TRACERS * MAX_TRACERS];
                    for a in 0..nt {
                        for b in 0..nt {
                            csig[a * nt + b] = kk[a] * kk[b] * d2 * plin;
                            c[a * nt + b] =
                                csig[a * nt + b] + if a == b { self.tracers[a].inv_n } else { 0.0 };
                        }
                    }
                    let ci = invert_small(&c, nt);
                    for m in dc.iter_mut() {
                        m.iter_mut().for_each(|x| *x = 0.0);
                    }
                    for (s, db) in dbs.iter().enumerate() {
                        for a in 0..nt {
                            for b in 0..nt {
                                dc[s][a * nt + b] = (db[a] * kk[b] + kk[a] * db[b]) * d2 * plin;
                            }
                        }
                    }
                    for t in 0..nt {
                        let ib = self.lay.b1(t);
                        for a in 0..nt {
                            for b in 0..nt {
                                let da = if a == t { kk[b] } else { 0.0 }
                                    + if b == t { kk[a] } else { 0.0 };
                                dc[ib][a * nt + b] = da * d2 * plin;
                            }
                        }
                        dc[self.lay.pshot(t)][t * nt + t] = self.tracers[t].inv_n;
                    }
                    active.clear();
                    active.extend((0..n).filter(|&i| dc[i].iter().any(|&x| x != 0.0)));
                    for (ai, &i) in active.iter().enumerate() {
                        mats[ai] = matmul_small(&ci, &dc[i], nt);
                    }
                    let w = wk * wm * 2.0 * self.volume * k * k
                        / (8.0 * std::f64::consts::PI * std::f64::consts::PI);
                    for (ai, &i) in active.iter().enumerate() {
                        for (aj, &j) in active.iter().enumerate().skip(ai) {
                            let tr = trace_prod(&mats[ai], &mats[aj], nt);
                            acc.f[i * n + j] += w * tr;
                            if i != j {
                                acc.f[j * n + i] += w * tr;
                            }
                        }
                    }
                    if r > 0 {
                        let ms = matmul_small(&ci, &csig, nt);
                        for (ai, &i) in active.iter().enumerate() {
                            v[i] += w * eps * trace_prod(&ms, &mats[ai], nt);
                        }
                        e += w * eps * eps * trace_prod(&ms, &ms, nt);
                    }
                }
                if let Some((_, m)) = self.theory {
                    modes.clear();
                    m.for_each(k, |a, u| modes.push((a, u)));
                    acc.add_modes(&modes, &v, e);
                }
            }
            acc
        };
        let per_panel: Vec<Pieces> = if self.parallel {
            (0..edges.len() - 1).into_par_iter().map(panel).collect()
        } else {
            (0..edges.len() - 1).map(panel).collect()
        };
        let mut out = vec![Pieces::zeros(n, r); kmax_used.len()];
        for (ip, p) in per_panel.iter().enumerate() {
            if let Some(s) = slot_of(kmax_used, edges[ip + 1]) {
                out[s].add(p);
            }
        }
        out
    }
}

/// The first k_max slot that includes a contribution ending at `k` (None: beyond all).
pub fn slot_of(kmax_used: &[f64], k: f64) -> Option<usize> {
    kmax_used.iter().position(|&km| k <= km * (1.0 + 1e-12))
}
