//! Unit tests of the shell model and its quadratures.

use super::*;
use crate::cmb::bispectrum::{BispectrumPlan, CmbFisherInput, FieldSet};
use crate::cmb::experiment::Experiment;
use crate::cmb::transfer::RadialGrid;
use crate::cosmology::{Background, Cosmology};
use crate::numerics::GaussLegendre;
use crate::shapes::Shape;
use crate::special::sph_bessel;
use std::f64::consts::{FRAC_PI_2, PI};
use std::sync::OnceLock;

const A_S: f64 = 2.1e-9;

fn thermal() -> &'static ThermalHistory {
    static TH: OnceLock<ThermalHistory> = OnceLock::new();
    TH.get_or_init(|| {
        let c = Cosmology::planck2018();
        ThermalHistory::new(&c, &Background::new(&c)).unwrap()
    })
}

fn default_model() -> ShellModel {
    ShellModel::from_thermal(thermal(), &ShellOverrides::default()).unwrap()
}

/// The default shell with another width and damping.
fn model(sigma: f64, kd: Option<f64>) -> ShellModel {
    ShellModel::new(ShellParams {
        sigma_chi_mpc: sigma,
        k_damping_mpc: kd,
        ..*default_model().params()
    })
    .unwrap()
}

fn scale_invariant() -> Primordial {
    Primordial::from_values(A_S, 1.0, 0.05)
}

/// l(l+1) C_l / 2pi in units of the Sachs-Wolfe plateau A_s / 25.
fn plateau_units(c: &[f64], l: usize) -> f64 {
    let lf = l as f64;
    lf * (lf + 1.0) * c[l] / (2.0 * PI) / (A_S / 25.0)
}

/// The default shell (Planck 2018, thermal width and damping) to l = 1500, default grid.
fn default_spectra() -> &'static ShellSpectra {
    static S: OnceLock<ShellSpectra> = OnceLock::new();
    S.get_or_init(|| {
        default_model()
            .spectra(
                1500,
                &KGridSpec::default(),
                &Primordial::new(&Cosmology::planck2018()),
            )
            .unwrap()
    })
}

fn max_rel(a: &[f64], b: &[f64], scale: &[f64]) -> f64 {
    (2..a.len())
        .map(|l| ((a[l] - b[l]) / scale[l]).abs())
        .fold(0.0, f64::max)
}

#[test]
fn thermal_defaults() {
    let s = thermal().summary();
    let m = default_model();
    let p = m.params();
    assert_eq!(p.chi_star_mpc, s.chi_visibility_peak_mpc);
    assert!((p.sigma_chi_mpc * FWHM_PER_SIGMA - s.visibility_fwhm_mpc).abs() < 1e-12);
    assert_eq!(p.k_damping_mpc, Some(s.k_damping_mpc));
    assert_eq!(p.sound_horizon_mpc, s.r_star_mpc);
    // c_s = 1/sqrt(3 (1 + R)), R = 3 rho_b / (4 rho_gamma) ~ 0.6 at z_*: c_s ~ 0.45.
    assert!(
        p.sound_speed > 0.44 && p.sound_speed < 0.47,
        "{}",
        p.sound_speed
    );
    // The opacity at the visibility peak: g = tau' e^-tau peaks near tau ~ 1, and
    // g_max ~ 1/(sqrt(2 pi) sigma) for a near-Gaussian visibility.
    let g_peak = 1.0 / ((2.0 * PI).sqrt() * p.sigma_chi_mpc);
    assert!(p.tau_dot_star_mpc > g_peak && p.tau_dot_star_mpc < 5.0 * g_peak);
    let off = ShellModel::from_thermal(
        thermal(),
        &ShellOverrides {
            sigma_chi_mpc: Some(0.0),
            damping: Damping::Off,
        },
    )
    .unwrap();
    assert_eq!(off.sigma_chi_mpc(), 0.0);
    assert_eq!(off.k_damping_mpc(), None);
    assert_eq!(off.damping_factor(1.0), 1.0);
}

