//! The ISW-lensing bispectrum of the CMB: the correlation of the late-time (integrated
//! Sachs-Wolfe) temperature anisotropy with the lensing potential phi that deflects the
//! primary anisotropies (Goldberg & Spergel 1999; Smith & Zaldarriaga 2011; Lewis,
//! Challinor & Hanson 2011, JCAP 03, 018, for T and E).
//!
//! To first order in phi a lensed field is X~(n) = X(n) + grad phi . grad X(n). With one
//! leg correlated with phi (leg a, C^{X_a phi}), one leg correlated with the unlensed field
//! that is lensed (leg b, C^{X_b X_c}) and the lensed leg c, the reduced bispectrum is
//!
//! b^{X1 X2 X3}_{l1 l2 l3} = Sum over the 6 assignments (a, b, c) of the legs of
//! f_{l_a l_b | l_c} C^{X_a phi}_{l_a} C^{X_b X_c}_{l_b},
//! f_{l_a l_b | l_c} = (1/2) [L_a + L_b - L_c],  L = l (l + 1),
//!
//! in the same normalization as the primordial reduced bispectra of the engine
//! (B_{l1 l2 l3} = sqrt[(2l1+1)(2l2+1)(2l3+1)/(4 pi)] (l1 l2 l3; 0 0 0) b_{l1 l2 l3}); the
//! factor f is the Gaunt integral of grad Y_{l_a} . grad Y_{l_b} Y_{l_c} divided by that of
//! Y Y Y (integration by parts on the sphere).
//!
//! Approximations (stated in every output that uses them):
//! - E polarization is lensed with the spin-0 coupling f of temperature. The exact spin-2
//!   coupling carries (l_c l_a l_b; 2 0 -2) in place of (l_c l_a l_b; 0 0 0); in the flat
//!   sky that is the factor cos 2(phi_{l_b} - phi_{l_c}) between the directions of the
//!   unlensed and the lensed multipole, which tends to 1 in the squeezed triangles
//!   l_a << l_b ~ l_c where C^{T phi} (an ISW effect, confined to l_a of a few tens) puts
//!   the signal: the error is of order (l_a / l_c)^2.
//! - C^{E phi} is included only when the caller supplies it (it comes from reionization
//!   and is tiny); without it the E-only bispectrum, and hence the E-only bias, vanish.
//! - The C^{XY} in b are the spectra the caller chooses; the command layer passes the
//!   spectra of the covariance (lensed, with the residual lensing of the chosen delensing,
//!   or unlensed), because the lensed spectrum captures the higher-order lensing of the
//!   acoustic peaks in the non-perturbative bispectrum (Lewis, Challinor & Hanson 2011).

use crate::cmb::ThermalHistory;
use crate::cmb::boltzmann::Spectra;
use crate::cmb::lensing::{L_LOS, Lensing, WeylSource};
use crate::cmb::transfer::{Field, TransferTable};
use crate::cosmology::{Background, Cosmology, Primordial};
use crate::error::Result;

/// The spectra that define the ISW-lensing bispectrum (dimensionless, Delta T / T),
/// indexed by l from 0.
#[derive(Debug, Clone, PartialEq)]
pub struct IswLensingBispectrum {
    tt: Vec<f64>,
    te: Vec<f64>,
    ee: Vec<f64>,
    tp: Vec<f64>,
    ep: Vec<f64>,
    lmax: usize,
}

impl IswLensingBispectrum {
    /// From C^TT, C^TE, C^EE (of the lensed field), C^{T phi} and optionally C^{E phi}
    /// (missing or shorter vectors are zero beyond their end). The l range is the
    /// shortest of TT, TE, EE and T phi.
    pub fn new(tt: &[f64], te: &[f64], ee: &[f64], tp: &[f64], ep: Option<&[f64]>) -> Self {
        let n = tt.len().min(te.len()).min(ee.len()).min(tp.len());
        let mut epv = vec![0.0; n];
        if let Some(ep) = ep {
            for (o, v) in epv.iter_mut().zip(ep) {
                *o = *v;
            }
        }
        Self {
            tt: tt[..n].to_vec(),
            te: te[..n].to_vec(),
            ee: ee[..n].to_vec(),
            tp: tp[..n].to_vec(),
            ep: epv,
            lmax: n.saturating_sub(1),
        }
    }

