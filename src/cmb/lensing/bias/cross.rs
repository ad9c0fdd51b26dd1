//! The Fisher cross terms F_lens,s of the ISW-lensing bispectrum with the primordial
//! shapes, by one-dimensional l sums of Q_l and P_l (see the parent module), for every
//! field set of a plan in one pass over the mu nodes.

use rayon::prelude::*;

use super::{active_fields, cinv_matrix};
use crate::cmb::bispectrum::{BispectrumPlan, legendre_all};
use crate::cmb::lensing::isw_bispectrum::{IswLensingBispectrum, gradient_legendre_all};
use crate::cmb::transfer::RadialGrid;
use crate::numerics::GaussLegendre;
use crate::numerics::gemm::gemm;

/// Mu nodes per block of the fast sums at most (the blocks are evened out so that every
/// thread gets the same number): large enough that the matrix products reuse each
/// packed weight many times.
const MU_BLOCK: usize = 192;

/// Rows (multipoles of one parity) per block of the l sums: each block uses the radial
/// nodes where some radial function of its multipoles is active.
const L_BLOCK: usize = 48;

/// A radial node is active at l where some radial function X^{e,X}_l (any exponent,
/// any field) reaches this fraction of its largest magnitude over the radial nodes at
/// that l; the sums skip the others. Measured on the full scan (T, E, T+E; local,
/// equilateral, orthogonal; l_max 500-3000): see the module doc of the parent.
const ACTIVE_TOL: f64 = 1e-4;

/// The weights of one field set: rows l, columns (r, function) with r outermost; WQ
/// holds A_e and B^z_e (multiplying (2l+1) Q_l), WP holds C^z_e (multiplying P_l).
struct Weights {
    nz: usize,
    nq: usize,
    np: usize,
    wq: Vec<f64>,
    wp: Vec<f64>,
}

/// One block of the l sums: grid segment `m`, the rows l = first, first + 2, ...
/// (`rows` of them), radial nodes r0..r1.
struct LBlock {
    m: usize,
    par: usize,
    first: usize,
    rows: usize,
    r0: usize,
    r1: usize,
}

/// The active radial range [r0, r1) at each l (empty below l = 2).
fn active_ranges(plan: &BispectrumPlan, nl: usize) -> Vec<(usize, usize)> {
    let nr = plan.n_radial();
    let (ne, nf) = (plan.exponents().len(), plan.n_fields());
    (0..nl)
        .map(|l| {
            if l < 2 {
                return (0, 0);
            }
            let (mut r0, mut r1) = (nr, 0);
            for e in 0..ne {
                for f in 0..nf {
                    let peak = (0..nr)
                        .map(|ir| plan.radial_function(e, f, l, ir).abs())
                        .fold(0.0, f64::max);
                    let cut = ACTIVE_TOL * peak;
                    for ir in 0..nr {
                        if plan.radial_function(e, f, l, ir).abs() >= cut && peak > 0.0 {
                            r0 = r0.min(ir);
                            r1 = r1.max(ir + 1);
                        }
                    }
                }
            }
            if r0 >= r1 { (0, 0) } else { (r0, r1) }
        })
        .collect()
}

/// The blocks of the l sums, in l order within each grid segment; `edges[m]..edges[m+1]`
/// is segment m.
fn l_blocks(edges: &[usize], ranges: &[(usize, usize)]) -> Vec<LBlock> {
    let mut out = Vec::new();
    for m in 0..edges.len() - 1 {
        let (lo, hi) = (edges[m].min(edges[m + 1]), edges[m + 1]);
        for par in 0..2 {
            let mut first = lo + (lo + par) % 2; // first l >= lo with l % 2 == par
            while first < hi {
                let rows = (hi - first).div_ceil(2).min(L_BLOCK);
                let (mut r0, mut r1) = (usize::MAX, 0);
                for j in 0..rows {
                    let (a, b) = ranges[first + 2 * j];
                    if a < b {
                        r0 = r0.min(a);
                        r1 = r1.max(b);
                    }
                }
                if r0 < r1 {
                    out.push(LBlock {
                        m,
                        par,
                        first,
                        rows,
                        r0,
                        r1,
                    });
                }
                first += 2 * rows;
            }
        }
    }
    out
}

