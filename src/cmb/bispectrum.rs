//! The CMB bispectrum Fisher engine: T, E and T+E, any separable primordial shape, the
//! cumulative Fisher matrix on a whole l_max grid in one pass.
//!
//! For shapes B_Phi = Sum_t c_t P(k1)^p1 P(k2)^p2 P(k3)^p3 (all permutations written out,
//! [`crate::shapes::Separable`]) the reduced bispectrum is
//! b^XYZ_{l1 l2 l3} = Sum_t c_t Integral r^2 dr X^{p1,X}_{l1}(r) X^{p2,Y}_{l2}(r)
//! X^{p3,Z}_{l3}(r), with X^{p,X}_l(r) = (2/pi) Integral k^2 dk P_Phi(k)^p Delta^X_l(k)
//! j_l(k r) (Komatsu & Spergel 2001, PRD 63, 063002, for local; the same line-of-sight
//! form for every separable template). The Fisher matrix (Komatsu & Spergel 2001; T+E as
//! in Babich & Zaldarriaga 2004, Yadav, Komatsu & Wandelt 2007) is
//! F_ij = (f_sky / 6) Sum_{l1 l2 l3} G^2_{l1 l2 l3} Sum b^i_{XYZ} C^-1_{XX'} C^-1_{YY'}
//! C^-1_{ZZ'} b^j_{X'Y'Z'}, G^2 = (2l1+1)(2l2+1)(2l3+1)/(4 pi) (l1 l2 l3; 0 0 0)^2, the
//! unrestricted sum over all l's (equal to the restricted sum with 1/Delta_{l1l2l3}).
//!
//! Fast path (exact; Smith & Zaldarriaga 2006, astro-ph/0612571): with
//! (l1 l2 l3; 0 0 0)^2 = (1/2) Integral_{-1}^{1} P_l1 P_l2 P_l3 d mu, the sum factorizes:
//! F_ij = (f_sky / 48 pi) Integral d mu Integral r^2 dr Integral r'^2 dr'
//! Sum_{t in i, u in j} c_t c_u Prod_{a=1..3} S_{p_ta p_ua}(r, r', mu), with
//! S_ab(r, r', mu) = Sum_l (2l+1) P_l(mu) Sum_XY X^{a,X}_l(r) C^-1_{l,XY} X^{b,Y}_l(r').
//! Gauss-Legendre in mu with ceil(3 l_max / 2) + 1 nodes integrates the degree-3 l_max
//! polynomial exactly, and S is a matrix product over l for each mu (blocked, via
//! matrixmultiply's dgemm). Accumulating S over l in blocks that end at the l_max grid
//! values gives the whole cumulative grid in one pass. Cost: N_mu x N_pairs x N_r^2 x
//! (fields x l_max) multiply-adds.

use rayon::prelude::*;

use crate::cmb::experiment::Experiment;
use crate::cmb::transfer::{Field, RadialGrid, TransferTable};
use crate::cosmology::Primordial;
use crate::fisher::FisherMatrix;
use crate::numerics::GaussLegendre;
use crate::shapes::Shape;

/// Which fields enter a Fisher matrix.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize)]
pub enum FieldSet {
    /// Temperature only.
    T,
    /// E polarization only.
    E,
    /// Both, with the 2x2 covariance per l.
    TE,
}

impl FieldSet {
    /// Output label: "T", "E", "T+E".
    pub fn label(self) -> &'static str {
        match self {
            FieldSet::T => "T",
            FieldSet::E => "E",
            FieldSet::TE => "T+E",
        }
    }

    /// Parses "T", "E", "T+E".
    pub fn parse(s: &str) -> Option<Self> {
        match s.trim() {
            "T" | "t" => Some(FieldSet::T),
            "E" | "e" => Some(FieldSet::E),
            "T+E" | "t+e" | "TE" => Some(FieldSet::TE),
            _ => None,
        }
    }
}

/// Everything the engine needs.
pub struct CmbFisherInput<'a> {
    /// Transfer functions Delta^X_l(k).
    pub transfer: &'a TransferTable,
    /// The primordial spectrum.
    pub primordial: Primordial,
    /// Shapes (Fisher parameters, in order).
    pub shapes: &'a [Shape],
    /// Noise, beam, sky fraction, multipole ranges.
    pub experiment: &'a Experiment,
    /// CMB temperature in K (to make the noise dimensionless).
    pub t_cmb_k: f64,
    /// The l_max grid (increasing; each <= the transfer table's l_max).
    pub lmax_grid: &'a [usize],
    /// Field sets to compute.
    pub field_sets: &'a [FieldSet],
    /// Radial quadrature.
    pub radial: &'a RadialGrid,
    /// Run the outer loops in parallel.
    pub parallel: bool,
}

