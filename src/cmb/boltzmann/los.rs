//! The line-of-sight projection (Seljak & Zaldarriaga 1996, ApJ 469, 437,
//! astro-ph/9603033; polarization: Zaldarriaga & Seljak 1997, PRD 55, 1830):
//!
//! ```text
//! Delta^T_l(k) = Int d eta [ S0 j_l(x) + S1 j_l'(x) + S2 (j_l(x) + 3 j_l''(x)) / 2 ]
//! Delta^E_l(k) = sqrt((l+2)! / (l-2)!) Int d eta SE j_l(x) / x^2,     x = k (eta_0 - eta)
//! ```
//!
//! with j_l' = (l/x) j_l - j_{l+1} and j_l'' from the Bessel equation, so that
//! (j_l + 3 j_l'')/2 = (3 l (l-1) / (2 x^2) - 1) j_l + (3/x) j_{l+1}. Two routes:
//!
//! - every l: at each (k, eta) node all j_l(x) for l <= l_cut(x) by recurrences, with
//!   l_cut(x) = x + 6.5 x^(1/3) + 10, beyond which j_l(x) < ~1e-6 of its maximum (Airy
//!   decay past the turning point): upward from the exact j_0, j_1 below the turning
//!   point, downward ratios above it (the scheme of [`sph_bessel_all_l`]). Eight nodes run
//!   side by side, fused with the accumulation into the rows (module `bessel_sum`), so no
//!   table of j_l is written;
//! - sampled l: j_l and j_{l+1} of each sampled l from quintic Hermite tables on a uniform
//!   x grid (values and first two derivatives at the nodes).

use rayon::prelude::*;

use super::bessel_sum::{LANES, Lanes};
use super::grids::{Nodes, Plan, taper};
use super::modes::SourceTable;
use crate::special::sph_bessel_all_l;

pub(crate) use crate::special::bessel::l_cut;

/// Per-worker scratch of the every-l projection.
struct Scratch {
    buf: Vec<f64>,
    acc_t: Vec<f64>,
    acc_e: Vec<f64>,
    rat: Vec<f64>,
}

/// What the projection of one k needs.
pub(crate) struct Projection<'a> {
    pub src: &'a SourceTable,
    pub nodes: &'a Nodes,
    pub plan: &'a Plan,
    pub eta0: f64,
}

