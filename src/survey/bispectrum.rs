//! The bispectrum Fisher sum of one redshift bin: the kernels of
//! [`crate::survey::kernels`] averaged over orientations and summed over the triangle
//! quadrature of [`crate::survey::triangles`], under the covariance model of
//! [`crate::survey::covariance`].
//!
//! With the realistic covariance three things are accumulated besides the Gaussian
//! Fisher matrix:
//! - the theoretical-error projections (mode amplitudes of the envelope, Woodbury);
//! - the whitened bispectrum d B - B_fid Sum_i d ln P_t(k_i, mu_i), which carries the
//!   leading P-B cross-covariance exactly when P and B are combined;
//! - for B alone, the same cross-covariance means that a bispectrum estimate responds to
//!   the measured fluctuation eps = delta P_0 / P_0 of the shell-averaged power P_0(k) =
//!   <P_t(k, mu)>_mu at its sides (the monopole form of the cross-covariance). The eps of
//!   each k cell (the triangle bin dk, or wider when there would be more than 400 cells)
//!   is a nuisance with prior variance 2 <P_t^2> / (N_cell P_0^2), and all are
//!   marginalized jointly: F -= Y^T (Lambda + K)^-1 Y, Lambda = diag of the inverse prior
//!   variances,
//!   Y_c,i = Sum_T m_c B d_i B / Var B, K_cc' = Sum_T m_c m_c' B^2 / Var B (m_c sides of
//!   the triangle in cell c). The cells coarse-grain the side bins: Cov[P_cell, B] is
//!   exact, the correlation between triangles is that of the cells. The theoretical-error
//!   modes get the same correction.

#![allow(clippy::needless_range_loop)] // index loops over parameters read best here

use rayon::prelude::*;

use crate::cosmology::LinearPower;
use crate::numerics::GaussLegendre;
use crate::survey::covariance::{
    ErrorModes, Pieces, SHAPE_MODES, TheoryError, cholesky_solve, shape_hats,
};
use crate::survey::kernels::{BispectrumModel, BispectrumTracer, Triangle, TriangleTerms};
use crate::survey::layout::Layout;
use crate::survey::power::slot_of;
use crate::survey::response::{ShapeInput, TracerResponse};
use crate::survey::triangles::TriRow;

/// Shell-averaged power derivatives at one k.
struct ShellPower {
    dln: Vec<f64>,
    var_ratio: f64,
}

/// Everything the bispectrum sum of one bin needs.
pub struct BispectrumBin<'a> {
    /// Redshift.
    pub z: f64,
    /// The model (growth rate, damping, terms).
    pub model: BispectrumModel,
    /// The bispectrum tracer.
    pub tracer: BispectrumTracer,
    /// Its non-Gaussian response.
    pub response: &'a TracerResponse,
    /// Parameter layout.
    pub lay: Layout,
    /// Shapes.
    pub shapes: &'a [ShapeInput],
    /// Linear power.
    pub power: &'a LinearPower,
    /// Theoretical error, when the covariance is realistic.
    pub theory: Option<(&'a TheoryError, &'a ErrorModes)>,
    /// Orientation nodes in mu_1 on [0, 1] and in phi.
    pub orient: (usize, usize),
    /// Power-fluctuation cells in k: (k_min, dk, count), and the volume.
    pub cells: (f64, f64, usize, f64),
    /// Run rows in parallel.
    pub parallel: bool,
}

/// What one k_max slot accumulates.
#[derive(Clone)]
struct SlotAcc {
    plain: Pieces,
    white: Pieces,
    /// Per cell: Y (n), Y for the modes (r); K (cells x cells).
    y: Vec<f64>,
    yu: Vec<f64>,
    kc: Vec<f64>,
}

