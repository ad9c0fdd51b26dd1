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
//! ([`gradient_legendre_all`]) and the separable radial form of b^s give
//! F_lens,s = (f_sky / 8 pi) Integral dmu Sum_t c_t Integral r^2 dr Sum_z
//! A_{e1}(r, mu) B^z_{e2}(r, mu) C^z_{e3}(r, mu), with the one-dimensional l sums
//! A_e = Sum_l (2l+1) Q_l Sum_X X^{e,X}_l(r) [C^-1 c^phi]_X,
//! B^z_e = Sum_l (2l+1) Q_l Sum_Y X^{e,Y}_l(r) [C^-1 C]_{Y z},
//! C^z_e = Sum_l (2l+1) P_l Sum_Z X^{e,Z}_l(r) [C^-1]_{z Z}
//! (z runs over the field being lensed). They are matrix products over l per block of mu
//! nodes, accumulated in l order so that every l_max of the grid comes out of one pass;
//! even and odd l are summed apart on the nodes mu >= 0, which gives the mirror nodes -mu
//! by parity for half the work.
//! Gauss-Legendre with ceil(3 l_max / 2) + 1 nodes is exact for the degree-3 l_max
//! polynomial. Cost: N_mu x l_max x N_r x (exponents) x (1 + 2 fields) multiply-adds
//! (half of it with the mirror symmetry). Measured at l_max 3000, three shapes, 160 radial
//! nodes, on 2 shared cores: cross terms 2.0 / 2.4 / 3.7 s and self terms 1.9 / 2.4 /
//! 4.9 s for T / E / T+E (the shape Fisher matrices took 38-58 s in the same runs).
//!
//! The self term F_lens,lens needs two coupling factors per triangle. With
//! (l_a l_b l_c; 0 0 0) f_{l_a l_b|l_c} = -sqrt(L_a L_b) (1/2)[(l_a l_b l_c; 1 -1 0) +
//! (l_a l_b l_c; -1 1 0)] (the same identity in Wigner-d form, d^l_{01} = Q_l / sqrt(L))
//! and (l's; m)(l's; m') = (1/2) Integral Prod d^{l_i}_{m_i m'_i} dmu, it is a sum of
//! products of one-dimensional l sums of Wigner d functions (stable recurrences), without
//! radial functions.

use rayon::prelude::*;

