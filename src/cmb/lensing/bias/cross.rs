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
fn active_ranges(plan: &BispectrumPlan, nl: usize, parallel: bool) -> Vec<(usize, usize)> {
    let nr = plan.n_radial();
    let (ne, nf) = (plan.exponents().len(), plan.n_fields());
    let range = |l: usize| {
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
                    if peak > 0.0 && plan.radial_function(e, f, l, ir).abs() >= cut {
                        r0 = r0.min(ir);
                        r1 = r1.max(ir + 1);
                    }
                }
            }
        }
        if r0 >= r1 { (0, 0) } else { (r0, r1) }
    };
    if parallel {
        (0..nl).into_par_iter().map(range).collect()
    } else {
        (0..nl).map(range).collect()
    }
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
    parallel: bool,
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
    let row = |(l, (wq, wp)): (usize, (&mut [f64], &mut [f64]))| {
        if l < 2 {
            return;
        }
        let two_l1 = (2 * l + 1) as f64;
        let mut xs = [0.0; 2];
        for ir in 0..nr {
            for e in 0..ne {
                for (f, x) in xs.iter_mut().enumerate().take(fields.len()) {
                    *x = plan.radial_function(e, f, l, ir);
                }
                let dot = |w: &[f64; 2]| -> f64 { xs.iter().zip(w).map(|(x, w)| x * w).sum() };
                wq[ir * nq + e] = two_l1 * dot(&wa[l]);
                for iz in 0..nz {
                    wq[ir * nq + ne + e * nz + iz] = two_l1 * dot(&wd[l][iz]);
                    wp[ir * np + e * nz + iz] = two_l1 * dot(&wc[l][iz]);
                }
            }
        }
    };
    if parallel {
        wq.par_chunks_mut(cq)
            .zip(wp.par_chunks_mut(cp))
            .enumerate()
            .for_each(row);
    } else {
        wq.chunks_mut(cq)
            .zip(wp.chunks_mut(cp))
            .enumerate()
            .for_each(row);
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
    let ws: Vec<Option<Weights>> = (0..nfs)
        .map(|ifs| weights(plan, isw, ifs, nl, parallel))
        .collect();
    if ws.iter().all(Option::is_none) {
        return vec![vec![vec![0.0; ns]; nm]; nfs];
    }
    let mut edges = vec![2usize];
    edges.extend(grid.iter().map(|&g| g + 1));
    let blocks = l_blocks(&edges, &active_ranges(plan, nl, parallel));
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
        // Gauss-Legendre weights of the nodes mu and of their mirrors -mu (none for the
        // middle node mu = 0 of an odd rule).
        let wplus = &gl.weights[c0..c1];
        let wminus: Vec<f64> = (c0..c1)
            .map(|node| {
                if n_mu % 2 == 1 && node == first_pos {
                    0.0
                } else {
                    gl.weights[node]
                }
            })
            .collect();
        let mut tri = Triple::new(radial_w, ne, nb, &pairs, &terms, [wplus, &wminus]);
        for (w, out) in ws.iter().zip(out.iter_mut()) {
            let Some(w) = w else { continue };
            let (nq, np) = (w.nq, w.np);
            let (cq, cp) = (nr * nq, nr * np);
            // [even l, odd l] partial sums, column-major: (node i, column c) at c * nb + i.
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
                        &mut sq[b.par][b.r0 * nq * nb..],
                        (1, nb),
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
                        &mut sp[b.par][b.r0 * np * nb..],
                        (1, nb),
                    );
                }
                let (r0, r1) = reach[m];
                if r0 >= r1 {
                    continue;
                }
                tri.add(w, [&sq[0], &sq[1]], [&sp[0], &sp[1]], (r0, r1), out_m);
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

/// The triple products of a block of mu nodes and their mirrors:
/// Sum_r w_r Sum_t c_t A_{e0}(r) Sum_z B^z_{e1}(r) C^z_{e2}(r) per shape, vectorized over
/// the nodes.
struct Triple<'a> {
    radial_w: &'a [f64],
    ne: usize,
    nb: usize,
    pairs: &'a [(usize, usize)],
    terms: &'a [Vec<(f64, usize, usize)>],
    /// Gauss-Legendre weights of the nodes +mu and -mu.
    wmu: [&'a [f64]; 2],
    /// w_r A_e, [e][node].
    a: Vec<f64>,
    /// B^z_e and C^z_e, [e][z][node].
    b: Vec<f64>,
    c: Vec<f64>,
    /// Sum_z B^z_{e1} C^z_{e2} per exponent pair, [pair][node].
    bc: Vec<f64>,
    /// Per shape, the sums over r and terms, [shape][node].
    acc: Vec<f64>,
}

