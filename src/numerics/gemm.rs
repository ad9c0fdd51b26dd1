//! A safe, bounds-checked wrapper of matrixmultiply's dgemm (which takes raw pointers):
//! the one place that calls it.
#![allow(unsafe_code)]

/// Largest index touched by an m x n matrix with strides (rs, cs), plus one.
fn extent(m: usize, n: usize, (rs, cs): (usize, usize)) -> usize {
    if m == 0 || n == 0 {
        0
    } else {
        (m - 1) * rs + (n - 1) * cs + 1
    }
}

/// C = A B + beta C for an m x k matrix A, a k x n matrix B and an m x n matrix C,
/// each given by a slice and its (row, column) strides. Bounds are checked once.
#[allow(clippy::too_many_arguments)]
pub fn gemm(
    m: usize,
    k: usize,
    n: usize,
    a: &[f64],
    sa: (usize, usize),
    b: &[f64],
    sb: (usize, usize),
    beta: f64,
    c: &mut [f64],
    sc: (usize, usize),
) {
    assert!(
        extent(m, k, sa) <= a.len() && extent(k, n, sb) <= b.len() && extent(m, n, sc) <= c.len(),
        "gemm: matrix out of bounds"
    );
    if m == 0 || n == 0 {
        return;
    }
    // SAFETY: the assertion above bounds every element index of A, B and C by the
    // lengths of their slices; c is a unique borrow, so it aliases neither a nor b.
    unsafe {
        matrixmultiply::dgemm(
            m,
            k,
            n,
            1.0,
            a.as_ptr(),
            sa.0 as isize,
            sa.1 as isize,
            b.as_ptr(),
            sb.0 as isize,
            sb.1 as isize,
            beta,
            c.as_mut_ptr(),
            sc.0 as isize,
            sc.1 as isize,
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Against the naive triple loop, with a transposed A and an offset, strided C.
    #[test]
    fn matches_naive_product_with_strides() {
        let (m, k, n) = (5, 7, 3);
        let a: Vec<f64> = (0..k * m).map(|i| (i as f64 * 0.37).sin()).collect(); // A^T stored k x m
        let b: Vec<f64> = (0..k * n).map(|i| (i as f64 * 0.11).cos()).collect();
        let ld = 10;
        let mut c = vec![1.0; m * ld];
        gemm(m, k, n, &a, (1, m), &b, (n, 1), 0.5, &mut c[2..], (ld, 1));
        for i in 0..m {
            for j in 0..n {
                let want: f64 = 0.5 + (0..k).map(|p| a[p * m + i] * b[p * n + j]).sum::<f64>();
                assert!((c[i * ld + 2 + j] - want).abs() < 1e-14);
            }
        }
        assert_eq!(c[0], 1.0);
    }
}