/// The weights of field set `ifs`; `None` when no leg carries phi (no bispectrum).
fn weights(
    plan: &BispectrumPlan,
    isw: &IswLensingBispectrum,
    ifs: usize,
    nl: usize,
) -> Option<Weights> {
    let fs = plan.field_sets()[ifs];
    let fields = plan.fields();
    let act = active_fields(plan, fs);
    let nz = act.len();
    let ne = plan.exponents().len();
    let nr = plan.n_radial();
    // Per-l leg weights (fields X of the table): a_X = [C^-1 c^phi]_X,
    // d[z]_Y = [C^-1 C]_{Y z}, ci[z]_Z = [C^-1]_{z Z}.
    let mut wa = vec![[0.0; 2]; nl];
    let mut wd = vec![[[0.0; 2]; 2]; nl];
    let mut wc = vec![[[0.0; 2]; 2]; nl];
    let mut any_phi = false;
    for l in 2..nl {
        let ci = cinv_matrix(plan, ifs, l);
        for x in 0..fields.len() {
            wa[l][x] = fields
                .iter()
                .enumerate()
                .map(|(y, &fy)| ci[x][y] * isw.cl_phi(fy, l))
                .sum();
            any_phi |= wa[l][x] != 0.0;
            for (iz, &z) in act.iter().enumerate() {
                wd[l][iz][x] = fields
                    .iter()
                    .enumerate()
                    .map(|(y, &fy)| ci[x][y] * isw.cl(fy, fields[z], l))
                    .sum();
                wc[l][iz][x] = ci[z][x];
            }
        }
    }
    if !any_phi {
        return None;
    }
    let nq = ne * (1 + nz);
    let np = ne * nz;
    let (cq, cp) = (nr * nq, nr * np);
    let mut wq = vec![0.0; nl * cq];
    let mut wp = vec![0.0; nl * cp];
    let mut xs = vec![0.0; fields.len()];
    for l in 2..nl {
        let two_l1 = (2 * l + 1) as f64;
        for ir in 0..nr {
            for e in 0..ne {
                for (f, x) in xs.iter_mut().enumerate() {
                    *x = plan.radial_function(e, f, l, ir);
                }
                let dot = |w: &[f64; 2]| -> f64 { xs.iter().zip(w).map(|(x, w)| x * w).sum() };
                wq[l * cq + ir * nq + e] = two_l1 * dot(&wa[l]);
                for iz in 0..nz {
                    wq[l * cq + ir * nq + ne + e * nz + iz] = two_l1 * dot(&wd[l][iz]);
                    wp[l * cp + ir * np + e * nz + iz] = two_l1 * dot(&wc[l][iz]);
                }
            }
        }
    }
    Some(Weights { nz, nq, np, wq, wp })
}

/// F_lens,s for every field set of the plan (outer index, the plan's order) and every
/// value of `grid` (each at most the plan's l_max): cross[fs][m][s].
///
/// The Legendre functions of a block of mu nodes are computed once for all field sets;
/// the l sums are blocked matrix products that use, per block of multipoles, only the
/// radial nodes where the radial functions are active ([`ACTIVE_TOL`]).
pub fn cross_fisher_terms(
    plan: &BispectrumPlan,
    radial: &RadialGrid,
    isw: &IswLensingBispectrum,
    grid: &[usize],
    parallel: bool,
) -> Vec<Vec<Vec<f64>>> {
    let lmax = grid.iter().copied().max().unwrap_or(2);
    let gl = GaussLegendre::new((3 * lmax).div_ceil(2) + 1);
    cross_terms_with_rule(plan, radial, isw, grid, &gl, parallel)
}