/// Result: one Fisher matrix per (field set, l_max).
#[derive(Debug, Clone, serde::Serialize)]
pub struct CmbForecast {
    /// The l_max grid.
    pub lmax: Vec<usize>,
    /// Field sets, in the order of `fisher`.
    pub field_sets: Vec<FieldSet>,
    /// Shape names.
    pub shapes: Vec<String>,
    /// fisher[field_set][lmax index], parameters `fnl_<shape>`.
    pub fisher: Vec<Vec<FisherMatrix>>,
}

/// Precomputed radial functions and inverse covariances: the "plan" of the engine.
pub struct BispectrumPlan {
    lmax: usize,
    n_r: usize,
    exponents: Vec<f64>,
    /// Terms per shape: (coefficient, exponent indices for the three legs).
    terms: Vec<Vec<(f64, [usize; 3])>>,
    fields: Vec<Field>,
    /// X[e][f] is an (lmax+1) x n_r row-major matrix (shared between experiments).
    x: std::sync::Arc<Vec<Vec<Vec<f64>>>>,
    /// Inverse covariance per field set: cinv[fs][l] as [TT, TE, EE] (in the table's
    /// field indices; unused entries zero).
    cinv: Vec<Vec<[f64; 3]>>,
    field_sets: Vec<FieldSet>,
    radial_w: Vec<f64>,
    f_sky: f64,
    shape_names: Vec<String>,
}

impl BispectrumPlan {
    /// Builds the radial functions X^{p,X}_l(r) and the inverse covariances.
    pub fn new(inp: &CmbFisherInput<'_>) -> Self {
        let tr = inp.transfer;
        let lmax = inp
            .lmax_grid
            .iter()
            .copied()
            .max()
            .unwrap_or(2)
            .min(tr.lmax());
        let n_r = inp.radial.len();
        // Exponents used by any shape, and the terms as exponent indices.
        let mut exponents: Vec<f64> = Vec::new();
        let mut terms = Vec::new();
        for s in inp.shapes {
            let sep = s.separable();
            let mut ts = Vec::new();
            for t in sep.terms() {
                let mut idx = [0usize; 3];
                for (a, &p) in t.powers.iter().enumerate() {
                    idx[a] = match exponents.iter().position(|&e| (e - p).abs() < 1e-12) {
                        Some(i) => i,
                        None => {
                            exponents.push(p);
                            exponents.len() - 1
                        }
                    };
                }
                ts.push((t.coeff, idx));
            }
            terms.push(ts);
        }
        let fields = tr.fields().to_vec();
        let nf = fields.len();
        let ne = exponents.len();
        let nl = lmax + 1;
        // X[r][e][f][l], computed per r in parallel, then transposed.
        let prim = inp.primordial;
        let per_r = |ir: usize| -> Vec<f64> {
            let r = inp.radial.r[ir];
            let mut out = vec![0.0; ne * nf * nl];
            let mut j = vec![0.0; tr.lmax() + 1];
            let mut coef = vec![0.0; ne];
            for (ik, (&k, &w)) in tr.k().iter().zip(tr.weights()).enumerate() {
                crate::special::bessel::sph_bessel_all_l(lmax as u32, k * r, &mut j[..nl]);
                let pk = prim.p_phi(k);
                for (e, c) in coef.iter_mut().enumerate() {
                    *c = 2.0 / std::f64::consts::PI * w * k * k * pk.powf(exponents[e]);
                }
                for f in 0..nf {
                    let g = &tr.row(f, ik)[..nl];
                    for (e, &c) in coef.iter().enumerate() {
                        let o = &mut out[(e * nf + f) * nl..(e * nf + f + 1) * nl];
                        for l in 0..nl {
                            o[l] += c * g[l] * j[l];
                        }
                    }
                }
            }
            out
        };
        let rows: Vec<Vec<f64>> = if inp.parallel {
            (0..n_r).into_par_iter().map(per_r).collect()
        } else {
            (0..n_r).map(per_r).collect()
        };
        let mut x = vec![vec![vec![0.0; nl * n_r]; nf]; ne];
        for (ir, row) in rows.iter().enumerate() {
            for e in 0..ne {
                for f in 0..nf {
                    let src = &row[(e * nf + f) * nl..(e * nf + f + 1) * nl];
                    for l in 0..nl {
                        x[e][f][l * n_r + ir] = src[l];
                    }
                }
            }
        }
        let cinv =
            inverse_covariances(tr, &prim, inp.experiment, inp.t_cmb_k, inp.field_sets, lmax);
        Self {
            lmax,
            n_r,
            exponents,
            terms,
            fields,
            x: std::sync::Arc::new(x),
            cinv,
            field_sets: inp.field_sets.to_vec(),
            radial_w: inp.radial.w.clone(),
            f_sky: inp.experiment.f_sky,
            shape_names: inp.shapes.iter().map(|s| s.name()).collect(),
        }
    }

