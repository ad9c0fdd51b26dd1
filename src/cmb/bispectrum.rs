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
use crate::cmb::lensing::LensedSpectra;
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
    /// Signal spectra of the covariance (e.g. lensed); `None`: the unlensed C_l of the
    /// transfer table.
    pub signal_cl: Option<&'a LensedSpectra>,
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
    /// What the engine did (sizes, operation counts).
    #[serde(skip)]
    pub stats: EngineStats,
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
        // X[r][e][f][l], computed per r in parallel, then transposed. At x = k r every
        // l beyond l_cut(x) is dropped (|j_l| < 1e-6 of its maximum there); where
        // x > l_max + 1 the upward recurrence is stable for every l and runs for four k
        // side by side, fused with the accumulation (as in the line-of-sight module).
        let prim = inp.primordial;
        // A cosine taper over the last K_TAPER of the k range of a table marked as cut where
        // the transfer functions are not yet negligible (the Boltzmann tables end at
        // k chi_* = 2.1 l_max + 600, beyond the 2 l_max that triangles need) makes the
        // radial functions ring in r, spreading them over the whole radial grid. Measured
        // at l_max = 1500 (full transfer, T, E, T+E, three shapes): with the taper sigma
        // stays within 0.1% of a table reaching twice as far, and the engine runs 3x
        // faster than without it.
        let k_top = tr.k().last().copied().unwrap_or(1.0);
        let taper_frac = if tr.k_truncated() { K_TAPER } else { 0.0 };
        let coefs: Vec<Vec<f64>> = tr
            .k()
            .iter()
            .zip(tr.weights())
            .map(|(&k, &w)| {
                let pk = prim.p_phi(k);
                let k_t = (1.0 - taper_frac) * k_top;
                let taper = if taper_frac > 0.0 && k > k_t {
                    0.5 * (1.0 + (std::f64::consts::PI * (k - k_t) / (k_top - k_t)).cos())
                } else {
                    1.0
                };
                exponents
                    .iter()
                    .map(|&p| 2.0 / std::f64::consts::PI * w * taper * k * k * pk.powf(p))
                    .collect()
            })
            .collect();
        let per_r = |ir: usize| -> Vec<f64> {
            let r = inp.radial.r[ir];
            let mut out = vec![0.0; ne * nf * nl];
            let mut j = vec![0.0; nl + 1];
            let mut lanes: Vec<usize> = Vec::with_capacity(XLANES);
            let mut jbuf = vec![0.0; XLANES * nl];
            let mut dbuf = vec![0.0; XLANES * nl];
            for ik in 0..tr.k().len() {
                let x = tr.k()[ik] * r;
                if x >= (lmax + 2) as f64 {
                    lanes.push(ik);
                    if lanes.len() == XLANES {
                        radial_lanes(tr, &coefs, &lanes, r, nl, &mut out, &mut jbuf, &mut dbuf);
                        lanes.clear();
                    }
                    continue;
                }
                let lc = crate::special::bessel::l_cut(x).min(lmax);
                crate::special::bessel::sph_bessel_all_l(lc as u32, x, &mut j[..=lc]);
                for f in 0..nf {
                    let g = &tr.row(f, ik)[..=lc];
                    for (e, &c) in coefs[ik].iter().enumerate() {
                        let o = &mut out[(e * nf + f) * nl..(e * nf + f) * nl + lc + 1];
                        for ((o, &g), &jl) in o.iter_mut().zip(g).zip(&j[..=lc]) {
                            *o += c * g * jl;
                        }
                    }
                }
            }
            if !lanes.is_empty() {
                radial_lanes(tr, &coefs, &lanes, r, nl, &mut out, &mut jbuf, &mut dbuf);
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
        let cinv = inverse_covariances(
            tr,
            &prim,
            inp.experiment,
            inp.t_cmb_k,
            inp.field_sets,
            lmax,
            inp.signal_cl,
        );
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
        signal_cl: Option<&LensedSpectra>,
    ) -> Self {
        Self {
            cinv: inverse_covariances(
                tr,
                prim,
                exp,
                t_cmb_k,
                &self.field_sets,
                self.lmax,
                signal_cl,
            ),
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

    /// The sky fraction of the experiment the plan carries.
    pub fn f_sky(&self) -> f64 {
        self.f_sky
    }

    /// The field sets the plan's inverse covariances are for (in `inverse_covariance`'s
    /// index order).
    pub fn field_sets(&self) -> &[FieldSet] {
        &self.field_sets
    }

    /// The highest multipole of the radial functions.
    pub fn lmax(&self) -> usize {
        self.lmax
    }

    /// Number of radial nodes.
    pub fn n_radial(&self) -> usize {
        self.n_r
    }

    /// The transfer table's fields, in the order of the radial functions' field index.
    pub fn fields(&self) -> &[Field] {
        &self.fields
    }
}

/// Fraction of the transfer table's k range over which the radial functions' k
/// integrand is tapered to zero (see [`BispectrumPlan::new`]).
const K_TAPER: f64 = 0.2;

/// Lanes of the fused radial-function kernel.
const XLANES: usize = 4;

/// Adds the contributions of up to four k nodes (all with k r > l_max + 1) to the radial
/// functions at r: out[(e nf + f) nl + l] += c_e(k) Delta^f_l(k) j_l(k r), with j_l from
/// the upward recurrence from the exact j_0, j_1 (stable below the turning point), run
/// for the lanes side by side into `jbuf` (XLANES x nl); then every accumulation is a
/// contiguous loop over l. `dbuf` is scratch of the same size.
#[allow(clippy::too_many_arguments)]
fn radial_lanes(
    tr: &TransferTable,
    coefs: &[Vec<f64>],
    lanes: &[usize],
    r: f64,
    nl: usize,
    out: &mut [f64],
    jbuf: &mut [f64],
    dbuf: &mut [f64],
) {
    let nf = tr.fields().len();
    let ne = coefs.first().map_or(0, Vec::len);
    let n = lanes.len();
    let mut ix = [0.0; XLANES];
    let mut jm = [0.0; XLANES];
    let mut jc = [0.0; XLANES];
    for (g, &ik) in lanes.iter().enumerate() {
        let x = tr.k()[ik] * r;
        let (s, c) = x.sin_cos();
        ix[g] = 1.0 / x;
        jm[g] = s / x;
        jc[g] = (s / x - c) / x;
    }
    // Recurrence, lanes interleaved: jbuf[g * nl + l].
    for g in 0..n {
        jbuf[g * nl] = jm[g];
        if nl > 1 {
            jbuf[g * nl + 1] = jc[g];
        }
    }
    for l in 2..nl {
        let tl = (2 * l - 1) as f64;
        for g in 0..n {
            let jp = tl * ix[g] * jc[g] - jm[g];
            jm[g] = jc[g];
            jc[g] = jp;
            jbuf[g * nl + l] = jp;
        }
    }
    for f in 0..nf {
        // d_g(l) = Delta^f_l(k_g) j_l(k_g r).
        for (g, &ik) in lanes.iter().enumerate() {
            let row = &tr.row(f, ik)[..nl];
            let jl = &jbuf[g * nl..(g + 1) * nl];
            let d = &mut dbuf[g * nl..(g + 1) * nl];
            for ((d, &t), &j) in d.iter_mut().zip(row).zip(jl) {
                *d = t * j;
            }
        }
        for e in 0..ne {
            let o = &mut out[(e * nf + f) * nl..(e * nf + f + 1) * nl];
            let mut g = 0;
            while g + 1 < n {
                let (c0, c1) = (coefs[lanes[g]][e], coefs[lanes[g + 1]][e]);
                let d0 = &dbuf[g * nl..(g + 1) * nl];
                let d1 = &dbuf[(g + 1) * nl..(g + 2) * nl];
                for ((o, &a), &b) in o.iter_mut().zip(d0).zip(d1) {
                    *o += c0 * a + c1 * b;
                }
                g += 2;
            }
            if g < n {
                let c0 = coefs[lanes[g]][e];
                for (o, &a) in o.iter_mut().zip(&dbuf[g * nl..(g + 1) * nl]) {
                    *o += c0 * a;
                }
            }
        }
    }
}

/// Inverse covariance [TT, TE, EE] per field set and l (zero outside the experiment's
/// ranges): C = C_l (from the transfer table, or the given signal spectra, e.g. lensed)
/// + N_l (the experiment's noise).
fn inverse_covariances(
    tr: &TransferTable,
    prim: &Primordial,
    exp: &Experiment,
    t_cmb_k: f64,
    field_sets: &[FieldSet],
    lmax: usize,
    signal: Option<&LensedSpectra>,
) -> Vec<Vec<[f64; 3]>> {
    let nl = lmax + 1;
    let prim = *prim;
    let it = tr.field_index(Field::T);
    let ie = tr.field_index(Field::E);
    let cl = |a: Option<usize>, b: Option<usize>| match (a, b) {
        (Some(a), Some(b)) => tr.cl(&prim, a, b),
        _ => vec![0.0; tr.lmax() + 1],
    };
    let (ctt, cte, cee) = match signal {
        // The lensed spectra must cover every l of the sum (checked by the caller).
        Some(s) => {
            assert!(
                s.tt.len() > lmax,
                "signal spectra end below the Fisher sum's l_max"
            );
            (s.tt.clone(), s.te.clone(), s.ee.clone())
        }
        None => (cl(it, it), cl(it, ie), cl(ie, ie)),
    };
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

/// Largest number of multipoles in one compressed block. Measured at l_max = 3000 (mu sums,
/// full transfer, T+E, on a shared machine): 9.9 s with 64, 8.5 s with 128, 16.6 s with
/// 256 (the rank grows with the block).
const BLOCK: usize = 128;

/// Default accuracy of the block-compressed radial functions: every multipole's radial
/// functions (all exponents and fields, each normalized over its block) are reproduced
/// to this relative accuracy (see [`cmb_fisher_with_plan`]).
/// Measured on the full transfer at l_max = 3000 (T+E, three shapes): 1e-5 moves
/// sigma(f_NL) by < 1e-6 relative against 1e-6, with half the rank.
pub const DEFAULT_COMPRESSION_TOL: f64 = 1e-5;

/// Radial nodes where every radial function at a given l is below this fraction of its
/// peak at that l are left out of that l's products: it makes the high-l blocks work on
/// the last-scattering shell only. Measured on the full transfer at l_max = 3000 (T+E,
/// local, equilateral, orthogonal): 1e-4 moves sigma(f_NL) by < 1e-6 relative against
/// 1e-5 (1e-3 would move it by 6e-5), far below the radial quadrature error.
const ACTIVE_TOL: f64 = 1e-4;

/// What the engine did: sizes and operation counts (for benchmarks and logs).
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct EngineStats {
    /// Gauss-Legendre nodes in mu.
    pub mu_nodes: usize,
    /// Multipole blocks.
    pub blocks: usize,
    /// Mean and largest rank of the compressed blocks.
    pub mean_rank: f64,
    /// Largest rank.
    pub max_rank: usize,
    /// Mean width of the active radial ranges.
    pub mean_width: f64,
    /// Distinct triple products per l_max grid point (after symmetry reduction).
    pub triples: usize,
    /// Last multipole of the low-l part, when the low/high split is used.
    pub split_lmax: Option<usize>,
    /// Width of the core radial range of the high-l part.
    pub core_width: Option<usize>,
    /// Floating-point operations in the matrix products (dgemm), all mu nodes.
    pub gemm_flops: f64,
    /// Floating-point operations in the triple products, all mu nodes.
    pub triple_flops: f64,
    /// The compression tolerance used.
    pub compression_tol: f64,
}

/// Runs the fast engine.
pub fn cmb_fisher(inp: &CmbFisherInput<'_>) -> CmbForecast {
    let plan = BispectrumPlan::new(inp);
    cmb_fisher_with_plan(&plan, inp.lmax_grid, inp.parallel)
}

/// One block of multipoles [l0, l1] (inside one l_max segment) and its low-rank basis on
/// the active radial range [r0, r0 + w): X^{e,f}_l(r) ~= Sum_q u[l - l0][q] v[e][(f q), r].
struct LBlock {
    l0: usize,
    l1: usize,
    /// Index of the l_max segment the block belongs to; `last` marks its final block.
    seg: usize,
    last: bool,
    r0: usize,
    w: usize,
    q: usize,
    /// Per field set: the fields [lo, hi) with a non-zero inverse covariance somewhere in
    /// the block (T, E or both: a contiguous range of the table's field indices).
    active_fields: Vec<(usize, usize)>,
    /// nb x q, row-major.
    u: Vec<f64>,
    /// Per exponent: (n_fields q) x w, row (f q + j).
    v: Vec<Vec<f64>>,
}

/// Row-pivoted modified Gram-Schmidt on the block's radial functions (an interpolative,
/// rank-revealing decomposition; Golub & Van Loan, section 5.4.2): the rows (multipoles)
/// are the radial functions of all exponents and fields, each (exponent, field) group
/// scaled by its norm over the block and each row then normalized, so the stopping rule
/// "largest residual row norm <= tol" bounds every multipole's relative error.
fn compress_block(
    plan: &BispectrumPlan,
    l0: usize,
    l1: usize,
    r0: usize,
    r1: usize,
    tol: f64,
) -> (usize, Vec<f64>, Vec<Vec<f64>>) {
    let n_r = plan.n_r;
    let ne = plan.exponents.len();
    let nf = plan.fields.len();
    let nb = l1 - l0 + 1;
    let w = r1 - r0;
    let ng = ne * nf;
    let ncol = ng * w;
    let mut group_norm = vec![0.0; ng];
    for e in 0..ne {
        for f in 0..nf {
            let x = &plan.x[e][f];
            let s: f64 = (l0..=l1)
                .map(|l| {
                    x[l * n_r + r0..l * n_r + r1]
                        .iter()
                        .map(|v| v * v)
                        .sum::<f64>()
                })
                .sum();
            group_norm[e * nf + f] = s.sqrt();
        }
    }
    // Scaled rows, then normalized: res[l] (nb x ncol).
    let mut res = vec![0.0; nb * ncol];
    let mut d = vec![0.0; nb];
    for (li, l) in (l0..=l1).enumerate() {
        let row = &mut res[li * ncol..(li + 1) * ncol];
        for e in 0..ne {
            for f in 0..nf {
                let g = e * nf + f;
                if group_norm[g] == 0.0 {
                    continue;
                }
                let src = &plan.x[e][f][l * n_r + r0..l * n_r + r1];
                for (o, s) in row[g * w..(g + 1) * w].iter_mut().zip(src) {
                    *o = s / group_norm[g];
                }
            }
        }
        let norm = row.iter().map(|v| v * v).sum::<f64>().sqrt();
        if norm > 0.0 {
            row.iter_mut().for_each(|v| *v /= norm);
        }
        d[li] = norm;
    }
    let floor = if tol > 0.0 { tol * tol } else { 1e-28 };
    let mut res2: Vec<f64> = (0..nb)
        .map(|li| if d[li] > 0.0 { 1.0 } else { 0.0 })
        .collect();
    let mut basis: Vec<Vec<f64>> = Vec::new();
    let mut coef: Vec<Vec<f64>> = vec![Vec::new(); nb];
    while let Some((piv, &best)) = res2.iter().enumerate().max_by(|a, b| a.1.total_cmp(b.1)) {
        if best <= floor || basis.len() == nb {
            break;
        }
        let mut qv = res[piv * ncol..(piv + 1) * ncol].to_vec();
        // Re-orthogonalize once against the basis (Gram-Schmidt twice is enough).
        for b in &basis {
            let c: f64 = qv.iter().zip(b).map(|(x, y)| x * y).sum();
            qv.iter_mut().zip(b).for_each(|(x, y)| *x -= c * y);
        }
        let norm = qv.iter().map(|v| v * v).sum::<f64>().sqrt();
        if norm <= 1e-15 {
            res2[piv] = 0.0;
            continue;
        }
        qv.iter_mut().for_each(|v| *v /= norm);
        for li in 0..nb {
            let row = &mut res[li * ncol..(li + 1) * ncol];
            let c: f64 = row.iter().zip(&qv).map(|(x, y)| x * y).sum();
            row.iter_mut().zip(&qv).for_each(|(x, y)| *x -= c * y);
            coef[li].push(c);
            res2[li] = if d[li] > 0.0 {
                row.iter().map(|v| v * v).sum()
            } else {
                0.0
            };
        }
        basis.push(qv);
    }
    let q = basis.len();
    let mut u = vec![0.0; nb * q];
    for li in 0..nb {
        for j in 0..q {
            u[li * q + j] = d[li] * coef[li][j];
        }
    }
    let v: Vec<Vec<f64>> = (0..ne)
        .map(|e| {
            let mut out = vec![0.0; nf * q * w];
            for f in 0..nf {
                let g = e * nf + f;
                for (j, b) in basis.iter().enumerate() {
                    let dst = &mut out[(f * q + j) * w..(f * q + j + 1) * w];
                    for (o, s) in dst.iter_mut().zip(&b[g * w..(g + 1) * w]) {
                        *o = group_norm[g] * s;
                    }
                }
            }
            out
        })
        .collect();
    (q, u, v)
}

/// Runs the fast engine on a prepared plan.
///
/// Scheme: the l range is cut into blocks of at most [`BLOCK`] multipoles that end at the
/// l_max grid values. In each block the radial functions are compressed to a basis of
/// rank q (6-11 for 128 multipoles above l = 100 at the default tolerance, about 50 for
/// l = 2..100; measured on the full transfer): X^{e,f}_l(r) ~= Sum_q U_lq V^{e,f}_q(r)
/// (`compress_block`). Then per mu node S_ab += V_a^T M V_b with
/// M_{fq,f'q'} = Sum_l (2l+1) P_l(mu) C^-1_{l,ff'} U_lq U_lq', so the matrix products have
/// inner dimension (fields x q) instead of (fields x multipoles). A low/high-l split
/// (`choose_split`, exact) runs the low multipoles, whose radial functions spread over
/// the whole radial grid, with a mu rule of their own and the rest on the shell's radial
/// core only. With tolerance 0 the basis is complete and the engine is exact (it equals
/// the brute-force triple sum to rounding); the default tolerance and `ACTIVE_TOL`
/// change sigma(f_NL) by < 1e-5 relative for l_max >= 300 and ~1e-4 at l_max = 100, where
/// the shapes are nearly degenerate (measured; see tests/cmb_engine.rs).
pub fn cmb_fisher_with_plan(
    plan: &BispectrumPlan,
    lmax_grid: &[usize],
    parallel: bool,
) -> CmbForecast {
    cmb_fisher_with_options(plan, lmax_grid, parallel, &EngineOptions::default())
}

/// The engine with explicit options.
pub fn cmb_fisher_with_options(
    plan: &BispectrumPlan,
    lmax_grid: &[usize],
    parallel: bool,
    opts: &EngineOptions,
) -> CmbForecast {
    let tol = opts.tol;
    let lmax = plan.lmax;
    let grid: Vec<usize> = lmax_grid.iter().map(|&l| l.min(lmax)).collect();
    let n_mu = (3 * lmax).div_ceil(2) + 1;
    let ns = plan.terms.len();
    let nfs = plan.field_sets.len();
    let nm = grid.len();
    let ne = plan.exponents.len();
    let n_r = plan.n_r;
    let nf = plan.fields.len();
    // Blocks of l: (lo, hi] per grid point; l < 2 never enters (Cinv = 0 there).
    let mut edges = vec![1usize];
    edges.extend(&grid);
    let pairs: Vec<(usize, usize)> = (0..ne).flat_map(|a| (a..ne).map(move |b| (a, b))).collect();
    let pair_index = |a: usize, b: usize| -> Leg {
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
    // Shape pairs (i <= j), and the distinct triple products with their coefficient per
    // shape pair. Sum_{r r'} w w S_x S_y S_z is invariant under permuting the three legs
    // and under transposing all three at once, so each triple is stored in a canonical
    // order and shared by every shape pair that needs it.
    let shape_pairs: Vec<(usize, usize)> =
        (0..ns).flat_map(|i| (i..ns).map(move |j| (i, j))).collect();
    let n_sp = shape_pairs.len();
    let mut triples: Vec<([Leg; 3], Vec<f64>)> = Vec::new();
    for (sp, &(i, j)) in shape_pairs.iter().enumerate() {
        for &(ct, et) in &reps[i] {
            for &(cu, eu) in &plan.terms[j] {
                let legs = [
                    pair_index(et[0], eu[0]),
                    pair_index(et[1], eu[1]),
                    pair_index(et[2], eu[2]),
                ];
                let key = canonical_triple(legs);
                let idx = match triples.iter().position(|t| t.0 == key) {
                    Some(k) => k,
                    None => {
                        triples.push((key, vec![0.0; n_sp]));
                        triples.len() - 1
                    }
                };
                triples[idx].1[sp] += ct * cu;
            }
        }
    }
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
    // The blocks and their compressed bases.
    let mut spans: Vec<(usize, usize, usize, bool)> = Vec::new();
    for (m, wnd) in edges.windows(2).enumerate() {
        let (lo, hi) = (wnd[0] + 1, wnd[1]);
        if hi < lo {
            spans.push((lo, lo - 1, m, true));
            continue;
        }
        let mut l0 = lo;
        while l0 <= hi {
            let rest = hi - l0 + 1;
            let nblk = rest.div_ceil(BLOCK);
            let size = rest.div_ceil(nblk);
            let l1 = (l0 + size - 1).min(hi);
            spans.push((l0, l1, m, l1 == hi));
            l0 = l1 + 1;
        }
    }
    // Per field set, the fields in use over [l0, l1].
    let active_fields = |l0: usize, l1: usize| -> Vec<(usize, usize)> {
        (0..nfs)
            .map(|fs| {
                let (mut lo, mut hi) = (nf, 0);
                for ci in &plan.cinv[fs][l0..=l1] {
                    for f in 0..nf {
                        if cinv_entry(ci, plan.fields[f], plan.fields[f]) != 0.0 {
                            lo = lo.min(f);
                            hi = hi.max(f + 1);
                        }
                    }
                }
                if hi > lo { (lo, hi) } else { (0, 0) }
            })
            .collect()
    };
    let build = |&(l0, l1, seg, last): &(usize, usize, usize, bool)| -> LBlock {
        let empty = |l1: usize| LBlock {
            l0,
            l1,
            seg,
            last,
            r0: 0,
            w: 0,
            q: 0,
            active_fields: vec![(0, 0); nfs],
            u: Vec::new(),
            v: vec![Vec::new(); ne],
        };
        if l1 < l0 {
            return empty(l0);
        }
        let (r0, r1) = (l0..=l1).fold((n_r, 0), |(a, b), l| {
            (a.min(active[l].0), b.max(active[l].1))
        });
        if r1 <= r0 {
            return empty(l1);
        }
        let (q, u, v) = compress_block(plan, l0, l1, r0, r1, tol);
        LBlock {
            l0,
            l1,
            seg,
            last,
            r0,
            w: r1 - r0,
            q,
            active_fields: active_fields(l0, l1),
            u,
            v,
        }
    };
    let blocks: Vec<LBlock> = if parallel {
        spans.par_iter().map(build).collect()
    } else {
        spans.iter().map(build).collect()
    };
    let max_q = blocks.iter().map(|b| b.q).max().unwrap_or(0);
    let max_w = blocks.iter().map(|b| b.w).max().unwrap_or(0);
    if std::env::var_os("NGREACH_DEBUG_ACTIVE").is_some() {
        for b in &blocks {
            eprintln!(
                "block l {}..={}: radial {}..{} rank {}",
                b.l0,
                b.l1,
                b.r0,
                b.r0 + b.w,
                b.q
            );
        }
    }
    let w_r = &plan.radial_w;
    let n_tr = triples.len();
    let n_pairs = pairs.len();
    // Split into a low-l and a high-l part (exact; see `choose_split`): pass 1 runs the
    // blocks up to the split on the full radial range with a small mu rule, pass 2 all
    // blocks on the core radial range with the full rule.
    let split = if opts.split {
        choose_split(&blocks, &grid, n_r, n_pairs, n_tr, nf, lmax)
    } else {
        None
    };
    let mut passes: Vec<Pass> = Vec::new();
    match split {
        Some((s, core)) => {
            let l_s = blocks[s].l1;
            passes.push(Pass {
                n_mu: (3 * l_s).div_ceil(2) + 1,
                blocks: 0..s + 1,
                outputs: 0..s + 1,
                clip: (0, n_r),
                outside: Some(core),
            });
            passes.push(Pass {
                n_mu,
                blocks: 0..blocks.len(),
                outputs: s + 1..blocks.len(),
                clip: core,
                outside: None,
            });
        }
        None => passes.push(Pass {
            n_mu,
            blocks: 0..blocks.len(),
            outputs: 0..blocks.len(),
            clip: (0, n_r),
            outside: None,
        }),
    }
    // acc[(fs, slot, triple)], slot nm = the outside-core part of the low blocks.
    let n_slot = nm + 1;
    let mut total = vec![0.0; nfs * n_slot * n_tr];
    let mut gemm_flops = 0.0;
    let mut triple_flops = 0.0;
    for pass in &passes {
        let (c0, c1) = pass.clip;
        let outputs = |bi: usize| blocks[bi].last && pass.outputs.contains(&bi);
        // One mu node: adds its contributions to acc[(fs, slot, triple)].
        let per_mu = |(mu, wmu): (f64, f64), acc: &mut Vec<f64>, sc: &mut Scratch| {
            legendre_all(lmax, mu, &mut sc.pl);
            for fs in 0..nfs {
                for v in &mut sc.s {
                    for ir in c0..c1 {
                        v[ir * n_r + c0..ir * n_r + c1].fill(0.0);
                    }
                }
                for bi in pass.blocks.clone() {
                    let blk = &blocks[bi];
                    // The block's radial range clipped to this pass's range.
                    let (a0, a1) = (blk.r0.max(c0), (blk.r0 + blk.w).min(c1));
                    if blk.q > 0 && a1 > a0 {
                        block_update(plan, blk, fs, (a0, a1), &pairs, sc);
                    }
                    if outputs(bi) {
                        let base = (fs * n_slot + blk.seg) * n_tr;
                        sc.refresh_transposes(n_r, (c0, c1));
                        for (k, (legs, _)) in triples.iter().enumerate() {
                            acc[base + k] += wmu * sc.triple(*legs, w_r, n_r, (c0, c1));
                        }
                    }
                    if bi + 1 == pass.blocks.end {
                        if let Some((k0, k1)) = pass.outside {
                            let base = (fs * n_slot + nm) * n_tr;
                            sc.refresh_transposes(n_r, (0, n_r));
                            for (k, (legs, _)) in triples.iter().enumerate() {
                                let all = sc.triple(*legs, w_r, n_r, (0, n_r));
                                let core = sc.triple(*legs, w_r, n_r, (k0, k1));
                                acc[base + k] += wmu * (all - core);
                            }
                        }
                    }
                }
            }
        };
        let mk_scratch = || Scratch {
            pl: vec![0.0; lmax + 1],
            m: vec![0.0; (nf * max_q).pow(2)],
            wm: vec![vec![0.0; nf * max_q * max_w]; ne],
            s: vec![vec![0.0; n_r * n_r]; n_pairs],
            st: vec![vec![0.0; n_r * n_r]; n_pairs],
        };
        let gl = GaussLegendre::new(pass.n_mu);
        let nodes: Vec<(f64, f64)> = gl
            .nodes
            .iter()
            .copied()
            .zip(gl.weights.iter().copied())
            .collect();
        // Fixed chunks of mu nodes, summed in order: the result does not depend on the
        // number of threads, and the serial path gives the same bits.
        let chunk_sum = |chunk: &[(f64, f64)]| {
            let mut acc = vec![0.0; nfs * n_slot * n_tr];
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
        for p in &parts {
            total.iter_mut().zip(p).for_each(|(x, y)| *x += y);
        }
        // Operation counts.
        for fs in 0..nfs {
            for bi in pass.blocks.clone() {
                let b = &blocks[bi];
                let w = (b.r0 + b.w).min(c1).saturating_sub(b.r0.max(c0)) as f64;
                let (f_lo, f_hi) = b.active_fields[fs];
                let nq = ((f_hi - f_lo) * b.q) as f64;
                gemm_flops += pass.n_mu as f64
                    * 2.0
                    * (ne as f64 * nq * nq * w + n_pairs as f64 * w * w * nq);
                if outputs(bi) {
                    triple_flops +=
                        pass.n_mu as f64 * n_tr as f64 * 4.0 * ((c1 - c0) * (c1 - c0)) as f64;
                }
            }
            if pass.outside.is_some() {
                triple_flops += pass.n_mu as f64 * n_tr as f64 * 8.0 * (n_r * n_r) as f64;
            }
        }
    }
    let norm = plan.f_sky / (48.0 * std::f64::consts::PI);
    let names: Vec<String> = plan
        .shape_names
        .iter()
        .map(|s| format!("fnl_{s}"))
        .collect();
    // Segments output in pass 2 get the outside-core part of the low blocks.
    let seg_in_pass2: Vec<bool> = (0..nm)
        .map(|m| {
            split.is_some()
                && blocks.iter().enumerate().any(|(bi, b)| {
                    b.last && b.seg == m && passes[passes.len() - 1].outputs.contains(&bi)
                })
        })
        .collect();
    let fisher = (0..nfs)
        .map(|fs| {
            (0..nm)
                .map(|m| {
                    let mut data = vec![0.0; ns * ns];
                    for (sp, &(i, j)) in shape_pairs.iter().enumerate() {
                        let v: f64 = triples
                            .iter()
                            .enumerate()
                            .map(|(k, t)| {
                                let mut x = total[(fs * n_slot + m) * n_tr + k];
                                if seg_in_pass2[m] {
                                    x += total[(fs * n_slot + nm) * n_tr + k];
                                }
                                t.1[sp] * x
                            })
                            .sum::<f64>()
                            * norm;
                        data[i * ns + j] = v;
                        data[j * ns + i] = v;
                    }
                    FisherMatrix::from_rows(names.clone(), data)
                })
                .collect()
        })
        .collect();
    let n_blk = blocks.iter().filter(|b| b.q > 0).count().max(1) as f64;
    let stats = EngineStats {
        mu_nodes: n_mu,
        blocks: blocks.len(),
        mean_rank: blocks.iter().map(|b| b.q as f64).sum::<f64>() / n_blk,
        max_rank: max_q,
        mean_width: blocks.iter().map(|b| b.w as f64).sum::<f64>() / n_blk,
        triples: n_tr,
        split_lmax: split.map(|(s, _)| blocks[s].l1),
        core_width: split.map(|(_, (c0, c1))| c1 - c0),
        gemm_flops,
        triple_flops,
        compression_tol: opts.tol,
    };
    CmbForecast {
        lmax: grid,
        field_sets: plan.field_sets.clone(),
        shapes: plan.shape_names.clone(),
        fisher,
        stats,
    }
}

/// Engine options.
#[derive(Debug, Clone, Copy)]
pub struct EngineOptions {
    /// Compression tolerance of the radial functions per block (0 = exact).
    pub tol: f64,
    /// Allow the low-l / high-l split (exact; off only to test it).
    pub split: bool,
}

impl Default for EngineOptions {
    fn default() -> Self {
        Self {
            tol: DEFAULT_COMPRESSION_TOL,
            split: true,
        }
    }
}

/// One pass over mu nodes.
struct Pass {
    n_mu: usize,
    blocks: std::ops::Range<usize>,
    /// Blocks whose segment end (an l_max grid point) this pass evaluates.
    outputs: std::ops::Range<usize>,
    /// Radial range the S matrices are accumulated and evaluated on.
    clip: (usize, usize),
    /// After the last block: the triple products outside core x core (the core given).
    outside: Option<(usize, usize)>,
}

/// The low/high split (exact). Radial functions of high l live on a narrow core of the
/// radial grid (the last-scattering shell); those of low l spread over all of it (ISW,
/// reionization). With S = S_low + S_high and S_high zero outside core x core,
/// Sum_{r r'} S S S = Sum_{outside core^2} S_low S_low S_low + Sum_{core^2} S S S. The
/// first term is a polynomial of degree 3 l_split in mu, integrated exactly by a rule of
/// ceil(3 l_split / 2) + 1 nodes; only the second needs the full rule, and it works on
/// the core only. Returns the index of the last low block and the core, choosing the
/// split with the smallest operation count (None: no split pays).
fn choose_split(
    blocks: &[LBlock],
    grid: &[usize],
    n_r: usize,
    n_pairs: usize,
    n_tr: usize,
    nf: usize,
    lmax: usize,
) -> Option<(usize, (usize, usize))> {
    let n_mu = |l: usize| ((3 * l).div_ceil(2) + 1) as f64;
    let block_cost = |b: &LBlock, c0: usize, c1: usize| -> f64 {
        let w = (b.r0 + b.w).min(c1).saturating_sub(b.r0.max(c0)) as f64;
        let nq = (nf * b.q) as f64;
        2.0 * n_pairs as f64 * w * w * nq
    };
    let triple_cost = |w: usize| (4 * n_tr * w * w) as f64;
    let outputs_after = |l: usize| grid.iter().filter(|&&g| g > l).count();
    let outputs_upto = |l: usize| grid.iter().filter(|&&g| g <= l).count();
    let none: f64 = n_mu(lmax)
        * (blocks.iter().map(|b| block_cost(b, 0, n_r)).sum::<f64>()
            + grid.len() as f64 * triple_cost(n_r));
    let mut best: Option<(f64, usize, (usize, usize))> = None;
    for s in 0..blocks.len().saturating_sub(1) {
        let rest = &blocks[s + 1..];
        let (c0, c1) = rest
            .iter()
            .filter(|b| b.w > 0)
            .fold((n_r, 0), |(a, z), b| (a.min(b.r0), z.max(b.r0 + b.w)));
        if c1 <= c0 || (c0 == 0 && c1 == n_r) {
            continue;
        }
        let l_s = blocks[s].l1;
        let pass1 = n_mu(l_s)
            * (blocks[..=s]
                .iter()
                .map(|b| block_cost(b, 0, n_r))
                .sum::<f64>()
                + outputs_upto(l_s) as f64 * triple_cost(n_r)
                + 2.0 * triple_cost(n_r));
        let pass2 = n_mu(lmax)
            * (blocks.iter().map(|b| block_cost(b, c0, c1)).sum::<f64>()
                + outputs_after(l_s) as f64 * triple_cost(c1 - c0));
        let cost = pass1 + pass2;
        if best.as_ref().is_none_or(|b| cost < b.0) {
            best = Some((cost, s, (c0, c1)));
        }
    }
    best.filter(|b| b.0 < 0.9 * none).map(|b| (b.1, b.2))
}

/// Adds one block's contribution at one mu node to the S matrices of field set `fs`, on
/// the radial range [a0, a1) (within the block's own range): S_ab += V_a^T M V_b.
fn block_update(
    plan: &BispectrumPlan,
    blk: &LBlock,
    fs: usize,
    (a0, a1): (usize, usize),
    pairs: &[(usize, usize)],
    sc: &mut Scratch,
) {
    let n_r = plan.n_r;
    let q = blk.q;
    let (f_lo, f_hi) = blk.active_fields[fs];
    if f_hi <= f_lo {
        return;
    }
    let nq = (f_hi - f_lo) * q;
    let m = &mut sc.m[..nq * nq];
    m.fill(0.0);
    for (li, l) in (blk.l0..=blk.l1).enumerate() {
        let s = (2 * l + 1) as f64 * sc.pl[l];
        let ci = plan.cinv[fs][l];
        let ul = &blk.u[li * q..(li + 1) * q];
        for f in f_lo..f_hi {
            for fp in f_lo..f_hi {
                let c = s * cinv_entry(&ci, plan.fields[f], plan.fields[fp]);
                if c == 0.0 {
                    continue;
                }
                for (qa, &ua) in ul.iter().enumerate() {
                    let t = c * ua;
                    let row = ((f - f_lo) * q + qa) * nq + (fp - f_lo) * q;
                    for (mm, &ub) in m[row..row + q].iter_mut().zip(ul) {
                        *mm += t * ub;
                    }
                }
            }
        }
    }
    let w = blk.w;
    let wc = a1 - a0;
    // V_b restricted: rows f_lo q .. f_hi q, columns a0 - r0 .. a1 - r0 (leading dim w).
    let off = f_lo * q * w + (a0 - blk.r0);
    let ne = blk.v.len();
    // W_b = M V_b (nq x wc, leading dim wc) for every exponent b.
    for b in 0..ne {
        let vb = &blk.v[b][off..];
        let wb = &mut sc.wm[b][..nq * wc];
        crate::numerics::gemm::gemm(nq, nq, wc, m, (nq, 1), vb, (w, 1), 0.0, wb, (wc, 1));
    }
    // S_ab[a0.., a0..] += V_a^T W_b.
    for (ip, &(a, b)) in pairs.iter().enumerate() {
        let va = &blk.v[a][off..];
        let s = &mut sc.s[ip][a0 * n_r + a0..];
        crate::numerics::gemm::gemm(
            wc,
            nq,
            wc,
            va,
            (1, w),
            &sc.wm[b][..nq * wc],
            (wc, 1),
            1.0,
            s,
            (n_r, 1),
        );
    }
}

impl Scratch {
    /// Transposes of the S matrices on [c0, c1)^2.
    fn refresh_transposes(&mut self, n_r: usize, (c0, c1): (usize, usize)) {
        for (st, s) in self.st.iter_mut().zip(&self.s) {
            for ir in c0..c1 {
                for jr in c0..c1 {
                    st[jr * n_r + ir] = s[ir * n_r + jr];
                }
            }
        }
    }

    /// Sum_{r, r' in [c0, c1)} w_r w_r' S_x S_y S_z for the three legs.
    fn triple(&self, legs: [Leg; 3], w_r: &[f64], n_r: usize, (c0, c1): (usize, usize)) -> f64 {
        let pick = |leg: Leg| {
            if leg.1 {
                &self.st[leg.0]
            } else {
                &self.s[leg.0]
            }
        };
        let (s0, s1, s2) = (pick(legs[0]), pick(legs[1]), pick(legs[2]));
        let mut sum = 0.0;
        for ir in c0..c1 {
            let rows = ir * n_r + c0..ir * n_r + c1;
            let (r0, r1, r2) = (&s0[rows.clone()], &s1[rows.clone()], &s2[rows]);
            let mut row = 0.0;
            for (jr, ((a, b), c)) in r0.iter().zip(r1).zip(r2).enumerate() {
                row += w_r[c0 + jr] * a * b * c;
            }
            sum += w_r[ir] * row;
        }
        sum
    }
}

/// Canonical order of a triple of legs: the smallest of the sorted triple and the sorted
/// all-transposed triple.
fn canonical_triple(legs: [Leg; 3]) -> [Leg; 3] {
    let mut a = legs;
    a.sort_unstable();
    let mut b = legs.map(|(p, t)| (p, !t));
    b.sort_unstable();
    a.min(b)
}

/// A radial-function pair for one leg: (index of the exponent pair, transposed?).
type Leg = (usize, bool);

struct Scratch {
    pl: Vec<f64>,
    /// The block's M matrix, (fields q)^2.
    m: Vec<f64>,
    /// W_b = M V_b per exponent.
    wm: Vec<Vec<f64>>,
    /// Cumulative S_ab per exponent pair (a <= b), n_r x n_r.
    s: Vec<Vec<f64>>,
    /// Their transposes, refreshed at every grid point.
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

/// The brute-force oracle: the direct sum over every (l1, l2, l3) <= `lmax` with the exact
/// Wigner 3j symbol, explicit field sums and the plan's radial integrals of the reduced
/// bispectrum, F_ij = (f_sky / 6) Sum G^2 b^i C^-1 C^-1 C^-1 b^j (row-major ns x ns,
/// field set index `fs`). O(l_max^3 n_r): for tests and benchmarks only.
pub fn brute_force_fisher(
    plan: &BispectrumPlan,
    fs: usize,
    lmax: usize,
    parallel: bool,
) -> Vec<f64> {
    use crate::special::wigner::wigner3j_000_squared;
    let ns = plan.terms.len();
    let nf = plan.fields.len();
    let combos: Vec<[usize; 3]> = (0..nf)
        .flat_map(|a| (0..nf).flat_map(move |b| (0..nf).map(move |c| [a, b, c])))
        .collect();
    let lmax = lmax.min(plan.lmax);
    let row = |l1: usize| -> Vec<f64> {
        let mut f = vec![0.0; ns * ns];
        let mut b = vec![vec![0.0; combos.len()]; ns];
        for l2 in 2..=lmax {
            for l3 in 2..=lmax {
                let w2 = wigner3j_000_squared(l1 as u32, l2 as u32, l3 as u32);
                if w2 == 0.0 {
                    continue;
                }
                let g2 = ((2 * l1 + 1) * (2 * l2 + 1) * (2 * l3 + 1)) as f64
                    / (4.0 * std::f64::consts::PI)
                    * w2;
                let ci = [plan.cinv[fs][l1], plan.cinv[fs][l2], plan.cinv[fs][l3]];
                for (s, bs) in b.iter_mut().enumerate() {
                    for (ic, c) in combos.iter().enumerate() {
                        let used = (0..3).all(|leg| {
                            cinv_entry(&ci[leg], plan.fields[c[leg]], plan.fields[c[leg]]) != 0.0
                        });
                        bs[ic] = if used {
                            plan.reduced_bispectrum(s, [l1, l2, l3], *c)
                        } else {
                            0.0
                        };
                    }
                }
                for i in 0..ns {
                    for j in 0..ns {
                        let mut acc = 0.0;
                        for (ia, a) in combos.iter().enumerate() {
                            if b[i][ia] == 0.0 {
                                continue;
                            }
                            for (ib, bb) in combos.iter().enumerate() {
                                let mut c = 1.0;
                                for leg in 0..3 {
                                    c *= cinv_entry(
                                        &ci[leg],
                                        plan.fields[a[leg]],
                                        plan.fields[bb[leg]],
                                    );
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
        f
    };
    let rows: Vec<Vec<f64>> = if parallel {
        (2..=lmax).into_par_iter().map(row).collect()
    } else {
        (2..=lmax).map(row).collect()
    };
    let mut f = vec![0.0; ns * ns];
    for r in rows {
        f.iter_mut().zip(r).for_each(|(x, y)| *x += y);
    }
    f.iter().map(|v| v * plan.f_sky / 6.0).collect()
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
            signal_cl: None,
        })
    }

    /// The exact form of the engine (complete basis, no split).
    const EXACT: EngineOptions = EngineOptions {
        tol: 0.0,
        split: false,
    };

    const ALL_FIELD_SETS: [FieldSet; 3] = [FieldSet::T, FieldSet::E, FieldSet::TE];

    /// A plan for T, E and T+E with the toy primordial spectrum.
    fn all_fields_plan(
        tr: &TransferTable,
        radial: &RadialGrid,
        exp: &Experiment,
        sh: &[Shape],
        grid: &[usize],
        parallel: bool,
    ) -> BispectrumPlan {
        BispectrumPlan::new(&CmbFisherInput {
            transfer: tr,
            primordial: Primordial::from_values(2.1e-9, 0.965, 0.05),
            shapes: sh,
            experiment: exp,
            t_cmb_k: 2.7255,
            lmax_grid: grid,
            field_sets: &ALL_FIELD_SETS,
            radial,
            parallel,
            signal_cl: None,
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
        let fsets = ALL_FIELD_SETS;
        let grid = [12, 18, lmax];
        let plan = all_fields_plan(&tr, &radial, &exp, &sh, &grid, false);
        let fast = cmb_fisher_with_options(&plan, &grid, false, &EXACT);
        let par = cmb_fisher_with_options(&plan, &grid, true, &EXACT);
        for (ifs, _) in fsets.iter().enumerate() {
            for (m, &lm) in grid.iter().enumerate() {
                let brute = brute_force_fisher(&plan, ifs, lm, false);
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

    /// The default (compressed) engine against the brute-force oracle at l_max = 60 on a
    /// damped toy table with T and E, every shape and field set: the compression keeps
    /// each multipole's radial functions to 1e-5, and F moves by about as much (measured
    /// 9.6e-6 of sqrt(F_ii F_jj)); an approximation with a stated error, far inside the
    /// 0.5% allowed for schemes that bin or interpolate. The exact form (tolerance 0) is
    /// held to 1e-9 above.
    #[test]
    fn default_engine_matches_brute_force() {
        let lmax = 60;
        let tr = toy_table(lmax, Some(0.004), true);
        let radial = toy_radial(600.0, 10);
        let exp = experiment(lmax, true);
        let sh = shapes();
        let fsets = ALL_FIELD_SETS;
        let grid = [30, lmax];
        let plan = all_fields_plan(&tr, &radial, &exp, &sh, &grid, true);
        let fast = cmb_fisher_with_plan(&plan, &grid, true);
        let mut worst: f64 = 0.0;
        for ifs in 0..fsets.len() {
            for (m, &lm) in grid.iter().enumerate() {
                let brute = brute_force_fisher(&plan, ifs, lm, true);
                let f = &fast.fisher[ifs][m];
                for i in 0..sh.len() {
                    for j in 0..sh.len() {
                        let scale = (f.get(i, i) * f.get(j, j)).sqrt();
                        worst = worst.max((f.get(i, j) - brute[i * sh.len() + j]).abs() / scale);
                    }
                }
            }
        }
        println!(
            "default engine vs brute force, l_max = {lmax}: worst {worst:.2e}; {:?}",
            fast.stats
        );
        assert!(worst < 3e-5, "{worst}");
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
        let fast = cmb_fisher_with_options(&plan, &[lmax], false, &EXACT);
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
