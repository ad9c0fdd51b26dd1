//! Tests of the survey Fisher assembly.

use super::*;
use crate::cosmology::{Background, Cosmology, Primordial};
use crate::shapes::Shape;
use crate::survey::CovarianceModel;
use crate::survey::spec::NuisanceSwitches;
use crate::survey::triangles::TriangleRule;

struct Setup {
    bg: Background,
    power: LinearPower,
    prim: Primordial,
    h: f64,
}

fn setup() -> Setup {
    let c = Cosmology::planck2018();
    Setup {
        bg: Background::new(&c),
        power: LinearPower::eisenstein_hu(&c),
        prim: Primordial::new(&c),
        h: c.h(),
    }
}

fn local(prim: Primordial) -> ShapeInput {
    ShapeInput::new(Shape::Local, prim)
}

fn local_b(prim: Primordial) -> impl Fn(f64, f64, f64) -> f64 + Sync {
    move |k1, k2, k3| {
        let (p1, p2, p3) = (prim.p_phi(k1), prim.p_phi(k2), prim.p_phi(k3));
        2.0 * (p1 * p2 + p2 * p3 + p1 * p3)
    }
}

fn sigma(fc: &SurveyForecast, ik: usize, probe: usize) -> f64 {
    fc.total[ik][probe].sigma_conditional(0)
}

fn quick(nbar_h3: f64, b1: f64, real_space: bool) -> Survey {
    let mut s = Survey::quick(10.0, 1.0, nbar_h3, b1, real_space, 0.6736).unwrap();
    s.covariance = CovarianceModel::Gaussian;
    s
}

#[test]
fn power_spectrum_saturates_at_cosmic_variance() {
    let s = setup();
    let shapes = [local(s.prim)];
    let st = SurveySettings::default();
    let sig = |nbar: f64| {
        let mut sv = quick(nbar, 2.0, true);
        sv.nuisance = NuisanceSwitches::all_fixed();
        let fc = survey_fisher(&sv, &s.power, &s.bg, &shapes, &[0.1 * s.h], &st);
        sigma(&fc, 0, 0)
    };
    let (a, b2, c) = (sig(1e-4), sig(1e-1), sig(1e1));
    assert!(a > b2 * 1.05, "shot noise must cost information: {a} {b2}");
    assert!((b2 / c - 1.0).abs() < 0.01, "saturation: {b2} {c}");
}

#[test]
fn two_tracers_cancel_cosmic_variance() {
    let s = setup();
    let shapes = [local(s.prim)];
    let st = SurveySettings::default();
    let mut one = quick(1e2, 2.0, true);
    one.nuisance = NuisanceSwitches::all_fixed();
    let mut two = one.clone();
    let mut t2 = two.tracers[0].clone();
    t2.name = "second".into();
    t2.bins[0].b1 = 1.2;
    t2.bins[0].b_phi = crate::survey::bias::b_phi(1.2, 1.0);
    two.tracers.push(t2);
    let s1 = sigma(
        &survey_fisher(&one, &s.power, &s.bg, &shapes, &[0.1 * s.h], &st),
        0,
        0,
    );
    let s2 = sigma(
        &survey_fisher(&two, &s.power, &s.bg, &shapes, &[0.1 * s.h], &st),
        0,
        0,
    );
    println!(
        "one tracer sigma = {s1:.3}, two tracers sigma = {s2:.4}, ratio {:.1}",
        s1 / s2
    );
    assert!(s1 / s2 > 10.0, "cosmic-variance cancellation: {s1} vs {s2}");
}

