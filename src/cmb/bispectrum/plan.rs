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
    ) -> (Self, super::radial_cache::RadialCacheStatus) {
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
/// node: computed per r (in parallel with `inp.parallel`, [`radial_row_impl`]), then
/// transposed.
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
    let ctx = RadialCtx {
        tr,
        coefs,
        r: &inp.radial.r,
        lmax: layout.lmax,
    };
    let per_r = |ir: usize| -> Vec<f64> {
        let mut out = vec![0.0; ne * nf * nl];
        super::simd::radial_row(&ctx, ir, &mut out);
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
    x
}

/// Fraction of the transfer table's k range over which the radial functions' k
/// integrand is tapered to zero (see [`BispectrumPlan::new`]).
pub(super) const K_TAPER: f64 = 0.2;

/// Lanes of the fused radial-function kernel.
pub(super) const XLANES: usize = 16;

/// What the radial-function kernel reads.
pub(super) struct RadialCtx<'a> {
    tr: &'a TransferTable,
    /// c_e(k) per k node: (2/pi) w_k taper k^2 P_Phi(k)^p_e.
    coefs: &'a [Vec<f64>],
    r: &'a [f64],
    lmax: usize,
}

/// The radial functions at node `ir`: out[(e nf + f) nl + l] = X^{p_e, f}_l(r_ir). At
/// x = k r every l beyond l_cut(x) is dropped (|j_l| < 1e-6 of its maximum there);
/// where x > l_max + 1 the upward recurrence is stable for every l and runs for
/// [`XLANES`] k side by side, fused with the accumulation.
#[inline(always)]
pub(super) fn radial_row_impl(ctx: &RadialCtx<'_>, ir: usize, out: &mut [f64]) {
    let tr = ctx.tr;
    let lmax = ctx.lmax;
    let nl = lmax + 1;
    let nf = tr.fields().len();
    let r = ctx.r[ir];
    let mut j = vec![0.0; nl + 1];
    let mut lanes: Vec<usize> = Vec::with_capacity(XLANES);
    let mut jbuf = vec![0.0; XLANES * nl];
    let mut dbuf = vec![0.0; XLANES * nl];
    for ik in 0..tr.k().len() {
        let x = tr.k()[ik] * r;
        if x >= (lmax + 2) as f64 {
            lanes.push(ik);
            if lanes.len() == XLANES {
                radial_lanes(tr, ctx.coefs, &lanes, r, nl, out, &mut jbuf, &mut dbuf);
                lanes.clear();
            }
            continue;
        }
        let lc = crate::special::bessel::l_cut(x).min(lmax);
        crate::special::bessel::sph_bessel_all_l(lc as u32, x, &mut j[..=lc]);
        for f in 0..nf {
            let g = &tr.row(f, ik)[..=lc];
            for (e, &c) in ctx.coefs[ik].iter().enumerate() {
                let o = &mut out[(e * nf + f) * nl..(e * nf + f) * nl + lc + 1];
                for ((o, &g), &jl) in o.iter_mut().zip(g).zip(&j[..=lc]) {
                    *o += c * g * jl;
                }
            }
        }
    }
    if !lanes.is_empty() {
        radial_lanes(tr, ctx.coefs, &lanes, r, nl, out, &mut jbuf, &mut dbuf);
    }
}

/// Adds the contributions of up to [`XLANES`] k nodes (all with k r > l_max + 1) to the
/// radial functions at r: out[(e nf + f) nl + l] += c_e(k) Delta^f_l(k) j_l(k r), with j_l
/// from the upward recurrence from the exact j_0, j_1 (stable below the turning point),
/// run for the lanes side by side into `jbuf` (XLANES x nl); then every accumulation is
/// a contiguous loop over l, four lanes per pass. `dbuf` is scratch of the same size.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
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
    // Recurrence, lanes interleaved in registers, stored per lane: jbuf[g * nl + l].
    for g in 0..n {
        jbuf[g * nl] = jm[g];
        if nl > 1 {
            jbuf[g * nl + 1] = jc[g];
        }
    }
    for l in 2..nl {
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
            while g + 3 < n {
                let c = [
                    coefs[lanes[g]][e],
                    coefs[lanes[g + 1]][e],
                    coefs[lanes[g + 2]][e],
                    coefs[lanes[g + 3]][e],
                ];
                let d0 = &dbuf[g * nl..(g + 1) * nl];
                let d1 = &dbuf[(g + 1) * nl..(g + 2) * nl];
                let d2 = &dbuf[(g + 2) * nl..(g + 3) * nl];
                let d3 = &dbuf[(g + 3) * nl..(g + 4) * nl];
                for ((((o, &a), &b), &cc), &d) in o.iter_mut().zip(d0).zip(d1).zip(d2).zip(d3) {
                    *o += (c[0] * a + c[1] * b) + (c[2] * cc + c[3] * d);
                }
                g += 4;
            }
            while g < n {
                let c0 = coefs[lanes[g]][e];
                for (o, &a) in o.iter_mut().zip(&dbuf[g * nl..(g + 1) * nl]) {
                    *o += c0 * a;
                }
                g += 1;
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
