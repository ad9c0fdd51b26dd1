//! The CMB bispectrum engine against published results and facts of the trade, and its
//! fast paths (block compression, low/high-l split) against the exact sum.

mod common;

use std::collections::HashMap;

use common::{run_json, test_cache_dir};
use ngreach::cmb::bispectrum::{
    BispectrumPlan, CmbFisherInput, EngineOptions, FieldSet, cmb_fisher_with_options,
};
use ngreach::cmb::boltzmann::CacheOptions;
use ngreach::cmb::experiment::Experiment;
use ngreach::cmb::thermal::ThermalHistory;
use ngreach::cosmology::{Background, Cosmology, Primordial};
use ngreach::shapes::Shape;

/// (lmax, fields, shape) -> (sigma_marginal, log_slope) from the `cmb` JSON rows.
fn rows(v: &serde_json::Value) -> HashMap<(u64, String, String), (f64, f64)> {
    v["rows"]
        .as_array()
        .expect("rows")
        .iter()
        .map(|r| {
            (
                (
                    r["lmax"].as_u64().expect("lmax"),
                    r["fields"].as_str().expect("fields").to_string(),
                    r["shape"].as_str().expect("shape").to_string(),
                ),
                (
                    r["sigma_marginal"].as_f64().unwrap_or(f64::INFINITY),
                    r["log_slope"].as_f64().unwrap_or(f64::NAN),
                ),
            )
        })
        .collect()
}

fn get(m: &HashMap<(u64, String, String), (f64, f64)>, l: u64, f: &str, s: &str) -> (f64, f64) {
    *m.get(&(l, f.to_string(), s.to_string()))
        .unwrap_or_else(|| panic!("row {l} {f} {s} missing"))
}

/// Published check: Planck 2018 IX (Akrami et al. 2020, A&A 641, A9), abstract, T+E:
/// sigma(f_NL) = 5.1 local, 47 equilateral, 24 orthogonal; and its Table 18 (simulations):
/// local T 5.8, E 26. Ours: the full transfer with the lensed covariance (the default)
/// and the Planck-like noise of tests/data/cmb_planck2018_like.toml (T to 2500, E to
/// 2000), marginalized over the three shapes; within 20%. (Measured: T+E 5.30 / 47.7 /
/// 24.9, T 6.22, E 26.9; with the unlensed covariance it was 5.28 / 47.8 / 24.9, T 6.19,
/// E 27.0.) E rows stop at the fixture's E l_max, 2000.
#[test]
fn planck_2018_like_errors_with_the_full_transfer() {
    let v = run_json(&[
        "cmb",
        "--experiment",
        "tests/data/cmb_planck2018_like.toml",
        "--transfer",
        "full",
        "--lmax",
        "2000,2500",
        "--fields",
        "T,E,T+E",
        "--shapes",
        "local,equilateral,orthogonal",
        "--format",
        "json",
    ]);
    let m = rows(&v);
    let checks = [
        ("T+E", "local", 5.1),
        ("T+E", "equilateral", 47.0),
        ("T+E", "orthogonal", 24.0),
        ("T", "local", 5.8),
        ("E", "local", 26.0),
    ];
    assert!(
        !m.contains_key(&(2500, "E".to_string(), "local".to_string())),
        "an E row above the experiment's E l_max"
    );
    for (f, s, published) in checks {
        let l = if f == "E" { 2000 } else { 2500 };
        let (sigma, _) = get(&m, l, f, s);
        println!("{f} {s}: sigma = {sigma:.2} (published {published})");
        assert!(
            (sigma / published - 1.0).abs() < 0.2,
            "{f} {s}: {sigma} vs published {published}"
        );
    }
}

/// Facts of the trade (common practice; shared/conventions.md): on a 2D surface the local
/// (S/N)^2 grows as l_max^2 up to a logarithm, damping and projection lower the
/// equilateral scaling much more than the local one. Shell model, ideal experiment, T.
/// (Measured, damped: local 2.11 / 2.09 at l_max 2000 / 2500, equilateral 1.66 / 1.51;
/// undamped equilateral 1.73 / 1.58. In a cosmic-variance-limited Fisher sum a damping
/// factor common to signal and noise largely cancels, so the shell's equilateral loss
/// comes mostly from the projection of its thickness.)
#[test]
fn shell_log_slopes_local_near_two_equilateral_lower() {
    let run = |damping: bool| {
        let mut args = vec![
            "cmb",
            "--ideal",
            "--transfer",
            "shell",
            "--lmax",
            "300,1000,2000,2500",
            "--fields",
            "T",
            "--shapes",
            "local,equilateral",
            "--format",
            "json",
        ];
        if !damping {
            args.push("--no-damping");
        }
        rows(&run_json(&args))
    };
    let (damped, undamped) = (run(true), run(false));
    for l in [1000, 2000, 2500] {
        let (_, local) = get(&damped, l, "T", "local");
        let (_, eq) = get(&damped, l, "T", "equilateral");
        let (_, eq_undamped) = get(&undamped, l, "T", "equilateral");
        println!(
            "l_max {l}: slopes local {local:.3}, equilateral {eq:.3} (undamped {eq_undamped:.3})"
        );
        assert!((1.9..2.3).contains(&local), "local slope {local} at {l}");
        assert!(
            eq < eq_undamped,
            "damping must lower the equilateral slope at {l}"
        );
        if l >= 2000 {
            assert!(eq < local - 0.4, "equilateral {eq} vs local {local} at {l}");
        }
    }
}