/// Brute force: real space, no damping, no nuisances, Gaussian covariance, exact
/// triangle sum: F = Sum_T (dB/dfNL)^2 / Var B evaluated per triangle with B written out
/// directly, including the second-order non-Gaussian bias (b_phi-delta) and the shift
/// term (Giannantonio & Porciani 2010; Baldauf, Seljak & Senatore 2011).
#[test]
fn bispectrum_matches_brute_force() {
    let s = setup();
    let b = local_b(s.prim);
    let shapes = [local(s.prim)];
    let mut sv = quick(3e-4, 2.0, true);
    sv.bins[0].volume_mpc3 = 1e9;
    // The oracle writes Delta b in its squeezed form.
    sv.response = crate::survey::ResponseModel::SqueezedCut;
    sv.nuisance = NuisanceSwitches::all_fixed();
    let kmax = 0.08;
    let fc = survey_fisher(
        &sv,
        &s.power,
        &s.bg,
        &shapes,
        &[kmax],
        &SurveySettings {
            parallel: false,
            triangles: TriangleRule {
                exact_bins: None,
                ..TriangleRule::default()
            },
            ..SurveySettings::default()
        },
    );
    let f_fast = fc.total[0][1].get(0, 0);
    let bpd = crate::survey::response::b_phi_delta(
        2.0,
        sv.tracers[0].bins[0].b2,
        sv.tracers[0].bins[0].b_phi,
    );
    // Brute force.
    let t = sv.tracers[0].bins[0];
    let z = 1.0;
    let v = 1e9_f64;
    let kf = 2.0 * std::f64::consts::PI / v.cbrt();
    let n_inv = 1.0 / t.nbar_mpc3;
    let mut f_brute = 0.0;
    let nk = ((kmax - kf) / kf).floor() as usize;
    for i in 0..nk {
        for j in 0..=i {
            for l in 0..=j {
                let k = [
                    kf + (i as f64 + 0.5) * kf,
                    kf + (j as f64 + 0.5) * kf,
                    kf + (l as f64 + 0.5) * kf,
                ];
                if k[0] > k[1] + k[2] || k[0] + 0.5 * kf > kmax {
                    continue;
                }
                let p: Vec<f64> = k.iter().map(|&q| s.power.p_mpc(q, z)).collect();
                let m: Vec<f64> = k.iter().map(|&q| s.power.m_factor(q, z)).collect();
                let db: Vec<f64> = k
                    .iter()
                    .map(|&q| t.b_phi / s.power.m_factor(q, z))
                    .collect();
                // Real-space Z2 = b1 F2 + b2/2 + bs2 S2 for each pair.
                let cosine = |a: usize, bb: usize| {
                    let (ka, kb) = (k[a], k[bb]);
                    let kc = k[3 - a - bb];
                    (kc * kc - ka * ka - kb * kb) / (2.0 * ka * kb)
                };
                let z2 = |a: usize, bb: usize| {
                    let (ka, kb) = (k[a], k[bb]);
                    let c = cosine(a, bb);
                    t.b1 * (5.0 / 7.0 + 0.5 * c * (ka / kb + kb / ka) + 2.0 / 7.0 * c * c)
                        + 0.5 * t.b2
                        + t.bs2 * (c * c - 1.0 / 3.0)
                };
                // d Z2 / d f_NL: (b_phi_delta / 2)(1/M_a + 1/M_b) + (b_phi / 2) mu (k_b/k_a / M_b + k_a/k_b / M_a).
                let dz2 = |a: usize, bb: usize| {
                    let (ka, kb) = (k[a], k[bb]);
                    0.5 * bpd * (1.0 / m[a] + 1.0 / m[bb])
                        + 0.5 * t.b_phi * cosine(a, bb) * (kb / ka / m[bb] + ka / kb / m[a])
                };
                let mut d = t.b1.powi(3) * m[0] * m[1] * m[2] * b(k[0], k[1], k[2]);
                for (a, bb) in [(0, 1), (1, 2), (0, 2)] {
                    d += 2.0 * p[a] * p[bb] * (db[a] * t.b1 + t.b1 * db[bb]) * z2(a, bb);
                    d += 2.0 * p[a] * p[bb] * t.b1 * t.b1 * dz2(a, bb);
                }
                d += n_inv * (0..3).map(|q| 2.0 * t.b1 * db[q] * p[q]).sum::<f64>();
                let s123 = if i == j && j == l {
                    6.0
                } else if i == j || j == l {
                    2.0
                } else {
                    1.0
                };
                let var = s123 * kf.powi(3)
                    / (8.0 * std::f64::consts::PI.powi(2) * k[0] * k[1] * k[2] * kf.powi(3))
                    * (0..3).map(|q| t.b1 * t.b1 * p[q] + n_inv).product::<f64>();
                f_brute += d * d / var;
            }
        }
    }
    assert!(
        (f_fast / f_brute - 1.0).abs() < 1e-9,
        "fast {f_fast} brute {f_brute}"
    );
}

