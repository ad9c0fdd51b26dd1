//! Lensed CMB spectra by the curved-sky correlation-function method (Challinor & Lewis
//! 2005, PRD 71, 103010, astro-ph/0502425): the unlensed correlation functions are
//! remapped by a Gaussian deflection field, non-perturbatively in its variance and to
//! second order in its anisotropic part, and transformed back.
//!
//! With the deflection correlations (spin-1 d functions of the separation beta)
//!
//! ```text
//! C_gl(beta)   = Sum_L (2L+1)/4pi L(L+1) C_L^{phi phi} d^L_11(beta)
//! C_gl,2(beta) = Sum_L (2L+1)/4pi L(L+1) C_L^{phi phi} d^L_{1,-1}(beta)
//! sigma^2(beta) = C_gl(0) - C_gl(beta),   x_l = l(l+1) C_gl,2 / 2
//! ```
//!
//! the lensed correlation functions are, per l of the unlensed spectra (weight
//! (2l+1)/4pi; E_s = exp[-(l(l+1) - s) sigma^2 / 2]),
//!
//! ```text
//! xi     <- C^TT  E_0 [d_00 + x d_{1,-1} + (x^2/4)(d_00 + d_{2,-2})]
//! xi_+   <- C^EE  E_4 [d_22 + x d_31 + (x^2/4)(d_22 + d_40)]
//! xi_-   <- C^EE  E_4 [d_{2,-2} + (x/2)(d_{1,-1} + d_{3,-3}) + (x^2/8)(d_00 + 2 d_{2,-2} + d_{4,-4})]
//! xi_X   <- C^TE  E_2 [d_20 + (x/2)(d_11 + d_{3,-1}) + (x^2/8)(3 d_20 + d_{4,-2})]
//! ```
//!
//! (no unlensed B). These are the expansions of Challinor & Lewis (2005, Sec. 4) with
//! their X_imn functions at leading order in 1/l, i.e. each d^l_{mn} with the Gaussian
//! factor of the spin pair; the flat-sky limit (J_n for d_{mn}, n = m - n) is the exact
//! Gaussian average e^{-l^2 sigma^2 / 2} [J_0 + x J_2 + (x^2/4)(J_0 + J_4)] of the
//! remapping. Then C~_l^TT = 2 pi Int xi d^l_00 d mu, C~^EE +- C~^BB = 2 pi Int xi_+- d^l_{2,+-2},
//! C~^TE = 2 pi Int xi_X d^l_20. Only the changes xi~ - xi are integrated (the unlensed
//! spectra are added back exactly), by Gauss-Legendre in mu = cos beta with
//! l_unlensed + l_out + 300 nodes (twice what polynomial exactness would need: the
//! Gaussian factors are not polynomials; doubling again changes nothing at 1e-6).
//! Wigner d^l_{mn}(beta) by the three-term recurrence in l (e.g. Varshalovich,
//! Moskalev & Khersonskii 1988, Sec. 4.8).
//!
//! Accuracy: the unlensed spectra must extend beyond the output range (power is lensed
//! in from higher l); [`UNLENSED_MARGIN`] is the margin we use; the measured errors
//! against the reference library are in tests/boltzmann.rs.

use rayon::prelude::*;

use crate::numerics::GaussLegendre;

/// Unlensed multipoles needed above the highest lensed l.
pub const UNLENSED_MARGIN: usize = 1500;

/// Lensed C_l^TT, EE, TE, BB (dimensionless, Delta T / T), indexed by l from 0 to lmax.
#[derive(Debug, Clone, PartialEq)]
pub struct LensedSpectra {
    /// C~_l^TT.
    pub tt: Vec<f64>,
    /// C~_l^EE.
    pub ee: Vec<f64>,
    /// C~_l^TE.
    pub te: Vec<f64>,
    /// C~_l^BB (lensing only: no primordial B).
    pub bb: Vec<f64>,
}

