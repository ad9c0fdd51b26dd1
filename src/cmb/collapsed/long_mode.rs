//! The long-mode covariance S'_L(r_i, r_j) of the modulating field on the radial nodes,
//! and the low-rank factorization tools of the fast path (pivoted Cholesky, pivoted
//! Gram-Schmidt). See the parent module for the formulas.

use rayon::prelude::*;

use crate::cosmology::Primordial;
use crate::numerics::GaussLegendre;

use super::MODULATION_POWER;

/// S'_L(r_i, r_j) = (25/9) (2/pi) Integral k^2 dk P_Phi(k) j_L(k r_i) j_L(k r_j) for
/// L = 0..=long_lmax on the nodes `r` (n x n, row-major; entries for L < 2 are zero).
/// Gauss-Legendre panels (8 nodes) in ln k from 0.01 / r_max to 30 (L_long + 2) / r_min,
/// of width at most 0.05 in ln k and at most 2.5 radians of the phase k (r_max + r_min)
/// (the fastest oscillation of j_L(k r_i) j_L(k r_j)). Above the top the integrand falls
/// as cos / k^3: the diagonal misses 1 / (4 x^2) of 1 / (2 L (L+1)) (x = k_top r >= 30
/// (L_long + 2)), i.e. 5e-4 at L = L_long and 2e-5 at L <= 6, where the information
/// sits (measured against the closed form in the tests).
/// `r_range` sets the k grid (default: the range of `r`).
pub fn long_mode_covariance(
    prim: &Primordial,
    r: &[f64],
    r_range: Option<(f64, f64)>,
    long_lmax: usize,
    parallel: bool,
) -> Vec<Vec<f64>> {
    let n = r.len();
    let nl = long_lmax + 1;
    if n == 0 {
        return vec![Vec::new(); nl];
    }
    let (r_lo, r_hi) = r_range.unwrap_or_else(|| node_range(r));
    let spread = r_hi + r_lo;
    let (k_lo, k_hi) = (0.01 / r_hi, 30.0 * (long_lmax + 2) as f64 / r_lo);
    let mut edges = vec![k_lo.ln()];
    while *edges.last().unwrap_or(&0.0) < k_hi.ln() {
        let x = *edges.last().unwrap_or(&0.0);
        let h = 0.05_f64.min(2.5 / (x.exp() * spread));
        edges.push((x + h).min(k_hi.ln()));
        if x + h >= k_hi.ln() {
            break;
        }
    }
    let gl = GaussLegendre::new(8);
    let mut kw: Vec<(f64, f64)> = Vec::new();
    for p in 0..edges.len() - 1 {
        let (xs, ws) = gl.mapped(edges[p], edges[p + 1]);
        for (x, w) in xs.into_iter().zip(ws) {
            let k = x.exp();
            // Integral dk k^2 P (...) = Integral d ln k k^3 P (...).
            kw.push((
                k,
                MODULATION_POWER * 2.0 / std::f64::consts::PI * w * k.powi(3) * prim.p_phi(k),
            ));
        }
    }
    const CHUNK: usize = 256;
    let chunk = |c: &[(f64, f64)]| -> Vec<Vec<f64>> {
        let m = c.len();
        let mut j = vec![0.0; nl];
        // jt[L][q * n + i] = sqrt(weight_q) j_L(k_q r_i)
        let mut jt = vec![vec![0.0; m * n]; nl];
        for (q, &(k, w)) in c.iter().enumerate() {
            let s = w.sqrt();
            for (i, &ri) in r.iter().enumerate() {
                crate::special::sph_bessel_all_l(long_lmax as u32, k * ri, &mut j);
                for ll in 2..nl {
                    jt[ll][q * n + i] = s * j[ll];
                }
            }
        }
        let mut out = vec![vec![0.0; n * n]; nl];
        for ll in 2..nl {
            crate::numerics::gemm::gemm(
                n,
                m,
                n,
                &jt[ll],
                (1, n),
                &jt[ll],
                (n, 1),
                0.0,
                &mut out[ll],
                (n, 1),
            );
        }
        out
    };
    let parts: Vec<Vec<Vec<f64>>> = if parallel {
        kw.par_chunks(CHUNK).map(chunk).collect()
    } else {
        kw.chunks(CHUNK).map(chunk).collect()
    };
    let mut s = vec![vec![0.0; n * n]; nl];
    for p in parts {
        for (a, b) in s.iter_mut().zip(p) {
            for (x, y) in a.iter_mut().zip(b) {
                *x += y;
            }
        }
    }
    s
}

/// (min, max) of radial nodes, the minimum at least 1 Mpc.
pub(super) fn node_range(r: &[f64]) -> (f64, f64) {
    let lo = r.iter().copied().fold(f64::INFINITY, f64::min).max(1.0);
    (lo, r.iter().copied().fold(0.0, f64::max).max(lo))
}

/// Pivoted Cholesky of the symmetric positive semi-definite n x n matrix `k` to the
/// relative tolerance `tol` (of its largest diagonal): columns l_a with k ~ Sum l_a l_a^T.
pub(super) fn pivoted_cholesky(k: &[f64], n: usize, tol: f64) -> Vec<Vec<f64>> {
    let mut diag: Vec<f64> = (0..n).map(|i| k[i * n + i]).collect();
    let top = diag.iter().copied().fold(0.0, f64::max);
    let mut cols: Vec<Vec<f64>> = Vec::new();
    if top <= 0.0 {
        return cols;
    }
    while cols.len() < n {
        let (p, &dp) = diag
            .iter()
            .enumerate()
            .max_by(|a, b| a.1.total_cmp(b.1))
            .unwrap_or((0, &0.0));
        if dp <= tol * top {
            break;
        }
        let s = dp.sqrt();
        let col: Vec<f64> = (0..n)
            .map(|i| {
                let mut v = k[i * n + p];
                for c in &cols {
                    v -= c[i] * c[p];
                }
                v / s
            })
            .collect();
        for (d, &c) in diag.iter_mut().zip(&col) {
            *d -= c * c;
        }
        diag[p] = 0.0;
        cols.push(col);
    }
    cols
}

/// An orthonormal basis of the span of `vs` (modified Gram-Schmidt, largest residual
/// first), dropping directions whose residual falls below `tol` of the vector's norm.
pub(super) fn orthonormal_basis(vs: &[Vec<f64>], tol: f64) -> Vec<Vec<f64>> {
    let mut work: Vec<(Vec<f64>, f64)> = vs
        .iter()
        .map(|v| (v.clone(), v.iter().map(|x| x * x).sum::<f64>().sqrt()))
        .filter(|(_, nrm)| *nrm > 0.0)
        .collect();
    let mut q: Vec<Vec<f64>> = Vec::new();
    while !work.is_empty() {
        // Pick the vector with the largest relative residual.
        let (ip, rel) = work
            .iter()
            .enumerate()
            .map(|(i, (v, n0))| (i, v.iter().map(|x| x * x).sum::<f64>().sqrt() / n0))
            .max_by(|a, b| a.1.total_cmp(&b.1))
            .unwrap_or((0, 0.0));
        if rel <= tol {
            break;
        }
        let (v, _) = work.swap_remove(ip);
        let nrm = v.iter().map(|x| x * x).sum::<f64>().sqrt();
        let u: Vec<f64> = v.iter().map(|x| x / nrm).collect();
        for (w, _) in work.iter_mut() {
            let dot: f64 = w.iter().zip(&u).map(|(a, b)| a * b).sum();
            for (a, b) in w.iter_mut().zip(&u) {
                *a -= dot * b;
            }
        }
        q.push(u);
    }
    q
}