/// Fact of the trade (common practice; shared/conventions.md): adding E restores part of
/// the equilateral scaling that the projected, damped temperature loses. With the full
/// transfer (ideal experiment) the T equilateral slope falls to ~1 above l = 500, T+E
/// keeps ~1.3-1.6 (measured). The shell model's tight-coupling E does not show this (its
/// T+E and T equilateral slopes agree within 0.05), so the check uses the full transfer.
#[test]
fn adding_e_raises_the_equilateral_slope() {
    let m = rows(&run_json(&[
        "cmb",
        "--ideal",
        "--transfer",
        "full",
        "--spectra",
        "unlensed",
        "--lmax",
        "300,500,1000,1500,2000",
        "--fields",
        "T,T+E",
        "--shapes",
        "local,equilateral",
        "--format",
        "json",
    ]));
    for l in [1000, 1500, 2000] {
        let (_, t) = get(&m, l, "T", "equilateral");
        let (_, te) = get(&m, l, "T+E", "equilateral");
        let (_, loc) = get(&m, l, "T", "local");
        println!("l_max {l}: equilateral slope T {t:.3}, T+E {te:.3}; local T {loc:.3}");
        assert!(te > t + 0.2, "T+E {te} vs T {t} at {l}");
        assert!(t < loc - 0.5, "equilateral T {t} vs local T {loc} at {l}");
    }
}

/// The engine's fast paths on the full transfer to l_max = 1000: the low/high-l split is
/// exact (equal to rounding with the same blocks), and the default compression moves
/// sigma(f_NL) by < 1e-5 relative against a 100 times tighter compression for
/// l_max >= 300. (The exact form, tolerance 0, equals the brute-force triple sum in the
/// module's tests; at this l_max it would take minutes.) The same check to l_max = 1500
/// is an extended check (`split_and_compression_to_1500`, ignored by default).
#[test]
fn split_is_exact_and_compression_is_within_tolerance() {
    split_and_compression(1000, &[100, 300, 600, 1000]);
}

/// Extended check (`cargo test --release --test cmb_engine -- --ignored`): as
/// [`split_is_exact_and_compression_is_within_tolerance`] to l_max = 1500.
#[test]
#[ignore = "extended check: run with --ignored"]
fn split_and_compression_to_1500() {
    split_and_compression(1500, &[100, 300, 600, 1000, 1500]);
}