    /// The highest multipole.
    pub fn lmax(&self) -> usize {
        self.lmax
    }

    /// C^{XY}_l of the lensed fields (zero above l_max).
    pub fn cl(&self, x: Field, y: Field, l: usize) -> f64 {
        if l > self.lmax {
            return 0.0;
        }
        match (x, y) {
            (Field::T, Field::T) => self.tt[l],
            (Field::E, Field::E) => self.ee[l],
            _ => self.te[l],
        }
    }

    /// C^{X phi}_l (zero above l_max).
    pub fn cl_phi(&self, x: Field, l: usize) -> f64 {
        if l > self.lmax {
            return 0.0;
        }
        match x {
            Field::T => self.tp[l],
            Field::E => self.ep[l],
        }
    }

    /// True when C^{E phi} is zero everywhere (then only a T leg can carry phi).
    pub fn has_e_phi(&self) -> bool {
        self.ep.iter().any(|&v| v != 0.0)
    }

    /// Multiplies C^{X phi} by `s` (the residual T phi correlation after removing the
    /// fraction 1 - s of phi by a Wiener-filtered estimate: C^{T phi_res} = s C^{T phi}).
    pub fn scale_phi(&mut self, s: f64) {
        self.tp.iter_mut().for_each(|v| *v *= s);
        self.ep.iter_mut().for_each(|v| *v *= s);
    }

    /// The reduced bispectrum b^{f0 f1 f2}_{l0 l1 l2}: all six assignments of the legs
    /// written out (the oracle's form; the fast sums use one assignment and symmetry).
    pub fn reduced(&self, l: [usize; 3], f: [Field; 3]) -> f64 {
        const PERMS: [[usize; 3]; 6] = [
            [0, 1, 2],
            [1, 0, 2],
            [0, 2, 1],
            [2, 0, 1],
            [1, 2, 0],
            [2, 1, 0],
        ];
        PERMS
            .iter()
            .map(|&[a, b, c]| {
                coupling(l[a], l[b], l[c]) * self.cl_phi(f[a], l[a]) * self.cl(f[b], f[c], l[b])
            })
            .sum()
    }
}

/// f_{l_a l_b | l_c} = (1/2) [L_a + L_b - L_c], L = l (l + 1): the lensing coupling of the
/// phi leg a and the unlensed leg b into the lensed leg c.
pub fn coupling(la: usize, lb: usize, lc: usize) -> f64 {
    let big_l = |l: usize| (l * (l + 1)) as f64;
    0.5 * (big_l(la) + big_l(lb) - big_l(lc))
}

/// Q_l(mu) = sqrt(1 - mu^2) dP_l/dmu for l = 0..=lmax (Q_0 = 0), by the stable upward
/// recurrence of the associated Legendre functions of order 1,
/// (l - 1) Q_l = (2l - 1) mu Q_{l-1} - l Q_{l-2}, Q_1 = sqrt(1 - mu^2), Q_2 = 3 mu Q_1.
/// With it, (1/2)(L_i + L_j - L_k) Integral P_i P_j P_k dmu = Integral Q_i Q_j P_k dmu
/// (grad P_i . grad P_j integrated against P_k by parts), so the l(l+1) factors of the
/// lensing bispectrum never appear as separate L-weighted sums (which cancel
/// catastrophically near mu = +-1 at high l).
pub fn gradient_legendre_all(lmax: usize, mu: f64, out: &mut [f64]) {
    out[0] = 0.0;
    if lmax == 0 {
        return;
    }
    let s = (1.0 - mu * mu).max(0.0).sqrt();
    out[1] = s;
    if lmax >= 2 {
        out[2] = 3.0 * mu * s;
    }
    for l in 3..=lmax {
        let lf = l as f64;
        out[l] = ((2.0 * lf - 1.0) * mu * out[l - 1] - lf * out[l - 2]) / (lf - 1.0);
    }
}