use super::isw_bispectrum::{IswLensingBispectrum, gradient_legendre_all};
use crate::cmb::bispectrum::{BispectrumPlan, FieldSet, legendre_all};
use crate::cmb::lensing::lensed_cl::DRecurrence;
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
fn cinv_matrix(plan: &BispectrumPlan, fs: usize, l: usize) -> [[f64; 2]; 2] {
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
fn active_fields(plan: &BispectrumPlan, fs: FieldSet) -> Vec<usize> {
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

/// Mu nodes per block of the fast sums.
const MU_BLOCK: usize = 32;

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
    let mut cross = Vec::new();
    let mut self_term = Vec::new();
    for (ifs, &fs) in plan.field_sets().iter().enumerate() {
        cross.push(cross_terms(plan, radial, isw, ifs, fs, &grid, parallel));
        self_term.push(self_terms(plan, isw, ifs, fs, &grid, parallel));
    }
    LensingFisher {
        lmax: grid,
        field_sets: plan.field_sets().to_vec(),
        cross,
        self_term,
    }
}

/// F_lens,s per grid point for one field set (the Q_l fast path).
fn cross_terms(
    plan: &BispectrumPlan,
    radial: &RadialGrid,
    isw: &IswLensingBispectrum,
    ifs: usize,
    fs: FieldSet,
    grid: &[usize],
    parallel: bool,
) -> Vec<Vec<f64>> {
    let ns = plan.terms().len();
    let nm = grid.len();
    let lmax = grid.iter().copied().max().unwrap_or(2);
    let nl = lmax + 1;
    let fields = plan.fields().to_vec();
    let act = active_fields(plan, fs);
    let nz = act.len();
    let ne = plan.exponents().len();
    let nr = plan.n_radial();
    // Per-l leg weights (fields X of the table): a_X = [C^-1 c^phi]_X,
    // d[z]_Y = [C^-1 C]_{Y z}, ci[z]_Z = [C^-1]_{z Z}.
    let mut wa = vec![[0.0; 2]; nl];
    let mut wd = vec![[[0.0; 2]; 2]; nl];
    let mut wc = vec![[[0.0; 2]; 2]; nl];
    let mut any_phi = false;
    for l in 2..nl {
        let ci = cinv_matrix(plan, ifs, l);
        for x in 0..fields.len() {
            wa[l][x] = fields
                .iter()
                .enumerate()
                .map(|(y, &fy)| ci[x][y] * isw.cl_phi(fy, l))
                .sum();
            any_phi |= wa[l][x] != 0.0;
            for (iz, &z) in act.iter().enumerate() {
                wd[l][iz][x] = fields
                    .iter()
                    .enumerate()
                    .map(|(y, &fy)| ci[x][y] * isw.cl(fy, fields[z], l))
                    .sum();
                wc[l][iz][x] = ci[z][x];
            }
        }
    }
    if !any_phi {
        return vec![vec![0.0; ns]; nm];
    }
    // Weight matrices (rows l, columns (r, function)): WQ holds A_e and B^z_e, WP C^z_e.
    let nq = ne * (1 + nz);
    let np = ne * nz;
    let (cq, cp) = (nr * nq, nr * np);
    let mut wq = vec![0.0; nl * cq];
    let mut wp = vec![0.0; nl * cp];
    for l in 2..nl {
        let two_l1 = (2 * l + 1) as f64;
        for ir in 0..nr {
            for e in 0..ne {
                let xs: Vec<f64> = (0..fields.len())
                    .map(|f| plan.radial_function(e, f, l, ir))
                    .collect();
                let dot = |w: &[f64; 2]| -> f64 { xs.iter().zip(w).map(|(x, w)| x * w).sum() };
                wq[l * cq + ir * nq + e] = two_l1 * dot(&wa[l]);
                for iz in 0..nz {
                    wq[l * cq + ir * nq + ne + e * nz + iz] = two_l1 * dot(&wd[l][iz]);
                    wp[l * cp + ir * np + e * nz + iz] = two_l1 * dot(&wc[l][iz]);
                }
            }
        }
    }
    let n_mu = (3 * lmax).div_ceil(2) + 1;
    let gl = GaussLegendre::new(n_mu);
    let radial_w = &radial.w;
    let terms = plan.terms();
    let mut edges = vec![2usize];
    edges.extend(grid.iter().map(|&g| g + 1));
    // Mirror symmetry of the Gauss-Legendre rule: mu and -mu carry the same weight, and
    // P_l(-mu) = (-1)^l P_l(mu), Q_l(-mu) = (-1)^(l+1) Q_l(mu). The l sums are split into
    // even and odd l on the nodes mu >= 0 only, which gives both nodes of a pair for half
    // the matrix-product work.
    let first_pos = n_mu / 2; // nodes increase; for odd n_mu this is the middle node, mu = 0
    let triple = |q: &[f64], p: &[f64], w: f64, out: &mut [f64]| {
        for ir in 0..nr {
            let q = &q[ir * nq..(ir + 1) * nq];
            let p = &p[ir * np..(ir + 1) * np];
            let wr = w * radial_w[ir];
            for (o, ts) in out.iter_mut().zip(terms) {
                let mut acc = 0.0;
                for &(c, e) in ts {
                    let bc: f64 = (0..nz)
                        .map(|iz| q[ne + e[1] * nz + iz] * p[e[2] * nz + iz])
                        .sum();
                    acc += c * q[e[0]] * bc;
                }
                *o += wr * acc;
            }
        }
    };
    let chunk = |c0: usize| -> Vec<Vec<f64>> {
        let c1 = (c0 + MU_BLOCK).min(n_mu);
        let nb = c1 - c0;
        let mut pm = vec![0.0; nb * nl];
        let mut qm = vec![0.0; nb * nl];
        for (i, &mu) in gl.nodes[c0..c1].iter().enumerate() {
            legendre_all(lmax, mu, &mut pm[i * nl..(i + 1) * nl]);
            gradient_legendre_all(lmax, mu, &mut qm[i * nl..(i + 1) * nl]);
        }
        // [even l, odd l] partial sums.
        let mut sq = [vec![0.0; nb * cq], vec![0.0; nb * cq]];
        let mut sp = [vec![0.0; nb * cp], vec![0.0; nb * cp]];
        let mut qv = vec![0.0; cq];
        let mut pv = vec![0.0; cp];
        let mut out = vec![vec![0.0; ns]; nm];
        for m in 0..nm {
            let (lo, hi) = (edges[m].min(edges[m + 1]), edges[m + 1]);
            for par in 0..2 {
                let first = lo + (lo + par) % 2; // first l >= lo with l % 2 == par
                if first >= hi {
                    continue;
                }
                let k = (hi - first).div_ceil(2);
                crate::numerics::gemm::gemm(
                    nb,
                    k,
                    cq,
                    &qm[first..],
                    (nl, 2),
                    &wq[first * cq..],
                    (2 * cq, 1),
                    1.0,
                    &mut sq[par],
                    (cq, 1),
                );
                crate::numerics::gemm::gemm(
                    nb,
                    k,
                    cp,
                    &pm[first..],
                    (nl, 2),
                    &wp[first * cp..],
                    (2 * cp, 1),
                    1.0,
                    &mut sp[par],
                    (cp, 1),
                );
            }
            for i in 0..nb {
                let node = c0 + i;
                let w = gl.weights[node];
                let (qe, qo) = (&sq[0][i * cq..(i + 1) * cq], &sq[1][i * cq..(i + 1) * cq]);
                let (pe, po) = (&sp[0][i * cp..(i + 1) * cp], &sp[1][i * cp..(i + 1) * cp]);
                // +mu.
                qv.iter_mut()
                    .zip(qe.iter().zip(qo))
                    .for_each(|(v, (a, b))| *v = a + b);
                pv.iter_mut()
                    .zip(pe.iter().zip(po))
                    .for_each(|(v, (a, b))| *v = a + b);
                triple(&qv, &pv, w, &mut out[m]);
                // -mu (not for the middle node mu = 0 of an odd rule).
                if !(n_mu % 2 == 1 && node == first_pos) {
                    qv.iter_mut()
                        .zip(qe.iter().zip(qo))
                        .for_each(|(v, (a, b))| *v = b - a);
                    pv.iter_mut()
                        .zip(pe.iter().zip(po))
                        .for_each(|(v, (a, b))| *v = a - b);
                    triple(&qv, &pv, w, &mut out[m]);
                }
            }
        }
        out
    };
    let starts: Vec<usize> = (first_pos..n_mu).step_by(MU_BLOCK).collect();
    let parts: Vec<Vec<Vec<f64>>> = if parallel {
        starts.par_iter().map(|&c| chunk(c)).collect()
    } else {
        starts.iter().map(|&c| chunk(c)).collect()
    };
    let norm = plan.f_sky() / (8.0 * std::f64::consts::PI);
    let mut total = vec![vec![0.0; ns]; nm];
    for p in parts {
        for (t, v) in total.iter_mut().zip(p) {
            for (a, b) in t.iter_mut().zip(v) {
                *a += norm * b;
            }
        }
    }
    total
}

/// Roles of a leg in one assignment of the lensing bispectrum.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Role {
    Phi,
    Unlensed,
    Lensed,
}