/// (a) Zero thickness, no damping, n_s = 1: l(l+1) C_l / 2pi = A_s/25 (Sachs & Wolfe
/// 1967; Integral_0^inf dx/x j_l^2 = 1/(2l(l+1)), Weber-Schafheitlin, A&S 11.4.33 from
/// memory). With k_max =
/// 30 (l_max + 1/2)/chi_* the truncated fraction is 5.6e-4 at l = 1000; the
/// deficit must equal the envelope estimate 1 - sqrt(1 - nu^2/(k_max chi_*)^2)
/// (the k-range convergence).
#[test]
fn sachs_wolfe_plateau() {
    let m = model(0.0, None);
    let spec = KGridSpec {
        undamped_factor: 30.0,
        undamped_floor_mpc: 1e-6,
        ..Default::default()
    };
    let g = m.k_grid(1000, &spec).unwrap();
    assert_eq!(g.cutoff, KCutoff::Multipole);
    let s = m.spectra_on(1000, &g, &scale_invariant()).unwrap();
    let x_max = g.k_max * m.chi_star_mpc();
    for l in [2, 3, 5, 10, 30, 100, 300, 600, 1000] {
        let dev = plateau_units(&s.tt, l) - 1.0;
        let nu = l as f64 + 0.5;
        let tail = 1.0 - (1.0 - (nu / x_max).powi(2)).sqrt();
        eprintln!(
            "SW plateau l = {l}: D_l / (A_s/25) - 1 = {dev:.3e}, truncation estimate {tail:.3e}"
        );
        assert!(dev.abs() < 1e-3, "l = {l}: {dev}");
        // Measured: |dev + tail| <= 1.6e-6 (2e-8 for l >= 30).
        assert!((dev + tail).abs() < 1e-5, "l = {l}: {dev} vs {tail}");
    }
}

/// (b) Damping: the power falls as exp(-2 (k/k_D)^2). Averaged over the j_l envelope
/// 1/(x sqrt(x^2 - nu^2)) above the turning point (x = nu sec theta), the plateau
/// becomes R(l) = Integral_0^(pi/2) cos(theta) exp(-2 (nu / (k_D chi_*))^2 sec^2(theta)),
/// which is below the naive exp(-2 nu^2 / (k_D chi_*)^2) because the power at l comes
/// from k >= nu/chi_*. Measured |D/R - 1| <= 5e-6 for 10 <= l <= 3000.
#[test]
fn damping_tail() {
    let kd = thermal().summary().k_damping_mpc;
    let m = model(0.0, Some(kd));
    let g = m.k_grid(3000, &KGridSpec::default()).unwrap();
    assert_eq!(g.cutoff, KCutoff::Damping);
    assert!((g.k_max - 5.0 * kd).abs() < 1e-12);
    let s = m.spectra_on(3000, &g, &scale_invariant()).unwrap();
    let xd = kd * m.chi_star_mpc();
    let gl = GaussLegendre::new(400);
    let mut last_ratio = f64::INFINITY;
    for l in [10, 100, 300, 500, 1000, 1500, 2000, 2500, 3000] {
        let nu = l as f64 + 0.5;
        let a = 2.0 * (nu / xd).powi(2);
        let r = gl.integrate(0.0, FRAC_PI_2, |t| {
            t.cos() * (-a / (t.cos() * t.cos())).exp()
        });
        let naive = (-2.0 * (l as f64 / xd).powi(2)).exp();
        let d = plateau_units(&s.tt, l);
        eprintln!("damping l = {l}: D = {d:.4e}, envelope estimate {r:.4e}, naive {naive:.4e}");
        assert!((d / r - 1.0).abs() < 2e-5, "l = {l}: {d} vs {r}");
        assert!(d < naive && d / naive < last_ratio && d / naive > 0.3);
        last_ratio = d / naive;
    }
    // Beyond l ~ k_D chi_* ~ 1970 the spectrum collapses.
    assert!(plateau_units(&s.tt, 3000) < 0.01 * plateau_units(&s.tt, 1000));
}

