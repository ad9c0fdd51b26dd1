//! Brute-force oracles of the collapsed-limit Fisher information (small l_max only):
//! the explicit (l1, l2) double sum with the full M_L, and the direct sum over
//! quadrilaterals of the collapsed pairing.

// Index loops over (l, L, node) mirror the formulas of the parent module.
#![allow(clippy::needless_range_loop)]

use crate::cmb::bispectrum::BispectrumPlan;
use crate::cmb::transfer::RadialGrid;
use crate::cosmology::Primordial;
use crate::error::Result;

use super::{cinv_entry, exponent_indices, long_mode_covariance};

/// Brute-force oracle: F_L for L = 0..=long_lmax (f_sky included) at l_max = `lmax`
/// and field set index `fs`, from the full M_L (every radial node, the explicit double
/// sum over l1, l2 <= lmax with exact 3j symbols) and the full S'_L:
/// F_L = f_sky (2L+1)/2 Tr[(M_L S'_L)^2] (`r_range` as in [`long_mode_covariance`]). Cost ~ lmax^2 n_r^2 per L: small l_max only.
pub fn brute_force_tau_fisher(
    plan: &BispectrumPlan,
    radial: &RadialGrid,
    prim: &Primordial,
    lmax: usize,
    fs: usize,
    long_lmax: usize,
    r_range: Option<(f64, f64)>,
) -> Result<Vec<f64>> {
    let (e0, e1) = exponent_indices(plan)?;
    let n = plan.n_radial();
    let nf = plan.n_fields();
    let fields = plan.fields().to_vec();
    let s = long_mode_covariance(prim, &radial.r, r_range, long_lmax, true);
    let mut out = vec![0.0; long_lmax + 1];
    for (big_l, o) in out.iter_mut().enumerate().skip(2) {
        let mut m = vec![0.0; n * n];
        for l1 in 2..=lmax {
            for l2 in 2..=lmax {
                let w3 = crate::special::wigner3j_000_squared(l1 as u32, l2 as u32, big_l as u32);
                if w3 == 0.0 {
                    continue;
                }
                let geo =
                    0.5 * ((2 * l1 + 1) * (2 * l2 + 1)) as f64 / (4.0 * std::f64::consts::PI) * w3;
                let (c1, c2) = (
                    plan.inverse_covariance(fs, l1),
                    plan.inverse_covariance(fs, l2),
                );
                // f[XY][i]
                let f: Vec<Vec<f64>> = (0..nf * nf)
                    .map(|xy| {
                        let (x, y) = (xy / nf, xy % nf);
                        (0..n)
                            .map(|i| {
                                radial.w[i]
                                    * (plan.radial_function(e0, x, l1, i)
                                        * plan.radial_function(e1, y, l2, i)
                                        + plan.radial_function(e1, x, l1, i)
                                            * plan.radial_function(e0, y, l2, i))
                            })
                            .collect()
                    })
                    .collect();
                for xy in 0..nf * nf {
                    for xpyp in 0..nf * nf {
                        let c = cinv_entry(&c1, fields[xy / nf], fields[xpyp / nf])
                            * cinv_entry(&c2, fields[xy % nf], fields[xpyp % nf]);
                        if c == 0.0 {
                            continue;
                        }
                        for i in 0..n {
                            let a = geo * c * f[xy][i];
                            for j in 0..n {
                                m[i * n + j] += a * f[xpyp][j];
                            }
                        }
                    }
                }
            }
        }
        // Tr[(M S)^2]
        let mut ms = vec![0.0; n * n];
        crate::numerics::gemm::gemm(n, n, n, &m, (n, 1), &s[big_l], (n, 1), 0.0, &mut ms, (n, 1));
        let mut t = 0.0;
        for i in 0..n {
            for j in 0..n {
                t += ms[i * n + j] * ms[j * n + i];
            }
        }
        *o = plan.f_sky() * (2 * big_l + 1) as f64 / 2.0 * t;
    }
    Ok(out)
}

/// Second oracle: the trispectrum Fisher written as a direct sum over quadrilaterals in
/// the collapsed pairing, T only (field set index `fs` of a T-only plan):
/// F = f_sky Sum_L (2L+1)/2 (1/4) Sum_{l1 l2 l3 l4} G^2_{l1l2L} G^2_{l3l4L}
/// t^{l1l2}_{l3l4}(L)^2 / (C_l1 C_l2 C_l3 C_l4), t = Sum_ij w_i f_{l1l2}(r_i) S'_L(i,j)
/// w_j f_{l3l4}(r_j). Returns F per L for L = 0..=long_lmax.
pub fn quadrilateral_tau_fisher(
    plan: &BispectrumPlan,
    radial: &RadialGrid,
    prim: &Primordial,
    lmax: usize,
    fs: usize,
    long_lmax: usize,
    r_range: Option<(f64, f64)>,
) -> Result<Vec<f64>> {
    let (e0, e1) = exponent_indices(plan)?;
    let n = plan.n_radial();
    let s = long_mode_covariance(prim, &radial.r, r_range, long_lmax, true);
    let mut out = vec![0.0; long_lmax + 1];
    for (big_l, o) in out.iter_mut().enumerate().skip(2) {
        // Pairs with their weight G^2 / C C and vectors S' (w f).
        let mut pairs: Vec<(f64, Vec<f64>, Vec<f64>)> = Vec::new();
        for l1 in 2..=lmax {
            for l2 in 2..=lmax {
                let w3 = crate::special::wigner3j_000_squared(l1 as u32, l2 as u32, big_l as u32);
                let c = plan.inverse_covariance(fs, l1)[0] * plan.inverse_covariance(fs, l2)[0];
                if w3 == 0.0 || c == 0.0 {
                    continue;
                }
                let g2 = ((2 * l1 + 1) * (2 * l2 + 1)) as f64 / (4.0 * std::f64::consts::PI) * w3;
                let wf: Vec<f64> = (0..n)
                    .map(|i| {
                        radial.w[i]
                            * (plan.radial_function(e0, 0, l1, i)
                                * plan.radial_function(e1, 0, l2, i)
                                + plan.radial_function(e1, 0, l1, i)
                                    * plan.radial_function(e0, 0, l2, i))
                    })
                    .collect();
                let sv: Vec<f64> = (0..n)
                    .map(|i| (0..n).map(|j| s[big_l][i * n + j] * wf[j]).sum())
                    .collect();
                pairs.push((g2 * c, wf, sv));
            }
        }
        let mut acc = 0.0;
        for (g12, _, sv) in &pairs {
            for (g34, wf, _) in &pairs {
                let t: f64 = sv.iter().zip(wf).map(|(a, b)| a * b).sum();
                acc += 0.25 * g12 * g34 * t * t;
            }
        }
        *o = plan.f_sky() * (2 * big_l + 1) as f64 / 2.0 * acc;
    }
    Ok(out)
}