impl<'a> Triple<'a> {
    fn new(
        radial_w: &'a [f64],
        ne: usize,
        nb: usize,
        pairs: &'a [(usize, usize)],
        terms: &'a [Vec<(f64, usize, usize)>],
        wmu: [&'a [f64]; 2],
    ) -> Self {
        Self {
            radial_w,
            ne,
            nb,
            pairs,
            terms,
            wmu,
            a: vec![0.0; ne * nb],
            b: vec![0.0; 2 * ne * nb],
            c: vec![0.0; 2 * ne * nb],
            bc: vec![0.0; pairs.len() * nb],
            acc: vec![0.0; terms.len() * nb],
        }
    }

    /// Adds the block's contribution (nodes and mirrors, times their weights) to `out`
    /// (per shape). `q` and `p` are the even- and odd-l sums (column-major, (node,
    /// column (r, function)) at column * nb + node); only radial nodes r0..r1 contribute.
    fn add(
        &mut self,
        w: &Weights,
        q: [&[f64]; 2],
        p: [&[f64]; 2],
        (r0, r1): (usize, usize),
        out: &mut [f64],
    ) {
        let (ne, nb, nz, nq, np) = (self.ne, self.nb, w.nz, w.nq, w.np);
        // Q_l(-mu) = (-1)^(l+1) Q_l(mu), P_l(-mu) = (-1)^l P_l(mu): the even-l part of Q
        // and the odd-l part of P change sign at the mirror node.
        for (side, wmu) in self.wmu.iter().enumerate() {
            let s = if side == 0 { 1.0 } else { -1.0 };
            self.acc.fill(0.0);
            for ir in r0..r1 {
                let wr = self.radial_w[ir];
                for e in 0..ne {
                    let (qe, qo) = (col(q[0], nb, ir * nq + e), col(q[1], nb, ir * nq + e));
                    let a = &mut self.a[e * nb..(e + 1) * nb];
                    for i in 0..nb {
                        a[i] = wr * (s * qe[i] + qo[i]);
                    }
                }
                for k in 0..ne * nz {
                    let (qe, qo) = (
                        col(q[0], nb, ir * nq + ne + k),
                        col(q[1], nb, ir * nq + ne + k),
                    );
                    let (pe, po) = (col(p[0], nb, ir * np + k), col(p[1], nb, ir * np + k));
                    let b = &mut self.b[k * nb..(k + 1) * nb];
                    for i in 0..nb {
                        b[i] = s * qe[i] + qo[i];
                    }
                    let c = &mut self.c[k * nb..(k + 1) * nb];
                    for i in 0..nb {
                        c[i] = pe[i] + s * po[i];
                    }
                }
                for (k, &(e1, e2)) in self.pairs.iter().enumerate() {
                    let bc = &mut self.bc[k * nb..(k + 1) * nb];
                    for z in 0..nz {
                        let b = &self.b[(e1 * nz + z) * nb..(e1 * nz + z + 1) * nb];
                        let c = &self.c[(e2 * nz + z) * nb..(e2 * nz + z + 1) * nb];
                        if z == 0 {
                            for i in 0..nb {
                                bc[i] = b[i] * c[i];
                            }
                        } else {
                            for i in 0..nb {
                                bc[i] += b[i] * c[i];
                            }
                        }
                    }
                }
                for (si, ts) in self.terms.iter().enumerate() {
                    let acc = &mut self.acc[si * nb..(si + 1) * nb];
                    for &(c, e0, k) in ts {
                        let a = &self.a[e0 * nb..(e0 + 1) * nb];
                        let bc = &self.bc[k * nb..(k + 1) * nb];
                        for i in 0..nb {
                            acc[i] += c * a[i] * bc[i];
                        }
                    }
                }
            }
            for (si, o) in out.iter_mut().enumerate() {
                let acc = &self.acc[si * nb..(si + 1) * nb];
                *o += dot4(acc, wmu);
            }
        }
    }
}

/// Column c of a column-major matrix with nb rows.
fn col(x: &[f64], nb: usize, c: usize) -> &[f64] {
    &x[c * nb..(c + 1) * nb]
}

/// Dot product with four independent partial sums (vectorizes).
fn dot4(x: &[f64], y: &[f64]) -> f64 {
    let mut s = [0.0; 4];
    let (xc, yc) = (x.chunks_exact(4), y.chunks_exact(4));
    let tail: f64 = xc
        .remainder()
        .iter()
        .zip(yc.remainder())
        .map(|(a, b)| a * b)
        .sum();
    for (a, b) in xc.zip(yc) {
        for k in 0..4 {
            s[k] += a[k] * b[k];
        }
    }
    (s[0] + s[1]) + (s[2] + s[3]) + tail
}