/// The spin pairs (m, n) of the d functions used, in a fixed order.
const PAIRS: [(i32, i32); 12] = [
    (0, 0),
    (1, 1),
    (1, -1),
    (2, 2),
    (2, -2),
    (2, 0),
    (3, 1),
    (4, 0),
    (3, -3),
    (4, -4),
    (3, -1),
    (4, -2),
];
const D00: usize = 0;
const D11: usize = 1;
const D1M1: usize = 2;
const D22: usize = 3;
const D2M2: usize = 4;
const D20: usize = 5;
const D31: usize = 6;
const D40: usize = 7;
const D3M3: usize = 8;
const D4M4: usize = 9;
const D3M1: usize = 10;
const D4M2: usize = 11;

/// Fills `out[l]` (l = 0..=lmax) with d^l_{mn}(beta), cos beta = mu, by the upward
/// recurrence from l = max(|m|, |n|) (zero below).
pub fn wigner_d(m: i32, n: i32, mu: f64, out: &mut [f64]) {
    let lmax = out.len() - 1;
    out.fill(0.0);
    if m.abs() < n.abs() {
        // d_{mn} = (-1)^(m-n) d_{nm}.
        wigner_d(n, m, mu, out);
        if (m - n) % 2 != 0 {
            out.iter_mut().for_each(|v| *v = -*v);
        }
        return;
    }
    let j = m.unsigned_abs() as usize;
    if j > lmax {
        return;
    }
    let c = (0.5 * (1.0 + mu)).max(0.0).sqrt();
    let s = (0.5 * (1.0 - mu)).max(0.0).sqrt();
    // sqrt((2j)! / ((j+n)! (j-n)!)).
    let fact = |k: i32| (1..=k).map(f64::from).product::<f64>();
    let jj = j as i32;
    let norm = (fact(2 * jj) / (fact(jj + n) * fact(jj - n))).sqrt();
    out[j] = if m > 0 {
        norm * c.powi(jj + n) * (-s).powi(jj - n)
    } else {
        norm * c.powi(jj - n) * s.powi(jj + n)
    };
    let (mf, nf) = (f64::from(m), f64::from(n));
    let mut start = j;
    if j == 0 {
        // d^1_00 = mu (the recurrence below divides by l).
        if lmax >= 1 {
            out[1] = mu;
        }
        start = 1;
    }
    for l in start..lmax {
        let lf = l as f64;
        let a = (2.0 * lf + 1.0) * (lf * (lf + 1.0) * mu - mf * nf);
        let b = (lf + 1.0) * ((lf * lf - mf * mf) * (lf * lf - nf * nf)).max(0.0).sqrt();
        let den = lf * (((lf + 1.0).powi(2) - mf * mf) * ((lf + 1.0).powi(2) - nf * nf)).sqrt();
        out[l + 1] = (a * out[l] - b * out[l - 1]) / den;
    }
}

/// Recurrence coefficients of d^l_{mn} for one spin pair, d^{l+1} = (a[l] mu + c[l]) d^l
/// minus b[l] d^{l-1}, so that a node costs three operations per l (shared with the
/// ISW-lensing self term in [`crate::cmb::lensing::bias`]).
pub(crate) struct DRecurrence {
    m: i32,
    n: i32,
    a: Vec<f64>,
    b: Vec<f64>,
    c: Vec<f64>,
}

impl DRecurrence {
    pub(crate) fn new(m: i32, n: i32, lmax: usize) -> Self {
        let (mf, nf) = (f64::from(m), f64::from(n));
        let mut a = vec![0.0; lmax + 1];
        let mut b = vec![0.0; lmax + 1];
        let mut c = vec![0.0; lmax + 1];
        for l in 1..lmax {
            let lf = l as f64;
            let den = lf * (((lf + 1.0).powi(2) - mf * mf) * ((lf + 1.0).powi(2) - nf * nf)).sqrt();
            if den == 0.0 {
                continue;
            }
            a[l] = (2.0 * lf + 1.0) * lf * (lf + 1.0) / den;
            c[l] = -(2.0 * lf + 1.0) * mf * nf / den;
            b[l] = (lf + 1.0) * ((lf * lf - mf * mf) * (lf * lf - nf * nf)).max(0.0).sqrt() / den;
        }
        Self { m, n, a, b, c }
    }

