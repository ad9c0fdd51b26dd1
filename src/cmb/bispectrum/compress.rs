//! Per-block low-rank bases of the radial functions (see [`super::cmb_fisher_with_plan`]).

use super::BispectrumPlan;

/// One block of multipoles [l0, l1] (inside one l_max segment) and its low-rank bases on
/// the active radial range [r0, r0 + w), one per field f (T, E): X^{e,f}_l(r) ~=
/// Sum_{j < q_f} u[f][l - l0][j] v[e][(qoff[f] + j), r]. Each field has a basis of its
/// own, so a field set's products have inner dimension Sum over its fields of q_f (a
/// joint basis over both fields would need the larger joint rank for every field).
pub(super) struct LBlock {
    pub(super) l0: usize,
    pub(super) l1: usize,
    /// Index of the l_max segment the block belongs to; `last` marks its final block.
    pub(super) seg: usize,
    pub(super) last: bool,
    pub(super) r0: usize,
    pub(super) w: usize,
    /// Total rank, Sum_f q_f (0: the block contributes nothing).
    pub(super) q: usize,
    /// Row offsets of the fields in `v`: field f owns rows qoff[f]..qoff[f + 1]
    /// (q_f = qoff[f + 1] - qoff[f]).
    pub(super) qoff: Vec<usize>,
    /// Per field set: the fields [lo, hi) with a non-zero inverse covariance somewhere in
    /// the block (T, E or both: a contiguous range of the table's field indices).
    pub(super) active_fields: Vec<(usize, usize)>,
    /// Per field: nb x q_f, row-major.
    pub(super) u: Vec<Vec<f64>>,
    /// Per exponent: (Sum_f q_f) x w, row qoff[f] + j.
    pub(super) v: Vec<Vec<f64>>,
}

impl LBlock {
    /// Rows of the field range [f_lo, f_hi) in `v` (the inner dimension of a field set).
    pub(super) fn rows(&self, (f_lo, f_hi): (usize, usize)) -> std::ops::Range<usize> {
        if f_hi <= f_lo {
            return 0..0;
        }
        self.qoff[f_lo]..self.qoff[f_hi]
    }
}

/// The per-field bases of one block: (qoff, u per field, v per exponent) as in
/// [`LBlock`], each field compressed by [`compress_field`].
pub(super) type BlockBases = (Vec<usize>, Vec<Vec<f64>>, Vec<Vec<f64>>);

/// Compresses every field of the block [l0, l1] on the radial range [r0, r1) separately
/// (see [`compress_field`]) and stacks the fields' radial bases per exponent.
pub(super) fn compress_block(
    plan: &BispectrumPlan,
    l0: usize,
    l1: usize,
    r0: usize,
    r1: usize,
    tol: f64,
) -> BlockBases {
    let ne = plan.exponents.len();
    let nf = plan.fields.len();
    let w = r1 - r0;
    let per_field: Vec<(usize, Vec<f64>, Vec<Vec<f64>>)> = (0..nf)
        .map(|f| compress_field(plan, f, l0, l1, r0, r1, tol))
        .collect();
    let mut qoff = vec![0usize; nf + 1];
    for (f, pf) in per_field.iter().enumerate() {
        qoff[f + 1] = qoff[f] + pf.0;
    }
    let v = (0..ne)
        .map(|e| {
            let mut out = Vec::with_capacity(qoff[nf] * w);
            for pf in &per_field {
                out.extend_from_slice(&pf.2[e]);
            }
            out
        })
        .collect();
    let u = per_field.into_iter().map(|pf| pf.1).collect();
    (qoff, u, v)
}

/// Row-pivoted modified Gram-Schmidt on one field's radial functions in the block (an
/// interpolative, rank-revealing decomposition; Golub & Van Loan, section 5.4.2): the
/// rows (multipoles) are the field's radial functions of all exponents, each exponent
/// group scaled by its norm over the block and each row then normalized, so the stopping
/// rule "largest residual row norm <= tol" bounds every multipole's relative error of
/// this field. Returns (q_f, u (nb x q_f), v per exponent (q_f x w)).
fn compress_field(
    plan: &BispectrumPlan,
    f: usize,
    l0: usize,
    l1: usize,
    r0: usize,
    r1: usize,
    tol: f64,
) -> (usize, Vec<f64>, Vec<Vec<f64>>) {
    let n_r = plan.n_r;
    let ne = plan.exponents.len();
    let nb = l1 - l0 + 1;
    let w = r1 - r0;
    let ng = ne;
    let ncol = ng * w;
    let mut group_norm = vec![0.0; ng];
    for (e, gn) in group_norm.iter_mut().enumerate() {
        let x = &plan.x[e][f];
        let s: f64 = (l0..=l1)
            .map(|l| {
                x[l * n_r + r0..l * n_r + r1]
                    .iter()
                    .map(|v| v * v)
                    .sum::<f64>()
            })
            .sum();
        *gn = s.sqrt();
    }
    // Scaled rows, then normalized: res[l] (nb x ncol).
    let mut res = vec![0.0; nb * ncol];
    let mut d = vec![0.0; nb];
    for (li, l) in (l0..=l1).enumerate() {
        let row = &mut res[li * ncol..(li + 1) * ncol];
        for (g, &gn) in group_norm.iter().enumerate() {
            if gn == 0.0 {
                continue;
            }
            let src = &plan.x[g][f][l * n_r + r0..l * n_r + r1];
            for (o, s) in row[g * w..(g + 1) * w].iter_mut().zip(src) {
                *o = s / gn;
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
        .map(|g| {
            let mut out = vec![0.0; q * w];
            for (j, b) in basis.iter().enumerate() {
                let dst = &mut out[j * w..(j + 1) * w];
                for (o, s) in dst.iter_mut().zip(&b[g * w..(g + 1) * w]) {
                    *o = group_norm[g] * s;
                }
            }
            out
        })
        .collect();
    (q, u, v)
}