/// Wavenumbers of the transfer table used for C^{E phi} (as for C^{T phi}: the lensing
/// potential's line of sight converges well below this, 1/Mpc).
const EP_K_MAX: f64 = 0.3;

/// C_L^{E phi} for L = 0..=min(lmax, [`L_LOS`]) by the line of sight (E transfer functions of
/// `table` times the lensing-potential transfer), zero above: E correlates with phi only
/// through reionization, at L of a few tens. `None` when the table has no E.
pub fn e_phi_los(
    weyl: &WeylSource,
    table: &TransferTable,
    prim: &Primordial,
    lmax: usize,
) -> Option<Vec<f64>> {
    let fe = table.field_index(Field::E)?;
    let l_top = lmax.min(L_LOS).min(table.lmax());
    let n = l_top + 1;
    let nk = table.k().partition_point(|&k| k <= EP_K_MAX);
    let d = weyl.phi_transfer(&table.k()[..nk], l_top);
    let mut c = vec![0.0; lmax + 1];
    for (ik, (&k, &w)) in table.k()[..nk].iter().zip(table.weights()).enumerate() {
        let a = 2.0 / std::f64::consts::PI * w * k * k * prim.p_phi(k);
        let e = table.row(fe, ik);
        for (l, cl) in c.iter_mut().enumerate().take(n).skip(2) {
            *cl += a * e[l] * d[ik * n + l];
        }
    }
    Some(c)
}

