//! The collapsed CMB trispectrum: the Fisher information on tau_NL from T, E and T+E.
//!
//! **Convention** (Suyama & Yamaguchi 2008): with P_zeta the curvature power spectrum,
//! the collapsed primordial trispectrum is
//! T_zeta(k1, k2, k3, k4) = tau_NL [P_zeta(k1) P_zeta(k3) P_zeta(k12) + 11 perms],
//! so that a single local source zeta = zeta_G + (3/5) f_NL zeta_G^2 gives
//! tau_NL = (6 f_NL / 5)^2, and any set of sources gives tau_NL >= (6 f_NL / 5)^2. For the
//! Bardeen potential Phi = (3/5) zeta this is T_Phi = (25/9) tau_NL [P_Phi P_Phi P_Phi +
//! 11 perms] (single source: 4 f_NL^2).
//!
//! **Modulation picture** (Pearson, Lewis & Regan 2012; Kogo & Komatsu 2006): in the
//! collapsed limit the small-scale potential is modulated by a large-scale field a(x),
//! Phi_s(x) -> Phi_s(x) [1 + a(x)], whose power spectrum is P_a(k) = (25/9) tau_NL
//! P_Phi(k) (single source: a = 2 f_NL Phi_L). At a Gaussian fiducial the modulation
//! changes the covariance of the small-scale a_lm by
//! d<a^X_{l1 m1} a^Y_{l2 m2}> = Sum_{LM} Gaunt(l1 l2 L; m1 m2 M) Integral r^2 dr
//! a_LM(r) f^{XY}_{l1 l2}(r), f^{XY}_{l1 l2}(r) = alpha^X_{l1}(r) beta^Y_{l2}(r) +
//! beta^X_{l1}(r) alpha^Y_{l2}(r), with the radial functions of the bispectrum engine
//! alpha = X^{(0)}, beta = X^{(1)} (p = 0 and p = 1 powers of P_Phi; the same functions
//! give the local bispectrum, 2 f_NL Integral r^2 dr [alpha beta beta + 2 perms]).
//!
//! **Quadratic estimator and its noise** (Hanson & Lewis 2009): on the radial nodes r_i
//! (weights w_i, r^2 included) the optimal quadratic estimator of a_LM(r_i) has inverse
//! noise covariance (per L, M)
//! M_L(i, j) = (1/2) Sum_{l1 l2} [(2l1+1)(2l2+1)/(4 pi)] (l1 l2 L; 0 0 0)^2 w_i w_j
//! Sum_{XY X'Y'} f^{XY}_{l1l2}(r_i) [C^-1_{l1}]_{XX'} [C^-1_{l2}]_{YY'} f^{X'Y'}_{l1l2}(r_j),
//! the unrestricted sum over l1, l2 (C = C_l + N_l, the 2x2 T+E inverse on each leg).
//! For a thin shell this is the scalar 1/N_L of the modulation reconstruction.
//!
//! **Fisher information** (Kogo & Komatsu 2006): the reconstructed field has signal
//! covariance S_L(r_i, r_j) = tau_NL S'_L(i, j), S'_L = (25/9) (2/pi) Integral k^2 dk
//! P_Phi(k) j_L(k r_i) j_L(k r_j); at tau_NL = 0 the information in its power is
//! F(tau_NL) = f_sky Sum_{L=2}^{L_long} (2L+1)/2 Tr[(M_L S'_L)^2].
//! Written out, Tr[(M S')^2] = (1/4) Sum_{l1 l2 l3 l4} G^2_{l1 l2 L} G^2_{l3 l4 L}
//! t^{l1 l2}_{l3 l4}(L)^2 / (C_l1 C_l2 C_l3 C_l4) with t = Integral Integral f_{l1l2}
//! S'_L f_{l3l4}: the trispectrum Fisher sum over the collapsed (diagonal-L) pairing. The
//! other two pairings of the full trispectrum and their cross terms are not included
//! (they carry the same information in their own collapsed limits and are small in
//! ours); L runs from 2 (L = 0 is an overall amplitude, L = 1 a dipole modulation,
//! both left out) to L_long = 30 by default: F_L falls roughly as L^-3 (S'_L ~ 1/L^2,
//! nearly flat noise), so the rest is below 1% (measured in the tests). In a small-l_max
//! direct quadrilateral sum (l_max = 16, every L up to 32) the pairing's share above
//! L = 8 is 4.5% (measured): there the "collapsed" cut is not yet a good approximation,
//! at l_max in the hundreds and above it is.
//!
//! **No cross term with f_NL**: at a Gaussian fiducial the bispectrum (cubic) and the
//! collapsed trispectrum (quartic) statistics are uncorrelated (odd moments of a
//! Gaussian field vanish), so F(f_NL, tau_NL) = 0 on the CMB side.
//!
//! **Fast path.** S'_L varies over the last-scattering shell on the scale chi_*/L, so in
//! the metric of M it is of low rank: per L a pivoted Cholesky factorization of
//! D S'_L D (D_i^2 ~ the diagonal of M, an inexpensive proxy over every l_max of the grid)
//! to a relative tolerance, all L's factors orthonormalized into one basis Q of rank R
//! (pivoted Gram-Schmidt), S'_L ~ D^-1 Q Lambda_L Q^T D^-1. Then
//! Tr[(M S')^2] = Tr[(M~ Lambda)^2] with M~ = U^T M U, U = D^-1 Q, and M~ needs the
//! projections g_{l1 l2}(a) = Sum_i u_a(i) w_i f_{l1l2}(r_i) only for |l1 - l2| <= L_long:
//! a matrix product per l1 over a window of l2. Cumulative in l_max: a pair enters at
//! l_max = max(l1, l2). The brute-force oracle [`brute_force_tau_fisher`] forms the full
//! M_L from the explicit double sum with exact 3j symbols.