    /// The same radial functions with another experiment's noise, sky fraction and
    /// multipole ranges (the expensive X^{p}_l(r) are shared, not recomputed).
    pub fn with_experiment(
        &self,
        tr: &TransferTable,
        prim: &Primordial,
        exp: &Experiment,
        t_cmb_k: f64,
    ) -> Self {
        Self {
            cinv: inverse_covariances(tr, prim, exp, t_cmb_k, &self.field_sets, self.lmax),
            f_sky: exp.f_sky,
            x: std::sync::Arc::clone(&self.x),
            exponents: self.exponents.clone(),
            terms: self.terms.clone(),
            fields: self.fields.clone(),
            field_sets: self.field_sets.clone(),
            radial_w: self.radial_w.clone(),
            shape_names: self.shape_names.clone(),
            lmax: self.lmax,
            n_r: self.n_r,
        }
    }

    /// The exponents of P_Phi that the radial functions carry.
    pub fn exponents(&self) -> &[f64] {
        &self.exponents
    }

    /// X^{p_e, field f}_l(r_ir).
    pub fn radial_function(&self, e: usize, f: usize, l: usize, ir: usize) -> f64 {
        self.x[e][f][l * self.n_r + ir]
    }

    /// Reduced bispectrum b^{XYZ}_{l1 l2 l3} of shape `s` (f_NL = 1) for fields given as
    /// indices into the transfer table's fields.
    pub fn reduced_bispectrum(&self, s: usize, l: [usize; 3], f: [usize; 3]) -> f64 {
        let mut b = 0.0;
        for &(c, e) in &self.terms[s] {
            let mut acc = 0.0;
            for ir in 0..self.n_r {
                acc += self.radial_w[ir]
                    * self.radial_function(e[0], f[0], l[0], ir)
                    * self.radial_function(e[1], f[1], l[1], ir)
                    * self.radial_function(e[2], f[2], l[2], ir);
            }
            b += c * acc;
        }
        b
    }

    /// The inverse covariance [TT, TE, EE] of field set `fs` at l.
    pub fn inverse_covariance(&self, fs: usize, l: usize) -> [f64; 3] {
        self.cinv[fs][l]
    }

    /// Number of fields in the transfer table.
    pub fn n_fields(&self) -> usize {
        self.fields.len()
    }

    /// Shapes' term lists (coefficient, exponent indices).
    pub fn terms(&self) -> &[Vec<(f64, [usize; 3])>] {
        &self.terms
    }
}

/// Inverse covariance [TT, TE, EE] per field set and l (zero outside the experiment's
/// ranges): C = C_l (from the transfer table) + N_l (the experiment's noise).
fn inverse_covariances(
    tr: &TransferTable,
    prim: &Primordial,
    exp: &Experiment,
    t_cmb_k: f64,
    field_sets: &[FieldSet],
    lmax: usize,
) -> Vec<Vec<[f64; 3]>> {
    let nl = lmax + 1;
    let prim = *prim;
    let it = tr.field_index(Field::T);
    let ie = tr.field_index(Field::E);
    let cl = |a: Option<usize>, b: Option<usize>| match (a, b) {
        (Some(a), Some(b)) => tr.cl(&prim, a, b),
        _ => vec![0.0; tr.lmax() + 1],
    };
    let (ctt, cte, cee) = (cl(it, it), cl(it, ie), cl(ie, ie));
    let mut cinv = Vec::new();
    for &fs in field_sets {
        let mut v = vec![[0.0; 3]; nl];
        for (l, c) in v.iter_mut().enumerate() {
            if l < exp.l_min.max(2) {
                continue;
            }
            let use_t = it.is_some() && l <= exp.lmax_t && fs != FieldSet::E;
            let use_e = ie.is_some() && l <= exp.lmax_e && fs != FieldSet::T;
            let tt = ctt[l] + exp.noise(l, false, t_cmb_k);
            let ee = cee[l] + exp.noise(l, true, t_cmb_k);
            match (use_t, use_e) {
                (true, true) => {
                    let det = tt * ee - cte[l] * cte[l];
                    *c = [ee / det, -cte[l] / det, tt / det];
                }
                (true, false) => *c = [1.0 / tt, 0.0, 0.0],
                (false, true) => *c = [0.0, 0.0, 1.0 / ee],
                (false, false) => {}
            }
        }
        cinv.push(v);
    }
    cinv
}

/// Multipoles per matrix-product block.
const SUB: usize = 64;

/// Radial nodes where every radial function at a given l is below this fraction of its
/// peak at that l are left out of that l's products (a relative truncation far below
/// the quadrature errors; it makes the high-l blocks work on the shell only).
const ACTIVE_TOL: f64 = 1e-5;

/// Runs the fast engine.
pub fn cmb_fisher(inp: &CmbFisherInput<'_>) -> CmbForecast {
    let plan = BispectrumPlan::new(inp);
    cmb_fisher_with_plan(&plan, inp.lmax_grid, inp.parallel)
}

