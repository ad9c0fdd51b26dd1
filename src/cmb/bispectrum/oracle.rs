//! The brute-force oracle of the fast engine.

use rayon::prelude::*;

use super::BispectrumPlan;
use super::kernel::cinv_entry;

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