// Index loops over (l, L, node) mirror the formulas above.
#![allow(clippy::needless_range_loop)]

use rayon::prelude::*;

use crate::cmb::bispectrum::{BispectrumPlan, FieldSet};
use crate::cmb::transfer::{Field, RadialGrid};
use crate::cosmology::Primordial;
use crate::error::{Error, Result};
use crate::special::wigner::Wigner000;

mod long_mode;
mod oracle;

pub use long_mode::long_mode_covariance;
use long_mode::{node_range, orthonormal_basis, pivoted_cholesky};
pub use oracle::{brute_force_tau_fisher, quadrilateral_tau_fisher};

/// The name of the parameter in outputs (rows use `shape = "tau_nl"`).
pub const PARAMETER_NAME: &str = "tau_nl";

/// Default highest multipole of the long (modulating) mode.
pub const DEFAULT_LONG_LMAX: usize = 30;

/// Default relative tolerance of the low-rank long-mode basis (pivoted Cholesky of the
/// weighted S'_L, relative to its largest diagonal element). Measured on the full
/// transfer, Planck-like noise, l_max 2000, T and T+E (`basis_tolerance_study` in
/// tests/cmb_tau_nl.rs): sigma(tau_NL) within 3e-10 of the exact form (every radial
/// node, rank 160) with rank 43, 11x faster; 1e-3 (rank 24) is still within 4e-9.
pub const DEFAULT_BASIS_TOL: f64 = 1e-5;

/// Radial nodes whose weight D_i is below this fraction of the largest are left out
/// (except in the exact form, basis tolerance 0).
const NODE_TOL: f64 = 1e-10;

/// P_a = (25/9) tau_NL P_Phi: the modulation field's power per unit tau_NL.
pub(crate) const MODULATION_POWER: f64 = 25.0 / 9.0;

/// Settings of the collapsed-limit engine.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CollapsedSettings {
    /// Highest multipole L of the long mode.
    pub long_lmax: usize,
    /// Relative tolerance of the long-mode basis; 0 keeps every active radial node
    /// (the exact form).
    pub basis_tol: f64,
    /// Run the outer loops in parallel.
    pub parallel: bool,
}

impl Default for CollapsedSettings {
    fn default() -> Self {
        Self {
            long_lmax: DEFAULT_LONG_LMAX,
            basis_tol: DEFAULT_BASIS_TOL,
            parallel: true,
        }
    }
}

