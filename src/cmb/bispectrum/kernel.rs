//! The per-mu kernels of the fast engine: the block update of the S matrices (blocked
//! matrix products) and the triple products.

use super::BispectrumPlan;
use super::compress::LBlock;
use crate::cmb::transfer::Field;

/// Consecutive blocks of one pass between two outputs, with their bases stacked: per
/// field set and exponent, V (K x (a1 - a0), row-major) holds every block's rows (its
/// active fields x its rank) on the union [a0, a1) of the blocks' radial ranges (clipped
/// to the pass's range), zero outside each block's own range. Then
/// Sum_blocks V_a^T M V_b over the group is one product of inner dimension K.
pub(super) struct Group {
    /// Blocks [b0, b1) of the pass.
    pub(super) b0: usize,
    pub(super) b1: usize,
    pub(super) a0: usize,
    pub(super) a1: usize,
    /// K per field set.
    pub(super) k: Vec<usize>,
    /// v[fs][e]: K x (a1 - a0).
    v: Vec<Vec<Vec<f64>>>,
}

/// The block's radial range clipped to `clip`, if it contributes there.
fn clipped(blk: &LBlock, (c0, c1): (usize, usize)) -> Option<(usize, usize)> {
    let (a0, a1) = (blk.r0.max(c0), (blk.r0 + blk.w).min(c1));
    (blk.q > 0 && a1 > a0).then_some((a0, a1))
}

/// The groups of a pass: each ends at a block whose segment end the pass outputs, or at
/// the pass's last block.
pub(super) fn make_groups(
    blocks: &[LBlock],
    pass: &super::engine::Pass,
    nfs: usize,
    outputs: &dyn Fn(usize) -> bool,
) -> Vec<Group> {
    let clip = pass.clip;
    let mut groups = Vec::new();
    let mut b0 = pass.blocks.start;
    for bi in pass.blocks.clone() {
        if !(outputs(bi) || bi + 1 == pass.blocks.end) {
            continue;
        }
        let b1 = bi + 1;
        let members = &blocks[b0..b1];
        let (a0, a1) = members
            .iter()
            .filter_map(|b| clipped(b, clip))
            .fold((usize::MAX, 0), |(x, y), (a, b)| (x.min(a), y.max(b)));
        let (a0, a1) = if a1 > a0 { (a0, a1) } else { (0, 0) };
        let wg = a1 - a0;
        let ne = members.first().map_or(0, |b| b.v.len());
        let mut k = vec![0; nfs];
        let mut v = vec![vec![Vec::new(); ne]; nfs];
        for fs in 0..nfs {
            let rows: Vec<(&LBlock, (usize, usize))> = members
                .iter()
                .filter_map(|b| clipped(b, clip).map(|r| (b, r)))
                .filter(|(b, _)| b.active_fields[fs].1 > b.active_fields[fs].0)
                .collect();
            k[fs] = rows
                .iter()
                .map(|(b, _)| b.rows(b.active_fields[fs]).len())
                .sum();
            for (e, ve) in v[fs].iter_mut().enumerate() {
                *ve = vec![0.0; k[fs] * wg];
                let mut koff = 0;
                for &(b, (ba0, ba1)) in &rows {
                    for row in b.rows(b.active_fields[fs]) {
                        let src = &b.v[e][row * b.w + (ba0 - b.r0)..row * b.w + (ba1 - b.r0)];
                        ve[koff * wg + (ba0 - a0)..koff * wg + (ba1 - a0)].copy_from_slice(src);
                        koff += 1;
                    }
                }
            }
        }
        groups.push(Group {
            b0,
            b1,
            a0,
            a1,
            k,
            v,
        });
        b0 = b1;
    }
    groups
}