    /// d^l_{mn}(mu_i) for the rows l in `ls` and the nodes `mus`, into
    /// `out[(l - ls.start) * mus.len() + i]`, continuing the recurrence: `prev` holds
    /// d^{l-2} and then d^{l-1} of every node for the first l of `ls` (any values when it
    /// is at most max(|m|, |n|) + 1, where the closed forms of [`wigner_d`] start) and the
    /// last two rows on return. Vectorizes over the nodes.
    pub(crate) fn fill_rows(
        &self,
        mus: &[f64],
        ls: std::ops::Range<usize>,
        prev: &mut [f64],
        out: &mut [f64],
    ) {
        let nb = mus.len();
        let top = self.m.unsigned_abs().max(self.n.unsigned_abs()) as usize + 1;
        let mut start = vec![0.0; top + 1];
        let (p2, p1) = prev.split_at_mut(nb);
        for (r, l) in ls.enumerate() {
            let row = &mut out[r * nb..(r + 1) * nb];
            if l <= top {
                for (v, &mu) in row.iter_mut().zip(mus) {
                    wigner_d(self.m, self.n, mu, &mut start);
                    *v = start[l];
                }
            } else {
                let (a, b, c) = (self.a[l - 1], self.b[l - 1], self.c[l - 1]);
                for (i, v) in row.iter_mut().enumerate() {
                    *v = (a * mus[i] + c) * p1[i] - b * p2[i];
                }
            }
            p2.copy_from_slice(p1);
            p1.copy_from_slice(row);
        }
    }

    /// d^l_{mn}(mu) for l = 0..=lmax into `out` (the start value from [`wigner_d`]).
    pub(crate) fn fill(&self, mu: f64, out: &mut [f64]) {
        let j = self.m.unsigned_abs().max(self.n.unsigned_abs()) as usize;
        let lmax = out.len() - 1;
        // Start values (l = j, and l = 1 for m = n = 0) from the closed forms.
        let top = (j + 1).min(lmax);
        wigner_d(self.m, self.n, mu, &mut out[..=top]);
        for l in top..lmax {
            out[l + 1] = (self.a[l] * mu + self.c[l]) * out[l] - self.b[l] * out[l - 1];
        }
    }
}

