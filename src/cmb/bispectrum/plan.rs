//! The plan of the fast engine: the radial functions X^{p,X}_l(r) and the inverse
//! covariances per field set.

use rayon::prelude::*;

use super::{CmbFisherInput, FieldSet};
use crate::cmb::experiment::Experiment;
use crate::cmb::lensing::LensedSpectra;
use crate::cmb::transfer::{Field, TransferTable};
use crate::cosmology::Primordial;

/// Wall times of building a plan (for benchmarks and logs).
#[derive(Debug, Clone, Copy, Default, serde::Serialize)]
pub struct PlanTimes {
    /// The radial functions X^{p,X}_l(r), s.
    pub radial_s: f64,
    /// The inverse covariances (the 2x2 T+E inverse per l), s.
    pub inverse_covariance_s: f64,
}

/// Precomputed radial functions and inverse covariances: the "plan" of the engine.
pub struct BispectrumPlan {
    pub(super) lmax: usize,
    pub(super) n_r: usize,
    pub(super) exponents: Vec<f64>,
    /// Terms per shape: (coefficient, exponent indices for the three legs).
    pub(super) terms: Vec<Vec<(f64, [usize; 3])>>,
    pub(super) fields: Vec<Field>,
    /// X[e][f] is an (lmax+1) x n_r row-major matrix (shared between experiments).
    pub(super) x: std::sync::Arc<Vec<Vec<Vec<f64>>>>,
    /// Inverse covariance per field set: cinv[fs][l] as [TT, TE, EE] (in the table's
    /// field indices; unused entries zero).
    pub(super) cinv: Vec<Vec<[f64; 3]>>,
    pub(super) field_sets: Vec<FieldSet>,
    pub(super) radial_w: Vec<f64>,
    pub(super) f_sky: f64,
    pub(super) shape_names: Vec<String>,
    times: PlanTimes,
}

impl BispectrumPlan {
    /// Builds the radial functions X^{p,X}_l(r) and the inverse covariances.
    pub fn new(inp: &CmbFisherInput<'_>) -> Self {
        let t_radial = std::time::Instant::now();
        let layout = PlanLayout::of(inp);
        let coefs = radial_coefs(inp, &layout.exponents);
        let x = compute_radial(inp, &layout, &coefs);
        Self::assemble(inp, layout, x, t_radial.elapsed().as_secs_f64())
    }

    /// [`BispectrumPlan::new`] with the radial functions read from the on-disk cache of
    /// `cache` (the transfer tables' folder) when a trusted file exists, otherwise
    /// computed and stored there (see [`super::radial_cache`]). Cache problems are never
    /// errors: they show in the returned status.
    pub fn new_cached(
        inp: &CmbFisherInput<'_>,
        cache: &crate::cmb::boltzmann::CacheOptions,
    ) -> (Self, crate::cmb::boltzmann::CacheStatus) {
        let t_radial = std::time::Instant::now();
        let layout = PlanLayout::of(inp);
        let coefs = radial_coefs(inp, &layout.exponents);
        let (x, status) = super::radial_cache::cached_radial(inp, &layout, &coefs, cache, || {
            compute_radial(inp, &layout, &coefs)
        });
        let plan = Self::assemble(inp, layout, x, t_radial.elapsed().as_secs_f64());
        (plan, status)
    }

    /// The plan from its radial functions `x` (built in `radial_s` seconds): adds the
    /// inverse covariances.
    fn assemble(
        inp: &CmbFisherInput<'_>,
        layout: PlanLayout,
        x: RadialFunctions,
        radial_s: f64,
    ) -> Self {
        let t_cinv = std::time::Instant::now();
        let cinv = inverse_covariances(
            inp.transfer,
            &inp.primordial,
            inp.experiment,
            inp.t_cmb_k,
            inp.field_sets,
            layout.lmax,
            inp.signal_cl,
        );
        Self {
            lmax: layout.lmax,
            n_r: inp.radial.len(),
            exponents: layout.exponents,
            terms: layout.terms,
            fields: inp.transfer.fields().to_vec(),
            x: std::sync::Arc::new(x),
            cinv,
            field_sets: inp.field_sets.to_vec(),
            radial_w: inp.radial.w.clone(),
            f_sky: inp.experiment.f_sky,
            shape_names: inp.shapes.iter().map(|s| s.name()).collect(),
            times: PlanTimes {
                radial_s,
                inverse_covariance_s: t_cinv.elapsed().as_secs_f64(),
            },
        }
    }