/// M of one block at one mu node for field set `fs` (into `sc.m`, nq x nq with
/// nq = Sum over the active fields of q_f): M_{f,f'} = U_f^T Z_{f,f'} with
/// Z_{f,f'}[l] = (2l+1) P_l(mu) C^-1_{l,ff'} U_{f',l}, as matrix products. Returns nq.
fn block_m(plan: &BispectrumPlan, blk: &LBlock, fs: usize, sc: &mut Scratch) -> usize {
    let (f_lo, f_hi) = blk.active_fields[fs];
    let base = blk.rows((f_lo, f_hi)).start;
    let nq = blk.rows((f_lo, f_hi)).len();
    let nb = blk.l1 - blk.l0 + 1;
    let m = &mut sc.m[..nq * nq];
    for f in f_lo..f_hi {
        let qf = blk.qoff[f + 1] - blk.qoff[f];
        if qf == 0 {
            continue;
        }
        let z = &mut sc.z[..nb * nq];
        for (li, l) in (blk.l0..=blk.l1).enumerate() {
            let s = (2 * l + 1) as f64 * sc.pl[l];
            let ci = &plan.cinv[fs][l];
            for fp in f_lo..f_hi {
                let qp = blk.qoff[fp + 1] - blk.qoff[fp];
                let c = s * cinv_entry(ci, plan.fields[f], plan.fields[fp]);
                let ul = &blk.u[fp][li * qp..(li + 1) * qp];
                let o = li * nq + blk.qoff[fp] - base;
                for (d, &u) in z[o..o + qp].iter_mut().zip(ul) {
                    *d = c * u;
                }
            }
        }
        let r0 = blk.qoff[f] - base;
        let mf = &mut m[r0 * nq..(r0 + qf) * nq];
        crate::numerics::gemm::gemm(qf, nb, nq, &blk.u[f], (1, qf), z, (nq, 1), 0.0, mf, (nq, 1));
    }
    nq
}

/// Adds one group's contribution at one mu node to the S matrices of field set `fs`:
/// W_b = M V_b per block into the stacked W (K x width), then S_ab += V_a^T W_b for every
/// exponent pair, one product of inner dimension K each.
pub(super) fn group_update(
    plan: &BispectrumPlan,
    blocks: &[LBlock],
    g: &Group,
    fs: usize,
    pairs: &[(usize, usize)],
    sc: &mut Scratch,
) {
    let n_r = plan.n_r;
    let wg = g.a1 - g.a0;
    let kk = g.k[fs];
    if kk == 0 || wg == 0 {
        return;
    }
    let clip = (g.a0, g.a1);
    let ne = sc.wseg.len();
    for w in &mut sc.wseg {
        w[..kk * wg].fill(0.0);
    }
    let mut koff = 0;
    for blk in &blocks[g.b0..g.b1] {
        let Some((ba0, ba1)) = clipped(blk, clip) else {
            continue;
        };
        let (f_lo, f_hi) = blk.active_fields[fs];
        if f_hi <= f_lo {
            continue;
        }
        let nq = block_m(plan, blk, fs, sc);
        let wc = ba1 - ba0;
        // V_b restricted: rows f_lo q .. f_hi q, columns ba0 - r0 .. ba1 - r0 (leading
        // dim w); W rows koff .. koff + nq, columns ba0 - a0 .. (leading dim wg).
        let off = blk.qoff[f_lo] * blk.w + (ba0 - blk.r0);
        for b in 0..ne {
            let vb = &blk.v[b][off..];
            let wb = &mut sc.wseg[b][koff * wg + (ba0 - g.a0)..];
            crate::numerics::gemm::gemm(
                nq,
                nq,
                wc,
                &sc.m[..nq * nq],
                (nq, 1),
                vb,
                (blk.w, 1),
                0.0,
                wb,
                (wg, 1),
            );
        }
        koff += nq;
    }
    // S_ab[a0.., a0..] += V_a^T W_b. S_aa is symmetric: only its upper triangle is
    // accumulated, in row strips that start at the diagonal ([`Scratch::complete`]
    // mirrors it before the triple products).
    for (ip, &(a, b)) in pairs.iter().enumerate() {
        let strips = if a == b { sym_strips(wg) } else { 1 };
        for i in 0..strips {
            let (r0, r1) = (i * wg / strips, (i + 1) * wg / strips);
            let c0 = if a == b { r0 } else { 0 };
            let s = &mut sc.s[ip][(g.a0 + r0) * n_r + g.a0 + c0..];
            crate::numerics::gemm::gemm(
                r1 - r0,
                kk,
                wg - c0,
                &g.v[fs][a][r0..],
                (1, wg),
                &sc.wseg[b][c0..kk * wg],
                (wg, 1),
                1.0,
                s,
                (n_r, 1),
            );
        }
    }
}

/// Flops of the S updates of one group ([`group_update`]'s products V_a^T W_b) of
/// width `wg` and inner dimension `kk`.
pub(super) fn s_update_flops(wg: usize, kk: usize, pairs: &[(usize, usize)]) -> f64 {
    pairs
        .iter()
        .map(|&(a, b)| {
            if a != b {
                return (wg * wg) as f64;
            }
            let p = sym_strips(wg);
            (0..p)
                .map(|i| {
                    let (r0, r1) = (i * wg / p, (i + 1) * wg / p);
                    ((r1 - r0) * (wg - r0)) as f64
                })
                .sum()
        })
        .sum::<f64>()
        * 2.0
        * kk as f64
}

