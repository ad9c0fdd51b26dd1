//! The self term F_lens,lens of the ISW-lensing bispectrum by one-dimensional l sums of
//! Wigner d functions (see the parent module), for every field set of a plan in one pass
//! over the mu nodes.

use std::collections::HashMap;

use rayon::prelude::*;

use super::{active_fields, cinv_matrix};
use crate::cmb::bispectrum::BispectrumPlan;
use crate::cmb::lensing::isw_bispectrum::IswLensingBispectrum;
use crate::cmb::lensing::lensed_cl::DRecurrence;
use crate::numerics::GaussLegendre;
use crate::numerics::gemm::gemm;

/// Mu nodes per block (the Wigner d recurrences run side by side over a block's nodes).
const MU_BLOCK: usize = 64;

/// Multipoles per block of the l sums (the d functions of a block are stored, then
/// multiplied by the weights).
const L_BLOCK: usize = 256;

/// Roles of a leg in one assignment of the lensing bispectrum.
#[derive(Clone, Copy, PartialEq, Eq, Hash)]
enum Role {
    Phi,
    Unlensed,
    Lensed,
}

/// The l sums the self term needs: each column is one weight vector h(l) summed against
/// one d^l_{mm'}; a product of three columns (one per leg) is one combination of leg
/// assignments, fields and signs.
struct Sums {
    /// The (m, m') of each d function used.
    pairs: Vec<(i32, i32)>,
    /// Per pair, its columns' weights as a (columns x (l_max + 1)) row-major matrix.
    weights: Vec<Vec<f64>>,
    /// Per pair, the index of its first column (columns are grouped by pair).
    first_column: Vec<usize>,
    n_columns: usize,
    /// Per field set, the combinations as three column indices.
    combos: Vec<Vec<[usize; 3]>>,
}

/// The weight vectors, d functions and combinations of every field set of the plan.
fn sums(plan: &BispectrumPlan, isw: &IswLensingBispectrum, nl: usize) -> Sums {
    use Role::{Lensed, Phi, Unlensed};
    let fields = plan.fields();
    let base = [Phi, Unlensed, Lensed];
    let perms: [[Role; 3]; 6] = [
        [Phi, Unlensed, Lensed],
        [Unlensed, Phi, Lensed],
        [Phi, Lensed, Unlensed],
        [Unlensed, Lensed, Phi],
        [Lensed, Phi, Unlensed],
        [Lensed, Unlensed, Phi],
    ];
    // Field vector of a role at l, lensed field z (table index).
    let vec_of = |role: Role, z: usize, l: usize| -> [f64; 2] {
        let mut v = [0.0; 2];
        for (x, &fx) in fields.iter().enumerate() {
            v[x] = match role {
                Phi => isw.cl_phi(fx, l),
                Unlensed => isw.cl(fx, fields[z], l),
                Lensed => f64::from(u8::from(x == z)),
            };
        }
        v
    };
    // The weight of a leg: (2l+1) [a C^-1 b] with a, b the field vectors of the base and
    // the permuted role, times sqrt(L) for each role that is not the lensed one.
    let weight = |ifs: usize, leg: usize, role: Role, z: usize, z2: usize| -> Vec<f64> {
        (0..nl)
            .map(|l| {
                if l < 2 {
                    return 0.0;
                }
                let ci = cinv_matrix(plan, ifs, l);
                let a = vec_of(base[leg], z, l);
                let b = vec_of(role, z2, l);
                let mut s = 0.0;
                for x in 0..2 {
                    for y in 0..2 {
                        s += a[x] * ci[x][y] * b[y];
                    }
                }
                let big_l = (l * (l + 1)) as f64;
                let mut sl = 1.0;
                if base[leg] != Lensed {
                    sl *= big_l.sqrt();
                }
                if role != Lensed {
                    sl *= big_l.sqrt();
                }
                (2 * l + 1) as f64 * sl * s
            })
            .collect()
    };
    let mut pairs: Vec<(i32, i32)> = Vec::new();
    let mut wvecs: Vec<Vec<f64>> = Vec::new();
    let mut wkey: HashMap<(usize, usize, Role, usize, usize), usize> = HashMap::new();
    // Columns as (pair, weight vector), numbered in order of appearance.
    let mut cols: Vec<(usize, usize)> = Vec::new();
    let mut combos: Vec<Vec<[usize; 3]>> = Vec::new();
    for (ifs, &fs) in plan.field_sets().iter().enumerate() {
        let act = active_fields(plan, fs);
        let mut list = Vec::new();
        for p in &perms {
            for &z in &act {
                for &z2 in &act {
                    let h: [usize; 3] = std::array::from_fn(|leg| {
                        *wkey.entry((ifs, leg, p[leg], z, z2)).or_insert_with(|| {
                            wvecs.push(weight(ifs, leg, p[leg], z, z2));
                            wvecs.len() - 1
                        })
                    });
                    if h.iter().any(|&k| wvecs[k].iter().all(|&x| x == 0.0)) {
                        continue;
                    }
                    for sigma in [1, -1] {
                        let c: [usize; 3] = std::array::from_fn(|leg| {
                            let m0 = match base[leg] {
                                Phi => 1,
                                Unlensed => -1,
                                Lensed => 0,
                            };
                            let m1 = match p[leg] {
                                Phi => sigma,
                                Unlensed => -sigma,
                                Lensed => 0,
                            };
                            let pair =
                                pairs
                                    .iter()
                                    .position(|&q| q == (m0, m1))
                                    .unwrap_or_else(|| {
                                        pairs.push((m0, m1));
                                        pairs.len() - 1
                                    });
                            cols.iter()
                                .position(|&q| q == (pair, h[leg]))
                                .unwrap_or_else(|| {
                                    cols.push((pair, h[leg]));
                                    cols.len() - 1
                                })
                        });
                        list.push(c);
                    }
                }
            }
        }
        combos.push(list);
    }
    // Group the columns by pair.
    let mut order: Vec<usize> = (0..cols.len()).collect();
    order.sort_by_key(|&c| cols[c].0);
    let mut new_index = vec![0; cols.len()];
    for (i, &c) in order.iter().enumerate() {
        new_index[c] = i;
    }
    for list in &mut combos {
        for c in list.iter_mut() {
            for k in c.iter_mut() {
                *k = new_index[*k];
            }
        }
    }
    let mut weights = vec![Vec::new(); pairs.len()];
    let mut first_column = vec![0; pairs.len() + 1];
    for &c in &order {
        let (pair, w) = cols[c];
        weights[pair].extend_from_slice(&wvecs[w]);
        first_column[pair + 1] += 1;
    }
    for k in 0..pairs.len() {
        first_column[k + 1] += first_column[k];
    }
    Sums {
        pairs,
        weights,
        first_column,
        n_columns: cols.len(),
        combos,
    }
}

