//! The Fisher cross term of the ISW-lensing bispectrum with the primordial shapes, its
//! self term, and the bias it induces on f_NL.
//!
//! An f_NL estimator that ignores a contaminating bispectrum b^lens returns on average
//! f_NL + Delta f_NL with Delta f_NL = F^-1 F_lens, F_lens,s = (f_sky / 6) Sum G^2 b^s C^-1
//! C^-1 C^-1 b^lens (the Fisher cross term; Smith & Zaldarriaga 2011; Lewis, Challinor &
//! Hanson 2011). "Single-shape" is F_ss^-1 F_lens,s (one shape fitted alone), "joint" the
//! vector F^-1 F_lens over all shapes of the run. The sign is that of the CMB f_NL
//! convention of the engine's shapes (a positive local f_NL makes a positive B_Phi): a
//! positive bias means the lensing bispectrum mimics a positive f_NL.
//!
//! Fast path (exact). Writing b^lens as one leg assignment (phi on leg 1, unlensed leg 2,
//! lensed leg 3) times 6 (the primordial b^s is symmetric under permuting legs and fields
//! together), (l1 l2 l3; 0 0 0)^2 f_{l1 l2|l3} = (1/2) Integral Q_l1 Q_l2 P_l3 dmu
//! ([`gradient_legendre_all`](crate::cmb::lensing::isw_bispectrum::gradient_legendre_all))
//! and the separable radial form of b^s give
//! F_lens,s = (f_sky / 8 pi) Integral dmu Sum_t c_t Integral r^2 dr Sum_z
//! A_{e1}(r, mu) B^z_{e2}(r, mu) C^z_{e3}(r, mu), with the one-dimensional l sums
//! A_e = Sum_l (2l+1) Q_l Sum_X X^{e,X}_l(r) [C^-1 c^phi]_X,
//! B^z_e = Sum_l (2l+1) Q_l Sum_Y X^{e,Y}_l(r) [C^-1 C]_{Y z},
//! C^z_e = Sum_l (2l+1) P_l Sum_Z X^{e,Z}_l(r) [C^-1]_{z Z}
//! (z runs over the field being lensed). They are matrix products over l per block of mu
//! nodes, accumulated in l order so that every l_max of the grid comes out of one pass;
//! even and odd l are summed apart on the nodes mu >= 0, which gives the mirror nodes -mu
//! by parity for half the work. A block of multipoles uses only the radial nodes where
//! some radial function of its l reaches 1e-4 of its peak over r (at high l only the
//! last-scattering shell): about half of the l x r plane at l_max 3000.
//! Gauss-Legendre with ceil(3 l_max / 2) + 1 nodes is exact for the degree-3 l_max
//! polynomial. All field sets share the rule and the Legendre functions of each block of
//! nodes (cross.rs), and the self term shares the Wigner d functions (self_term.rs).
//!
//! Cost: (N_mu / 2) x l_max x (active N_r) x (exponents) x (1 + 2 n_z) multiply-adds per
//! field set with n_z lensed fields (1 for T or E, 2 for T+E) for the cross terms, and
//! N_mu x l_max x (a few hundred) for the self terms. Measured (`cargo bench --bench
//! lensing_bias`: the full scan of `ngreach cmb --ideal`, T, E and T+E, three shapes,
//! l_max 500-3000 in one pass, 160 radial nodes, 4501 mu nodes; 2 cores shared with other
//! work, load average 5, so CPU times are quoted): cross terms 1.36 s and self terms
//! 0.24 s of CPU, both in one pass 1.44 s of CPU (before this layout: 7.3 s of CPU, 6.3 +
//! 5.0 s wall at load 7). Skipping the inactive radial nodes moved the cross terms by at
//! most 2.7e-7 relative (the equilateral ones, small by cancellation; local 2e-9,
//! orthogonal 3.5e-8) and the self terms by 6e-11.
//!
//! The self term F_lens,lens needs two coupling factors per triangle. With
//! (l_a l_b l_c; 0 0 0) f_{l_a l_b|l_c} = -sqrt(L_a L_b) (1/2)[(l_a l_b l_c; 1 -1 0) +
//! (l_a l_b l_c; -1 1 0)] (the same identity in Wigner-d form, d^l_{01} = Q_l / sqrt(L))
//! and (l's; m)(l's; m') = (1/2) Integral Prod d^{l_i}_{m_i m'_i} dmu, it is a sum of
//! products of one-dimensional l sums of Wigner d functions (stable recurrences), without
//! radial functions.