/// Row strips of the upper-triangle product of a symmetric S over a width `wg`: p strips
/// do (p + 1) / (2 p) of the full product's work; strips of at least 24 rows keep the
/// products efficient.
fn sym_strips(wg: usize) -> usize {
    (wg / 24).clamp(1, 4)
}

/// Side of the square tiles of the blocked transposes.
const TILE: usize = 16;

impl Scratch {
    /// The scratch of one thread: P_l up to `lmax`, M and Z for ranks up to `max_nq`
    /// (fields x rank) and blocks of up to `max_nb` multipoles, the stacked W of groups
    /// of inner dimension up to `max_k` and width up to `max_wg`, `n_pairs` S matrices of
    /// n_r x n_r and the transposes of those that `needs_t` marks.
    pub(super) fn new(
        lmax: usize,
        (max_nq, max_nb): (usize, usize),
        (max_k, max_wg): (usize, usize),
        ne: usize,
        n_r: usize,
        needs_t: &[bool],
        sym: &[bool],
    ) -> Self {
        Self {
            pl: vec![0.0; lmax + 1],
            m: vec![0.0; max_nq * max_nq],
            z: vec![0.0; max_nb * max_nq],
            wseg: vec![vec![0.0; max_k * max_wg]; ne],
            s: vec![vec![0.0; n_r * n_r]; needs_t.len()],
            st: needs_t
                .iter()
                .map(|&t| if t { vec![0.0; n_r * n_r] } else { Vec::new() })
                .collect(),
            tsum: Vec::new(),
            sym: sym.to_vec(),
            n_r,
        }
    }

    /// Zeroes the S matrices on [c0, c1)^2.
    pub(super) fn clear(&mut self, (c0, c1): (usize, usize)) {
        let n_r = self.n_r;
        for v in &mut self.s {
            for ir in c0..c1 {
                v[ir * n_r + c0..ir * n_r + c1].fill(0.0);
            }
        }
    }

    /// Makes the S matrices ready for the triple products on [c0, c1)^2: the symmetric
    /// ones (accumulated on their upper triangle only) get their lower triangle mirrored,
    /// and the transposes that some triple uses are refreshed (both blocked in tiles).
    pub(super) fn complete(&mut self, (c0, c1): (usize, usize)) {
        let n_r = self.n_r;
        for (s, _) in self.s.iter_mut().zip(&self.sym).filter(|x| *x.1) {
            for i0 in (c0..c1).step_by(TILE) {
                let i1 = (i0 + TILE).min(c1);
                for j0 in (c0..i1).step_by(TILE) {
                    let j1 = (j0 + TILE).min(c1);
                    for ir in i0..i1 {
                        for jr in j0..j1.min(ir) {
                            s[ir * n_r + jr] = s[jr * n_r + ir];
                        }
                    }
                }
            }
        }
        for (st, s) in self.st.iter_mut().zip(&self.s) {
            if st.is_empty() {
                continue;
            }
            for i0 in (c0..c1).step_by(TILE) {
                let i1 = (i0 + TILE).min(c1);
                for j0 in (c0..c1).step_by(TILE) {
                    let j1 = (j0 + TILE).min(c1);
                    for ir in i0..i1 {
                        for jr in j0..j1 {
                            st[jr * n_r + ir] = s[ir * n_r + jr];
                        }
                    }
                }
            }
        }
    }

    /// out[k] += scale Sum_{r, r' in [c0, c1)} w_r w_r' S_x S_y S_z for the legs of
    /// every triple k.
    pub(super) fn triples(
        &mut self,
        legs: &[[Leg; 3]],
        w_r: &[f64],
        clip: (usize, usize),
        scale: f64,
        out: &mut [f64],
    ) {
        let sums = &mut self.tsum;
        if sums.len() < legs.len() {
            sums.resize(legs.len(), 0.0);
        }
        super::simd::triple_sums(
            &self.s, &self.st, self.n_r, legs, w_r, clip, scale, out, sums,
        );
    }
}