impl Projection<'_> {
    /// Sources (with quadrature weights and tapers folded in) at the nodes that k uses;
    /// returns how many.
    fn weighted_sources(&self, k: f64, buf: &mut [f64]) -> usize {
        let n = self.nodes.needed(k, self.plan, 0.0);
        self.src.eval_into(k, n, buf);
        let te = taper(k, self.plan.k_cut_early);
        let tl = taper(k, self.plan.k_cut_late);
        for i in 0..n {
            let w = self.nodes.w[i]
                * if i < self.nodes.n_rec {
                    1.0
                } else if i < self.nodes.n_early {
                    te
                } else {
                    tl
                };
            for s in 0..4 {
                buf[4 * i + s] *= w;
            }
        }
        n
    }

    /// Delta^T_l(k) and Delta^E_l(k) for every l in 0..=lmax on the grid `ks`, k-major.
    pub fn every_l(&self, ks: &[f64], lmax: usize, parallel: bool) -> (Vec<f64>, Vec<f64>) {
        let nl = lmax + 1;
        let mut t = vec![0.0; ks.len() * nl];
        let mut e = vec![0.0; ks.len() * nl];
        let enorm: Vec<f64> = (0..nl)
            .map(|l| {
                let l = l as f64;
                if l < 2.0 {
                    0.0
                } else {
                    ((l + 2.0) * (l + 1.0) * l * (l - 1.0)).sqrt()
                }
            })
            .collect();
        let nn = self.nodes.len();
        let init = || Scratch {
            buf: vec![0.0; 4 * nn],
            acc_t: vec![0.0; nl * LANES],
            acc_e: vec![0.0; nl * LANES],
            rat: vec![0.0; 2 * (nl + 1) * LANES],
        };
        let one = |s: &mut Scratch, (ik, (tr, er)): (usize, (&mut [f64], &mut [f64]))| {
            let k = ks[ik];
            let n = self.weighted_sources(k, &mut s.buf);
            s.acc_t.fill(0.0);
            s.acc_e.fill(0.0);
            let mut lanes = Lanes::default();
            for i in 0..n {
                let x = k * (self.eta0 - self.nodes.eta[i]);
                if x <= 1e-8 {
                    continue;
                }
                let b = &s.buf[4 * i..4 * i + 4];
                let [s0, s1, s2, se] = [b[0], b[1], b[2], b[3]];
                let ix = 1.0 / x;
                let coef = [
                    s0 - s2,
                    s1 * ix,
                    1.5 * s2 * ix * ix,
                    -s1 + 3.0 * s2 * ix,
                    se * ix * ix,
                ];
                if lanes.push(x, coef) {
                    lanes.run(lmax, &mut s.acc_t, &mut s.acc_e, &mut s.rat);
                }
            }
            lanes.run(lmax, &mut s.acc_t, &mut s.acc_e, &mut s.rat);
            for l in 2..nl {
                tr[l] = s.acc_t[l * LANES..(l + 1) * LANES].iter().sum();
                er[l] = s.acc_e[l * LANES..(l + 1) * LANES].iter().sum::<f64>() * enorm[l];
            }
        };
        if parallel {
            // Blocks of consecutive k, each with one scratch (a scratch per rayon job
            // would be allocated, page-faulted and freed thousands of times).
            let block = ks.len().div_ceil(16 * rayon::current_num_threads()).max(1);
            t.par_chunks_mut(nl * block)
                .zip(e.par_chunks_mut(nl * block))
                .enumerate()
                .for_each_init(init, |s, (ib, (tb, eb))| {
                    let rows = tb.chunks_mut(nl).zip(eb.chunks_mut(nl));
                    for (j, r) in rows.enumerate() {
                        one(s, (ib * block + j, r));
                    }
                });
        } else {
            let mut scratch = init();
            for r in t.chunks_mut(nl).zip(e.chunks_mut(nl)).enumerate() {
                one(&mut scratch, r);
            }
        }
        (t, e)
    }

    /// Delta^T_l(k), Delta^E_l(k) at the sampled multipoles `ls` only, l-major:
    /// [il * nk + ik].
    pub fn sampled(&self, ks: &[f64], ls: &[usize], parallel: bool) -> (Vec<f64>, Vec<f64>) {
        let x_max = ks.last().copied().unwrap_or(0.0) * (self.eta0 - self.nodes.eta[0]) + 1.0;
        let tables = PairTables::new(ls, x_max, self.plan.bessel_h);
        let nl = ls.len();
        let nk = ks.len();
        let nn = self.nodes.len();
        let per_k = |buf: &mut Vec<f64>, ik: usize| -> Vec<(f64, f64)> {
            let k = ks[ik];
            let n = self.weighted_sources(k, buf);
            let mut acc = vec![(0.0, 0.0); nl];
            // l outer, nodes inner: each l's table is then read over a short x range,
            // which stays in cache.
            for (il, &l) in ls.iter().enumerate() {
                let lf = l as f64;
                let (mut at, mut ae) = (0.0, 0.0);
                for i in 0..n {
                    let x = k * (self.eta0 - self.nodes.eta[i]);
                    if x <= 1e-8 {
                        continue;
                    }
                    let Some((j, j1)) = tables.eval(il, x) else {
                        continue;
                    };
                    let [s0, s1, s2, se] =
                        [buf[4 * i], buf[4 * i + 1], buf[4 * i + 2], buf[4 * i + 3]];
                    let ix = 1.0 / x;
                    at += j * (s0 - s2 + lf * s1 * ix + 1.5 * lf * (lf - 1.0) * s2 * ix * ix)
                        + j1 * (-s1 + 3.0 * s2 * ix);
                    ae += j * se * ix * ix;
                }
                acc[il] = (at, ae);
            }
            acc
        };
        let rows: Vec<Vec<(f64, f64)>> = if parallel {
            (0..nk)
                .into_par_iter()
                .with_max_len(4)
                .map_init(|| vec![0.0; 4 * nn], per_k)
                .collect()
        } else {
            let mut buf = vec![0.0; 4 * nn];
            (0..nk).map(|ik| per_k(&mut buf, ik)).collect()
        };
        let mut t = vec![0.0; nl * nk];
        let mut e = vec![0.0; nl * nk];
        for (ik, row) in rows.iter().enumerate() {
            for (il, &(a, b)) in row.iter().enumerate() {
                let l = ls[il] as f64;
                t[il * nk + ik] = a;
                e[il * nk + ik] = b * ((l + 2.0) * (l + 1.0) * l * (l - 1.0)).sqrt();
            }
        }
        (t, e)
    }
}