mod cross;
mod oracle;
mod self_term;

pub use cross::cross_fisher_terms;
pub use oracle::brute_force_lensing_fisher;
pub use self_term::self_fisher_terms;

use super::isw_bispectrum::IswLensingBispectrum;
use crate::cmb::bispectrum::{BispectrumPlan, FieldSet};
use crate::cmb::transfer::{Field, RadialGrid};
use crate::fisher::FisherMatrix;
use crate::numerics::GaussLegendre;

/// Fisher terms of the ISW-lensing bispectrum on an l_max grid.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct LensingFisher {
    /// The l_max grid.
    pub lmax: Vec<usize>,
    /// Field sets, in the plan's order.
    pub field_sets: Vec<FieldSet>,
    /// cross[fs][m][s]: F_{shape s, lens} (per unit f_NL and unit lensing amplitude).
    pub cross: Vec<Vec<Vec<f64>>>,
    /// self_term[fs][m]: F_{lens, lens} (the (S/N)^2 of the ISW-lensing bispectrum).
    pub self_term: Vec<Vec<f64>>,
}

/// The bias of f_NL for one (field set, l_max): single-shape and joint, per shape.
#[derive(Debug, Clone, PartialEq)]
pub struct Bias {
    /// F_ss^-1 F_lens,s.
    pub single: Vec<f64>,
    /// (F^-1 F_lens)_s over all shapes; NaN where F is singular.
    pub joint: Vec<f64>,
}

/// Delta f_NL from a shape Fisher matrix and the cross terms F_lens,s (same order).
pub fn bias_from(f: &FisherMatrix, cross: &[f64]) -> Bias {
    let n = f.len();
    let single = (0..n)
        .map(|i| {
            let fii = f.get(i, i);
            if fii > 0.0 { cross[i] / fii } else { f64::NAN }
        })
        .collect();
    let joint = match f.inverse() {
        Ok(inv) => (0..n)
            .map(|i| (0..n).map(|j| inv.get(i, j) * cross[j]).sum())
            .collect(),
        Err(_) => vec![f64::NAN; n],
    };
    Bias { single, joint }
}

/// The sign convention and meaning of the bias columns, for output notes.
pub const BIAS_NOTE: &str = "lensing_bias: Delta f_NL induced by the ISW-lensing bispectrum (f_NL units, CMB convention; positive: the lensing bispectrum mimics a positive f_NL of that shape), single-shape F_ss^-1 F_s,lens; lensing_bias_marginal: the joint (F^-1 F_lens)_s over the shapes of the run; same covariance as sigma";

/// The ISW-lensing bias of a CMB forecast: the Fisher terms and what they were built
/// from.
#[derive(Debug, Clone, PartialEq)]
pub struct LensingBias {
    /// Cross and self terms per field set and l_max (the forecast's order).
    pub fisher: LensingFisher,
    /// The C^XY of the bispectrum: "lensed" (residual lensing of the delensing) or
    /// "unlensed", the same spectra as the covariance.
    pub spectra: &'static str,
    /// Fraction of phi removed (C^{X phi} scaled by 1 - delensing).
    pub delensing: f64,
    /// Whether C^{E phi} entered (else only T legs carry phi).
    pub e_phi: bool,
}

impl LensingBias {
    /// Builds the Fisher terms for `plan` (its experiment and covariance).
    pub fn compute(
        plan: &BispectrumPlan,
        radial: &RadialGrid,
        isw: &IswLensingBispectrum,
        spectra: &'static str,
        delensing: f64,
        lmax_grid: &[usize],
        parallel: bool,
    ) -> Self {
        Self {
            fisher: lensing_fisher(plan, radial, isw, lmax_grid, parallel),
            spectra,
            delensing,
            e_phi: isw.has_e_phi(),
        }
    }

    /// The bias at field set `ifs`, grid index `m`, given that point's shape Fisher matrix.
    pub fn bias(&self, f: &FisherMatrix, ifs: usize, m: usize) -> Bias {
        bias_from(f, &self.fisher.cross[ifs][m])
    }

    /// The ISW-lensing bispectrum's own signal-to-noise sqrt(F_lens,lens).
    pub fn signal_to_noise(&self, ifs: usize, m: usize) -> f64 {
        self.fisher.self_term[ifs][m].max(0.0).sqrt()
    }