/// F_lens,lens per grid point for one field set (Wigner-d form).
fn self_terms(
    plan: &BispectrumPlan,
    isw: &IswLensingBispectrum,
    ifs: usize,
    fs: FieldSet,
    grid: &[usize],
    parallel: bool,
) -> Vec<f64> {
    let nm = grid.len();
    let lmax = grid.iter().copied().max().unwrap_or(2);
    let nl = lmax + 1;
    let fields = plan.fields().to_vec();
    let act = active_fields(plan, fs);
    use Role::{Lensed, Phi, Unlensed};
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
    // Each combination: (perm, z, z', sigma') -> per leg (m, m', weight row).
    struct Combo {
        m: [(i32, i32); 3],
        w: [Vec<f64>; 3],
    }
    let mut combos = Vec::new();
    for p in &perms {
        for &z in &act {
            for &z2 in &act {
                let h: [Vec<f64>; 3] = std::array::from_fn(|leg| {
                    (0..nl)
                        .map(|l| {
                            if l < 2 {
                                return 0.0;
                            }
                            let ci = cinv_matrix(plan, ifs, l);
                            let a = vec_of(base[leg], z, l);
                            let b = vec_of(p[leg], z2, l);
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
                            if p[leg] != Lensed {
                                sl *= big_l.sqrt();
                            }
                            (2 * l + 1) as f64 * sl * s
                        })
                        .collect()
                });
                if h.iter().any(|v| v.iter().all(|&x| x == 0.0)) {
                    continue;
                }
                for sigma in [1, -1] {
                    let m: [(i32, i32); 3] = std::array::from_fn(|leg| {
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
                        (m0, m1)
                    });
                    combos.push(Combo { m, w: h.clone() });
                }
            }
        }
    }
    if combos.is_empty() {
        return vec![0.0; nm];
    }
    let mut pairs: Vec<(i32, i32)> = combos.iter().flat_map(|c| c.m).collect();
    pairs.sort_unstable();
    pairs.dedup();
    let n_mu = (3 * lmax).div_ceil(2) + 1;
    let gl = GaussLegendre::new(n_mu);
    let mut edges = vec![0usize];
    edges.extend(grid.iter().map(|&g| g + 1));
    let recs: Vec<DRecurrence> = pairs
        .iter()
        .map(|&(a, b)| DRecurrence::new(a, b, lmax))
        .collect();
    let node = |i: usize| -> Vec<f64> {
        let mu = gl.nodes[i];
        let d: Vec<Vec<f64>> = recs
            .iter()
            .map(|r| {
                let mut v = vec![0.0; nl];
                r.fill(mu, &mut v);
                v
            })
            .collect();
        let mut out = vec![0.0; nm];
        for c in &combos {
            let mut g = [0.0; 3];
            for m in 0..nm {
                let (lo, hi) = (edges[m].min(edges[m + 1]), edges[m + 1]);
                for leg in 0..3 {
                    let dl = &d[pairs.iter().position(|&q| q == c.m[leg]).unwrap_or(0)];
                    g[leg] += c.w[leg][lo..hi]
                        .iter()
                        .zip(&dl[lo..hi])
                        .map(|(a, b)| a * b)
                        .sum::<f64>();
                }
                out[m] += gl.weights[i] * g[0] * g[1] * g[2];
            }
        }
        out
    };
    let parts: Vec<Vec<f64>> = if parallel {
        (0..n_mu).into_par_iter().map(node).collect()
    } else {
        (0..n_mu).map(node).collect()
    };
    let norm = plan.f_sky() / (16.0 * std::f64::consts::PI);
    let mut out = vec![0.0; nm];
    for p in parts {
        for (o, v) in out.iter_mut().zip(p) {
            *o += norm * v;
        }
    }
    out
}