/// Exact count of triangles (q1, q2, q3 = -q1 - q2) on the integer lattice with each
/// |q_i| in a shell of width dk (units of k_f), against the continuum
/// V_123 / k_f^6 = 8 pi^2 k1 k2 k3 dk^3 behind Var B. Shell edges are kept off
/// integer radii, where many lattice points sit (edges at r = 15 or 17 exactly would
/// drop all of them and bias the count low by ~8%).
#[test]
fn discrete_triangle_count_matches_continuum() {
    let dk = 2.0;
    let shell = |q: [i64; 3], c: f64| {
        let r = ((q[0] * q[0] + q[1] * q[1] + q[2] * q[2]) as f64).sqrt();
        (r - c).abs() < 0.5 * dk
    };
    let r = 18i64;
    let mut pts: Vec<[i64; 3]> = Vec::new();
    for x in -r..=r {
        for y in -r..=r {
            for zz in -r..=r {
                pts.push([x, y, zz]);
            }
        }
    }
    let (mut tot_count, mut tot_cont) = (0.0, 0.0);
    for (c1, c2, c3) in [
        (16.3, 14.3, 12.3),
        (16.3, 16.3, 16.3),
        (15.3, 12.3, 10.3),
        (14.3, 12.3, 8.3),
    ] {
        let s1: Vec<[i64; 3]> = pts.iter().copied().filter(|&q| shell(q, c1)).collect();
        let s2: Vec<[i64; 3]> = pts.iter().copied().filter(|&q| shell(q, c2)).collect();
        let mut count = 0u64;
        for a in &s1 {
            for b in &s2 {
                let q3 = [-(a[0] + b[0]), -(a[1] + b[1]), -(a[2] + b[2])];
                if shell(q3, c3) {
                    count += 1;
                }
            }
        }
        let cont = 8.0 * std::f64::consts::PI.powi(2) * c1 * c2 * c3 * dk.powi(3);
        let ratio = count as f64 / cont;
        println!(
            "shells ({c1},{c2},{c3}) dk={dk}: count {count}, continuum {cont:.0}, ratio {ratio:.4}"
        );
        assert!((ratio - 1.0).abs() < 0.05, "ratio {ratio}");
        tot_count += count as f64;
        tot_cont += cont;
    }
    println!("all four: ratio {:.4}", tot_count / tot_cont);
    assert!((tot_count / tot_cont - 1.0).abs() < 0.02);
}

#[test]
fn fisher_is_psd_and_marginal_exceeds_conditional() {
    let s = setup();
    let shapes = [
        local(s.prim),
        ShapeInput {
            name: "half".into(),
            squeezed_index: 0.5,
            ..local(s.prim)
        },
    ];
    // The second shape is synthetic (local bispectrum, squeezed index 0.5): only the
    // squeezed-cut response reads its index.
    let mut sv = Survey::quick(5.0, 0.8, 5e-4, 1.8, false, 0.6736).unwrap();
    sv.response = crate::survey::ResponseModel::SqueezedCut;
    let fc = survey_fisher(
        &sv,
        &s.power,
        &s.bg,
        &shapes,
        &[0.05, 0.1],
        &SurveySettings::default(),
    );
    // The full-shape response with the local shape alone: more k, more information.
    sv.response = crate::survey::ResponseModel::FullShape;
    let full = survey_fisher(
        &sv,
        &s.power,
        &s.bg,
        &shapes[..1],
        &[0.05, 0.1],
        &SurveySettings::default(),
    );
    for p in 0..3 {
        assert!(
            full.total[1][p].get(0, 0) > full.total[0][p].get(0, 0),
            "probe {p}"
        );
    }
    for per_k in &fc.total {
        for f in per_k {
            assert!(f.is_symmetric_psd(1e-9));
            let m = f.sigma_marginal_or_inf();
            for (i, mi) in m.iter().enumerate() {
                assert!(*mi >= f.sigma_conditional(i) * (1.0 - 1e-9));
            }
        }
    }
    // More k means more information.
    assert!(fc.total[1][2].get(0, 0) > fc.total[0][2].get(0, 0));
}

fn one_bin(real_space: bool, cov: CovarianceModel) -> Survey {
    let mut sv = Survey::quick(2.0, 1.0, 5e-4, 2.0, real_space, 0.6736).unwrap();
    sv.covariance = cov;
    sv
}