/// Lensed spectra to `lmax_out` from unlensed C_l^TT, EE, TE and C_L^{phi phi} (all
/// indexed from 0, the same length; that length minus one is the unlensed l range,
/// which should exceed `lmax_out` by [`UNLENSED_MARGIN`]).
///
/// # Panics
/// If the inputs differ in length or `lmax_out` is not below it (programming errors).
pub fn lensed_spectra(
    tt: &[f64],
    ee: &[f64],
    te: &[f64],
    pp: &[f64],
    lmax_out: usize,
) -> LensedSpectra {
    let n = tt.len();
    assert!(ee.len() == n && te.len() == n && pp.len() == n && lmax_out < n);
    let lu = n - 1;
    let fac: Vec<f64> = (0..n)
        .map(|l| (2 * l + 1) as f64 / (4.0 * std::f64::consts::PI))
        .collect();
    let llp: Vec<f64> = (0..n).map(|l| (l * (l + 1)) as f64).collect();
    let wpp: Vec<f64> = (0..n).map(|l| fac[l] * llp[l] * pp[l]).collect();
    let cgl0: f64 = wpp.iter().sum();
    let n_mu = lu + lmax_out + 300;
    let gl = GaussLegendre::new(n_mu);
    let no = lmax_out + 1;
    let two_pi = 2.0 * std::f64::consts::PI;
    let nodes: Vec<(f64, f64)> = gl
        .nodes
        .iter()
        .copied()
        .zip(gl.weights.iter().copied())
        .collect();
    let rec: Vec<DRecurrence> = PAIRS
        .iter()
        .map(|&(m, nn)| DRecurrence::new(m, nn, lu))
        .collect();
    let acc = nodes
        .par_chunks(64)
        .map(|chunk| {
            let mut d = vec![vec![0.0; n]; PAIRS.len()];
            let mut acc = vec![0.0; 4 * no];
            for &(mu, w) in chunk {
                for (k, r) in rec.iter().enumerate() {
                    r.fill(mu, &mut d[k]);
                }
                let mut cgl = 0.0;
                let mut cgl2 = 0.0;
                for l in 0..n {
                    cgl += wpp[l] * d[D11][l];
                    cgl2 += wpp[l] * d[D1M1][l];
                }
                let sig2 = cgl0 - cgl;
                let (mut xt, mut xp, mut xm, mut xx) = (0.0, 0.0, 0.0, 0.0);
                for l in 2..n {
                    let x = 0.5 * llp[l] * cgl2;
                    let x2 = x * x;
                    let e0m1 = (-0.5 * llp[l] * sig2).exp_m1();
                    let e4m1 = (-0.5 * (llp[l] - 4.0) * sig2).exp_m1();
                    let e2m1 = (-0.5 * (llp[l] - 2.0) * sig2).exp_m1();
                    let (e0, e4, e2) = (1.0 + e0m1, 1.0 + e4m1, 1.0 + e2m1);
                    let dd = |k: usize| d[k][l];
                    xt += fac[l]
                        * tt[l]
                        * (e0m1 * dd(D00) + e0 * (x * dd(D1M1) + 0.25 * x2 * (dd(D00) + dd(D2M2))));
                    xp += fac[l]
                        * ee[l]
                        * (e4m1 * dd(D22) + e4 * (x * dd(D31) + 0.25 * x2 * (dd(D22) + dd(D40))));
                    xm += fac[l]
                        * ee[l]
                        * (e4m1 * dd(D2M2)
                            + e4 * (0.5 * x * (dd(D1M1) + dd(D3M3))
                                + 0.125 * x2 * (dd(D00) + 2.0 * dd(D2M2) + dd(D4M4))));
                    xx += fac[l]
                        * te[l]
                        * (e2m1 * dd(D20)
                            + e2 * (0.5 * x * (dd(D11) + dd(D3M1))
                                + 0.125 * x2 * (3.0 * dd(D20) + dd(D4M2))));
                }
                let wf = two_pi * w;
                for l in 0..no {
                    acc[l] += wf * xt * d[D00][l];
                    acc[no + l] += wf * xp * d[D22][l];
                    acc[2 * no + l] += wf * xm * d[D2M2][l];
                    acc[3 * no + l] += wf * xx * d[D20][l];
                }
            }
            acc
        })
        .reduce(
            || vec![0.0; 4 * no],
            |mut a, b| {
                a.iter_mut().zip(&b).for_each(|(x, y)| *x += y);
                a
            },
        );
    let mut out = LensedSpectra {
        tt: vec![0.0; no],
        ee: vec![0.0; no],
        te: vec![0.0; no],
        bb: vec![0.0; no],
    };
    for l in 2..no {
        let (p, m) = (acc[no + l], acc[2 * no + l]);
        out.tt[l] = tt[l] + acc[l];
        out.ee[l] = ee[l] + 0.5 * (p + m);
        out.bb[l] = 0.5 * (p - m);
        out.te[l] = te[l] + acc[3 * no + l];
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wigner_d_closed_forms_and_orthogonality() {
        // Closed forms (e.g. Varshalovich et al. 1988, Table 4.3): d^1_00 = mu,
        // d^1_11 = (1 + mu)/2, d^1_{1,-1} = (1 - mu)/2, d^2_20 = sqrt(3/8) sin^2 beta,
        // d^2_{2,-2} = (1 - mu)^2 / 4.
        let mu = 0.3_f64;
        let s2 = 1.0 - mu * mu;
        let mut d = vec![0.0; 6];
        wigner_d(0, 0, mu, &mut d);
        assert!((d[1] - mu).abs() < 1e-15 && (d[2] - 0.5 * (3.0 * mu * mu - 1.0)).abs() < 1e-15);
        wigner_d(1, 1, mu, &mut d);
        assert!((d[1] - 0.5 * (1.0 + mu)).abs() < 1e-15);
        wigner_d(1, -1, mu, &mut d);
        assert!((d[1] - 0.5 * (1.0 - mu)).abs() < 1e-15);
        wigner_d(2, 0, mu, &mut d);
        assert!((d[2] - (3.0f64 / 8.0).sqrt() * s2).abs() < 1e-15);
        wigner_d(0, 2, mu, &mut d);
        assert!((d[2] - (3.0f64 / 8.0).sqrt() * s2).abs() < 1e-15);
        wigner_d(2, -2, mu, &mut d);
        assert!((d[2] - 0.25 * (1.0 - mu).powi(2)).abs() < 1e-15);
        // Orthogonality Int d^l_mn d^l'_mn d mu = 2 / (2l + 1) delta, at l ~ 3000.
        let lmax = 3000;
        let gl = GaussLegendre::new(lmax + 10);
        for &(m, n) in &PAIRS {
            let mut a = vec![0.0; lmax + 1];
            let (mut s_same, mut s_diff) = (0.0, 0.0);
            for (&x, &w) in gl.nodes.iter().zip(&gl.weights) {
                wigner_d(m, n, x, &mut a);
                s_same += w * a[lmax] * a[lmax];
                s_diff += w * a[lmax] * a[lmax - 1];
            }
            let want = 2.0 / (2 * lmax + 1) as f64;
            assert!((s_same / want - 1.0).abs() < 1e-10, "({m},{n}): {s_same}");
            assert!(s_diff.abs() < 1e-10 * want, "({m},{n}): {s_diff}");
        }
    }

    #[test]
    fn tabulated_recurrence_equals_the_direct_one() {
        let lmax = 500;
        let (mut a, mut b) = (vec![0.0; lmax + 1], vec![0.0; lmax + 1]);
        for &(m, n) in &PAIRS {
            let r = DRecurrence::new(m, n, lmax);
            for mu in [-0.999, -0.3, 0.0, 0.7, 0.99999] {
                wigner_d(m, n, mu, &mut a);
                r.fill(mu, &mut b);
                for l in 0..=lmax {
                    let tol = 1e-12; // |d| <= 1
                    assert!((a[l] - b[l]).abs() < tol, "({m},{n}) l={l} mu={mu}");
                }
            }
        }
    }

    #[test]
    fn no_lensing_returns_the_unlensed_spectra() {
        let n = 400;
        let tt: Vec<f64> = (0..n).map(|l| 1.0 / (1.0 + l as f64).powi(2)).collect();
        let ee: Vec<f64> = tt.iter().map(|v| 0.1 * v).collect();
        let te: Vec<f64> = tt.iter().map(|v| 0.2 * v).collect();
        let pp = vec![0.0; n];
        let out = lensed_spectra(&tt, &ee, &te, &pp, 300);
        for l in 2..=300 {
            assert!((out.tt[l] / tt[l] - 1.0).abs() < 1e-12);
            assert!((out.ee[l] / ee[l] - 1.0).abs() < 1e-12);
            assert!((out.te[l] / te[l] - 1.0).abs() < 1e-12);
            assert!(out.bb[l].abs() < 1e-12 * ee[l]);
        }
    }
}