/// The tau_NL Fisher information per field set and l_max.
#[derive(Debug, Clone, serde::Serialize)]
pub struct CollapsedForecast {
    /// The l_max grid.
    pub lmax: Vec<usize>,
    /// Field sets, in the order of `fisher`.
    pub field_sets: Vec<FieldSet>,
    /// Highest multipole of the long mode.
    pub long_lmax: usize,
    /// `fisher[field set][l_max index]`: F(tau_NL, tau_NL) (f_sky included).
    pub fisher: Vec<Vec<f64>>,
    /// `per_long_l[field set][L]`: the contribution of long mode L at the top l_max
    /// (f_sky included; zero for L < 2).
    pub per_long_l: Vec<Vec<f64>>,
    /// Effective thin-shell reconstruction noise at the top l_max, per field set and L:
    /// N_L defined by F_L = f_sky (2L+1)/2 (C^a_L / N_L)^2, with C^a_L = S'_L(chi, chi)
    /// at the radial node of largest weight (tau_NL = 1). Dimensionless.
    pub noise_eff: Vec<Vec<f64>>,
    /// Rank of the long-mode basis.
    pub basis_rank: usize,
    /// Radial nodes used.
    pub active_nodes: usize,
    /// The radial range (Mpc) that set the k grid of S'_L.
    pub r_range_mpc: (f64, f64),
}

/// Indices of the P^0 and P^1 radial functions in a plan.
///
/// # Errors
/// [`Error::Numerical`] when the plan lacks them (a plan without any shape).
pub fn exponent_indices(plan: &BispectrumPlan) -> Result<(usize, usize)> {
    let find = |p: f64| plan.exponents().iter().position(|&e| (e - p).abs() < 1e-12);
    match (find(0.0), find(1.0)) {
        (Some(a), Some(b)) => Ok((a, b)),
        _ => Err(Error::Numerical {
            stage: "collapsed trispectrum",
            message: "the radial-function plan lacks the P^0 and P^1 functions (build it with the local shape)".into(),
        }),
    }
}

pub(crate) fn cinv_entry(c: &[f64; 3], a: Field, b: Field) -> f64 {
    match (a, b) {
        (Field::T, Field::T) => c[0],
        (Field::E, Field::E) => c[2],
        _ => c[1],
    }
}

/// Radial kernels on the active nodes, l-major: alpha[f][l * n + i].
struct Kernels {
    n: usize,
    nf: usize,
    lmax: usize,
    nodes: Vec<usize>,
    w: Vec<f64>,
    r: Vec<f64>,
    d: Vec<f64>,
    alpha: Vec<Vec<f64>>,
    beta: Vec<Vec<f64>>,
    /// cinv[fs][l][f1 * nf + f2]
    cinv: Vec<Vec<Vec<f64>>>,
}