impl SlotAcc {
    fn zeros(n: usize, r: usize, nc: usize, with_cells: bool) -> Self {
        let nc = if with_cells { nc } else { 0 };
        Self {
            plain: Pieces::zeros(n, r),
            white: Pieces::zeros(n, r),
            y: vec![0.0; nc * n],
            yu: vec![0.0; nc * r],
            kc: vec![0.0; nc * nc],
        }
    }
    fn add(&mut self, o: &SlotAcc) {
        self.plain.add(&o.plain);
        self.white.add(&o.white);
        for (v, w) in [
            (&mut self.y, &o.y),
            (&mut self.yu, &o.yu),
            (&mut self.kc, &o.kc),
        ] {
            v.iter_mut().zip(w).for_each(|(a, b)| *a += b);
        }
    }
}

impl BispectrumBin<'_> {
    /// The Fisher matrices (row-major, full layout) per k_max (cumulative): B alone and
    /// the (whitened) B to add to P. `prior_var` is the theoretical-error mode variance.
    pub fn cumulative(
        &self,
        rows: &[TriRow],
        kmax_used: &[f64],
        prior_var: f64,
    ) -> Vec<[Vec<f64>; 2]> {
        let n = self.lay.n();
        let realistic = self.theory.is_some();
        let r = self.theory.map_or(0, |(_, m)| m.len() * SHAPE_MODES);
        let (ck0, cdk, cnk, volume) = self.cells;
        let nc = cnk;
        let ns = kmax_used.len();
        let nchunks = if self.parallel { 8 } else { 1 };
        let chunk = rows.len().div_ceil(nchunks).max(1);
        let run = |rs: &[TriRow]| -> Vec<SlotAcc> {
            let mut slots = vec![SlotAcc::zeros(n, r, nc, realistic); ns];
            for row in rs {
                if let Some(s) = slot_of(kmax_used, row.k_cum) {
                    self.row(row, &mut slots[s]);
                }
            }
            slots
        };
        let parts: Vec<Vec<SlotAcc>> = if self.parallel {
            rows.par_chunks(chunk).map(run).collect()
        } else {
            rows.chunks(chunk).map(run).collect()
        };
        let mut slots = vec![SlotAcc::zeros(n, r, nc, realistic); ns];
        for p in &parts {
            for (a, b) in slots.iter_mut().zip(p) {
                a.add(b);
            }
        }
        let mut cum = SlotAcc::zeros(n, r, nc, realistic);
        slots
            .iter()
            .map(|s| {
                cum.add(s);
                if !realistic {
                    let f = cum.plain.fisher(prior_var, false);
                    return [f.clone(), f];
                }
                // Marginalize the power-fluctuation cells out of B alone.
                let mut alone = cum.plain.clone();
                let mut m = cum.kc.clone();
                let mut sp = ShellPower {
                    dln: vec![0.0; n],
                    var_ratio: 1.0,
                };
                for c in 0..nc {
                    let kk = ck0 + (c as f64 + 0.5) * cdk;
                    let n_modes = volume * kk * kk * cdk
                        / (2.0 * std::f64::consts::PI * std::f64::consts::PI);
                    let (pk, mk) = (
                        self.power.p_mpc(kk, self.z),
                        self.power.m_factor(kk, self.z),
                    );
                    self.shell_power(kk, pk, mk, &mut sp);
                    m[c * nc + c] += 0.5 * n_modes / sp.var_ratio;
                }
                let w = n + r;
                let mut rhs = vec![0.0; nc * w];
                for c in 0..nc {
                    rhs[c * w..c * w + n].copy_from_slice(&cum.y[c * n..(c + 1) * n]);
                    rhs[c * w + n..(c + 1) * w].copy_from_slice(&cum.yu[c * r..(c + 1) * r]);
                }
                let x = cholesky_solve(&m, nc, &rhs, w);
                for c in 0..nc {
                    let (ry, rx) = (&rhs[c * w..(c + 1) * w], &x[c * w..(c + 1) * w]);
                    for i in 0..n {
                        if ry[i] == 0.0 {
                            continue;
                        }
                        for j in 0..n {
                            alone.f[i * n + j] -= ry[i] * rx[j];
                        }
                    }
                    for a in 0..r {
                        let ya = ry[n + a];
                        if ya == 0.0 {
                            continue;
                        }
                        for j in 0..n {
                            alone.a[a * n + j] -= ya * rx[j];
                        }
                        for b in 0..r {
                            alone.s[a * r + b] -= ya * rx[n + b];
                        }
                    }
                }
                [
                    alone.fisher(prior_var, true),
                    cum.white.fisher(prior_var, true),
                ]
            })
            .collect()
    }

    /// The shell-averaged power of the bispectrum tracer at k, P_0 = <P_t(k, mu)>_mu:
    /// d ln P_0 / d theta (layout) and <P_t^2> / P_0^2 (so that Var[delta P_0 / P_0] =
    /// 2 <P_t^2> / (N_k P_0^2)).
    fn shell_power(&self, k: f64, p: f64, m: f64, out: &mut ShellPower) {
        let (xs, ws) = GaussLegendre::new(8).mapped(0.0, 1.0);
        let t = &self.tracer;
        let f = self.model.f;
        out.dln.iter_mut().for_each(|x| *x = 0.0);
        let (mut p0, mut p2) = (0.0, 0.0);
        for (&mu, &w) in xs.iter().zip(&ws) {
            let z1 = t.b1 + f * mu * mu;
            let d2 = (-k * k * mu * mu * self.model.damp2).exp();
            let pt = z1 * z1 * d2 * p + t.inv_n;
            p0 += w * pt;
            p2 += w * pt * pt;
            out.dln[self.lay.b1(0)] += w * 2.0 * z1 * d2 * p;
            out.dln[self.lay.pshot(0)] += w * t.inv_n;
            for (is, s) in self.shapes.iter().enumerate() {
                let db = t.bphi * self.response.alpha(s, is, k, m);
                out.dln[is] += w * 2.0 * z1 * db * d2 * p;
            }
        }
        out.dln.iter_mut().for_each(|x| *x /= p0);
        out.var_ratio = p2 / (p0 * p0);
    }

    /// The cell of a side.
    fn cell(&self, k: f64) -> Option<usize> {
        let (ck0, cdk, cnk, _) = self.cells;
        let ik = ((k - ck0) / cdk).floor();
        if ik < 0.0 || ik as usize >= cnk {
            return None;
        }
        Some(ik as usize)
    }

    fn row(&self, row: &TriRow, acc: &mut SlotAcc) {
        let n = self.lay.n();
        let r = acc.plain.r;
        let (n_mu, nphi) = self.orient;
        let (mu_x, mu_w) = GaussLegendre::new(n_mu).mapped(0.0, 1.0);
        let phis: Vec<f64> = (0..nphi)
            .map(|ip| 2.0 * std::f64::consts::PI * (ip as f64 + 0.5) / nphi as f64)
            .collect();
        let d0 = self.power.growth().d_norm0(self.z);
        let ns = self.shapes.len();
        let mut g = vec![0.0; n];
        let mut gx = vec![0.0; n];
        let mut qsum = vec![0.0; n];
        let mut qside = ShellPower {
            dln: vec![0.0; n],
            var_ratio: 1.0,
        };
        let mut fsum = vec![0.0; n * n];
        let mut xsum = vec![0.0; n * n];
        let mut v = vec![0.0; n];
        let mut vx = vec![0.0; n];
        let mut bprim = vec![0.0; ns];
        let mut alpha = vec![[0.0; 3]; ns];
        let mut umodes: Vec<(usize, f64)> = Vec::new();
        for pt in &row.points {
            let [k1, k2, k3] = pt.k;
            let tri = Triangle::new(k1, k2, k3);
            let p = pt.k.map(|k| self.power.p_mpc(k, self.z));
            let m = pt.k.map(|k| self.power.m_factor(k, self.z));
            for (is, s) in self.shapes.iter().enumerate() {
                bprim[is] = s.bispectrum(k1, k2, k3);
                for i in 0..3 {
                    alpha[is][i] = self.response.alpha(s, is, pt.k[i], m[i]);
                }
            }
            let tt = TriangleTerms {
                tri,
                p,
                m,
                bprim: &bprim,
                alpha: &alpha,
            };
            let kt = (k1 + k2 + k3) / 3.0;
            let c = pt.weight;
            if self.theory.is_some() {
                qsum.iter_mut().for_each(|x| *x = 0.0);
                for i in 0..3 {
                    self.shell_power(pt.k[i], p[i], m[i], &mut qside);
                    for a in 0..n {
                        qsum[a] += qside.dln[a];
                    }
                }
            }
            umodes.clear();
            if let Some((_, modes)) = self.theory {
                let hats = shape_hats(k1, k2, k3);
                modes.for_each(kt, |ia, u| {
                    for &(s, hv) in &hats {
                        if hv > 0.0 {
                            umodes.push((ia * SHAPE_MODES + s, u * hv));
                        }
                    }
                });
            }
            let eps = self
                .theory
                .map_or(0.0, |(te, _)| te.amp_b * te.relative(kt, d0));
            fsum.iter_mut().for_each(|x| *x = 0.0);
            xsum.iter_mut().for_each(|x| *x = 0.0);
            v.iter_mut().for_each(|x| *x = 0.0);
            vx.iter_mut().for_each(|x| *x = 0.0);
            let mut e = 0.0;
            for (&mu1, &wm) in mu_x.iter().zip(&mu_w) {
                for &phi in &phis {
                    let mus = tri.mus(mu1, phi);
                    let ov = self
                        .model
                        .gradient(&tt, &mus, &self.tracer, &self.lay, &mut g);
                    let w = wm / nphi as f64 / ov.var;
                    for a in 0..n {
                        if g[a] == 0.0 {
                            continue;
                        }
                        let wa = w * g[a];
                        for b in a..n {
                            fsum[a * n + b] += wa * g[b];
                        }
                    }
                    if self.theory.is_none() {
                        continue;
                    }
                    for a in 0..n {
                        gx[a] = g[a] - ov.b_fid * qsum[a];
                    }
                    for a in 0..n {
                        if gx[a] == 0.0 {
                            continue;
                        }
                        let wa = w * gx[a];
                        for b in a..n {
                            xsum[a * n + b] += wa * gx[b];
                        }
                    }
                    let env = eps * ov.b_grav.abs();
                    for a in 0..n {
                        v[a] += w * env * g[a];
                        vx[a] += w * env * gx[a];
                    }
                    e += w * env * env;
                    // Power-fluctuation cells of the three sides.
                    let cells = [self.cell(k1), self.cell(k2), self.cell(k3)];
                    let wb = c * w * ov.b_fid;
                    let nc = self.cells.2;
                    for cs in &cells {
                        let Some(cc) = *cs else { continue };
                        let y = &mut acc.y[cc * n..(cc + 1) * n];
                        for a in 0..n {
                            y[a] += wb * g[a];
                        }
                        let yu = &mut acc.yu[cc * r..(cc + 1) * r];
                        for &(mi, u) in &umodes {
                            yu[mi] += wb * env * u;
                        }
                        // K: every pair of sides (m_c m_c').
                        for c2 in cells.iter().flatten() {
                            acc.kc[cc * nc + c2] += wb * ov.b_fid;
                        }
                    }
                }
            }
            for (dst, src) in [(&mut acc.plain.f, &fsum), (&mut acc.white.f, &xsum)] {
                for a in 0..n {
                    for b in a..n {
                        let val = src[a * n + b] * c;
                        dst[a * n + b] += val;
                        if a != b {
                            dst[b * n + a] += val;
                        }
                    }
                }
            }
            if self.theory.is_some() {
                v.iter_mut().for_each(|x| *x *= c);
                vx.iter_mut().for_each(|x| *x *= c);
                acc.plain.add_modes(&umodes, &v, e * c);
                acc.white.add_modes(&umodes, &vx, e * c);
            }
        }
    }
}