/// Quintic Hermite tables of j_l and j_{l+1} for a set of l on a uniform x grid, each
/// starting where j_l becomes non-negligible.
struct PairTables {
    inv_h: f64,
    /// First node index per l.
    start: Vec<usize>,
    /// Per l: nodes of (j_l, h j_l', h^2 j_l'', j_l+1, h j_l+1', h^2 j_l+1'').
    data: Vec<Vec<[f64; 6]>>,
}

impl PairTables {
    fn new(ls: &[usize], x_max: f64, h: f64) -> Self {
        let lmax = ls.iter().copied().max().unwrap_or(2) + 2;
        let n = (x_max / h).ceil() as usize + 2;
        // First node where j_l is non-negligible: below the turning point by the same
        // margin as l_cut.
        let start: Vec<usize> = ls
            .iter()
            .map(|&l| {
                let lf = l as f64;
                let x_lo = (lf - 6.5 * lf.cbrt() - 10.0).max(0.0);
                (x_lo / h).floor() as usize
            })
            .collect();
        let mut data: Vec<Vec<[f64; 6]>> = start
            .iter()
            .map(|&s| Vec::with_capacity(n.saturating_sub(s)))
            .collect();
        let mut jl = vec![0.0; lmax + 1];
        // x = 0: j_l(0) = 0 for l >= 2, j_l'(0) = 0, j_2''(0) = 2/15.
        for (il, &l) in ls.iter().enumerate() {
            if start[il] == 0 {
                let c = if l == 2 { 2.0 / 15.0 * h * h } else { 0.0 };
                data[il].push([0.0, 0.0, c, 0.0, 0.0, 0.0]);
            }
        }
        for i in 1..n {
            let x = i as f64 * h;
            let lc = l_cut(x).clamp(2, lmax);
            sph_bessel_all_l(lc as u32, x, &mut jl[..=lc]);
            jl[lc + 1..].fill(0.0);
            for (il, &l) in ls.iter().enumerate() {
                if i < start[il] {
                    continue;
                }
                let d = |l: usize| {
                    let lf = l as f64;
                    let j = jl[l];
                    let jp = lf / x * j - jl[l + 1];
                    let jpp = -2.0 / x * jp + (lf * (lf + 1.0) / (x * x) - 1.0) * j;
                    (j, h * jp, h * h * jpp)
                };
                let (a, b, c) = d(l);
                let (p, q, r) = d(l + 1);
                data[il].push([a, b, c, p, q, r]);
            }
        }
        Self {
            inv_h: 1.0 / h,
            start,
            data,
        }
    }

    /// (j_l(x), j_{l+1}(x)) for the il-th l, or None where j_l is negligible.
    #[inline]
    fn eval(&self, il: usize, x: f64) -> Option<(f64, f64)> {
        let u = x * self.inv_h;
        let s = self.start[il] as f64;
        if u < s {
            return None;
        }
        let d = &self.data[il];
        let rel = u - s;
        let i = (rel as usize).min(d.len().saturating_sub(2));
        let t = rel - i as f64;
        let (p0, p1) = (&d[i], &d[i + 1]);
        let [h0, h1, h2, h5, h4, h3] = crate::numerics::quintic_hermite_weights(t);
        let v = |o: usize| {
            p0[o] * h0
                + p0[o + 1] * h1
                + p0[o + 2] * h2
                + p1[o] * h5
                + p1[o + 1] * h4
                + p1[o + 2] * h3
        };
        Some((v(0), v(3)))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn l_cut_bounds_the_bessel_function() {
        // Beyond l_cut(x), |j_l(x)| is below 1e-6 of its largest value over l.
        for &x in &[5.0, 80.0, 900.0, 4000.0] {
            let lc = l_cut(x);
            let mut jl = vec![0.0; lc + 40];
            sph_bessel_all_l(lc as u32 + 39, x, &mut jl);
            let peak = jl.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
            for &v in &jl[lc..] {
                assert!(v.abs() < 1e-6 * peak, "x={x}");
            }
        }
    }
}
