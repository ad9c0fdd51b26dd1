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
//! - every l: at each (k, eta) node all j_l(x) for l <= l_cut(x) come from one call of
//!   [`sph_bessel_all_l`] (upward/downward recurrences), with
//!   l_cut(x) = x + 6.5 x^(1/3) + 10, beyond which j_l(x) < ~1e-6 of its maximum (Airy
//!   decay past the turning point). Where x > l_max + 1 every needed l lies below the
//!   turning point, and the upward recurrence from the exact j_0, j_1 (the same that
//!   [`sph_bessel_all_l`] uses there) runs for four nodes side by side, fused with the
//!   accumulation (about 70% of the work at l_max = 3000);
//! - sampled l: j_l and j_{l+1} of each sampled l from quintic Hermite tables on a uniform
//!   x grid (values and first two derivatives at the nodes).

use rayon::prelude::*;

use super::grids::{Nodes, Plan, taper};
use super::modes::SourceTable;
use crate::special::sph_bessel_all_l;

pub(crate) use crate::special::bessel::l_cut;

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
        let lf: Vec<f64> = (0..nl).map(|l| l as f64).collect();
        let ll1: Vec<f64> = (0..nl).map(|l| (l * l.saturating_sub(1)) as f64).collect();
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
        let init = || (vec![0.0; 4 * nn], vec![0.0; nl + 2]);
        let one = |(buf, jl): &mut (Vec<f64>, Vec<f64>),
                   (ik, (tr, er)): (usize, (&mut [f64], &mut [f64]))| {
            let k = ks[ik];
            let n = self.weighted_sources(k, buf);
            let mut group = Group::default();
            for i in 0..n {
                let x = k * (self.eta0 - self.nodes.eta[i]);
                if x <= 1e-8 {
                    continue;
                }
                let lc = l_cut(x).min(lmax + 1);
                if lc < 3 {
                    continue;
                }
                let [s0, s1, s2, se] = [buf[4 * i], buf[4 * i + 1], buf[4 * i + 2], buf[4 * i + 3]];
                let ix = 1.0 / x;
                let coef = [
                    s0 - s2,
                    s1 * ix,
                    1.5 * s2 * ix * ix,
                    -s1 + 3.0 * s2 * ix,
                    se * ix * ix,
                ];
                if x >= (lmax + 2) as f64 {
                    // Every l <= lmax + 1 lies below the turning point: the upward
                    // recurrence is stable there, and is fused with the accumulation.
                    if group.push(x, coef) {
                        group.run(tr, er, lmax);
                    }
                    continue;
                }
                let [ca, cb, cc, cd, ce] = coef;
                sph_bessel_all_l(lc as u32, x, &mut jl[..=lc]);
                // Equal-length slices: no bounds checks, so the loop vectorizes.
                let tr = &mut tr[2..lc];
                let er = &mut er[2..lc];
                let j0 = &jl[2..lc];
                let j1 = &jl[3..=lc];
                let lf = &lf[2..lc];
                let ll1 = &ll1[2..lc];
                for i in 0..tr.len() {
                    let j = j0[i];
                    tr[i] += j * (ca + lf[i] * cb + ll1[i] * cc) + j1[i] * cd;
                    er[i] += j * ce;
                }
            }
            if group.len > 0 {
                group.run(tr, er, lmax);
            }
            for l in 0..nl {
                er[l] *= enorm[l];
            }
        };
        if parallel {
            t.par_chunks_mut(nl)
                .zip(e.par_chunks_mut(nl))
                .enumerate()
                .with_max_len(4)
                .for_each_init(init, one);
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

/// Lanes of the fused kernel.
const LANES: usize = 4;

/// Up to four nodes of one k whose x exceeds lmax + 1: their j_l for all l come from the
/// upward recurrence j_{l+1} = (2l + 1)/x j_l - j_{l-1} from the exact j_0, j_1 (stable
/// below the turning point, as in `sph_bessel_all_l`), run for the four nodes side by side
/// and accumulated directly into the rows, which hides the latency of the recurrence.
#[derive(Default)]
struct Group {
    len: usize,
    ix: [f64; LANES],
    j0: [f64; LANES],
    j1: [f64; LANES],
    /// Per lane: ca, cb, cc, cd, ce as in `every_l`.
    c: [[f64; LANES]; 5],
}

impl Group {
    /// Adds a node; true when the group is full.
    fn push(&mut self, x: f64, coef: [f64; 5]) -> bool {
        let g = self.len;
        let (s, co) = x.sin_cos();
        self.ix[g] = 1.0 / x;
        self.j0[g] = s / x;
        self.j1[g] = (s / x - co) / x;
        for (c, v) in self.c.iter_mut().zip(coef) {
            c[g] = v;
        }
        self.len += 1;
        self.len == LANES
    }

    /// Accumulates the group into the rows (l = 2..=lmax) and empties it.
    fn run(&mut self, tr: &mut [f64], er: &mut [f64], lmax: usize) {
        for g in self.len..LANES {
            // Idle lanes: zero coefficients on a harmless argument.
            self.ix[g] = 1e-6;
            self.j0[g] = 0.0;
            self.j1[g] = 0.0;
            for c in self.c.iter_mut() {
                c[g] = 0.0;
            }
        }
        let [ca, cb, cc, cd, ce] = self.c;
        let ix = self.ix;
        let mut jm = self.j0;
        let mut jc = self.j1;
        // l = 1 -> j_2.
        for g in 0..LANES {
            let jp = 3.0 * ix[g] * jc[g] - jm[g];
            jm[g] = jc[g];
            jc[g] = jp;
        }
        let tr = &mut tr[2..=lmax];
        let er = &mut er[2..=lmax];
        for (i, (t, e)) in tr.iter_mut().zip(er.iter_mut()).enumerate() {
            let lf = (i + 2) as f64;
            let tl = 2.0 * lf + 1.0;
            let ll1 = lf * (lf - 1.0);
            let mut ta = 0.0;
            let mut ea = 0.0;
            for g in 0..LANES {
                let j = jc[g];
                let jp = tl * ix[g] * j - jm[g];
                ta += j * (ca[g] + lf * cb[g] + ll1 * cc[g]) + jp * cd[g];
                ea += j * ce[g];
                jm[g] = j;
                jc[g] = jp;
            }
            *t += ta;
            *e += ea;
        }
        self.len = 0;
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
    fn fused_recurrence_matches_bessel_routine() {
        // Lane g (weight w = g + 1) accumulates T_l += w j_l + (w/2) j_{l+1} (coefficients
        // ca and cd) and E_l += w j_l (ce), checked against sph_bessel_all_l.
        let lmax = 400;
        let xs = [402.5, 517.0, 1999.3];
        let mut tr = vec![0.0; lmax + 1];
        let mut er = vec![0.0; lmax + 1];
        let mut g = Group::default();
        for (i, &x) in xs.iter().enumerate() {
            let w = (i + 1) as f64;
            g.push(x, [w, 0.0, 0.0, 0.5 * w, w]);
        }
        g.run(&mut tr, &mut er, lmax);
        let mut want_t = vec![0.0; lmax + 1];
        let mut want_e = vec![0.0; lmax + 1];
        let mut jl = vec![0.0; lmax + 2];
        for (i, &x) in xs.iter().enumerate() {
            let w = (i + 1) as f64;
            sph_bessel_all_l(lmax as u32 + 1, x, &mut jl);
            for l in 2..=lmax {
                want_t[l] += w * jl[l] + 0.5 * w * jl[l + 1];
                want_e[l] += w * jl[l];
            }
        }
        for l in 2..=lmax {
            let scale = 1.0 / 400.0; // |j_l(x)| <= ~1/x
            assert!((tr[l] - want_t[l]).abs() < 1e-12 * scale, "l={l}");
            assert!((er[l] - want_e[l]).abs() < 1e-12 * scale, "l={l}");
        }
        assert_eq!(tr[0], 0.0);
        assert_eq!(tr[1], 0.0);
    }

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