/// Runs the fast engine on a prepared plan.
pub fn cmb_fisher_with_plan(
    plan: &BispectrumPlan,
    lmax_grid: &[usize],
    parallel: bool,
) -> CmbForecast {
    let lmax = plan.lmax;
    let grid: Vec<usize> = lmax_grid.iter().map(|&l| l.min(lmax)).collect();
    let n_mu = (3 * lmax).div_ceil(2) + 1;
    let gl = GaussLegendre::new(n_mu);
    let ns = plan.terms.len();
    let nfs = plan.field_sets.len();
    let nm = grid.len();
    let ne = plan.exponents.len();
    let n_r = plan.n_r;
    let nf = plan.fields.len();
    // Z[fs][b][f] = Sum_f' Cinv_{f f'} X[b][f'] (l rows, r columns).
    let z: Vec<Vec<Vec<Vec<f64>>>> = (0..nfs)
        .map(|fs| {
            (0..ne)
                .map(|b| {
                    (0..nf)
                        .map(|f| {
                            let mut out = vec![0.0; (lmax + 1) * n_r];
                            for l in 0..=lmax {
                                let ci = plan.cinv[fs][l];
                                for fp in 0..nf {
                                    let c = cinv_entry(&ci, plan.fields[f], plan.fields[fp]);
                                    if c == 0.0 {
                                        continue;
                                    }
                                    let src = &plan.x[b][fp][l * n_r..(l + 1) * n_r];
                                    let dst = &mut out[l * n_r..(l + 1) * n_r];
                                    for (d, s) in dst.iter_mut().zip(src) {
                                        *d += c * s;
                                    }
                                }
                            }
                            out
                        })
                        .collect()
                })
                .collect()
        })
        .collect();
    // Blocks of l: (lo, hi] per grid point; l < 2 never enters (Cinv = 0 there).
    let mut edges = vec![1usize];
    edges.extend(&grid);
    let pairs: Vec<(usize, usize)> = (0..ne).flat_map(|a| (a..ne).map(move |b| (a, b))).collect();
    let pair_index = |a: usize, b: usize| -> (usize, bool) {
        let (lo, hi, tr) = if a <= b { (a, b, false) } else { (b, a, true) };
        (pairs.iter().position(|&p| p == (lo, hi)).unwrap_or(0), tr)
    };
    // Term pairs per shape pair (i <= j): (c_t c_u, [(pair, transposed); 3]).
    // Every shape's term list is closed under permutations of the legs (all permutations
    // are written out) with permutation-invariant coefficients, and the unrestricted l
    // sum is invariant under permuting the legs of both terms at once. So the sum over
    // t runs over one representative per permutation orbit, weighted by the orbit size.
    let reps: Vec<Vec<(f64, [usize; 3])>> = plan
        .terms
        .iter()
        .map(|ts| {
            let mut seen: Vec<([usize; 3], usize, f64, [usize; 3])> = Vec::new();
            for &(c, e) in ts {
                let mut key = e;
                key.sort_unstable();
                match seen.iter_mut().find(|x| x.0 == key) {
                    Some(x) => x.1 += 1,
                    None => seen.push((key, 1, c, e)),
                }
            }
            seen.into_iter()
                .map(|(_, n, c, e)| (c * n as f64, e))
                .collect()
        })
        .collect();
    let mut term_pairs: Vec<TermPairs> = Vec::new();
    for (i, rep) in reps.iter().enumerate() {
        for j in i..ns {
            let mut v = Vec::new();
            for &(ct, et) in rep {
                for &(cu, eu) in &plan.terms[j] {
                    v.push((
                        ct * cu,
                        [
                            pair_index(et[0], eu[0]),
                            pair_index(et[1], eu[1]),
                            pair_index(et[2], eu[2]),
                        ],
                    ));
                }
            }
            term_pairs.push((i, j, v));
        }
    }
    let max_block = SUB;
    // Active radial range per l: the nodes where some radial function exceeds
    // ACTIVE_TOL of its largest value at that l (at high l the functions are confined
    // to the last-scattering shell; far nodes only matter at low l).
    let active: Vec<(usize, usize)> = (0..=lmax)
        .map(|l| {
            let v: Vec<f64> = (0..n_r)
                .map(|ir| {
                    plan.x
                        .iter()
                        .flat_map(|xe| xe.iter().map(move |xf| xf[l * n_r + ir].abs()))
                        .fold(0.0, f64::max)
                })
                .collect();
            let peak = v.iter().copied().fold(0.0, f64::max);
            if peak == 0.0 {
                return (0, 0);
            }
            let lo = v.iter().position(|&x| x >= ACTIVE_TOL * peak).unwrap_or(0);
            let hi = v
                .iter()
                .rposition(|&x| x >= ACTIVE_TOL * peak)
                .map_or(0, |i| i + 1);
            (lo, hi)
        })
        .collect();
    if std::env::var_os("NGREACH_DEBUG_ACTIVE").is_some() {
        for l in [2, 10, 50, 100, 300, 600, 1000, 2000]
            .iter()
            .filter(|&&l| l <= lmax)
        {
            eprintln!("active radial range at l = {l}: {:?} of {n_r}", active[*l]);
        }
    }
    let w_r = &plan.radial_w;
    // One mu node: returns F[fs][m][i][j] contributions (flattened).
    let per_mu = |(mu, wmu): (f64, f64), acc: &mut Vec<f64>, scratch: &mut Scratch| {
        legendre_all(lmax, mu, &mut scratch.pl);
        for fs in 0..nfs {
            scratch
                .s
                .iter_mut()
                .for_each(|v| v.iter_mut().for_each(|x| *x = 0.0));
            for (m, w) in edges.windows(2).enumerate() {
                let (lo, hi) = (w[0] + 1, w[1]);
                // Sub-blocks of at most SUB multipoles, each on the radial range where
                // its radial functions are not negligible.
                let mut l0 = lo;
                while l0 <= hi {
                    let l1 = (l0 + SUB - 1).min(hi);
                    let nb = l1 - l0 + 1;
                    let (r0, r1) = (0..nb).fold((n_r, 0), |(a, b), i| {
                        (a.min(active[l0 + i].0), b.max(active[l0 + i].1))
                    });
                    if r1 > r0 {
                        let w_sub = r1 - r0;
                        for (ip, &(a, b)) in pairs.iter().enumerate() {
                            for (xaf, zbf) in plan.x[a].iter().zip(&z[fs][b]) {
                                // A = diag((2l+1) P_l) X[a][f][l0..=l1][r0..r1].
                                let xa = &xaf[l0 * n_r..(l1 + 1) * n_r];
                                let za = &zbf[l0 * n_r..(l1 + 1) * n_r];
                                let asc = &mut scratch.a[..nb * n_r];
                                for (li, l) in (l0..=l1).enumerate() {
                                    let fac = (2 * l + 1) as f64 * scratch.pl[l];
                                    let row = li * n_r;
                                    for ir in r0..r1 {
                                        asc[row + ir] = fac * xa[row + ir];
                                    }
                                }
                                // S[r0..r1, r0..r1] += A^T Z.
                                matrixmultiply_safe::dgemm_at_b_sub(
                                    w_sub,
                                    nb,
                                    n_r,
                                    r0,
                                    asc,
                                    za,
                                    &mut scratch.s[ip],
                                );
                            }
                        }
                    }
                    l0 = l1 + 1;
                }
                // Evaluate the products for this cumulative l_max.
                for (st, s) in scratch.st.iter_mut().zip(&scratch.s) {
                    for ir in 0..n_r {
                        for jr in 0..n_r {
                            st[jr * n_r + ir] = s[ir * n_r + jr];
                        }
                    }
                }
                let pick = |leg: Leg| {
                    if leg.1 {
                        &scratch.st[leg.0]
                    } else {
                        &scratch.s[leg.0]
                    }
                };
                for (tp_i, (_, _, list)) in term_pairs.iter().enumerate() {
                    let mut tot = 0.0;
                    for &(c, legs) in list {
                        let (s0, s1, s2) = (pick(legs[0]), pick(legs[1]), pick(legs[2]));
                        let mut sum = 0.0;
                        for ir in 0..n_r {
                            let rows = ir * n_r..(ir + 1) * n_r;
                            let (r0, r1, r2) = (&s0[rows.clone()], &s1[rows.clone()], &s2[rows]);
                            let mut row = 0.0;
                            for jr in 0..n_r {
                                row += w_r[jr] * r0[jr] * r1[jr] * r2[jr];
                            }
                            sum += w_r[ir] * row;
                        }
                        tot += c * sum;
                    }
                    acc[(fs * nm + m) * term_pairs.len() + tp_i] += wmu * tot;
                }
            }
        }
    };
    let n_tp = term_pairs.len();
    let mk_scratch = || Scratch {
        pl: vec![0.0; lmax + 1],
        a: vec![0.0; max_block * n_r],
        s: vec![vec![0.0; n_r * n_r]; pairs.len()],
        st: vec![vec![0.0; n_r * n_r]; pairs.len()],
    };
    let nodes: Vec<(f64, f64)> = gl
        .nodes
        .iter()
        .copied()
        .zip(gl.weights.iter().copied())
        .collect();
    // Fixed chunks of mu nodes, summed in order: the result does not depend on the
    // number of threads, and the serial path gives the same bits.
    let chunk_sum = |chunk: &[(f64, f64)]| {
        let mut acc = vec![0.0; nfs * nm * n_tp];
        let mut sc = mk_scratch();
        for &node in chunk {
            per_mu(node, &mut acc, &mut sc);
        }
        acc
    };
    let parts: Vec<Vec<f64>> = if parallel {
        nodes.par_chunks(8).map(chunk_sum).collect()
    } else {
        nodes.chunks(8).map(chunk_sum).collect()
    };
    let mut total = vec![0.0; nfs * nm * n_tp];
    for p in &parts {
        total.iter_mut().zip(p).for_each(|(x, y)| *x += y);
    }
    let norm = plan.f_sky / (48.0 * std::f64::consts::PI);
    let names: Vec<String> = plan
        .shape_names
        .iter()
        .map(|s| format!("fnl_{s}"))
        .collect();
    let fisher = (0..nfs)
        .map(|fs| {
            (0..nm)
                .map(|m| {
                    let mut data = vec![0.0; ns * ns];
                    for (tp_i, &(i, j, _)) in term_pairs.iter().enumerate() {
                        let v = norm * total[(fs * nm + m) * n_tp + tp_i];
                        data[i * ns + j] = v;
                        data[j * ns + i] = v;
                    }
                    FisherMatrix::from_rows(names.clone(), data)
                })
                .collect()
        })
        .collect();
    CmbForecast {
        lmax: grid,
        field_sets: plan.field_sets.clone(),
        shapes: plan.shape_names.clone(),
        fisher,
    }
}