/// (c) A thicker shell suppresses high-l power, monotonically in the width at every l
/// and increasingly with l (three widths, thermal damping).
#[test]
fn thickness_suppresses_high_l() {
    let kd = Some(thermal().summary().k_damping_mpc);
    let prim = scale_invariant();
    let lmax = 1200;
    let s: Vec<ShellSpectra> = [15.0, 30.0, 60.0]
        .iter()
        .map(|&w| {
            model(w, kd)
                .spectra(lmax, &KGridSpec::default(), &prim)
                .unwrap()
        })
        .collect();
    for l in 2..=lmax {
        assert!(s[1].tt[l] <= s[0].tt[l] * (1.0 + 1e-9), "l = {l}");
        assert!(s[2].tt[l] <= s[1].tt[l] * (1.0 + 1e-9), "l = {l}");
    }
    let mut prev = [1.0, 1.0];
    for l in (100..=lmax).step_by(100) {
        let r = [s[1].tt[l] / s[0].tt[l], s[2].tt[l] / s[1].tt[l]];
        assert!(
            r[0] < prev[0] && r[1] < prev[1],
            "l = {l}: {r:?} after {prev:?}"
        );
        prev = r;
    }
    // Measured at l = 1200: C(30)/C(15) = 0.73, C(60)/C(30) = 0.59.
    assert!(prev[0] < 0.85 && prev[1] < 0.75, "{prev:?}");
}

/// (d) Convergence in k spacing and k range. Measured (default shell, l <= 1000):
/// 5 -> 8 nodes per panel changes C_l by <= 1.4e-6; 5 k_D -> 7 k_D and 6/sigma -> 9/sigma
/// by <= 1e-8. Zero thickness without damping: 5 -> 8 nodes by <= 2e-6.
#[test]
fn k_grid_convergence() {
    let m = default_model();
    let prim = Primordial::new(&Cosmology::planck2018());
    let lmax = 1000;
    let a = m.spectra(lmax, &KGridSpec::default(), &prim).unwrap();
    let finer = m
        .spectra(
            lmax,
            &KGridSpec {
                nodes_per_panel: 8,
                ..Default::default()
            },
            &prim,
        )
        .unwrap();
    let wider = m
        .spectra(
            lmax,
            &KGridSpec {
                damping_cut: 7.0,
                thickness_cut: 9.0,
                ..Default::default()
            },
            &prim,
        )
        .unwrap();
    let (dt, de) = (
        max_rel(&a.tt, &finer.tt, &a.tt),
        max_rel(&a.ee, &finer.ee, &a.ee),
    );
    let (rt, re) = (
        max_rel(&a.tt, &wider.tt, &a.tt),
        max_rel(&a.ee, &wider.ee, &a.ee),
    );
    eprintln!("k spacing: TT {dt:.2e} EE {de:.2e}; k range: TT {rt:.2e} EE {re:.2e}");
    assert!(dt < 1e-5 && de < 1e-5);
    assert!(rt < 1e-7 && re < 1e-7);
    let z = model(0.0, None);
    let spec = KGridSpec {
        undamped_factor: 4.0,
        ..Default::default()
    };
    let za = z.spectra(800, &spec, &prim).unwrap();
    let zb = z
        .spectra(
            800,
            &KGridSpec {
                nodes_per_panel: 8,
                ..spec
            },
            &prim,
        )
        .unwrap();
    let dz = max_rel(&za.tt, &zb.tt, &za.tt);
    eprintln!("k spacing, zero thickness: TT {dz:.2e}");
    assert!(dz < 1e-5);
}