fn all_shapes(prim: Primordial) -> Vec<ShapeInput> {
    [Shape::Local, Shape::Equilateral, Shape::Orthogonal]
        .into_iter()
        .map(|s| ShapeInput::new(s, prim))
        .collect()
}

/// The triangle quadrature (exact first bins plus continuum) against the exact triangle
/// sum, Gaussian covariance, redshift space, all shapes and probes, nuisances
/// marginalized, at k_max = 30 and 48 k_f: within 1% (measured: 0.045%).
#[test]
fn quadrature_matches_exact_triangle_sum() {
    let s = setup();
    let shapes = all_shapes(s.prim);
    let sv = one_bin(false, CovarianceModel::Gaussian);
    let run = |exact: bool| {
        let st = SurveySettings {
            triangles: TriangleRule {
                exact_bins: if exact {
                    None
                } else {
                    TriangleRule::default().exact_bins
                },
                ..TriangleRule::default()
            },
            ..SurveySettings::default()
        };
        survey_fisher(&sv, &s.power, &s.bg, &shapes, &[0.1, 0.16], &st)
    };
    let (q, e) = (run(false), run(true));
    let mut worst: f64 = 0.0;
    for ik in 0..2 {
        for probe in 1..3 {
            for is in 0..3 {
                let (a, b) = (
                    q.total[ik][probe].sigma_conditional(is),
                    e.total[ik][probe].sigma_conditional(is),
                );
                worst = worst.max((a / b - 1.0).abs());
            }
        }
    }
    println!(
        "quadrature vs exact triangle sum: worst sigma difference {:.3}%",
        100.0 * worst
    );
    assert!(worst < 0.01, "{worst}");
}

/// Saturation under the theoretical error (Baldauf, Mirbabayi, Simonovic & Zaldarriaga
/// 2016: the information stops growing once the envelope passes the Gaussian error):
/// from k_max = 0.3 to 0.5 Mpc^-1 the Gaussian bispectrum information on the equilateral
/// amplitude keeps growing roughly like the triangle count, the realistic one barely.
#[test]
fn theory_error_saturates_bispectrum_information() {
    let s = setup();
    let shapes = [ShapeInput::new(Shape::Equilateral, s.prim)];
    let info = |cov: CovarianceModel| -> (f64, f64) {
        let mut sv = one_bin(true, cov);
        sv.kmax_tree_mpc = 1.0;
        let fc = survey_fisher(
            &sv,
            &s.power,
            &s.bg,
            &shapes,
            &[0.3, 0.5],
            &SurveySettings::default(),
        );
        (fc.total[0][1].get(0, 0), fc.total[1][1].get(0, 0))
    };
    let (g3, g5) = info(CovarianceModel::Gaussian);
    let (r3, r5) = info(CovarianceModel::Realistic);
    println!(
        "B information gain from k_max 0.3 to 0.5 Mpc^-1: gaussian x{:.2}, realistic x{:.2}",
        g5 / g3,
        r5 / r3
    );
    assert!(g5 / g3 > 1.5, "gaussian gain {}", g5 / g3);
    assert!(
        r5 / r3 - 1.0 < 0.5 * (g5 / g3 - 1.0),
        "realistic gain {} vs gaussian {}",
        r5 / r3,
        g5 / g3
    );
    assert!(r3 < g3);
}

/// Woodbury through the engine: the realistic P information never exceeds the Gaussian
/// one, and P+B (whitened bispectrum) never falls below B alone or P alone in
/// information (the same model for both; marginalized f_NL block, conditional sigma).
#[test]
fn realistic_probes_are_ordered() {
    let s = setup();
    let shapes = all_shapes(s.prim);
    let g = survey_fisher(
        &one_bin(false, CovarianceModel::Gaussian),
        &s.power,
        &s.bg,
        &shapes,
        &[0.15],
        &SurveySettings::default(),
    );
    let r = survey_fisher(
        &one_bin(false, CovarianceModel::Realistic),
        &s.power,
        &s.bg,
        &shapes,
        &[0.15],
        &SurveySettings::default(),
    );
    for is in [0, 2] {
        assert!(r.total[0][0].get(is, is) <= g.total[0][0].get(is, is) * (1.0 + 1e-9));
    }
    for is in 0..3 {
        let (p, b, pb) = (
            r.total[0][0].sigma_conditional(is),
            r.total[0][1].sigma_conditional(is),
            r.total[0][2].sigma_conditional(is),
        );
        println!("realistic shape {is}: P {p:.3} B {b:.3} P+B {pb:.3}");
        assert!(pb <= b * 1.001 && pb <= p * 1.001, "{p} {b} {pb}");
        assert!(r.total[0][1].sigma_conditional(is) >= g.total[0][1].sigma_conditional(is));
    }
}