/// As [`cross_fisher_terms`] on the Gauss-Legendre rule `gl` of ceil(3 l_max / 2) + 1
/// nodes (or more).
pub(super) fn cross_terms_with_rule(
    plan: &BispectrumPlan,
    radial: &RadialGrid,
    isw: &IswLensingBispectrum,
    grid: &[usize],
    gl: &GaussLegendre,
    parallel: bool,
) -> Vec<Vec<Vec<f64>>> {
    let ns = plan.terms().len();
    let nm = grid.len();
    let nfs = plan.field_sets().len();
    let lmax = grid.iter().copied().max().unwrap_or(2);
    let nl = lmax + 1;
    let ne = plan.exponents().len();
    let nr = plan.n_radial();
    let ws: Vec<Option<Weights>> = (0..nfs).map(|ifs| weights(plan, isw, ifs, nl)).collect();
    if ws.iter().all(Option::is_none) {
        return vec![vec![vec![0.0; ns]; nm]; nfs];
    }
    let mut edges = vec![2usize];
    edges.extend(grid.iter().map(|&g| g + 1));
    let blocks = l_blocks(&edges, &active_ranges(plan, nl));
    let n_mu = gl.len();
    let radial_w = &radial.w;
    // Mirror symmetry of the Gauss-Legendre rule: mu and -mu carry the same weight, and
    // P_l(-mu) = (-1)^l P_l(mu), Q_l(-mu) = (-1)^(l+1) Q_l(mu). The l sums are split into
    // even and odd l on the nodes mu >= 0 only, which gives both nodes of a pair for half
    // the matrix-product work.
    let first_pos = n_mu / 2; // nodes increase; for odd n_mu this is the middle node, mu = 0
    let n_pos = n_mu - first_pos;
    let threads = if parallel {
        rayon::current_num_threads().max(1)
    } else {
        1
    };
    let n_chunks = n_pos.div_ceil(MU_BLOCK).div_ceil(threads) * threads;
    let nb_max = n_pos.div_ceil(n_chunks.min(n_pos));
    // The shapes' terms as (coefficient, exponent of the A leg, index of the (B, C)
    // exponent pair), the pairs listed once.
    let mut pairs: Vec<(usize, usize)> = Vec::new();
    let terms: Vec<Vec<(f64, usize, usize)>> = plan
        .terms()
        .iter()
        .map(|ts| {
            ts.iter()
                .map(|&(c, e)| {
                    let pair = (e[1], e[2]);
                    let k = pairs.iter().position(|&q| q == pair).unwrap_or_else(|| {
                        pairs.push(pair);
                        pairs.len() - 1
                    });
                    (c, e[0], k)
                })
                .collect()
        })
        .collect();
    // Radial nodes active at some l below each grid segment's end (the sums vanish
    // elsewhere).
    let reach: Vec<(usize, usize)> = (0..nm)
        .map(|m| {
            blocks
                .iter()
                .filter(|b| b.m <= m)
                .fold((nr, 0), |(a, z), b| (a.min(b.r0), z.max(b.r1)))
        })
        .collect();
    let chunk = |c0: usize| -> Vec<Vec<Vec<f64>>> {
        let c1 = (c0 + nb_max).min(n_mu);
        let nb = c1 - c0;
        let mut pm = vec![0.0; nb * nl];
        let mut qm = vec![0.0; nb * nl];
        for (i, &mu) in gl.nodes[c0..c1].iter().enumerate() {
            legendre_all(lmax, mu, &mut pm[i * nl..(i + 1) * nl]);
            gradient_legendre_all(lmax, mu, &mut qm[i * nl..(i + 1) * nl]);
        }
        let mut out = vec![vec![vec![0.0; ns]; nm]; nfs];
        let mut tri = Triple::new(radial_w, ne, &pairs, &terms);
        for (w, out) in ws.iter().zip(out.iter_mut()) {
            let Some(w) = w else { continue };
            let (nq, np) = (w.nq, w.np);
            let (cq, cp) = (nr * nq, nr * np);
            // [even l, odd l] partial sums.
            let mut sq = [vec![0.0; nb * cq], vec![0.0; nb * cq]];
            let mut sp = [vec![0.0; nb * cp], vec![0.0; nb * cp]];
            let mut bi = 0;
            for (m, out_m) in out.iter_mut().enumerate() {
                while bi < blocks.len() && blocks[bi].m == m {
                    let b = &blocks[bi];
                    bi += 1;
                    let (f, k) = (b.first, b.rows);
                    gemm(
                        nb,
                        k,
                        (b.r1 - b.r0) * nq,
                        &qm[f..],
                        (nl, 2),
                        &w.wq[f * cq + b.r0 * nq..],
                        (2 * cq, 1),
                        1.0,
                        &mut sq[b.par][b.r0 * nq..],
                        (cq, 1),
                    );
                    gemm(
                        nb,
                        k,
                        (b.r1 - b.r0) * np,
                        &pm[f..],
                        (nl, 2),
                        &w.wp[f * cp + b.r0 * np..],
                        (2 * cp, 1),
                        1.0,
                        &mut sp[b.par][b.r0 * np..],
                        (cp, 1),
                    );
                }
                let (r0, r1) = reach[m];
                if r0 >= r1 {
                    continue;
                }
                for i in 0..nb {
                    let node = c0 + i;
                    let wmu = gl.weights[node];
                    let q = [&sq[0][i * cq..(i + 1) * cq], &sq[1][i * cq..(i + 1) * cq]];
                    let p = [&sp[0][i * cp..(i + 1) * cp], &sp[1][i * cp..(i + 1) * cp]];
                    // +mu, and -mu (not for the middle node mu = 0 of an odd rule).
                    tri.add(w, q, p, 1.0, (r0, r1), wmu, out_m);
                    if !(n_mu % 2 == 1 && node == first_pos) {
                        tri.add(w, q, p, -1.0, (r0, r1), wmu, out_m);
                    }
                }
            }
        }
        out
    };
    let starts: Vec<usize> = (first_pos..n_mu).step_by(nb_max).collect();
    let parts: Vec<Vec<Vec<Vec<f64>>>> = if parallel {
        starts.par_iter().map(|&c| chunk(c)).collect()
    } else {
        starts.iter().map(|&c| chunk(c)).collect()
    };
    let norm = plan.f_sky() / (8.0 * std::f64::consts::PI);
    let mut total = vec![vec![vec![0.0; ns]; nm]; nfs];
    for p in parts {
        for (tf, pf) in total.iter_mut().zip(p) {
            for (t, v) in tf.iter_mut().zip(pf) {
                for (a, b) in t.iter_mut().zip(v) {
                    *a += norm * b;
                }
            }
        }
    }
    total
}