/// The chi quadrature: the node rule n(k) against three times as many nodes.
#[test]
fn chi_quadrature_converged() {
    let lmax = 3000;
    let n = lmax + 1;
    let spin2 = ShellModel::spin2_factors(lmax);
    let mut j = vec![0.0; n];
    let mut rows = vec![vec![0.0; n]; 4];
    for sigma in [16.0, 100.0, 500.0] {
        let m = model(sigma, None);
        let p1 = ChiPlan::new(sigma, 0.8);
        let p3 = ChiPlan::with_scale(sigma, 0.8, 3.0);
        for k in [1e-3, 0.01, 0.05, 0.2, 0.3, 0.6, 0.8] {
            let (a, b) = rows.split_at_mut(2);
            let (t1, e1) = a.split_at_mut(1);
            let (t3, e3) = b.split_at_mut(1);
            m.fill_row(k, &p1, &spin2, &mut j, &mut t1[0], &mut e1[0]);
            m.fill_row(k, &p3, &spin2, &mut j, &mut t3[0], &mut e3[0]);
            let x = k * m.chi_star_mpc();
            let (mut et, mut ee) = (0.0f64, 0.0f64);
            for l in 2..n {
                et = et.max((t1[0][l] - t3[0][l]).abs() * x / SACHS_WOLFE.abs());
                let env = m.e_source(k).abs() * spin2[l] / (x * x * x);
                ee = ee.max((e1[0][l] - e3[0][l]).abs() / env);
            }
            // Measured <= 3e-13 of the envelopes 1/x and spin2/x^3.
            assert!(
                et < 1e-11 && ee < 1e-11,
                "sigma {sigma} k {k}: {et:e} {ee:e}"
            );
        }
    }
}

#[test]
fn thin_shell_tends_to_zero_thickness() {
    let k_d = thermal().summary().k_damping_mpc;
    let kd = Some(k_d);
    let prim = scale_invariant();
    let a = model(0.0, kd)
        .spectra(400, &KGridSpec::default(), &prim)
        .unwrap();
    let b = model(1e-3, kd)
        .spectra(
            400,
            &KGridSpec {
                k_max_mpc: Some(5.0 * k_d),
                ..Default::default()
            },
            &prim,
        )
        .unwrap();
    assert!(max_rel(&a.tt, &b.tt, &a.tt) < 1e-6);
    assert!(max_rel(&a.ee, &b.ee, &a.ee) < 1e-6);
}

#[test]
fn table_matches_streamed_spectra() {
    let m = default_model();
    let prim = Primordial::new(&Cosmology::planck2018());
    let spec = KGridSpec::default();
    let t = m.transfer_table(200, &spec).unwrap();
    assert_eq!(t.label(), "shell");
    assert_eq!(t.fields(), &[Field::T, Field::E]);
    assert_eq!(t.k().len(), m.k_grid(200, &spec).unwrap().len());
    let s = m.spectra(200, &spec, &prim).unwrap();
    let (it, ie) = (
        t.field_index(Field::T).unwrap(),
        t.field_index(Field::E).unwrap(),
    );
    let scale: Vec<f64> =
        s.tt.iter()
            .zip(&s.ee)
            .map(|(a, b)| (a * b).sqrt())
            .collect();
    assert!(max_rel(&t.cl(&prim, it, it), &s.tt, &s.tt) < 1e-12);
    assert!(max_rel(&t.cl(&prim, ie, ie), &s.ee, &s.ee) < 1e-12);
    assert!(max_rel(&t.cl(&prim, it, ie), &s.te, &scale) < 1e-12);
    for ik in [0, t.k().len() / 2] {
        for f in [it, ie] {
            assert_eq!(t.get(f, 0, ik), 0.0);
            assert_eq!(t.get(f, 1, ik), 0.0);
        }
    }
    // Weights integrate dk exactly over [0, k_max].
    let sum: f64 = t.weights().iter().sum();
    assert!((sum / m.k_grid(200, &spec).unwrap().k_max - 1.0).abs() < 1e-13);
}

