//! Eigen-decomposition of small dense symmetric matrices by the cyclic Jacobi method
//! (Golub & Van Loan, Matrix Computations, 4th ed., section 8.5; the rotation formulas of
//! Rutishauser 1966 that keep the update stable). Used to find a low-rank basis of the
//! CMB radial functions over a block of multipoles, where the matrices are at most a few
//! hundred rows: Jacobi is simple, needs no workspace beyond the matrix, and gives
//! eigenvalues with absolute error ~ machine epsilon x the largest one.

/// Eigenvalues (descending) and eigenvectors of a symmetric n x n matrix `a` (row-major,
/// overwritten). Returns (values, vectors) with vectors as columns of an n x n row-major
/// matrix: `vectors[i * n + q]` is component i of eigenvector q.
pub fn symmetric_eigen(a: &mut [f64], n: usize) -> (Vec<f64>, Vec<f64>) {
    assert_eq!(a.len(), n * n, "symmetric_eigen: matrix is not n x n");
    let mut v = vec![0.0; n * n];
    for i in 0..n {
        v[i * n + i] = 1.0;
    }
    let frob: f64 = a.iter().map(|x| x * x).sum::<f64>().sqrt();
    if frob > 0.0 {
        for _sweep in 0..60 {
            let off: f64 = (0..n)
                .flat_map(|i| (0..n).filter(move |&j| j != i).map(move |j| (i, j)))
                .map(|(i, j)| a[i * n + j] * a[i * n + j])
                .sum::<f64>()
                .sqrt();
            if off <= 1e-15 * frob {
                break;
            }
            for p in 0..n {
                for q in p + 1..n {
                    let apq = a[p * n + q];
                    if apq.abs() <= 1e-300 {
                        continue;
                    }
                    let (app, aqq) = (a[p * n + p], a[q * n + q]);
                    let theta = (aqq - app) / (2.0 * apq);
                    let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                    let t = if theta == 0.0 { 1.0 } else { t };
                    let c = 1.0 / (t * t + 1.0).sqrt();
                    let s = t * c;
                    // A <- J^T A J on rows/columns p, q.
                    for k in 0..n {
                        let (akp, akq) = (a[k * n + p], a[k * n + q]);
                        a[k * n + p] = c * akp - s * akq;
                        a[k * n + q] = s * akp + c * akq;
                    }
                    for k in 0..n {
                        let (apk, aqk) = (a[p * n + k], a[q * n + k]);
                        a[p * n + k] = c * apk - s * aqk;
                        a[q * n + k] = s * apk + c * aqk;
                    }
                    for k in 0..n {
                        let (vkp, vkq) = (v[k * n + p], v[k * n + q]);
                        v[k * n + p] = c * vkp - s * vkq;
                        v[k * n + q] = s * vkp + c * vkq;
                    }
                }
            }
        }
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&i, &j| a[j * n + j].total_cmp(&a[i * n + i]));
    let values: Vec<f64> = order.iter().map(|&i| a[i * n + i]).collect();
    let mut vectors = vec![0.0; n * n];
    for (q, &src) in order.iter().enumerate() {
        for i in 0..n {
            vectors[i * n + q] = v[i * n + src];
        }
    }
    (values, vectors)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Reconstruction A = V diag(lambda) V^T and orthonormality, on a matrix with a known
    /// spectrum built from a Householder reflection (an independent construction).
    #[test]
    fn reconstructs_known_spectrum() {
        let n = 12;
        let lam: Vec<f64> = (0..n).map(|i| 10f64.powi(-(i as i32))).collect();
        let u: Vec<f64> = (0..n).map(|i| ((i * 7 + 3) % 5) as f64 - 1.7).collect();
        let uu: f64 = u.iter().map(|x| x * x).sum();
        // H = I - 2 u u^T / u^T u; A = H diag(lam) H.
        let h = |i: usize, j: usize| f64::from(u8::from(i == j)) - 2.0 * u[i] * u[j] / uu;
        let mut a = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..n {
                a[i * n + j] = (0..n).map(|k| h(i, k) * lam[k] * h(k, j)).sum();
            }
        }
        let a0 = a.clone();
        let (vals, vecs) = symmetric_eigen(&mut a, n);
        for (got, want) in vals.iter().zip(&lam) {
            assert!((got - want).abs() < 1e-14, "{got} vs {want}");
        }
        for i in 0..n {
            for j in 0..n {
                let r: f64 = (0..n)
                    .map(|q| vecs[i * n + q] * vals[q] * vecs[j * n + q])
                    .sum();
                assert!((r - a0[i * n + j]).abs() < 1e-14);
                let o: f64 = (0..n).map(|k| vecs[k * n + i] * vecs[k * n + j]).sum();
                assert!((o - f64::from(u8::from(i == j))).abs() < 1e-13);
            }
        }
    }
}