/// The triple products of one mu node: Sum_r w_r Sum_t c_t A_{e0}(r) Sum_z B^z_{e1}(r)
/// C^z_{e2}(r) per shape, vectorized over r (the sums are transposed to r innermost).
struct Triple<'a> {
    radial_w: &'a [f64],
    ne: usize,
    pairs: &'a [(usize, usize)],
    terms: &'a [Vec<(f64, usize, usize)>],
    /// w_r A_e(r), [e][r].
    wa: Vec<f64>,
    /// B^z_e(r) and C^z_e(r), [e][z][r].
    b: Vec<f64>,
    c: Vec<f64>,
    /// Sum_z B^z_{e1} C^z_{e2} per exponent pair, [pair][r].
    bc: Vec<f64>,
    /// One shape's sum over terms, [r].
    acc: Vec<f64>,
}

impl<'a> Triple<'a> {
    fn new(
        radial_w: &'a [f64],
        ne: usize,
        pairs: &'a [(usize, usize)],
        terms: &'a [Vec<(f64, usize, usize)>],
    ) -> Self {
        let nr = radial_w.len();
        Self {
            radial_w,
            ne,
            pairs,
            terms,
            wa: vec![0.0; ne * nr],
            b: vec![0.0; 2 * ne * nr],
            c: vec![0.0; 2 * ne * nr],
            bc: vec![0.0; pairs.len() * nr],
            acc: vec![0.0; nr],
        }
    }