impl Kernels {
    fn new(
        plan: &BispectrumPlan,
        radial: &RadialGrid,
        lmax_grid: &[usize],
        exact: bool,
    ) -> Result<Self> {
        let (e0, e1) = exponent_indices(plan)?;
        let lmax = lmax_grid
            .iter()
            .copied()
            .max()
            .unwrap_or(2)
            .min(plan.lmax());
        let nf = plan.n_fields();
        let fields = plan.fields().to_vec();
        let n_r = plan.n_radial();
        let nfs = plan.field_sets().len();
        let cinv: Vec<Vec<Vec<f64>>> = (0..nfs)
            .map(|fs| {
                (0..=lmax)
                    .map(|l| {
                        let c = plan.inverse_covariance(fs, l);
                        let mut m = vec![0.0; nf * nf];
                        for a in 0..nf {
                            for b in 0..nf {
                                m[a * nf + b] = cinv_entry(&c, fields[a], fields[b]);
                            }
                        }
                        m
                    })
                    .collect()
            })
            .collect();
        // Node weights: D_i^2 ~ w_i^2 Sum_l (2l+1) (Sum_X alpha^X_l(r_i)^2 C^-1_XX)
        // (Sum_Y beta^Y_l(r_i)^2 C^-1_YY), the diagonal of M_L without its 3j coupling,
        // normalized per field set and l_max of the grid; the largest over both.
        let mut d2 = vec![0.0_f64; n_r];
        for (fs, cfs) in cinv.iter().enumerate() {
            let _ = fs;
            let mut acc = vec![0.0_f64; n_r];
            for l in 2..=lmax {
                let c = &cfs[l];
                for (i, a) in acc.iter_mut().enumerate() {
                    let mut sa = 0.0;
                    let mut sb = 0.0;
                    for f in 0..nf {
                        let cf = c[f * nf + f];
                        sa += plan.radial_function(e0, f, l, i).powi(2) * cf;
                        sb += plan.radial_function(e1, f, l, i).powi(2) * cf;
                    }
                    *a += (2 * l + 1) as f64 * sa * sb * radial.w[i] * radial.w[i];
                }
                if lmax_grid.contains(&l) {
                    let top = acc.iter().copied().fold(0.0, f64::max);
                    if top > 0.0 {
                        for (d, a) in d2.iter_mut().zip(&acc) {
                            *d = d.max(a / top);
                        }
                    }
                }
            }
        }
        let node_tol = if exact { 0.0 } else { NODE_TOL };
        let nodes: Vec<usize> = (0..n_r)
            .filter(|&i| d2[i].sqrt() > node_tol && radial.w[i] > 0.0)
            .collect();
        let n = nodes.len();
        let mut alpha = vec![vec![0.0; (lmax + 1) * n]; nf];
        let mut beta = vec![vec![0.0; (lmax + 1) * n]; nf];
        for f in 0..nf {
            for l in 0..=lmax {
                for (a, &i) in nodes.iter().enumerate() {
                    alpha[f][l * n + a] = plan.radial_function(e0, f, l, i);
                    beta[f][l * n + a] = plan.radial_function(e1, f, l, i);
                }
            }
        }
        Ok(Self {
            n,
            nf,
            lmax,
            w: nodes.iter().map(|&i| radial.w[i]).collect(),
            r: nodes.iter().map(|&i| radial.r[i]).collect(),
            d: nodes.iter().map(|&i| d2[i].sqrt()).collect(),
            nodes,
            alpha,
            beta,
            cinv,
        })
    }
}

/// Tr[(A B)^2] for symmetric R x R matrices.
fn trace_sq(a: &[f64], b: &[f64], r: usize) -> f64 {
    let mut p = vec![0.0; r * r];
    crate::numerics::gemm::gemm(r, r, r, a, (r, 1), b, (r, 1), 0.0, &mut p, (r, 1));
    let mut t = 0.0;
    for i in 0..r {
        for j in 0..r {
            t += p[i * r + j] * p[j * r + i];
        }
    }
    t
}