    /// Wall times of building this plan (radial functions, inverse covariances).
    pub fn times(&self) -> PlanTimes {
        self.times
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
        let t_cinv = std::time::Instant::now();
        let cinv = inverse_covariances(
            tr,
            prim,
            exp,
            t_cmb_k,
            &self.field_sets,
            self.lmax,
            signal_cl,
        );
        Self {
            times: PlanTimes {
                radial_s: 0.0,
                inverse_covariance_s: t_cinv.elapsed().as_secs_f64(),
            },
            cinv,
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

/// X[e][f] is an (lmax+1) x n_r row-major matrix: X^{p_e, field f}_l(r_ir) at
/// [l n_r + ir].
pub(super) type RadialFunctions = Vec<Vec<Vec<f64>>>;

/// What the radial functions are computed for: the multipole range and the exponents of
/// P_Phi that the shapes' separable terms use.
pub(super) struct PlanLayout {
    /// The highest multipole (the grid's largest, capped at the table's).
    pub(super) lmax: usize,
    /// Distinct exponents p of P_Phi(k)^p over all shapes' terms.
    pub(super) exponents: Vec<f64>,
    /// Terms per shape: (coefficient, exponent indices for the three legs).
    pub(super) terms: Vec<Vec<(f64, [usize; 3])>>,
}

impl PlanLayout {
    fn of(inp: &CmbFisherInput<'_>) -> Self {
        let lmax = inp
            .lmax_grid
            .iter()
            .copied()
            .max()
            .unwrap_or(2)
            .min(inp.transfer.lmax());
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
        Self {
            lmax,
            exponents,
            terms,
        }
    }
}

/// The k weights of the radial functions, c_e(k) = (2/pi) w_k taper(k) k^2 P_Phi(k)^p_e,
/// per k node and exponent.
///
/// A cosine taper over the last [`K_TAPER`] of the k range of a table marked as cut where
/// the transfer functions are not yet negligible (the Boltzmann tables end at
/// k chi_* = 2.1 l_max + 600, beyond the 2 l_max that triangles need) makes the radial
/// functions ring in r, spreading them over the whole radial grid. Measured at
/// l_max = 1500 (full transfer, T, E, T+E, three shapes): with the taper sigma stays
/// within 0.1% of a table reaching twice as far, and the engine runs 3x faster than
/// without it.
pub(super) fn radial_coefs(inp: &CmbFisherInput<'_>, exponents: &[f64]) -> Vec<Vec<f64>> {
    let tr = inp.transfer;
    let prim = inp.primordial;
    let k_top = tr.k().last().copied().unwrap_or(1.0);
    let taper_frac = if tr.k_truncated() { K_TAPER } else { 0.0 };
    tr.k()
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
        .collect()
}

/// The radial functions X^{p_e, f}_l(r) for every exponent, field, l <= l_max and radial
/// node: computed per group of [`RGROUP`] nodes (in parallel with `inp.parallel`,
/// [`radial_rows_impl`]), then transposed.
pub(super) fn compute_radial(
    inp: &CmbFisherInput<'_>,
    layout: &PlanLayout,
    coefs: &[Vec<f64>],
) -> RadialFunctions {
    let tr = inp.transfer;
    let nf = tr.fields().len();
    let ne = layout.exponents.len();
    let nl = layout.lmax + 1;
    let n_r = inp.radial.len();
    // Each k's last nonzero multipole <= l_max over the fields (None: all zero).
    let l_top: Vec<Option<usize>> = (0..tr.k().len())
        .map(|ik| {
            (0..nf)
                .filter_map(|f| tr.row(f, ik)[..nl].iter().rposition(|v| *v != 0.0))
                .max()
        })
        .collect();
    let ctx = RadialCtx {
        tr,
        coefs,
        r: &inp.radial.r,
        lmax: layout.lmax,
        l_top: &l_top,
    };
    let row_len = ne * nf * nl;
    let per_group = |ig: usize| -> Vec<f64> {
        let ir0 = ig * RGROUP;
        let mut out = vec![0.0; row_len * RGROUP.min(n_r - ir0)];
        super::simd::radial_rows(&ctx, ir0, &mut out);
        out
    };
    let n_groups = n_r.div_ceil(RGROUP);
    let groups: Vec<Vec<f64>> = if inp.parallel {
        (0..n_groups).into_par_iter().map(per_group).collect()
    } else {
        (0..n_groups).map(per_group).collect()
    };
    let mut x = vec![vec![vec![0.0; nl * n_r]; nf]; ne];
    let rows = groups.iter().flat_map(|g| g.chunks_exact(row_len.max(1)));
    for (ir, row) in rows.enumerate() {
        for e in 0..ne {
            for f in 0..nf {
                let src = &row[(e * nf + f) * nl..(e * nf + f + 1) * nl];
                for l in 0..nl {
                    x[e][f][l * n_r + ir] = src[l];
                }
            }
        }
    }
    x
}

/// Fraction of the transfer table's k range over which the radial functions' k
/// integrand is tapered to zero (see [`BispectrumPlan::new`]).
pub(super) const K_TAPER: f64 = 0.2;

/// Lanes of the fused radial-function kernel.
pub(super) const XLANES: usize = 16;

/// Radial nodes computed together (each transfer row read once for all of them; at most
/// [`XLANES`]). Measured at l_max = 3000 (full transfer, three shapes, one thread, CPU
/// time of the stage on a shared machine): 2 and 8 nodes take 5-25% longer than 4.
pub(super) const RGROUP: usize = 4;

/// What the radial-function kernel reads.
pub(super) struct RadialCtx<'a> {
    tr: &'a TransferTable,
    /// c_e(k) per k node: (2/pi) w_k taper k^2 P_Phi(k)^p_e.
    coefs: &'a [Vec<f64>],
    r: &'a [f64],
    lmax: usize,
    /// Per k node: the last multipole <= l_max where any field's transfer function is
    /// nonzero (`None`: zero at every l).
    l_top: &'a [Option<usize>],
}

/// One (k, r) pair of the radial-function kernel.
#[derive(Clone, Copy)]
struct Lane {
    /// k node.
    ik: usize,
    /// Radial node within the group.
    q: usize,
    /// Last multipole that contributes: min(l_cut(k r), l_max, the table's last nonzero
    /// multipole at k).
    top: usize,
}

/// The radial functions at the radial nodes ir0, ir0 + 1, ... (as many as `out` holds
/// rows of ne nf nl): out[q ne nf nl + (e nf + f) nl + l] = X^{p_e, f}_l(r_{ir0 + q}).
/// The k loop is outside the loop over the group's nodes, so each transfer row is read
/// from memory once per group rather than once per node (the stage is bound by reading
/// the table: 240 MB at l_max = 3000). At x = k r every l beyond l_cut(x) is dropped
/// (|j_l| < 1e-6 of its maximum there), and every l beyond the table's last nonzero
/// multipole at k (exact zeros: the Boltzmann tables end each k's row near
/// l_cut(k chi_0), which matters for nodes beyond the observer's distance chi_0). The
/// (k, r) pairs run [`XLANES`] side by side through [`radial_lanes`].
#[inline(always)]
pub(super) fn radial_rows_impl(ctx: &RadialCtx<'_>, ir0: usize, out: &mut [f64]) {
    let tr = ctx.tr;
    let lmax = ctx.lmax;
    let nl = lmax + 1;
    let nf = tr.fields().len();
    let ne = ctx.coefs.first().map_or(0, Vec::len);
    let row_len = ne * nf * nl;
    if row_len == 0 {
        return;
    }
    let rs = &ctx.r[ir0..ir0 + out.len() / row_len];
    let mut lanes: Vec<Lane> = Vec::with_capacity(XLANES);
    let mut jbuf = vec![0.0; XLANES * nl];
    let mut dbuf = vec![0.0; XLANES * nl];
    for ik in 0..tr.k().len() {
        let Some(l_top) = ctx.l_top[ik] else {
            continue;
        };
        for (q, &r) in rs.iter().enumerate() {
            let x = tr.k()[ik] * r;
            let top = crate::special::bessel::l_cut(x).min(lmax).min(l_top);
            lanes.push(Lane { ik, q, top });
            if lanes.len() == XLANES {
                radial_lanes(ctx, &lanes, rs, out, &mut jbuf, &mut dbuf);
                lanes.clear();
            }
        }
    }
    if !lanes.is_empty() {
        radial_lanes(ctx, &lanes, rs, out, &mut jbuf, &mut dbuf);
    }
}

/// Adds the contributions of up to [`XLANES`] (k, r) pairs to the radial functions of
/// the group of nodes `rs`: out[q ne nf nl + (e nf + f) nl + l] += c_e(k) Delta^f_l(k)
/// j_l(k r_q) for l <= the lane's top. j_l comes from the upward recurrence from the
/// exact j_0, j_1 up to min(floor(k r), top) (stable below the turning point), run for
/// the lanes side by side (independent chains hide the latency) into `jbuf` (XLANES x nl),
/// and above that from downward ratios ([`crate::special::bessel::sph_bessel_tail`]).
/// Then every accumulation is a contiguous loop over l, four lanes of the same node per
/// pass. `dbuf` is scratch of the same size.
#[inline(always)]
fn radial_lanes(
    ctx: &RadialCtx<'_>,
    lanes: &[Lane],
    rs: &[f64],
    out: &mut [f64],
    jbuf: &mut [f64],
    dbuf: &mut [f64],
) {
    let tr = ctx.tr;
    let coefs = ctx.coefs;
    let nl = ctx.lmax + 1;
    let nf = tr.fields().len();
    let ne = coefs.first().map_or(0, Vec::len);
    let row_len = ne * nf * nl;
    let n = lanes.len();
    let mut xs = [0.0; XLANES];
    let mut ix = [0.0; XLANES];
    let mut jm = [0.0; XLANES];
    let mut jc = [0.0; XLANES];
    let mut up = [0usize; XLANES];
    for (g, lane) in lanes.iter().enumerate() {
        let x = tr.k()[lane.ik] * rs[lane.q];
        let (s, c) = x.sin_cos();
        xs[g] = x;
        ix[g] = 1.0 / x;
        jm[g] = s / x;
        jc[g] = (s / x - c) / x;
        // floor(x) < top <= l_max here, or top itself.
        up[g] = if x < lane.top as f64 {
            x as usize
        } else {
            lane.top
        };
    }
    let up_max = up[..n].iter().copied().max().unwrap_or(0);
    // Recurrence, lanes interleaved in registers, stored per lane: jbuf[g * nl + l]
    // (values past a lane's own upward end are overwritten or unused).
    for g in 0..n {
        jbuf[g * nl] = jm[g];
        if nl > 1 {
            jbuf[g * nl + 1] = jc[g];
        }
    }
    for l in 2..=up_max {
        let tl = (2 * l - 1) as f64;
        for g in 0..XLANES {
            let jp = tl * ix[g] * jc[g] - jm[g];
            jm[g] = jc[g];
            jc[g] = jp;
        }
        for g in 0..n {
            jbuf[g * nl + l] = jc[g];
        }
    }
    for (g, lane) in lanes.iter().enumerate() {
        if lane.top > up[g] {
            crate::special::bessel::sph_bessel_tail(
                up[g],
                lane.top,
                xs[g],
                &mut jbuf[g * nl..g * nl + lane.top + 1],
            );
        }
    }
    // The lanes of each node of the group, in k order.
    let n_q = rs.len();
    let mut by_node = [[0usize; XLANES]; XLANES];
    let mut count = [0usize; XLANES];
    for (g, lane) in lanes.iter().enumerate() {
        by_node[lane.q][count[lane.q]] = g;
        count[lane.q] += 1;
    }
    // d_g(l) = Delta^f_l(k_g) j_l(k_g r_g) for l <= top_g, lanes in k order (a row is
    // read from memory once for all the nodes of the group): field 0 into `dbuf`, field
    // 1 (E; a table has at most T and E) in place of j_l in `jbuf`, both rows of a k in
    // one pass.
    debug_assert!(nf <= 2, "a transfer table holds at most T and E");
    for (g, lane) in lanes.iter().enumerate() {
        let t = lane.top + 1;
        let d = &mut dbuf[g * nl..g * nl + t];
        let jl = &mut jbuf[g * nl..g * nl + t];
        let r0 = &tr.row(0, lane.ik)[..t];
        if nf > 1 {
            let r1 = &tr.row(1, lane.ik)[..t];
            for (((d, j), &a), &b) in d.iter_mut().zip(jl.iter_mut()).zip(r0).zip(r1) {
                *d = a * *j;
                *j *= b;
            }
        } else {
            for ((d, &j), &a) in d.iter_mut().zip(jl.iter()).zip(r0) {
                *d = a * j;
            }
        }
    }
    for f in 0..nf {
        let dbuf: &mut [f64] = if f == 0 { &mut *dbuf } else { &mut *jbuf };
        for q in 0..n_q {
            let gs = &by_node[q][..count[q]];
            let out_q = &mut out[q * row_len..(q + 1) * row_len];
            let mut i = 0;
            while i + 3 < gs.len() {
                let g = [gs[i], gs[i + 1], gs[i + 2], gs[i + 3]];
                // Zeros between each lane's top and the group's.
                let t = g.iter().map(|&g| lanes[g].top).max().unwrap_or(0) + 1;
                for &g in &g {
                    dbuf[g * nl + lanes[g].top + 1..g * nl + t].fill(0.0);
                }
                let d0 = &dbuf[g[0] * nl..g[0] * nl + t];
                let d1 = &dbuf[g[1] * nl..g[1] * nl + t];
                let d2 = &dbuf[g[2] * nl..g[2] * nl + t];
                let d3 = &dbuf[g[3] * nl..g[3] * nl + t];
                // Two exponents per pass: each d value loaded once for both (same
                // arithmetic per output as one at a time).
                let mut e = 0;
                while e + 1 < ne {
                    let c = g.map(|g| coefs[lanes[g].ik][e]);
                    let c2 = g.map(|g| coefs[lanes[g].ik][e + 1]);
                    let (lo, hi) = out_q.split_at_mut(((e + 1) * nf + f) * nl);
                    let o = &mut lo[(e * nf + f) * nl..(e * nf + f) * nl + t];
                    let o2 = &mut hi[..t];
                    for (((((o, o2), &a), &b), &cc), &d) in
                        o.iter_mut().zip(o2).zip(d0).zip(d1).zip(d2).zip(d3)
                    {
                        *o += (c[0] * a + c[1] * b) + (c[2] * cc + c[3] * d);
                        *o2 += (c2[0] * a + c2[1] * b) + (c2[2] * cc + c2[3] * d);
                    }
                    e += 2;
                }
                if e < ne {
                    let c = g.map(|g| coefs[lanes[g].ik][e]);
                    let o = &mut out_q[(e * nf + f) * nl..(e * nf + f) * nl + t];
                    for ((((o, &a), &b), &cc), &d) in o.iter_mut().zip(d0).zip(d1).zip(d2).zip(d3) {
                        *o += (c[0] * a + c[1] * b) + (c[2] * cc + c[3] * d);
                    }
                }
                i += 4;
            }
            while i < gs.len() {
                let g = gs[i];
                let t = lanes[g].top + 1;
                for e in 0..ne {
                    let c0 = coefs[lanes[g].ik][e];
                    let o = &mut out_q[(e * nf + f) * nl..(e * nf + f) * nl + t];
                    for (o, &a) in o.iter_mut().zip(&dbuf[g * nl..g * nl + t]) {
                        *o += c0 * a;
                    }
                }
                i += 1;
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