/// A radial-function pair for one leg: (index of the exponent pair, transposed?).
type Leg = (usize, bool);

/// The term pairs of one shape pair (i, j): (c_t c_u, legs).
type TermPairs = (usize, usize, Vec<(f64, [Leg; 3])>);

struct Scratch {
    pl: Vec<f64>,
    a: Vec<f64>,
    /// Cumulative S_ab per exponent pair (a <= b), n_r x n_r.
    s: Vec<Vec<f64>>,
    /// Their transposes, refreshed after every block.
    st: Vec<Vec<f64>>,
}

fn cinv_entry(c: &[f64; 3], a: Field, b: Field) -> f64 {
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

mod matrixmultiply_safe {
    //! The one place that calls matrixmultiply (its dgemm takes raw pointers).
    #![allow(unsafe_code)]

    /// C[off.., off..] (w x w, leading dimension ld) += A[.., off..]^T B[.., off..], with
    /// A and B k x ld row-major.
    pub fn dgemm_at_b_sub(
        w: usize,
        k: usize,
        ld: usize,
        off: usize,
        a: &[f64],
        b: &[f64],
        c: &mut [f64],
    ) {
        assert!(off + w <= ld && a.len() >= k * ld && b.len() >= k * ld && c.len() >= ld * ld);
        // SAFETY: element (i, p) of A^T is a[p*ld + off + i] with p < k, i < w, so the
        // largest index is (k-1)*ld + off + w - 1 < k*ld <= a.len() (likewise b); C's
        // element (i, j) is c[(off+i)*ld + off + j] < ld*ld <= c.len(); c does not alias
        // a or b (distinct borrows).
        unsafe {
            matrixmultiply::dgemm(
                w,
                k,
                w,
                1.0,
                a.as_ptr().add(off),
                1,
                ld as isize,
                b.as_ptr().add(off),
                ld as isize,
                1,
                1.0,
                c.as_mut_ptr().add(off * ld + off),
                ld as isize,
                1,
            );
        }
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::cmb::experiment::Channel;
    use crate::special::wigner::wigner3j_000_squared;

    pub(crate) const CHI: f64 = 14_000.0;

    /// A toy transfer table: T from a zero-thickness Sachs-Wolfe shell,
    /// Delta^T_l = -(1/3) j_l(k chi) D(k), and (for the oracles only) an E-like field
    /// 0.2 j_l(k (chi - 300)) D(k) min(1, k chi / 20), correlated with T but not nearly
    /// degenerate. D = exp(-(k/k_D)^2) or 1.
    pub(crate) fn toy_table(lmax: usize, k_d: Option<f64>, with_e: bool) -> TransferTable {
        toy_table_k(lmax, k_d, with_e, 4.0)
    }

    /// As [`toy_table`] with k up to `kfac` l_max / chi.
    pub(crate) fn toy_table_k(
        lmax: usize,
        k_d: Option<f64>,
        with_e: bool,
        kfac: f64,
    ) -> TransferTable {
        let kmax = kfac * lmax as f64 / CHI;
        let panel = std::f64::consts::PI / CHI;
        let n_panels = (kmax / panel).ceil() as usize;
        let gl = GaussLegendre::new(6);
        let (mut k, mut wk) = (Vec::new(), Vec::new());
        for p in 0..n_panels {
            let (x, w) = gl.mapped(p as f64 * panel, (p + 1) as f64 * panel);
            k.extend(x);
            wk.extend(w);
        }
        let nl = lmax + 1;
        let mut fields = vec![Field::T];
        if with_e {
            fields.push(Field::E);
        }
        let mut data = vec![vec![0.0; k.len() * nl]; fields.len()];
        let mut j = vec![0.0; nl];
        for (ik, &kk) in k.iter().enumerate() {
            let d = k_d.map_or(1.0, |kd| (-(kk / kd) * (kk / kd)).exp());
            crate::special::bessel::sph_bessel_all_l(lmax as u32, kk * CHI, &mut j);
            for l in 2..nl {
                data[0][ik * nl + l] = -j[l] / 3.0 * d;
            }
            if with_e {
                crate::special::bessel::sph_bessel_all_l(lmax as u32, kk * (CHI - 300.0), &mut j);
                for l in 2..nl {
                    data[1][ik * nl + l] = 0.2 * j[l] * d * (kk * CHI / 20.0).min(1.0);
                }
            }
        }
        TransferTable::new("toy shell", k, wk, lmax, fields, data)
    }

    pub(crate) fn toy_radial(half_width: f64, panels: usize) -> RadialGrid {
        RadialGrid::panels(CHI - half_width, CHI + half_width, panels, 6)
    }

    fn experiment(lmax: usize, noisy: bool) -> Experiment {
        let mut e = Experiment::ideal(lmax);
        e.f_sky = 0.7;
        if noisy {
            e.channels.push(Channel {
                label: "x".into(),
                noise_t_uk_arcmin: 30.0,
                noise_p_uk_arcmin: 42.0,
                fwhm_arcmin: 60.0,
            });
        }
        e
    }

    /// Direct triple sum with exact Wigner 3j, explicit field sums and the plan's radial
    /// integrals: the slow oracle for the fast path.
    fn brute_force(plan: &BispectrumPlan, fs: usize, lmax: usize, f_sky: f64) -> Vec<f64> {
        let ns = plan.terms().len();
        let nf = plan.n_fields();
        let combos: Vec<[usize; 3]> = (0..nf)
            .flat_map(|a| (0..nf).flat_map(move |b| (0..nf).map(move |c| [a, b, c])))
            .collect();
        let fields = |i: usize| plan.fields[i];
        let mut f = vec![0.0; ns * ns];
        for l1 in 2..=lmax {
            for l2 in 2..=lmax {
                for l3 in 2..=lmax {
                    let w2 = wigner3j_000_squared(l1 as u32, l2 as u32, l3 as u32);
                    if w2 == 0.0 {
                        continue;
                    }
                    let g2 = ((2 * l1 + 1) * (2 * l2 + 1) * (2 * l3 + 1)) as f64
                        / (4.0 * std::f64::consts::PI)
                        * w2;
                    let b: Vec<Vec<f64>> = (0..ns)
                        .map(|s| {
                            combos
                                .iter()
                                .map(|c| plan.reduced_bispectrum(s, [l1, l2, l3], *c))
                                .collect()
                        })
                        .collect();
                    let ci = [
                        plan.inverse_covariance(fs, l1),
                        plan.inverse_covariance(fs, l2),
                        plan.inverse_covariance(fs, l3),
                    ];
                    for i in 0..ns {
                        for j in 0..ns {
                            let mut acc = 0.0;
                            for (ia, a) in combos.iter().enumerate() {
                                for (ib, bb) in combos.iter().enumerate() {
                                    let mut c = 1.0;
                                    for leg in 0..3 {
                                        c *= cinv_entry(&ci[leg], fields(a[leg]), fields(bb[leg]));
                                    }
                                    if c != 0.0 {
                                        acc += b[i][ia] * c * b[j][ib];
                                    }
                                }
                            }
                            f[i * ns + j] += g2 * acc;
                        }
                    }
                }
            }
        }
        f.iter().map(|v| v * f_sky / 6.0).collect()
    }

    /// The plan for local f_NL, temperature only, on one l_max.
    fn local_t_plan(
        tr: &TransferTable,
        radial: &RadialGrid,
        exp: &Experiment,
        prim: Primordial,
        lmax: usize,
        parallel: bool,
    ) -> BispectrumPlan {
        BispectrumPlan::new(&CmbFisherInput {
            transfer: tr,
            primordial: prim,
            shapes: &[Shape::Local],
            experiment: exp,
            t_cmb_k: 2.7255,
            lmax_grid: &[lmax],
            field_sets: &[FieldSet::T],
            radial,
            parallel,
        })
    }

    fn shapes() -> Vec<Shape> {
        ["local", "equilateral", "orthogonal", "delta=0.5"]
            .iter()
            .map(|s| s.parse().unwrap())
            .collect()
    }

    #[test]
    fn fast_path_equals_brute_force_for_every_field_set() {
        let lmax = 24;
        let tr = toy_table(lmax, Some(0.02), true);
        let radial = toy_radial(600.0, 8);
        let exp = experiment(lmax, true);
        let sh = shapes();
        let fsets = [FieldSet::T, FieldSet::E, FieldSet::TE];
        let grid = [12, 18, lmax];
        let inp = CmbFisherInput {
            transfer: &tr,
            primordial: Primordial::from_values(2.1e-9, 0.965, 0.05),
            shapes: &sh,
            experiment: &exp,
            t_cmb_k: 2.7255,
            lmax_grid: &grid,
            field_sets: &fsets,
            radial: &radial,
            parallel: false,
        };
        let plan = BispectrumPlan::new(&inp);
        let fast = cmb_fisher_with_plan(&plan, &grid, false);
        let par = cmb_fisher_with_plan(&plan, &grid, true);
        for (ifs, _) in fsets.iter().enumerate() {
            for (m, &lm) in grid.iter().enumerate() {
                let brute = brute_force(&plan, ifs, lm, exp.f_sky);
                let f = &fast.fisher[ifs][m];
                for i in 0..sh.len() {
                    for j in 0..sh.len() {
                        let (a, b) = (f.get(i, j), brute[i * sh.len() + j]);
                        let scale = (f.get(i, i) * f.get(j, j)).sqrt();
                        assert!(
                            (a - b).abs() <= 1e-9 * scale,
                            "fs {ifs} lmax {lm} ({i},{j}): fast {a} brute {b}"
                        );
                        let p = par.fisher[ifs][m].get(i, j);
                        assert_eq!(a, p, "serial and parallel sums must agree to the bit");
                    }
                }
            }
        }
    }

    /// Sachs-Wolfe limit (zero thickness, no damping): b_{l1 l2 l3} = -6 f_NL
    /// [C_l1 C_l2 + C_l2 C_l3 + C_l1 C_l3] for Delta T / T = -Phi / 3 (Komatsu & Spergel
    /// 2001, Eq. 16), including the sign.
    #[test]
    fn sachs_wolfe_local_bispectrum_closed_form() {
        // The zero-thickness kernel converges slowly in k: the tail beyond x = k chi costs
        // about l^2 / (2 x^2) of C_l, so k runs to 20 l_max / chi here.
        let lmax = 60;
        let tr = toy_table_k(lmax, None, false, 20.0);
        let radial = toy_radial(900.0, 240);
        let exp = Experiment::ideal(lmax);
        let prim = Primordial::from_values(2.1e-9, 1.0, 0.05);
        let plan = local_t_plan(&tr, &radial, &exp, prim, lmax, true);
        let cl = tr.cl(&prim, 0, 0);
        // SW plateau check of the toy table itself: l(l+1) C_l / 2 pi = A_s / 25.
        for l in [2usize, 10, 40] {
            let d = (l * (l + 1)) as f64 * cl[l] / (2.0 * std::f64::consts::PI);
            assert!((d / (2.1e-9 / 25.0) - 1.0).abs() < 2e-3, "l={l} {d}");
        }
        let mut worst: f64 = 0.0;
        for l in [
            [2usize, 3, 3],
            [10, 12, 14],
            [20, 20, 20],
            [5, 30, 33],
            [40, 45, 51],
        ] {
            let b = plan.reduced_bispectrum(0, l, [0, 0, 0]);
            let expect = -6.0 * (cl[l[0]] * cl[l[1]] + cl[l[1]] * cl[l[2]] + cl[l[0]] * cl[l[2]]);
            worst = worst.max((b / expect - 1.0).abs());
            assert!((b / expect - 1.0).abs() < 0.01, "{l:?}: {b} vs {expect}");
        }
        println!("Sachs-Wolfe closed form: worst relative deviation {worst:.2e}");
    }

    #[test]
    fn restricted_sum_equals_unrestricted_over_six() {
        // T only: Sum_{l1<=l2<=l3} G^2 b^2 / (Delta C C C) = (1/6) Sum over all l.
        let lmax = 20;
        let tr = toy_table(lmax, Some(0.01), false);
        let radial = toy_radial(500.0, 6);
        let exp = experiment(lmax, false);
        let prim = Primordial::from_values(2.1e-9, 0.965, 0.05);
        let plan = local_t_plan(&tr, &radial, &exp, prim, lmax, false);
        let cl = tr.cl(&prim, 0, 0);
        let mut restricted = 0.0;
        for l1 in 2..=lmax {
            for l2 in l1..=lmax {
                for l3 in l2..=lmax {
                    let w2 = wigner3j_000_squared(l1 as u32, l2 as u32, l3 as u32);
                    let g2 = ((2 * l1 + 1) * (2 * l2 + 1) * (2 * l3 + 1)) as f64
                        / (4.0 * std::f64::consts::PI)
                        * w2;
                    let delta = if l1 == l2 && l2 == l3 {
                        6.0
                    } else if l1 == l2 || l2 == l3 {
                        2.0
                    } else {
                        1.0
                    };
                    let b = plan.reduced_bispectrum(0, [l1, l2, l3], [0, 0, 0]);
                    restricted += g2 * b * b / (delta * cl[l1] * cl[l2] * cl[l3]);
                }
            }
        }
        let fast = cmb_fisher_with_plan(&plan, &[lmax], false);
        let f = fast.fisher[0][0].get(0, 0) / exp.f_sky;
        assert!((f / restricted - 1.0).abs() < 1e-9, "{f} vs {restricted}");
    }

    #[test]
    fn legendre_recurrence() {
        let mut p = vec![0.0; 6];
        legendre_all(5, 0.3, &mut p);
        let x: f64 = 0.3;
        let p5 = (63.0 * x.powi(5) - 70.0 * x.powi(3) + 15.0 * x) / 8.0;
        assert!((p[5] - p5).abs() < 1e-15);
    }
}