/// E sanity (order of magnitude): D^EE peaks near l ~ 1000 at a few percent of the T
/// plateau; C^TE obeys |C^TE| <= sqrt(C^TT C^EE) and changes sign with sin(k r_s).
#[test]
fn e_mode_sanity() {
    let s = default_spectra();
    let d = |c: &[f64], l: usize| (l * (l + 1)) as f64 * c[l];
    let (peak_l, peak) = (2..=1500)
        .map(|l| (l, d(&s.ee, l)))
        .fold((0, 0.0), |a, b| if b.1 > a.1 { b } else { a });
    let ratio = peak / d(&s.tt, 10);
    eprintln!("D^EE peak at l = {peak_l}, {ratio:.4} of D^TT(10)");
    assert!((700..=1400).contains(&peak_l), "{peak_l}");
    assert!(ratio > 0.01 && ratio < 0.2, "{ratio}");
    let mut signs = [false; 2];
    for l in 2..=1500 {
        assert!(s.te[l].abs() <= (s.tt[l] * s.ee[l]).sqrt() * (1.0 + 1e-12));
        signs[usize::from(s.te[l] > 0.0)] = true;
    }
    assert!(signs[0] && signs[1]);
    // E is tiny on large scales (k / tau' -> 0).
    assert!(d(&s.ee, 10) < 1e-5 * d(&s.tt, 10));
}

#[test]
fn l_top_bounds_the_bessel_rows() {
    for x in [0.05, 0.5, 3.0, 30.0, 300.0, 3000.0, 12_000.0] {
        let l = l_top(x);
        let v = sph_bessel(l as u32, x).abs();
        assert!(v * x.max(1.0) < 1e-24, "x = {x}, l = {l}: {v:e}");
    }
}

#[test]
fn invalid_inputs_are_rejected() {
    let p = *default_model().params();
    for bad in [
        ShellParams {
            sigma_chi_mpc: -1.0,
            ..p
        },
        ShellParams {
            sigma_chi_mpc: p.chi_star_mpc / 5.0,
            ..p
        },
        ShellParams {
            chi_star_mpc: 0.0,
            ..p
        },
        ShellParams {
            k_damping_mpc: Some(0.0),
            ..p
        },
        ShellParams {
            tau_dot_star_mpc: -1.0,
            ..p
        },
        ShellParams {
            sound_speed: 1.5,
            ..p
        },
        ShellParams {
            sigma_chi_mpc: f64::NAN,
            ..p
        },
    ] {
        assert!(
            matches!(ShellModel::new(bad), Err(Error::OutOfRange { .. })),
            "{bad:?}"
        );
    }
    let e = ShellModel::from_thermal(
        thermal(),
        &ShellOverrides {
            sigma_chi_mpc: Some(-2.0),
            damping: Damping::Thermal,
        },
    )
    .unwrap_err();
    assert!(e.to_string().contains("shell width"), "{e}");
    let m = default_model();
    let spec = KGridSpec::default();
    for l in [0, 1, MAX_LMAX + 1] {
        assert!(m.k_grid(l, &spec).is_err());
        assert!(m.transfer_table(l, &spec).is_err());
    }
    assert!(
        m.k_grid(
            10,
            &KGridSpec {
                nodes_per_panel: 1,
                ..spec
            }
        )
        .is_err()
    );
    assert!(
        m.k_grid(
            10,
            &KGridSpec {
                k_max_mpc: Some(-1.0),
                ..spec
            }
        )
        .is_err()
    );
    let g = m.k_grid(10, &spec).unwrap();
    let rs = RadialGridSpec::default();
    assert!(
        m.radial_grid(
            &g,
            &RadialGridSpec {
                outer_growth: 1.0,
                ..rs
            }
        )
        .is_err()
    );
    assert!(
        m.radial_grid(
            &g,
            &RadialGridSpec {
                nodes_per_panel: 0,
                ..rs
            }
        )
        .is_err()
    );
}

