//! The brute-force oracle of the ISW-lensing Fisher terms (tests and benches only), and
//! the tests of the fast sums against it.

use rayon::prelude::*;

use super::cinv_matrix;
use crate::cmb::bispectrum::BispectrumPlan;
use crate::cmb::lensing::isw_bispectrum::IswLensingBispectrum;

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
    use super::super::lensing_fisher;
    use super::*;
    use crate::cmb::bispectrum::CmbFisherInput;
    use crate::cmb::bispectrum::FieldSet;
    use crate::cmb::experiment::{Channel, Experiment};
    use crate::cmb::transfer::TransferTable;
    use crate::cmb::transfer::{Field, RadialGrid};
    use crate::cosmology::Primordial;
    use crate::numerics::GaussLegendre;
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
}