/// The orthogonal template's scale-dependent bias ~ (k / k_S) / M(k) with the tracer's
/// k_S (0.1-0.4 Mpc^-1) makes its P-only constraint much weaker than the local one for a
/// b1 = 2 tracer: published P-only forecasts put it one to two orders of magnitude above
/// sigma(f_NL^loc) (from memory; the ratio depends on k_S and k_max; loose check
/// 5-100).
#[test]
fn orthogonal_over_local_power_spectrum_ratio() {
    let s = setup();
    let shapes = [
        ShapeInput::new(Shape::Local, s.prim),
        ShapeInput::new(Shape::Orthogonal, s.prim),
    ];
    let mut sv = Survey::quick(10.0, 1.0, 1e-3, 2.0, true, 0.6736).unwrap();
    sv.covariance = CovarianceModel::Gaussian;
    let fc = survey_fisher(
        &sv,
        &s.power,
        &s.bg,
        &shapes,
        &[0.1 * s.h],
        &SurveySettings::default(),
    );
    let ratio = fc.total[0][0].sigma_conditional(1) / fc.total[0][0].sigma_conditional(0);
    let ks = fc.bins[0].responses[0].k_s_mpc[1];
    println!("P only, b1 = 2, z = 1: sigma(orth)/sigma(local) = {ratio:.1}, k_S = {ks:.3} Mpc^-1");
    assert!(ratio > 5.0 && ratio < 100.0, "{ratio}");
}

/// What each new bispectrum term and fix does to sigma on the two demo surveys (Gaussian
/// covariance, k_max 0.2 h/Mpc, single-shape sigma): prints a table. Run with
/// `cargo test --release --lib term_effects -- --ignored --nocapture` (about a minute).
#[test]
#[ignore]
fn term_effects_on_demo_surveys() {
    use crate::input::{Source, parse_toml};
    use crate::survey::SurveyFile;
    use crate::survey::kernels::TermSwitches;
    let s = setup();
    let growth = crate::cosmology::Growth::new(&Cosmology::planck2018());
    let shapes = all_shapes(s.prim);
    for (name, text) in [
        (
            "wide",
            include_str!("../../../surveys/survey_wide_spectro.toml"),
        ),
        (
            "deep",
            include_str!("../../../surveys/survey_deep_photo.toml"),
        ),
    ] {
        let src = Source::from_text(name, text);
        let file: SurveyFile = parse_toml(&src).unwrap();
        let mut sv = file.survey.resolve(&src, &s.bg, &growth).unwrap();
        sv.covariance = CovarianceModel::Gaussian;
        let all = TermSwitches::default();
        let variants = [
            ("all terms", all),
            (
                "no RSD-velocity Delta b",
                TermSwitches {
                    rsd_velocity_bias: false,
                    ..all
                },
            ),
            (
                "no b_phi-delta",
                TermSwitches {
                    bias_phi_delta: false,
                    ..all
                },
            ),
            (
                "no shift",
                TermSwitches {
                    shift: false,
                    ..all
                },
            ),
            (
                "old shot damping",
                TermSwitches {
                    shot_damping: false,
                    ..all
                },
            ),
        ];
        for (label, terms) in variants {
            let st = SurveySettings {
                terms,
                ..SurveySettings::default()
            };
            let fc = survey_fisher(&sv, &s.power, &s.bg, &shapes, &[0.2 * s.h], &st);
            let row: Vec<String> = (1..3)
                .flat_map(|p| (0..3).map(move |i| (p, i)).collect::<Vec<_>>())
                .map(|(p, i)| format!("{:.4}", fc.total[0][p].sigma_conditional(i)))
                .collect();
            println!(
                "{name} {label}: B (loc, eq, orth), P+B (loc, eq, orth) = {}",
                row.join(" ")
            );
        }
    }
}
