//! Unit tests of the fast engine against its oracles (toy transfer tables shared with
//! other modules' tests).

use super::*;
use crate::cmb::experiment::Channel;
use crate::cmb::transfer::Field;
use crate::numerics::GaussLegendre;
use crate::special::wigner::wigner3j_000_squared;

pub(crate) const CHI: f64 = 14_000.0;

/// A toy transfer table: T from a zero-thickness Sachs-Wolfe shell,
/// Delta^T_l = -(1/3) j_l(k chi) D(k), and (for the oracles only) an E-like field
/// 0.2 j_l(k (chi - 300)) D(k) min(1, k chi / 20), correlated with T but not nearly
/// degenerate. D = exp(-(k/k_D)^2) or 1.
pub(crate) fn toy_table(lmax: usize, k_d: Option<f64>, with_e: bool) -> TransferTable {
    toy_table_k(lmax, k_d, with_e, 4.0)
}

/// As [`toy_table`] with k up to `kfac` l_max / chi.
pub(crate) fn toy_table_k(lmax: usize, k_d: Option<f64>, with_e: bool, kfac: f64) -> TransferTable {
    let kmax = kfac * lmax as f64 / CHI;
    let panel = std::f64::consts::PI / CHI;
    let n_panels = (kmax / panel).ceil() as usize;
    let gl = GaussLegendre::new(6);
    let (mut k, mut wk) = (Vec::new(), Vec::new());
    for p in 0..n_panels {
        let (x, w) = gl.mapped(p as f64 * panel, (p + 1) as f64 * panel);
        k.extend(x);
        wk.extend(w);
    }
    let nl = lmax + 1;
    let mut fields = vec![Field::T];
    if with_e {
        fields.push(Field::E);
    }
    let mut data = vec![vec![0.0; k.len() * nl]; fields.len()];
    let mut j = vec![0.0; nl];
    for (ik, &kk) in k.iter().enumerate() {
        let d = k_d.map_or(1.0, |kd| (-(kk / kd) * (kk / kd)).exp());
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

pub(crate) fn toy_radial(half_width: f64, panels: usize) -> RadialGrid {
    RadialGrid::panels(CHI - half_width, CHI + half_width, panels, 6)
}

fn experiment(lmax: usize, noisy: bool) -> Experiment {
    let mut e = Experiment::ideal(lmax);
    e.f_sky = 0.7;
    if noisy {
        e.channels.push(Channel {
            label: "x".into(),
            noise_t_uk_arcmin: 30.0,
            noise_p_uk_arcmin: 42.0,
            fwhm_arcmin: 60.0,
        });
    }
    e
}

/// The plan for local f_NL, temperature only, on one l_max.
fn local_t_plan(
    tr: &TransferTable,
    radial: &RadialGrid,
    exp: &Experiment,
    prim: Primordial,
    lmax: usize,
    parallel: bool,
) -> BispectrumPlan {
    BispectrumPlan::new(&CmbFisherInput {
        transfer: tr,
        primordial: prim,
        shapes: &[Shape::Local],
        experiment: exp,
        t_cmb_k: 2.7255,
        lmax_grid: &[lmax],
        field_sets: &[FieldSet::T],
        radial,
        parallel,
        signal_cl: None,
    })
}

/// The exact form of the engine (complete basis, no split).
const EXACT: EngineOptions = EngineOptions {
    tol: 0.0,
    split: false,
    block: super::BLOCK,
};

const ALL_FIELD_SETS: [FieldSet; 3] = [FieldSet::T, FieldSet::E, FieldSet::TE];

/// A plan for T, E and T+E with the toy primordial spectrum.
fn all_fields_plan(
    tr: &TransferTable,
    radial: &RadialGrid,
    exp: &Experiment,
    sh: &[Shape],
    grid: &[usize],
    parallel: bool,
) -> BispectrumPlan {
    BispectrumPlan::new(&CmbFisherInput {
        transfer: tr,
        primordial: Primordial::from_values(2.1e-9, 0.965, 0.05),
        shapes: sh,
        experiment: exp,
        t_cmb_k: 2.7255,
        lmax_grid: grid,
        field_sets: &ALL_FIELD_SETS,
        radial,
        parallel,
        signal_cl: None,
    })
}

fn shapes() -> Vec<Shape> {
    ["local", "equilateral", "orthogonal", "delta=0.5"]
        .iter()
        .map(|s| s.parse().unwrap())
        .collect()
}

#[test]
fn fast_path_equals_brute_force_for_every_field_set() {
    let lmax = 24;
    let tr = toy_table(lmax, Some(0.02), true);
    let radial = toy_radial(600.0, 8);
    let exp = experiment(lmax, true);
    let sh = shapes();
    let fsets = ALL_FIELD_SETS;
    let grid = [12, 18, lmax];
    let plan = all_fields_plan(&tr, &radial, &exp, &sh, &grid, false);
    let fast = cmb_fisher_with_options(&plan, &grid, false, &EXACT);
    let par = cmb_fisher_with_options(&plan, &grid, true, &EXACT);
    for (ifs, _) in fsets.iter().enumerate() {
        for (m, &lm) in grid.iter().enumerate() {
            let brute = brute_force_fisher(&plan, ifs, lm, false);
            let f = &fast.fisher[ifs][m];
            for i in 0..sh.len() {
                for j in 0..sh.len() {
                    let (a, b) = (f.get(i, j), brute[i * sh.len() + j]);
                    let scale = (f.get(i, i) * f.get(j, j)).sqrt();
                    assert!(
                        (a - b).abs() <= 1e-9 * scale,
                        "fs {ifs} lmax {lm} ({i},{j}): fast {a} brute {b}"
                    );
                    let p = par.fisher[ifs][m].get(i, j);
                    assert_eq!(a, p, "serial and parallel sums must agree to the bit");
                }
            }
        }
    }
}

/// The default (compressed) engine against the brute-force oracle at l_max = 60 on a
/// damped toy table with T and E, every shape and field set: the compression keeps
/// each multipole's radial functions to 1e-5, and F moves by about as much (measured
/// 9.6e-6 of sqrt(F_ii F_jj)); an approximation with a stated error, far inside the
/// 0.5% allowed for schemes that bin or interpolate. The exact form (tolerance 0) is
/// held to 1e-9 above.
#[test]
fn default_engine_matches_brute_force() {
    let lmax = 60;
    let tr = toy_table(lmax, Some(0.004), true);
    let radial = toy_radial(600.0, 10);
    let exp = experiment(lmax, true);
    let sh = shapes();
    let fsets = ALL_FIELD_SETS;
    let grid = [30, lmax];
    let plan = all_fields_plan(&tr, &radial, &exp, &sh, &grid, true);
    let fast = cmb_fisher_with_plan(&plan, &grid, true);
    let mut worst: f64 = 0.0;
    for ifs in 0..fsets.len() {
        for (m, &lm) in grid.iter().enumerate() {
            let brute = brute_force_fisher(&plan, ifs, lm, true);
            let f = &fast.fisher[ifs][m];
            for i in 0..sh.len() {
                for j in 0..sh.len() {
                    let scale = (f.get(i, i) * f.get(j, j)).sqrt();
                    worst = worst.max((f.get(i, j) - brute[i * sh.len() + j]).abs() / scale);
                }
            }
        }
    }
    println!(
        "default engine vs brute force, l_max = {lmax}: worst {worst:.2e}; {:?}",
        fast.stats
    );
    assert!(worst < 3e-5, "{worst}");
}

/// Sachs-Wolfe limit (zero thickness, no damping): b_{l1 l2 l3} = -6 f_NL
/// [C_l1 C_l2 + C_l2 C_l3 + C_l1 C_l3] for Delta T / T = -Phi / 3 (Komatsu & Spergel
/// 2001, Eq. 16), including the sign.
#[test]
fn sachs_wolfe_local_bispectrum_closed_form() {
    // The zero-thickness kernel converges slowly in k: the tail beyond x = k chi costs
    // about l^2 / (2 x^2) of C_l, so k runs to 20 l_max / chi here.
    let lmax = 60;
    let tr = toy_table_k(lmax, None, false, 20.0);
    let radial = toy_radial(900.0, 240);
    let exp = Experiment::ideal(lmax);
    let prim = Primordial::from_values(2.1e-9, 1.0, 0.05);
    let plan = local_t_plan(&tr, &radial, &exp, prim, lmax, true);
    let cl = tr.cl(&prim, 0, 0);
    // SW plateau check of the toy table itself: l(l+1) C_l / 2 pi = A_s / 25.
    for l in [2usize, 10, 40] {
        let d = (l * (l + 1)) as f64 * cl[l] / (2.0 * std::f64::consts::PI);
        assert!((d / (2.1e-9 / 25.0) - 1.0).abs() < 2e-3, "l={l} {d}");
    }
    let mut worst: f64 = 0.0;
    for l in [
        [2usize, 3, 3],
        [10, 12, 14],
        [20, 20, 20],
        [5, 30, 33],
        [40, 45, 51],
    ] {
        let b = plan.reduced_bispectrum(0, l, [0, 0, 0]);
        let expect = -6.0 * (cl[l[0]] * cl[l[1]] + cl[l[1]] * cl[l[2]] + cl[l[0]] * cl[l[2]]);
        worst = worst.max((b / expect - 1.0).abs());
        assert!((b / expect - 1.0).abs() < 0.01, "{l:?}: {b} vs {expect}");
    }
    println!("Sachs-Wolfe closed form: worst relative deviation {worst:.2e}");
}

#[test]
fn restricted_sum_equals_unrestricted_over_six() {
    // T only: Sum_{l1<=l2<=l3} G^2 b^2 / (Delta C C C) = (1/6) Sum over all l.
    let lmax = 20;
    let tr = toy_table(lmax, Some(0.01), false);
    let radial = toy_radial(500.0, 6);
    let exp = experiment(lmax, false);
    let prim = Primordial::from_values(2.1e-9, 0.965, 0.05);
    let plan = local_t_plan(&tr, &radial, &exp, prim, lmax, false);
    let cl = tr.cl(&prim, 0, 0);
    let mut restricted = 0.0;
    for l1 in 2..=lmax {
        for l2 in l1..=lmax {
            for l3 in l2..=lmax {
                let w2 = wigner3j_000_squared(l1 as u32, l2 as u32, l3 as u32);
                let g2 = ((2 * l1 + 1) * (2 * l2 + 1) * (2 * l3 + 1)) as f64
                    / (4.0 * std::f64::consts::PI)
                    * w2;
                let delta = if l1 == l2 && l2 == l3 {
                    6.0
                } else if l1 == l2 || l2 == l3 {
                    2.0
                } else {
                    1.0
                };
                let b = plan.reduced_bispectrum(0, [l1, l2, l3], [0, 0, 0]);
                restricted += g2 * b * b / (delta * cl[l1] * cl[l2] * cl[l3]);
            }
        }
    }
    let fast = cmb_fisher_with_options(&plan, &[lmax], false, &EXACT);
    let f = fast.fisher[0][0].get(0, 0) / exp.f_sky;
    assert!((f / restricted - 1.0).abs() < 1e-9, "{f} vs {restricted}");
}

#[test]
fn legendre_recurrence() {
    let mut p = vec![0.0; 6];
    legendre_all(5, 0.3, &mut p);
    let x: f64 = 0.3;
    let p5 = (63.0 * x.powi(5) - 70.0 * x.powi(3) + 15.0 * x) / 8.0;
    assert!((p[5] - p5).abs() < 1e-15);
}

/// The radial functions against a direct sum over k with exact j_l (no l_cut, no
/// recurrences), X^p_l(r) = (2/pi) Sum_k w_k k^2 P_Phi(k)^p Delta_l(k) j_l(k r), on nodes
/// on both sides of the shell and beyond it, with rows that end in exact zeros past
/// l_cut(k chi) (as the Boltzmann tables do): every (p, field, l) row agrees to 1e-9 of
/// its largest value (the l_cut rule drops |j_l| < 1e-6 of its peak).
#[test]
fn radial_functions_equal_a_direct_sum() {
    let lmax = 70;
    let mut tr = toy_table(lmax, Some(0.01), true);
    // Zero each row beyond l_cut(k chi): the kernel skips exact zeros.
    let nl = lmax + 1;
    let (k, w) = (tr.k().to_vec(), tr.weights().to_vec());
    let data: Vec<Vec<f64>> = (0..2)
        .map(|f| {
            let mut d = Vec::with_capacity(k.len() * nl);
            for (ik, &kk) in k.iter().enumerate() {
                let top = crate::special::bessel::l_cut(kk * CHI);
                d.extend(tr.row(f, ik)[..nl].iter().enumerate().map(
                    |(l, &v)| {
                        if l > top { 0.0 } else { v }
                    },
                ));
            }
            d
        })
        .collect();
    tr = TransferTable::new(
        "toy shell, cut rows",
        k,
        w,
        lmax,
        vec![Field::T, Field::E],
        data,
    );
    // Nodes from well inside to well beyond the shell, fewer than a radial group apart.
    let radial = RadialGrid::panels(CHI - 3000.0, CHI + 4000.0, 3, 3);
    let exp = experiment(lmax, false);
    let sh = shapes();
    let prim = Primordial::from_values(2.1e-9, 0.965, 0.05);
    let plan = all_fields_plan(&tr, &radial, &exp, &sh, &[lmax], true);
    let serial = all_fields_plan(&tr, &radial, &exp, &sh, &[lmax], false);
    let mut worst: f64 = 0.0;
    for (e, &p) in plan.exponents().iter().enumerate() {
        for f in 0..2 {
            for l in 2..=lmax {
                let direct: Vec<f64> = radial
                    .r
                    .iter()
                    .map(|&r| {
                        tr.k()
                            .iter()
                            .zip(tr.weights())
                            .enumerate()
                            .map(|(ik, (&kk, &wk))| {
                                2.0 / std::f64::consts::PI
                                    * wk
                                    * kk
                                    * kk
                                    * prim.p_phi(kk).powf(p)
                                    * tr.row(f, ik)[l]
                                    * crate::special::sph_bessel(l as u32, kk * r)
                            })
                            .sum()
                    })
                    .collect();
                let peak = direct.iter().fold(0.0f64, |m, v| m.max(v.abs()));
                for (ir, d) in direct.iter().enumerate() {
                    let x = plan.radial_function(e, f, l, ir);
                    assert_eq!(x.to_bits(), serial.radial_function(e, f, l, ir).to_bits());
                    worst = worst.max((x - d).abs() / peak);
                }
            }
        }
    }
    println!("radial functions against the direct sum: worst {worst:.2e} of each row's peak");
    assert!(worst < 1e-9, "{worst}");
}