/// The brute-force oracle: the direct triple sum over every (l1, l2, l3) <= `lmax` with
/// the exact Wigner 3j symbol, explicit field sums, the plan's reduced bispectra of the
/// shapes and [`IswLensingBispectrum::reduced`] (all six leg assignments):
/// F_lens,s = (f_sky / 6) Sum G^2 b^s C^-1 C^-1 C^-1 b^lens and the self term. Returns
/// (cross per shape, self term). O(l_max^3 n_r): for tests only.
pub fn brute_force_lensing_fisher(
    plan: &BispectrumPlan,
    isw: &IswLensingBispectrum,
    fs: usize,
    lmax: usize,
    parallel: bool,
) -> (Vec<f64>, f64) {
    use crate::special::wigner::wigner3j_000_squared;
    let ns = plan.terms().len();
    let fields = plan.fields().to_vec();
    let nf = fields.len();
    let combos: Vec<[usize; 3]> = (0..nf)
        .flat_map(|a| (0..nf).flat_map(move |b| (0..nf).map(move |c| [a, b, c])))
        .collect();
    let lmax = lmax.min(plan.lmax());
    let row = |l1: usize| -> (Vec<f64>, f64) {
        let mut cross = vec![0.0; ns];
        let mut auto = 0.0;
        for l2 in 2..=lmax {
            for l3 in 2..=lmax {
                let w2 = wigner3j_000_squared(l1 as u32, l2 as u32, l3 as u32);
                if w2 == 0.0 {
                    continue;
                }
                let g2 = ((2 * l1 + 1) * (2 * l2 + 1) * (2 * l3 + 1)) as f64
                    / (4.0 * std::f64::consts::PI)
                    * w2;
                let ls = [l1, l2, l3];
                let ci = [
                    cinv_matrix(plan, fs, l1),
                    cinv_matrix(plan, fs, l2),
                    cinv_matrix(plan, fs, l3),
                ];
                let bl: Vec<f64> = combos
                    .iter()
                    .map(|c| isw.reduced(ls, [fields[c[0]], fields[c[1]], fields[c[2]]]))
                    .collect();
                // [C^-1 C^-1 C^-1 b^lens] per field combination.
                let wl: Vec<f64> = combos
                    .iter()
                    .map(|a| {
                        combos
                            .iter()
                            .zip(&bl)
                            .map(|(b, v)| {
                                ci[0][a[0]][b[0]] * ci[1][a[1]][b[1]] * ci[2][a[2]][b[2]] * v
                            })
                            .sum()
                    })
                    .collect();
                auto += g2 * bl.iter().zip(&wl).map(|(a, b)| a * b).sum::<f64>();
                for (s, cs) in cross.iter_mut().enumerate() {
                    let v: f64 = combos
                        .iter()
                        .zip(&wl)
                        .filter(|(_, w)| **w != 0.0)
                        .map(|(c, w)| plan.reduced_bispectrum(s, ls, *c) * w)
                        .sum();
                    *cs += g2 * v;
                }
            }
        }
        (cross, auto)
    };
    let rows: Vec<(Vec<f64>, f64)> = if parallel {
        (2..=lmax).into_par_iter().map(row).collect()
    } else {
        (2..=lmax).map(row).collect()
    };
    let mut cross = vec![0.0; ns];
    let mut auto = 0.0;
    for (c, a) in rows {
        cross.iter_mut().zip(c).for_each(|(x, y)| *x += y);
        auto += a;
    }
    let k = plan.f_sky() / 6.0;
    (cross.iter().map(|v| v * k).collect(), auto * k)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cmb::bispectrum::CmbFisherInput;
    use crate::cmb::experiment::{Channel, Experiment};
    use crate::cmb::transfer::TransferTable;
    use crate::cosmology::Primordial;
    use crate::shapes::Shape;

    const CHI: f64 = 14_000.0;

    /// A toy table: T from a Sachs-Wolfe shell with damping, E a shifted, damped shell
    /// (correlated with T, not degenerate).
    fn toy_table(lmax: usize, with_e: bool) -> TransferTable {
        let kmax = 3.0 * lmax as f64 / CHI;
        let panel = std::f64::consts::PI / CHI;
        let gl = GaussLegendre::new(6);
        let (mut k, mut wk) = (Vec::new(), Vec::new());
        for p in 0..(kmax / panel).ceil() as usize {
            let (x, w) = gl.mapped(p as f64 * panel, (p + 1) as f64 * panel);
            k.extend(x);
            wk.extend(w);
        }
        let nl = lmax + 1;
        let fields = if with_e {
            vec![Field::T, Field::E]
        } else {
            vec![Field::T]
        };
        let mut data = vec![vec![0.0; k.len() * nl]; fields.len()];
        let mut j = vec![0.0; nl];
        let k_d = 1.2 * lmax as f64 / CHI;
        for (ik, &kk) in k.iter().enumerate() {
            let d = (-(kk / k_d) * (kk / k_d)).exp();
            crate::special::bessel::sph_bessel_all_l(lmax as u32, kk * CHI, &mut j);
            for l in 2..nl {
                data[0][ik * nl + l] = -j[l] / 3.0 * d;
            }
            if with_e {
                crate::special::bessel::sph_bessel_all_l(lmax as u32, kk * (CHI - 300.0), &mut j);
                for l in 2..nl {
                    data[1][ik * nl + l] = 0.2 * j[l] * d * (kk * CHI / 20.0).min(1.0);
                }
            }
        }
        TransferTable::new("toy shell", k, wk, lmax, fields, data)
    }

    fn experiment(lmax: usize) -> Experiment {
        let mut e = Experiment::ideal(lmax);
        e.f_sky = 0.7;
        e.channels.push(Channel {
            label: "x".into(),
            noise_t_uk_arcmin: 30.0,
            noise_p_uk_arcmin: 42.0,
            fwhm_arcmin: 30.0,
        });
        e
    }

    fn prim() -> Primordial {
        Primordial::from_values(2.1e-9, 0.965, 0.05)
    }

    /// The ISW-lensing spectra of the toy: the table's own C_l, an invented T phi that
    /// falls off over a few tens of multipoles (ISW-like) and, optionally, an E phi.
    fn toy_isw(tr: &TransferTable, with_ep: bool) -> IswLensingBispectrum {
        let p = prim();
        let it = tr.field_index(Field::T).unwrap_or(0);
        let tt = tr.cl(&p, it, it);
        let (te, ee) = match tr.field_index(Field::E) {
            Some(ie) => (tr.cl(&p, it, ie), tr.cl(&p, ie, ie)),
            None => (vec![0.0; tt.len()], vec![0.0; tt.len()]),
        };
        let tp: Vec<f64> = (0..tt.len())
            .map(|l| 3e-14 * (l as f64 + 1.0).powf(-2.5) * (1.0 + (l as f64 / 40.0).powi(2)))
            .collect();
        let ep: Vec<f64> = (0..tt.len())
            .map(|l| -0.2 * tp[l] * (-(l as f64) / 15.0).exp())
            .collect();
        IswLensingBispectrum::new(&tt, &te, &ee, &tp, with_ep.then_some(ep.as_slice()))
    }

    fn plan_for(
        tr: &TransferTable,
        radial: &RadialGrid,
        shapes: &[Shape],
        fs: &[FieldSet],
        grid: &[usize],
    ) -> BispectrumPlan {
        BispectrumPlan::new(&CmbFisherInput {
            transfer: tr,
            primordial: prim(),
            shapes,
            experiment: &experiment(*grid.last().unwrap_or(&2)),
            t_cmb_k: 2.7255,
            lmax_grid: grid,
            field_sets: fs,
            radial,
            parallel: true,
            signal_cl: None,
        })
    }

    fn close(a: f64, b: f64, rel: f64) -> bool {
        (a - b).abs() <= rel * a.abs().max(b.abs()).max(1e-300)
    }

    /// Fast path (Q_l sums, Wigner-d self term) against the brute-force triple sum with the
    /// exact Wigner 3j, for T, E and T+E, three shapes, two l_max of one grid.
    #[test]
    fn fast_sums_equal_the_brute_force_triple_sum() {
        let lmax = 60;
        let tr = toy_table(lmax, true);
        let radial = RadialGrid::panels(CHI - 600.0, CHI + 600.0, 4, 4);
        let shapes = [Shape::Local, Shape::Equilateral, Shape::Orthogonal];
        let fsets = [FieldSet::T, FieldSet::E, FieldSet::TE];
        let grid = [40, lmax];
        let plan = plan_for(&tr, &radial, &shapes, &fsets, &grid);
        for with_ep in [false, true] {
            let isw = toy_isw(&tr, with_ep);
            let fast = lensing_fisher(&plan, &radial, &isw, &grid, true);
            for (ifs, fs) in fsets.iter().enumerate() {
                for (m, &l) in grid.iter().enumerate() {
                    let (cross, auto) = brute_force_lensing_fisher(&plan, &isw, ifs, l, true);
                    for (s, (&f, &b)) in fast.cross[ifs][m].iter().zip(&cross).enumerate() {
                        assert!(
                            close(f, b, 1e-9),
                            "{} lmax {l} shape {s} e-phi {with_ep}: fast {f:e} brute {b:e}",
                            fs.label()
                        );
                    }
                    let f = fast.self_term[ifs][m];
                    assert!(
                        close(f, auto, 1e-9),
                        "{} lmax {l} self e-phi {with_ep}: fast {f:e} brute {auto:e}",
                        fs.label()
                    );
                    // Without E phi an E-only map has no ISW-lensing bispectrum.
                    if *fs == FieldSet::E && !with_ep {
                        assert_eq!(auto, 0.0);
                        assert!(cross.iter().all(|&c| c == 0.0));
                    } else {
                        assert!(auto > 0.0 && cross.iter().all(|&c| c != 0.0));
                    }
                }
            }
        }
    }

    /// The same oracle at l_max = 300, temperature and local only (a few seconds in
    /// release): the Q_l recurrence and the Wigner-d sums keep their accuracy where the
    /// L weights span four decades.
    #[test]
    fn fast_sums_equal_the_brute_force_at_lmax_300() {
        let lmax = 300;
        let tr = toy_table(lmax, false);
        let radial = RadialGrid::panels(CHI - 150.0, CHI + 150.0, 2, 3);
        let grid = [lmax];
        let plan = plan_for(&tr, &radial, &[Shape::Local], &[FieldSet::T], &grid);
        let isw = toy_isw(&tr, false);
        let fast = lensing_fisher(&plan, &radial, &isw, &grid, true);
        let (cross, auto) = brute_force_lensing_fisher(&plan, &isw, 0, lmax, true);
        assert!(
            close(fast.cross[0][0][0], cross[0], 1e-8),
            "{:e} vs {:e}",
            fast.cross[0][0][0],
            cross[0]
        );
        assert!(
            close(fast.self_term[0][0], auto, 1e-8),
            "{:e} vs {auto:e}",
            fast.self_term[0][0]
        );
    }

    #[test]
    fn single_and_joint_bias() {
        let f = FisherMatrix::from_rows(
            vec!["fnl_a".into(), "fnl_b".into()],
            vec![4.0, 1.0, 1.0, 2.0],
        );
        let b = bias_from(&f, &[2.0, 3.0]);
        assert_eq!(b.single, vec![0.5, 1.5]);
        // F^-1 = [[2, -1], [-1, 4]] / 7.
        assert!(close(b.joint[0], (4.0 - 3.0) / 7.0, 1e-14));
        assert!(close(b.joint[1], (-2.0 + 12.0) / 7.0, 1e-14));
    }
}