#[test]
fn radial_grid_layout() {
    let m = default_model();
    let g = m.k_grid(1000, &KGridSpec::default()).unwrap();
    let spec = RadialGridSpec::default();
    let rg = m.radial_grid(&g, &spec).unwrap();
    assert!(rg.r.windows(2).all(|w| w[1] > w[0]));
    assert!(rg.w.iter().all(|&w| w > 0.0));
    let chi = m.chi_star_mpc();
    let (lo, hi) = (
        chi * (1.0 - spec.outer_fraction),
        chi * (1.0 + spec.outer_fraction),
    );
    assert!(rg.r[0] > lo && rg.r[0] < lo + 0.01 * chi);
    assert!(*rg.r.last().unwrap() < hi && *rg.r.last().unwrap() > hi - 0.01 * chi);
    // Gauss-Legendre panels integrate r^2 exactly.
    let sum: f64 = rg.w.iter().sum();
    assert!((sum / ((hi.powi(3) - lo.powi(3)) / 3.0) - 1.0).abs() < 1e-12);
    // The core spacing resolves the kernel.
    let w = m.kernel_width_mpc(g.k_max);
    let core: Vec<f64> =
        rg.r.iter()
            .copied()
            .filter(|r| (r - chi).abs() < w)
            .collect();
    assert!(core.len() >= 6, "{}", core.len());
    // Truncated delta (zero thickness, no damping): core only, ending where
    // cos(k_max L) = 0. The weights integrate r^2 exactly, 2 chi^2 L + (2/3) L^3:
    // solve for L.
    let z = model(0.0, None);
    let gz = z.k_grid(1000, &KGridSpec::default()).unwrap();
    assert_eq!(gz.cutoff, KCutoff::Multipole);
    let rz = z.radial_grid(&gz, &spec).unwrap();
    let total: f64 = rz.w.iter().sum();
    let mut l = total / (2.0 * chi * chi);
    for _ in 0..20 {
        l -=
            (2.0 * chi * chi * l + 2.0 / 3.0 * l.powi(3) - total) / (2.0 * chi * chi + 2.0 * l * l);
    }
    let rs = z.params().sound_horizon_mpc;
    assert!(
        l * gz.k_max >= rs * gz.k_max + spec.truncated_phase - 1e-6,
        "{l}"
    );
    assert!(
        (l * gz.k_max).cos().abs() < 1e-6,
        "{}",
        (l * gz.k_max).cos()
    );
    assert!(rz.r[0] > chi - l && *rz.r.last().unwrap() < chi + l);
    assert!(rz.r.windows(2).all(|w| w[1] > w[0]));
}

fn bispectra(
    t: &TransferTable,
    rg: &RadialGrid,
    shapes: &[Shape],
    tri: &[[usize; 3]],
    fields: &[[usize; 3]],
) -> Vec<f64> {
    let lmax = t.lmax();
    let exp = Experiment::ideal(lmax);
    let inp = CmbFisherInput {
        transfer: t,
        primordial: scale_invariant(),
        shapes,
        experiment: &exp,
        t_cmb_k: 2.7255,
        lmax_grid: &[lmax],
        field_sets: &[FieldSet::T],
        radial: rg,
        parallel: true,
        signal_cl: None,
    };
    let plan = BispectrumPlan::new(&inp);
    let mut out = Vec::new();
    for s in 0..shapes.len() {
        for l in tri {
            for f in fields {
                out.push(plan.reduced_bispectrum(s, *l, *f));
            }
        }
    }
    out
}