/// The ISW-lensing bispectrum of a run, with the spectra of its covariance:
/// - `lensing = Some(l)` (lensed covariance): the lensed C^XY of `l` (lensed by the
///   residual (1 - F) C^{phi phi} of the delensing F) and (1 - F) C^{X phi} (a
///   Wiener-filtered phi estimate that removes the fraction F of the phi power leaves
///   C^{X phi_res} = (1 - F) C^{X phi});
/// - `None` (unlensed covariance): the table's unlensed C^XY, C^{T phi} from a
///   Weyl-potential solve of its own.
///
/// C^{E phi} by [`e_phi_los`] in both cases (the lensed case reuses the lensing
/// potential of `lensing`: nothing is solved twice).
///
/// # Errors
/// As [`WeylSource::new`].
#[allow(clippy::too_many_arguments)] // the cosmology's pieces and the run's choices
pub fn isw_lensing_for(
    cosmo: &Cosmology,
    th: &ThermalHistory,
    bg: &Background,
    table: &TransferTable,
    lensing: Option<&Lensing>,
    lmax: usize,
    parallel: bool,
) -> Result<IswLensingBispectrum> {
    let prim = Primordial::new(cosmo);
    let mut b = match lensing {
        Some(l) => {
            let mut b = IswLensingBispectrum::new(
                &l.lensed.tt,
                &l.lensed.te,
                &l.lensed.ee,
                &l.potential.tp,
                l.e_phi.as_deref(),
            );
            b.scale_phi(1.0 - l.delensing);
            b
        }
        None => {
            let weyl = WeylSource::new(cosmo, th, bg, 1, parallel)?;
            let ep = e_phi_los(&weyl, table, &prim, lmax);
            let s = Spectra::from_table(table, &prim);
            let tp = weyl.spectra(table, lmax.min(table.lmax())).tp;
            IswLensingBispectrum::new(&s.tt, &s.te, &s.ee, &tp, ep.as_deref())
        }
    };
    b.lmax = b.lmax.min(lmax);
    Ok(b)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cmb::bispectrum::legendre_all;
    use crate::numerics::GaussLegendre;
    use crate::special::wigner::wigner3j_000_squared;

    /// Q_l against sqrt(1 - mu^2) times a finite-difference derivative of P_l.
    #[test]
    fn q_is_the_polar_gradient_of_p() {
        let lmax = 40;
        let (mut p1, mut p2, mut q) = (
            vec![0.0; lmax + 1],
            vec![0.0; lmax + 1],
            vec![0.0; lmax + 1],
        );
        for &mu in &[-0.93, -0.2, 0.0, 0.37, 0.81] {
            let h = 1e-6;
            legendre_all(lmax, mu + h, &mut p1);
            legendre_all(lmax, mu - h, &mut p2);
            gradient_legendre_all(lmax, mu, &mut q);
            for l in 1..=lmax {
                let d = (p1[l] - p2[l]) / (2.0 * h) * (1.0 - mu * mu).sqrt();
                assert!(
                    (q[l] - d).abs() < 1e-6 * (1.0 + d.abs()) * l as f64,
                    "l {l} mu {mu}"
                );
            }
        }
    }

    /// The identity behind the fast sums, at the multipoles users run (l to 2500), against
    /// the exact Wigner 3j: Integral Q_i Q_j P_k dmu = (1/2)(L_i + L_j - L_k) * 2 (i j k; 0 0 0)^2.
    #[test]
    fn q_identity_holds_at_high_l() {
        let lmax: usize = 2500;
        let gl = GaussLegendre::new((3 * lmax).div_ceil(2) + 1);
        let triples: [[usize; 3]; 7] = [
            [2, 2500, 2500],
            [30, 1200, 1220],
            [1800, 2500, 1000],
            [2499, 2500, 3],
            [700, 700, 1400],
            [10, 2100, 2098],
            [1500, 1500, 1500],
        ];
        let mut p = vec![0.0; lmax + 1];
        let mut q = vec![0.0; lmax + 1];
        let mut acc = [0.0; 7];
        for (&mu, &w) in gl.nodes.iter().zip(&gl.weights) {
            legendre_all(lmax, mu, &mut p);
            gradient_legendre_all(lmax, mu, &mut q);
            for (a, t) in acc.iter_mut().zip(&triples) {
                *a += w * q[t[0]] * q[t[1]] * p[t[2]];
            }
        }
        for (a, t) in acc.iter().zip(&triples) {
            let w3 = wigner3j_000_squared(t[0] as u32, t[1] as u32, t[2] as u32);
            let exact = coupling(t[0], t[1], t[2]) * 2.0 * w3;
            let scale = coupling(t[0], t[1], t[2]).abs().max(1.0) * 2.0 * w3;
            assert!(
                (a - exact).abs() <= 1e-9 * scale.max(1e-30),
                "{t:?}: {a} vs {exact}"
            );
        }
    }

    #[test]
    fn reduced_bispectrum_is_symmetric_and_uses_the_coupling() {
        let n = 50;
        let tt: Vec<f64> = (0..n).map(|l| 1.0 / (1.0 + l as f64).powi(2)).collect();
        let ee: Vec<f64> = (0..n).map(|l| 0.1 / (1.0 + l as f64)).collect();
        let te: Vec<f64> = (0..n).map(|l| 0.05 / (1.0 + l as f64).powf(1.5)).collect();
        let tp: Vec<f64> = (0..n).map(|l| 1e-3 * (-(l as f64) / 10.0).exp()).collect();
        let b = IswLensingBispectrum::new(&tt, &te, &ee, &tp, None);
        let l = [3, 10, 12];
        let f = [Field::T, Field::E, Field::T];
        let v = b.reduced(l, f);
        assert!(
            (b.reduced([10, 3, 12], [Field::E, Field::T, Field::T]) - v).abs() < 1e-15 * v.abs()
        );
        assert!(
            (b.reduced([12, 10, 3], [Field::T, Field::E, Field::T]) - v).abs() < 1e-15 * v.abs()
        );
        // By hand: phi on a T leg only (no E phi).
        let by_hand = coupling(3, 10, 12) * tp[3] * te[10]
            + coupling(3, 12, 10) * tp[3] * te[12]
            + coupling(12, 3, 10) * tp[12] * te[3]
            + coupling(12, 10, 3) * tp[12] * te[10];
        assert!(
            (v - by_hand).abs() < 1e-14 * by_hand.abs(),
            "{v} vs {by_hand}"
        );
    }
}