/// The body of [`Scratch::triples`]: row by row, every triple's three rows (in cache
/// after the first triple that reads them), partial sums in `sums`.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
pub(super) fn triple_sums_impl(
    s: &[Vec<f64>],
    st: &[Vec<f64>],
    n_r: usize,
    legs: &[[Leg; 3]],
    w_r: &[f64],
    (c0, c1): (usize, usize),
    scale: f64,
    out: &mut [f64],
    sums: &mut [f64],
) {
    let pick = |leg: Leg| if leg.1 { &st[leg.0] } else { &s[leg.0] };
    let wc = &w_r[c0..c1];
    let sums = &mut sums[..legs.len()];
    sums.fill(0.0);
    for (ir, &w) in w_r.iter().enumerate().take(c1).skip(c0) {
        let rows = ir * n_r + c0..ir * n_r + c1;
        for (sum, l) in sums.iter_mut().zip(legs) {
            let (s0, s1, s2) = (pick(l[0]), pick(l[1]), pick(l[2]));
            *sum += w * dot4_impl(wc, &s0[rows.clone()], &s1[rows.clone()], &s2[rows.clone()]);
        }
    }
    for (o, s) in out.iter_mut().zip(sums.iter()) {
        *o += scale * s;
    }
}

/// Sum_i w_i a_i b_i c_i over the common length, with 16 independent partial sums (so
/// that the loop runs in vector registers) added pairwise at the end.
#[inline(always)]
pub(super) fn dot4_impl(w: &[f64], a: &[f64], b: &[f64], c: &[f64]) -> f64 {
    const L: usize = 16;
    let n = w.len().min(a.len()).min(b.len()).min(c.len());
    let (w, a, b, c) = (&w[..n], &a[..n], &b[..n], &c[..n]);
    let mut acc = [0.0f64; L];
    let body = n - n % L;
    for (((w, a), b), c) in w[..body]
        .chunks_exact(L)
        .zip(a[..body].chunks_exact(L))
        .zip(b[..body].chunks_exact(L))
        .zip(c[..body].chunks_exact(L))
    {
        for j in 0..L {
            acc[j] += w[j] * a[j] * b[j] * c[j];
        }
    }
    for j in body..n {
        acc[j - body] += w[j] * a[j] * b[j] * c[j];
    }
    let mut width = L;
    while width > 1 {
        width /= 2;
        for j in 0..width {
            acc[j] += acc[j + width];
        }
    }
    acc[0]
}

/// Canonical order of a triple of legs (the sum is invariant under permuting the legs and
/// under transposing all three at once): of the sorted triple and the sorted
/// all-transposed triple, the one with fewer transposed legs (then the smaller). Legs of
/// symmetric pairs (`symmetric[p]`: S_aa) are never transposed.
pub(super) fn canonical_triple(legs: [Leg; 3], symmetric: &[bool]) -> [Leg; 3] {
    let norm = |l: Leg| (l.0, l.1 && !symmetric[l.0]);
    let mut a = legs.map(norm);
    a.sort_unstable();
    let mut b = legs.map(|(p, t)| norm((p, !t)));
    b.sort_unstable();
    let nt = |x: &[Leg; 3]| x.iter().filter(|l| l.1).count();
    match nt(&a).cmp(&nt(&b)) {
        std::cmp::Ordering::Less => a,
        std::cmp::Ordering::Greater => b,
        std::cmp::Ordering::Equal => a.min(b),
    }
}

/// A radial-function pair for one leg: (index of the exponent pair, transposed?).
pub(super) type Leg = (usize, bool);

/// Work space of one thread of the mu sums (allocated once per thread, not per node).
pub(super) struct Scratch {
    pub(super) pl: Vec<f64>,
    /// The block's M matrix, (fields q)^2.
    m: Vec<f64>,
    /// Z of the M product, (block multipoles) x (fields q).
    z: Vec<f64>,
    /// The stacked W_b = M V_b of a group per exponent, K x width.
    wseg: Vec<Vec<f64>>,
    /// Cumulative S_ab per exponent pair (a <= b), n_r x n_r.
    s: Vec<Vec<f64>>,
    /// Transposes of the non-symmetric ones that a triple uses (empty otherwise),
    /// refreshed at every grid point.
    st: Vec<Vec<f64>>,
    /// Partial sums of the triple products.
    tsum: Vec<f64>,
    /// Per exponent pair: symmetric (S_aa; upper triangle accumulated only).
    sym: Vec<bool>,
    n_r: usize,
}

pub(super) fn cinv_entry(c: &[f64; 3], a: Field, b: Field) -> f64 {
    match (a, b) {
        (Field::T, Field::T) => c[0],
        (Field::E, Field::E) => c[2],
        _ => c[1],
    }
}

/// P_l(mu) for l = 0..=lmax by the upward recurrence.
pub fn legendre_all(lmax: usize, mu: f64, out: &mut [f64]) {
    out[0] = 1.0;
    if lmax >= 1 {
        out[1] = mu;
    }
    for l in 2..=lmax {
        let lf = l as f64;
        out[l] = ((2.0 * lf - 1.0) * mu * out[l - 1] - (lf - 1.0) * out[l - 2]) / lf;
    }
}
