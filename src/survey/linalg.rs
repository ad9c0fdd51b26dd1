//! Small fixed-size matrices for the multi-tracer covariance (n <= MAX_TRACERS).

/// Most tracers per survey (the covariance algebra works on fixed-size arrays).
pub const MAX_TRACERS: usize = 4;

/// A row-major n x n matrix in a fixed array.
pub type Small = [f64; MAX_TRACERS * MAX_TRACERS];

/// Inverse of a small symmetric positive-definite n x n matrix by Gauss-Jordan
/// elimination.
pub fn invert_small(a: &Small, n: usize) -> Small {
    let mut m = *a;
    let mut inv = [0.0; MAX_TRACERS * MAX_TRACERS];
    for i in 0..n {
        inv[i * n + i] = 1.0;
    }
    for col in 0..n {
        let piv = m[col * n + col];
        for j in 0..n {
            m[col * n + j] /= piv;
            inv[col * n + j] /= piv;
        }
        for r in 0..n {
            if r != col {
                let fct = m[r * n + col];
                for j in 0..n {
                    m[r * n + j] -= fct * m[col * n + j];
                    inv[r * n + j] -= fct * inv[col * n + j];
                }
            }
        }
    }
    inv
}

/// Product of two small matrices.
pub fn matmul_small(a: &Small, b: &Small, n: usize) -> Small {
    let mut c = [0.0; MAX_TRACERS * MAX_TRACERS];
    for i in 0..n {
        for k in 0..n {
            let aik = a[i * n + k];
            for j in 0..n {
                c[i * n + j] += aik * b[k * n + j];
            }
        }
    }
    c
}

/// Tr(A B).
pub fn trace_prod(a: &Small, b: &Small, n: usize) -> f64 {
    let mut t = 0.0;
    for i in 0..n {
        for k in 0..n {
            t += a[i * n + k] * b[k * n + i];
        }
    }
    t
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn inverse_times_matrix_is_identity() {
        let n = 3;
        let mut a = [0.0; MAX_TRACERS * MAX_TRACERS];
        let v = [4.0, 1.0, 0.5, 1.0, 3.0, 0.2, 0.5, 0.2, 2.0];
        a[..9].copy_from_slice(&v);
        let p = matmul_small(&a, &invert_small(&a, n), n);
        for i in 0..n {
            for j in 0..n {
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((p[i * n + j] - want).abs() < 1e-12);
            }
        }
        assert!((trace_prod(&a, &invert_small(&a, n), n) - 3.0).abs() < 1e-12);
    }
}