    /// What the bispectrum was built from, in one sentence.
    pub fn description(&self) -> String {
        format!(
            "ISW-lensing bispectrum b = (1/2)[L_a + L_b - L_c] C^{{X_a phi}}_la C^{{X_b X_c}}_lb + 5 perms (Goldberg & Spergel 1999; Lewis, Challinor & Hanson 2011) with the {} C^XY of the covariance, C^{{T phi}}{} from our lensing potential times (1 - delensing) = {}; E lensed with the spin-0 coupling (exact in the squeezed limit that carries the signal)",
            self.spectra,
            if self.e_phi { " and C^{E phi}" } else { "" },
            1.0 - self.delensing
        )
    }

    /// The JSON block of a report: description, convention and the Fisher terms.
    pub fn to_json(&self) -> serde_json::Value {
        serde_json::json!({
            "description": self.description(),
            "convention": BIAS_NOTE,
            "bispectrum_spectra": self.spectra,
            "delensing": self.delensing,
            "e_phi_included": self.e_phi,
            "lmax": self.fisher.lmax,
            "per_field_set": self.fisher.field_sets.iter().enumerate().map(|(i, fs)| serde_json::json!({
                "fields": fs.label(),
                "fisher_cross_shape_lens": self.fisher.cross[i],
                "fisher_lens_lens": self.fisher.self_term[i],
                "isw_lensing_signal_to_noise": (0..self.fisher.lmax.len()).map(|m| self.signal_to_noise(i, m)).collect::<Vec<_>>(),
            })).collect::<Vec<_>>(),
        })
    }
}

/// The plan's inverse covariance as a 2x2 matrix in the table's field indices.
pub(super) fn cinv_matrix(plan: &BispectrumPlan, fs: usize, l: usize) -> [[f64; 2]; 2] {
    let c = plan.inverse_covariance(fs, l);
    let fields = plan.fields();
    let mut m = [[0.0; 2]; 2];
    for (i, &a) in fields.iter().enumerate() {
        for (j, &b) in fields.iter().enumerate() {
            m[i][j] = match (a, b) {
                (Field::T, Field::T) => c[0],
                (Field::E, Field::E) => c[2],
                _ => c[1],
            };
        }
    }
    m
}

/// The fields of the table a field set uses.
pub(super) fn active_fields(plan: &BispectrumPlan, fs: FieldSet) -> Vec<usize> {
    plan.fields()
        .iter()
        .enumerate()
        .filter(|(_, f)| match fs {
            FieldSet::T => **f == Field::T,
            FieldSet::E => **f == Field::E,
            FieldSet::TE => true,
        })
        .map(|(i, _)| i)
        .collect()
}

/// The cross terms F_lens,s and the self term F_lens,lens on `lmax_grid` (each value
/// capped at the plan's l_max), for every field set of the plan.
///
/// `radial` is the radial quadrature the plan was built on.
///
/// # Panics
/// If `isw` ends below the plan's l_max or `radial` is not the plan's grid.
pub fn lensing_fisher(
    plan: &BispectrumPlan,
    radial: &RadialGrid,
    isw: &IswLensingBispectrum,
    lmax_grid: &[usize],
    parallel: bool,
) -> LensingFisher {
    let grid: Vec<usize> = lmax_grid.iter().map(|&l| l.min(plan.lmax())).collect();
    let lmax = grid.iter().copied().max().unwrap_or(2);
    assert!(
        isw.lmax() >= lmax,
        "ISW-lensing spectra end at {} below l_max {lmax}",
        isw.lmax()
    );
    assert_eq!(
        radial.len(),
        plan.n_radial(),
        "radial grid is not the plan's"
    );
    let gl = GaussLegendre::new((3 * lmax).div_ceil(2) + 1);
    LensingFisher {
        cross: cross::cross_terms_with_rule(plan, radial, isw, &grid, &gl, parallel),
        self_term: self_term::self_terms_with_rule(plan, isw, &grid, &gl, parallel),
        lmax: grid,
        field_sets: plan.field_sets().to_vec(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn single_and_joint_bias() {
        let f = FisherMatrix::from_rows(
            vec!["fnl_a".into(), "fnl_b".into()],
            vec![4.0, 1.0, 1.0, 2.0],
        );
        let b = bias_from(&f, &[2.0, 3.0]);
        assert_eq!(b.single, vec![0.5, 1.5]);
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-14 * a.abs().max(b.abs());
        // F^-1 = [[2, -1], [-1, 4]] / 7.
        assert!(close(b.joint[0], (4.0 - 3.0) / 7.0));
        assert!(close(b.joint[1], (-2.0 + 12.0) / 7.0));
    }
}