/// Zero thickness without damping is the Sachs-Wolfe limit of the local bispectrum,
/// b_{l1 l2 l3} = -6 f_NL (C_l1 C_l2 + 2 perms) (Komatsu & Spergel 2001, with
/// Delta_l = S j_l(k chi_*), X^0 -> S delta(r - chi_*) / chi_*^2, X^1(chi_*) = C_l / S).
/// The recommended grid reproduces it through the truncated-delta kernel.
#[test]
fn radial_grid_sachs_wolfe_local_bispectrum() {
    let m = model(0.0, None);
    let lmax = 100;
    let spec = KGridSpec {
        undamped_floor_mpc: 0.1,
        ..Default::default()
    };
    let g = m.k_grid(lmax, &spec).unwrap();
    assert_eq!(g.cutoff, KCutoff::Multipole);
    let t = m.transfer_table_on(lmax, &g).unwrap();
    let cl = t.cl(&scale_invariant(), 0, 0);
    let tri = [
        [2, 2, 2],
        [10, 10, 10],
        [30, 60, 80],
        [5, 95, 98],
        [100, 100, 100],
    ];
    let sw: Vec<f64> = tri
        .iter()
        .map(|l| -6.0 * (cl[l[0]] * cl[l[1]] + cl[l[1]] * cl[l[2]] + cl[l[2]] * cl[l[0]]))
        .collect();
    // Measured worst |b / b_SW - 1|: 5.4e-4 (k_max L >= k_max r_s + 10 pi), 4.6e-4
    // (20 pi, the default), 4.6e-4 (40 pi): what is left is the finite width of the
    // kernel against the curvature of X^1 X^1 (the worst triangle is l = 100).
    for phase in [10.0, 20.0, 40.0] {
        let rs = RadialGridSpec {
            truncated_phase: phase * PI,
            ..Default::default()
        };
        let rg = m.radial_grid(&g, &rs).unwrap();
        let b = bispectra(&t, &rg, &[Shape::Local], &tri, &[[0, 0, 0]]);
        let worst = b
            .iter()
            .zip(&sw)
            .map(|(x, y)| (x / y - 1.0).abs())
            .fold(0.0, f64::max);
        eprintln!(
            "SW local bispectrum, k_max L >= {phase} pi (n_r = {}): worst {worst:.2e}",
            rg.len()
        );
        assert!(worst < 1e-3, "{phase}: {worst}");
    }
    // E legs (box-car kernels between chi_* -+ r_s): default against 80 pi.
    let fields = [[1, 1, 1], [0, 0, 1]];
    let long = RadialGridSpec {
        truncated_phase: 80.0 * PI,
        ..Default::default()
    };
    let a = bispectra(
        &t,
        &m.radial_grid(&g, &RadialGridSpec::default()).unwrap(),
        &[Shape::Local],
        &tri,
        &fields,
    );
    let b = bispectra(
        &t,
        &m.radial_grid(&g, &long).unwrap(),
        &[Shape::Local],
        &tri,
        &fields,
    );
    let worst = a
        .iter()
        .zip(&b)
        .map(|(x, y)| (x / y - 1.0).abs())
        .fold(0.0, f64::max);
    eprintln!("SW local bispectrum with E legs, 20 pi vs 80 pi: worst {worst:.2e}");
    assert!(worst < 1e-3, "{worst}");
}

/// The default radial grid against a much finer and wider one (local and
/// equilateral, TTT, EEE, TTE), on a damped shell.
#[test]
fn radial_grid_convergence() {
    let m = model(16.0, Some(0.05));
    let lmax = 200;
    let g = m
        .k_grid(
            lmax,
            &KGridSpec {
                k_max_mpc: Some(0.2),
                ..Default::default()
            },
        )
        .unwrap();
    let t = m.transfer_table_on(lmax, &g).unwrap();
    let d = RadialGridSpec::default();
    let fine = RadialGridSpec {
        core_widths: 10.0,
        core_panel: 1.5,
        nodes_per_panel: 8,
        outer_fraction: 0.6,
        outer_growth: 1.3,
        truncated_phase: 0.0,
    };
    let shapes = [Shape::Local, Shape::Equilateral];
    let tri = [
        [10, 10, 10],
        [30, 60, 80],
        [100, 100, 100],
        [5, 190, 195],
        [200, 200, 200],
    ];
    let fields = [[0, 0, 0], [1, 1, 1], [0, 0, 1]];
    let rd = m.radial_grid(&g, &d).unwrap();
    let rf = m.radial_grid(&g, &fine).unwrap();
    let a = bispectra(&t, &rd, &shapes, &tri, &fields);
    let b = bispectra(&t, &rf, &shapes, &tri, &fields);
    let n = tri.len() * fields.len();
    for (s, name) in shapes.iter().enumerate() {
        let worst = (s * n..(s + 1) * n)
            .map(|i| (a[i] / b[i] - 1.0).abs())
            .fold(0.0, f64::max);
        eprintln!(
            "radial grid {} vs {} nodes, {name:?}: worst {worst:.2e}",
            rd.len(),
            rf.len()
        );
        assert!(worst < 1e-4, "{name:?}: {worst}");
    }
}