    /// Adds the node's contribution times `wmu` to `out` (per shape). `q` and `p` are the
    /// even- and odd-l sums of one node (columns (r, function)); `sign` +1 for the node
    /// mu, -1 for its mirror -mu; only radial nodes r0..r1 contribute.
    #[allow(clippy::too_many_arguments)]
    fn add(
        &mut self,
        w: &Weights,
        q: [&[f64]; 2],
        p: [&[f64]; 2],
        sign: f64,
        (r0, r1): (usize, usize),
        wmu: f64,
        out: &mut [f64],
    ) {
        let (ne, nz, nq, np) = (self.ne, w.nz, w.nq, w.np);
        let n = r1 - r0;
        // Q_l(-mu) = (-1)^(l+1) Q_l(mu), P_l(-mu) = (-1)^l P_l(mu).
        let (qe, qo) = if sign > 0.0 { (1.0, 1.0) } else { (-1.0, 1.0) };
        let (pe, po) = if sign > 0.0 { (1.0, 1.0) } else { (1.0, -1.0) };
        for (j, ir) in (r0..r1).enumerate() {
            let (q0, q1) = (&q[0][ir * nq..(ir + 1) * nq], &q[1][ir * nq..(ir + 1) * nq]);
            let (p0, p1) = (&p[0][ir * np..(ir + 1) * np], &p[1][ir * np..(ir + 1) * np]);
            let wr = self.radial_w[ir];
            for e in 0..ne {
                self.wa[e * n + j] = wr * (qe * q0[e] + qo * q1[e]);
            }
            for k in 0..ne * nz {
                self.b[k * n + j] = qe * q0[ne + k] + qo * q1[ne + k];
                self.c[k * n + j] = pe * p0[k] + po * p1[k];
            }
        }
        for (k, &(e1, e2)) in self.pairs.iter().enumerate() {
            let bc = &mut self.bc[k * n..(k + 1) * n];
            for z in 0..nz {
                let b = &self.b[(e1 * nz + z) * n..(e1 * nz + z + 1) * n];
                let c = &self.c[(e2 * nz + z) * n..(e2 * nz + z + 1) * n];
                if z == 0 {
                    bc.iter_mut()
                        .zip(b.iter().zip(c))
                        .for_each(|(o, (x, y))| *o = x * y);
                } else {
                    bc.iter_mut()
                        .zip(b.iter().zip(c))
                        .for_each(|(o, (x, y))| *o += x * y);
                }
            }
        }
        let acc = &mut self.acc[..n];
        for (o, ts) in out.iter_mut().zip(self.terms) {
            acc.fill(0.0);
            for &(c, e0, k) in ts {
                let a = &self.wa[e0 * n..(e0 + 1) * n];
                let bc = &self.bc[k * n..(k + 1) * n];
                acc.iter_mut()
                    .zip(a.iter().zip(bc))
                    .for_each(|(o, (x, y))| *o += c * x * y);
            }
            *o += wmu * sum4(acc);
        }
    }
}

/// Sum of a slice with four independent partial sums (vectorizes).
fn sum4(x: &[f64]) -> f64 {
    let mut s = [0.0; 4];
    let mut it = x.chunks_exact(4);
    for c in &mut it {
        for (a, b) in s.iter_mut().zip(c) {
            *a += b;
        }
    }
    (s[0] + s[1]) + (s[2] + s[3]) + it.remainder().iter().sum::<f64>()
}