/// F_lens,lens for every field set of the plan (outer index) and every value of `grid`
/// (each at most the plan's l_max): self_term[fs][m].
pub fn self_fisher_terms(
    plan: &BispectrumPlan,
    isw: &IswLensingBispectrum,
    grid: &[usize],
    parallel: bool,
) -> Vec<Vec<f64>> {
    let lmax = grid.iter().copied().max().unwrap_or(2);
    let gl = GaussLegendre::new((3 * lmax).div_ceil(2) + 1);
    self_terms_with_rule(plan, isw, grid, &gl, parallel)
}

/// As [`self_fisher_terms`] on the Gauss-Legendre rule `gl` of ceil(3 l_max / 2) + 1
/// nodes (or more).
pub(super) fn self_terms_with_rule(
    plan: &BispectrumPlan,
    isw: &IswLensingBispectrum,
    grid: &[usize],
    gl: &GaussLegendre,
    parallel: bool,
) -> Vec<Vec<f64>> {
    let nm = grid.len();
    let nfs = plan.field_sets().len();
    let lmax = grid.iter().copied().max().unwrap_or(2);
    let nl = lmax + 1;
    let s = sums(plan, isw, nl);
    if s.combos.iter().all(Vec::is_empty) {
        return vec![vec![0.0; nm]; nfs];
    }
    let n_mu = gl.len();
    let mut edges = vec![0usize];
    edges.extend(grid.iter().map(|&g| g + 1));
    let recs: Vec<DRecurrence> = s
        .pairs
        .iter()
        .map(|&(a, b)| DRecurrence::new(a, b, lmax))
        .collect();
    let block = |c0: usize| -> Vec<Vec<f64>> {
        let c1 = (c0 + MU_BLOCK).min(n_mu);
        let nb = c1 - c0;
        let mus = &gl.nodes[c0..c1];
        // Running l sums: G[column][node].
        let mut g = vec![0.0; s.n_columns * nb];
        let mut prev: Vec<Vec<f64>> = vec![vec![0.0; 2 * nb]; s.pairs.len()];
        let mut d = vec![0.0; L_BLOCK * nb];
        let mut acc = vec![0.0; nb];
        let mut out = vec![vec![0.0; nm]; nfs];
        for m in 0..nm {
            let (lo, hi) = (edges[m].min(edges[m + 1]), edges[m + 1]);
            let mut l0 = lo;
            while l0 < hi {
                let l1 = (l0 + L_BLOCK).min(hi);
                for (k, rec) in recs.iter().enumerate() {
                    rec.fill_rows(mus, l0..l1, &mut prev[k], &mut d);
                    let (f0, f1) = (s.first_column[k], s.first_column[k + 1]);
                    gemm(
                        f1 - f0,
                        l1 - l0,
                        nb,
                        &s.weights[k][l0..],
                        (nl, 1),
                        &d,
                        (nb, 1),
                        1.0,
                        &mut g[f0 * nb..],
                        (nb, 1),
                    );
                }
                l0 = l1;
            }
            for (combos, out) in s.combos.iter().zip(out.iter_mut()) {
                if combos.is_empty() {
                    continue;
                }
                acc.fill(0.0);
                for c in combos {
                    let (a, b, e) = (
                        &g[c[0] * nb..(c[0] + 1) * nb],
                        &g[c[1] * nb..(c[1] + 1) * nb],
                        &g[c[2] * nb..(c[2] + 1) * nb],
                    );
                    for i in 0..nb {
                        acc[i] += a[i] * b[i] * e[i];
                    }
                }
                out[m] += acc
                    .iter()
                    .zip(&gl.weights[c0..c1])
                    .map(|(a, w)| a * w)
                    .sum::<f64>();
            }
        }
        out
    };
    let starts: Vec<usize> = (0..n_mu).step_by(MU_BLOCK).collect();
    let parts: Vec<Vec<Vec<f64>>> = if parallel {
        starts.par_iter().map(|&c| block(c)).collect()
    } else {
        starts.iter().map(|&c| block(c)).collect()
    };
    let norm = plan.f_sky() / (16.0 * std::f64::consts::PI);
    let mut total = vec![vec![0.0; nm]; nfs];
    for p in parts {
        for (t, v) in total.iter_mut().zip(p) {
            for (a, b) in t.iter_mut().zip(v) {
                *a += norm * b;
            }
        }
    }
    total
}