fn split_and_compression(lmax: usize, grid: &[usize]) {
    let c = Cosmology::planck2018();
    let bg = Background::new(&c);
    let th = ThermalHistory::new(&c, &bg).expect("thermal");
    let (table, radial, _) = ngreach::cmb::full_transfer_for(
        &c,
        &th,
        &bg,
        lmax,
        &CacheOptions::in_dir(test_cache_dir()),
    )
    .expect("full transfer");
    let shapes = [Shape::Local, Shape::Equilateral, Shape::Orthogonal];
    let exp = Experiment::ideal(lmax);
    let fsets = [FieldSet::T, FieldSet::TE];
    let plan = BispectrumPlan::new(&CmbFisherInput {
        transfer: &table,
        primordial: Primordial::new(&c),
        shapes: &shapes,
        experiment: &exp,
        t_cmb_k: c.params().t_cmb_k,
        lmax_grid: grid,
        field_sets: &fsets,
        radial: &radial,
        parallel: true,
        signal_cl: None,
    });
    let run = |tol: f64, split: bool| {
        cmb_fisher_with_options(
            &plan,
            grid,
            true,
            &EngineOptions {
                tol,
                split,
                ..EngineOptions::default()
            },
        )
    };
    let tol = EngineOptions::default().tol;
    let exact = run(tol, false);
    let split = run(tol, true);
    let tight = run(tol / 100.0, true);
    let fast = &split;
    assert!(
        split.stats.split_lmax.is_some(),
        "the split must be exercised here: {:?}",
        split.stats
    );
    println!("split: {:?}", split.stats);
    println!("default: {:?}", fast.stats);
    let n = shapes.len();
    let mut worst_split: f64 = 0.0;
    let mut worst_fast: f64 = 0.0;
    let mut worst_low: f64 = 0.0;
    for fs in 0..fsets.len() {
        for (m, &lm) in grid.iter().enumerate() {
            let (a, b, f) = (
                &exact.fisher[fs][m],
                &split.fisher[fs][m],
                &fast.fisher[fs][m],
            );
            for i in 0..n {
                for j in 0..n {
                    let scale = (a.get(i, i) * a.get(j, j)).sqrt();
                    worst_split = worst_split.max((a.get(i, j) - b.get(i, j)).abs() / scale);
                }
            }
            let (sa, sf) = (
                tight.fisher[fs][m].sigma_marginal_or_inf(),
                f.sigma_marginal_or_inf(),
            );
            for i in 0..n {
                let d = (sf[i] / sa[i] - 1.0).abs();
                if lm >= 300 {
                    worst_fast = worst_fast.max(d);
                } else {
                    worst_low = worst_low.max(d);
                }
            }
        }
    }
    println!(
        "split vs no split: {worst_split:.2e}; default vs tol/100 sigma: {worst_fast:.2e} \
         (l_max >= 300), {worst_low:.2e} (l_max = 100)"
    );
    // The mu integrand peaks at mu = +-1 by ~l_max^4 over its mean, so rules of different
    // sizes agree to rounding times that: measured 5e-9, at l_max = 300 (output by pass 1
    // with its small rule); with the full rule in pass 1 as well the two agree to 3e-12,
    // so the difference is the rule size, not the split.
    assert!(worst_split < 1e-7, "{worst_split}");
    // Measured 8e-6; at l_max = 100, 1.3e-4 (the three shapes are nearly degenerate there
    // and marginalizing amplifies the compression error).
    assert!(worst_fast < 1e-5, "{worst_fast}");
    assert!(worst_low < 5e-4, "{worst_low}");
}

/// The covariance options: removing all of the lensing potential (`--delensing 1`) gives
/// back the unlensed covariance exactly (the lensing remap is then the identity), partial
/// delensing lies between, and the lensed covariance changes sigma. Bad values are input
/// errors (exit code 2) naming the flag.
#[test]
fn covariance_spectra_and_delensing() {
    let dir = std::env::temp_dir().join(format!("ngreach-cov-{}", std::process::id()));
    let cache = dir.to_string_lossy().into_owned();
    let sigma = |extra: &[&str]| {
        let mut args = vec![
            "cmb",
            "--ideal",
            "--lmax",
            "400",
            "--fields",
            "T",
            "--shapes",
            "local",
            "--cache-dir",
            &cache,
            "--format",
            "json",
        ];
        args.extend_from_slice(extra);
        let v = run_json(&args);
        assert!(v["inputs"]["cmb_spectra"].is_string());
        get(&rows(&v), 400, "T", "local").0
    };
    let unlensed = sigma(&["--spectra", "unlensed"]);
    let lensed = sigma(&[]);
    let half = sigma(&["--delensing", "0.5"]);
    let full = sigma(&["--delensing", "1"]);
    println!(
        "sigma local T, l_max 400: unlensed {unlensed}, lensed {lensed}, half {half}, full {full}"
    );
    assert!((full / unlensed - 1.0).abs() < 1e-9, "{full} vs {unlensed}");
    assert!((lensed / unlensed - 1.0).abs() > 1e-4);
    assert!((half - unlensed) * (lensed - unlensed) > 0.0);
    assert!((half - unlensed).abs() < (lensed - unlensed).abs());
    let _ = std::fs::remove_dir_all(&dir);
    for bad in [
        vec!["cmb", "--ideal", "--lmax", "300", "--delensing", "1.5"],
        vec![
            "cmb",
            "--ideal",
            "--lmax",
            "300",
            "--spectra",
            "unlensed",
            "--delensing",
            "0.5",
        ],
        vec![
            "cmb",
            "--ideal",
            "--lmax",
            "300",
            "--transfer",
            "shell",
            "--spectra",
            "lensed",
        ],
    ] {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_ngreach"))
            .args(&bad)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{bad:?}: {err}");
        assert!(
            err.contains("--delensing") || err.contains("--spectra"),
            "{err}"
        );
    }
}