/// The collapsed-limit Fisher information on tau_NL, cumulative on the l_max grid, for
/// every field set of `plan` (its radial functions, inverse covariances and f_sky).
///
/// # Errors
/// A plan without the P^0 and P^1 radial functions.
pub fn tau_nl_fisher(
    plan: &BispectrumPlan,
    radial: &RadialGrid,
    prim: &Primordial,
    lmax_grid: &[usize],
    settings: &CollapsedSettings,
) -> Result<CollapsedForecast> {
    let mut grid: Vec<usize> = lmax_grid.iter().map(|&l| l.min(plan.lmax())).collect();
    grid.sort_unstable();
    grid.dedup();
    let kern = Kernels::new(plan, radial, &grid, settings.basis_tol <= 0.0)?;
    let n = kern.n;
    let nf = kern.nf;
    let lmax = kern.lmax;
    let ll = settings.long_lmax.max(2);
    let nfs = kern.cinv.len();
    let r_range = node_range(&kern.r);
    let s = long_mode_covariance(prim, &kern.r, Some(r_range), ll, settings.parallel);
    // Weighted kernels K_L = D S'_L D, their low-rank factors and one basis.
    let weighted: Vec<Vec<f64>> = s
        .iter()
        .map(|sl| {
            let mut k = sl.clone();
            for i in 0..n {
                for j in 0..n {
                    k[i * n + j] *= kern.d[i] * kern.d[j];
                }
            }
            k
        })
        .collect();
    let q: Vec<Vec<f64>> = if settings.basis_tol > 0.0 {
        let mut cols = Vec::new();
        for k in weighted.iter().skip(2) {
            cols.extend(pivoted_cholesky(k, n, settings.basis_tol));
        }
        orthonormal_basis(&cols, 1e-8)
    } else {
        (0..n)
            .map(|a| (0..n).map(|i| if i == a { 1.0 } else { 0.0 }).collect())
            .collect()
    };
    let rk = q.len();
    // Lambda_L = Q^T K_L Q (R x R).
    let lambda: Vec<Vec<f64>> = weighted
        .iter()
        .map(|k| {
            let mut kq = vec![0.0; n * rk];
            for i in 0..n {
                for (a, qa) in q.iter().enumerate() {
                    kq[i * rk + a] = (0..n).map(|j| k[i * n + j] * qa[j]).sum();
                }
            }
            let mut m = vec![0.0; rk * rk];
            for a in 0..rk {
                for b in 0..rk {
                    m[a * rk + b] = (0..n).map(|i| q[a][i] * kq[i * rk + b]).sum();
                }
            }
            m
        })
        .collect();
    // U = D^-1 Q, times the radial weights: uw[a * n + i] = Q_ia w_i / D_i.
    let mut uw = vec![0.0; rk * n];
    for (a, qa) in q.iter().enumerate() {
        for i in 0..n {
            uw[a * n + i] = qa[i] * kern.w[i] / kern.d[i];
        }
    }
    // Accumulators per grid interval: acc[interval][fs][L][a * rk + b].
    let n_int = grid.len();
    let interval_of = |l: usize| grid.iter().position(|&g| l <= g).unwrap_or(n_int);
    let w3 = Wigner000::new((lmax + ll) as u32);
    let zero = || vec![vec![vec![0.0; rk * rk]; ll + 1]; nfs * n_int];
    let nxy = nf * nf;
    let work = |range: std::ops::Range<usize>| -> Vec<Vec<Vec<f64>>> {
        let mut acc = zero();
        // Per l_lo: aw[X][a * n + i] = u_a w_i alpha^X_lo(i) / beta likewise.
        let mut ab = vec![0.0; rk * 2 * n];
        let win = ll + 1;
        // g[XY][a * win + d], d = l_hi - l_lo.
        let mut g = vec![vec![0.0; rk * win]; nxy];
        let mut stacked = vec![0.0; 2 * n * win];
        let mut h = vec![0.0; rk * nxy];
        let mut qm = vec![0.0; rk * rk];
        for l_lo in range {
            let l_top = (l_lo + ll).min(lmax);
            let wlen = l_top - l_lo + 1;
            for x in 0..nf {
                for a in 0..rk {
                    for i in 0..n {
                        ab[a * 2 * n + i] = uw[a * n + i] * kern.alpha[x][l_lo * n + i];
                        ab[a * 2 * n + n + i] = uw[a * n + i] * kern.beta[x][l_lo * n + i];
                    }
                }
                for y in 0..nf {
                    // stacked[(i) * win + d] = beta^Y_{lo+d}(i); [(n + i) * win + d] = alpha.
                    for d in 0..wlen {
                        let l2 = l_lo + d;
                        for i in 0..n {
                            stacked[i * win + d] = kern.beta[y][l2 * n + i];
                            stacked[(n + i) * win + d] = kern.alpha[y][l2 * n + i];
                        }
                    }
                    crate::numerics::gemm::gemm(
                        rk,
                        2 * n,
                        wlen,
                        &ab,
                        (2 * n, 1),
                        &stacked,
                        (win, 1),
                        0.0,
                        &mut g[x * nf + y],
                        (win, 1),
                    );
                }
            }
            for d in 0..wlen {
                let l_hi = l_lo + d;
                let it = interval_of(l_hi);
                if it >= n_int {
                    continue;
                }
                let mult = if d == 0 { 1.0 } else { 2.0 };
                let geo = 0.5 * mult * ((2 * l_lo + 1) * (2 * l_hi + 1)) as f64
                    / (4.0 * std::f64::consts::PI);
                for fs in 0..nfs {
                    let (c1, c2) = (&kern.cinv[fs][l_lo], &kern.cinv[fs][l_hi]);
                    if c1.iter().all(|&v| v == 0.0) || c2.iter().all(|&v| v == 0.0) {
                        continue;
                    }
                    // h[X'Y'](a) = Sum_XY C1^-1_{XX'} C2^-1_{YY'} g[XY](a).
                    for xp in 0..nf {
                        for yp in 0..nf {
                            for a in 0..rk {
                                let mut v = 0.0;
                                for x in 0..nf {
                                    for y in 0..nf {
                                        v += c1[x * nf + xp]
                                            * c2[y * nf + yp]
                                            * g[x * nf + y][a * win + d];
                                    }
                                }
                                h[(xp * nf + yp) * rk + a] = v;
                            }
                        }
                    }
                    for a in 0..rk {
                        for b in 0..rk {
                            let mut v = 0.0;
                            for xy in 0..nxy {
                                v += h[xy * rk + a] * g[xy][b * win + d];
                            }
                            qm[a * rk + b] = v;
                        }
                    }
                    let l_min_long = d.max(2);
                    for big_l in l_min_long..=ll {
                        if (l_lo + l_hi + big_l) % 2 == 1 {
                            continue;
                        }
                        let c = geo * w3.squared(l_lo as u32, l_hi as u32, big_l as u32);
                        if c == 0.0 {
                            continue;
                        }
                        let m = &mut acc[it * nfs + fs][big_l];
                        for (x, &y) in m.iter_mut().zip(&qm) {
                            *x += c * y;
                        }
                    }
                }
            }
        }
        acc
    };
    let lo = 2usize;
    let chunks: Vec<std::ops::Range<usize>> = {
        let n_chunks = if settings.parallel {
            4 * rayon::current_num_threads()
        } else {
            1
        };
        let len = (lmax + 1).saturating_sub(lo);
        let step = len.div_ceil(n_chunks.max(1)).max(1);
        (0..n_chunks)
            .map(|c| (lo + c * step).min(lmax + 1)..(lo + (c + 1) * step).min(lmax + 1))
            .filter(|r| !r.is_empty())
            .collect()
    };
    let parts: Vec<Vec<Vec<Vec<f64>>>> = if settings.parallel {
        chunks.into_par_iter().map(work).collect()
    } else {
        chunks.into_iter().map(work).collect()
    };
    let mut total = zero();
    for p in parts {
        for (a, b) in total.iter_mut().zip(p) {
            for (x, y) in a.iter_mut().zip(b) {
                for (u, v) in x.iter_mut().zip(y) {
                    *u += v;
                }
            }
        }
    }
    // Cumulative over intervals, then F.
    let f_sky = plan.f_sky();
    let mut fisher = vec![vec![0.0; n_int]; nfs];
    let mut per_long_l = vec![vec![0.0; ll + 1]; nfs];
    for fs in 0..nfs {
        let mut run = vec![vec![0.0; rk * rk]; ll + 1];
        for it in 0..n_int {
            let mut f = 0.0;
            for big_l in 2..=ll {
                for (x, y) in run[big_l].iter_mut().zip(&total[it * nfs + fs][big_l]) {
                    *x += y;
                }
                let fl = f_sky * (2 * big_l + 1) as f64 / 2.0
                    * trace_sq(&run[big_l], &lambda[big_l], rk);
                if it + 1 == n_int {
                    per_long_l[fs][big_l] = fl;
                }
                f += fl;
            }
            fisher[fs][it] = f;
        }
    }
    // Effective noise at the node of largest weight.
    let imax = (0..n)
        .max_by(|&a, &b| kern.d[a].total_cmp(&kern.d[b]))
        .unwrap_or(0);
    let noise_eff = per_long_l
        .iter()
        .map(|v| {
            v.iter()
                .enumerate()
                .map(|(big_l, &fl)| {
                    if big_l < 2 || fl <= 0.0 || n == 0 {
                        f64::INFINITY
                    } else {
                        let ca = s[big_l][imax * n + imax];
                        ca / (2.0 * fl / (f_sky * (2 * big_l + 1) as f64)).sqrt()
                    }
                })
                .collect()
        })
        .collect();
    Ok(CollapsedForecast {
        lmax: grid,
        field_sets: plan.field_sets().to_vec(),
        long_lmax: ll,
        fisher,
        per_long_l,
        noise_eff,
        basis_rank: rk,
        active_nodes: kern.nodes.len(),
        r_range_mpc: r_range,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cmb::bispectrum::CmbFisherInput;
    use crate::cmb::experiment::Experiment;
    use crate::cmb::thermal::ThermalHistory;
    use crate::cmb::transfer::TransferTable;
    use crate::cosmology::{Background, Cosmology};
    use crate::shapes::Shape;

    fn shell(lmax: usize) -> (TransferTable, RadialGrid, Primordial) {
        let c = Cosmology::planck2018();
        let bg = Background::new(&c);
        let th = ThermalHistory::new(&c, &bg).unwrap();
        let (t, r, _) = crate::cmb::shell_transfer_for(&th, None, true, lmax).unwrap();
        (t, r, Primordial::new(&c))
    }

    fn plan(
        t: &TransferTable,
        r: &RadialGrid,
        p: Primordial,
        lmax: usize,
        fs: &[FieldSet],
    ) -> BispectrumPlan {
        let exp = Experiment::ideal(lmax);
        BispectrumPlan::new(&CmbFisherInput {
            transfer: t,
            primordial: p,
            shapes: &[Shape::Local],
            experiment: &exp,
            t_cmb_k: 2.7255,
            lmax_grid: &[lmax],
            field_sets: fs,
            radial: r,
            parallel: true,
            signal_cl: None,
        })
    }

    /// Closed form (n_s = 1): Integral_0^inf dk/k j_L(k r)^2 = 1 / (2 L (L + 1)), so
    /// S'_L(r, r) = (25/9) (2/pi) (9/25) 2 pi^2 A Integral dk/k j_L^2 = 2 pi A / (L (L+1)).
    #[test]
    fn long_mode_covariance_against_the_closed_form() {
        let a = 2.1e-9;
        let p = Primordial::from_values(a, 1.0, 0.05);
        let r = [13000.0, 13900.0, 14200.0];
        let s = long_mode_covariance(&p, &r, None, 30, true);
        let (mut worst, mut worst_low) = (0.0_f64, 0.0_f64);
        for big_l in 2..=30 {
            for i in 0..3 {
                let exact = 2.0 * std::f64::consts::PI * a / (big_l * (big_l + 1)) as f64;
                let e = (s[big_l][i * 3 + i] / exact - 1.0).abs();
                worst = worst.max(e);
                if big_l <= 6 {
                    worst_low = worst_low.max(e);
                }
            }
            // Symmetric, and |S_ij| <= sqrt(S_ii S_jj).
            assert!((s[big_l][1] - s[big_l][3]).abs() <= 1e-12 * s[big_l][0]);
            assert!(s[big_l][1].abs() <= (s[big_l][0] * s[big_l][4]).sqrt());
        }
        println!(
            "S'_L(r, r) against 2 pi A / (L (L+1)): worst {worst:.2e}, L <= 6: {worst_low:.2e}"
        );
        assert!(worst < 6e-4 && worst_low < 5e-5, "{worst} {worst_low}");
    }

    /// The fast path (low-rank long-mode basis, windowed pair sums, cumulative grid)
    /// against the brute-force double sum over (l1, l2) with the full M_L, shell model,
    /// T, E and T+E at l_max = 40, per long mode L.
    #[test]
    fn fast_path_against_brute_force_pair_sum() {
        let lmax = 40;
        let (t, r, p) = shell(lmax);
        let fss = [FieldSet::T, FieldSet::E, FieldSet::TE];
        let pl = plan(&t, &r, p, lmax, &fss);
        for (tol, bound) in [(0.0, 1e-9), (DEFAULT_BASIS_TOL, 1e-5)] {
            let st = CollapsedSettings {
                long_lmax: 12,
                basis_tol: tol,
                parallel: true,
            };
            let fc = tau_nl_fisher(&pl, &r, &p, &[20, lmax], &st).unwrap();
            for fs in 0..3 {
                let bf = brute_force_tau_fisher(&pl, &r, &p, lmax, fs, 12, Some(fc.r_range_mpc))
                    .unwrap();
                let total: f64 = bf.iter().sum();
                let mut worst = 0.0_f64;
                for big_l in 2..=12 {
                    worst = worst.max((fc.per_long_l[fs][big_l] - bf[big_l]).abs() / bf[big_l]);
                }
                let rel = (fc.fisher[fs][1] / total - 1.0).abs();
                println!(
                    "tol {tol:e} {}: rank {}, F {:.4e} vs {:.4e} ({rel:.1e}), worst per L {worst:.1e}",
                    fss[fs].label(),
                    fc.basis_rank,
                    fc.fisher[fs][1],
                    total
                );
                assert!(rel < bound && worst < 10.0 * bound, "{rel} {worst}");
                // Cumulative: the l_max = 20 value against brute force at 20.
                let bf20: f64 =
                    brute_force_tau_fisher(&pl, &r, &p, 20, fs, 12, Some(fc.r_range_mpc))
                        .unwrap()
                        .iter()
                        .sum();
                assert!((fc.fisher[fs][0] / bf20 - 1.0).abs() < 10.0 * bound);
            }
        }
    }

    /// The long-mode cut: F_L falls roughly as L^-3 (S'_L ~ 1/L^2, nearly flat
    /// reconstruction noise), so the part above L_long = 30, estimated as F_30 * 30 / 2
    /// (the integral of F_30 (30/L)^3), is below 1% of F (shell, T, l_max = 400).
    #[test]
    fn long_mode_cut_leaves_out_below_one_percent() {
        let lmax = 400;
        let (t, r, p) = shell(lmax);
        let pl = plan(&t, &r, p, lmax, &[FieldSet::T]);
        let fc = tau_nl_fisher(&pl, &r, &p, &[lmax], &CollapsedSettings::default()).unwrap();
        let f = &fc.per_long_l[0];
        let total: f64 = f.iter().sum();
        let tail = f[30] * 30.0 / 2.0;
        let slope = (f[20] / f[10]).ln() / 2f64.ln();
        println!(
            "F_L: L=2 {:.3e}, 10 {:.3e}, 20 {:.3e}, 30 {:.3e}; d ln F_L / d ln L (10-20) {slope:.2}; estimated tail above 30: {:.2e} of F",
            f[2],
            f[10],
            f[20],
            f[30],
            tail / total
        );
        assert!(tail / total < 0.01, "{}", tail / total);
        assert!((-4.0..-2.0).contains(&slope), "{slope}");
    }

    /// The pair-sum form Tr[(M S')^2] against the trispectrum Fisher written as a sum
    /// over quadrilaterals (l1 l2 l3 l4; L) of the collapsed pairing (T, l_max = 16).
    /// Also prints how much of the pairing's information sits at long-mode L above
    /// 8: the part a collapsed-limit cut at L_long would leave out.
    #[test]
    fn pair_sum_against_quadrilateral_sum() {
        let lmax = 16;
        let (t, r, p) = shell(lmax);
        let pl = plan(&t, &r, p, lmax, &[FieldSet::T]);
        let q = quadrilateral_tau_fisher(&pl, &r, &p, lmax, 0, 2 * lmax, None).unwrap();
        let bf = brute_force_tau_fisher(&pl, &r, &p, lmax, 0, 2 * lmax, None).unwrap();
        for big_l in 2..=2 * lmax {
            assert!(
                (q[big_l] - bf[big_l]).abs() <= 1e-9 * bf[big_l].abs().max(1e-300),
                "L {big_l}: {} {}",
                q[big_l],
                bf[big_l]
            );
        }
        let all: f64 = q.iter().sum();
        let low: f64 = q[..=8].iter().sum();
        println!(
            "l_max {lmax}: share of the collapsed pairing at L > 8: {:.3}",
            1.0 - low / all
        );
        assert!(low / all > 0.5);
    }
}
