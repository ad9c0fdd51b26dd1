//! `src/special` against committed mpmath / sympy reference tables
//! (`tests/reference/gen_special.py`; library versions and working precisions are in each
//! table's header).

use ngreach::special::{
    BesselTable, Wigner000, gaunt_000, sph_bessel, sph_bessel_all_l, wigner3j_000,
    wigner3j_000_fill_l3_recursive, wigner3j_000_squared,
};
use std::collections::BTreeMap;
use std::f64::consts::PI;

const BESSEL_TSV: &str = include_str!("reference/special/sph_bessel_mpmath.tsv");
const WIGNER_TSV: &str = include_str!("reference/special/wigner000_mpmath.tsv");

struct BesselRow {
    l: u32,
    x: f64,
    value: f64,
    envelope: f64,
    region: String,
}

fn bessel_rows() -> Vec<BesselRow> {
    BESSEL_TSV
        .lines()
        .filter(|s| !s.starts_with('#') && !s.trim().is_empty())
        .map(|s| {
            let f: Vec<&str> = s.split('\t').collect();
            BesselRow {
                l: f[0].parse().unwrap(),
                x: f[1].parse().unwrap(),
                value: f[2].parse().unwrap(),
                envelope: f[3].parse().unwrap(),
                region: f[4].to_string(),
            }
        })
        .collect()
}

/// Worst errors of one kind, per region.
#[derive(Default)]
struct Worst {
    rel: f64,
    rel_at: (u32, f64),
    /// Worst relative error where |j| >= 1e-2 of the envelope.
    rel_far: f64,
    env: f64,
    n_rel: usize,
    n_env: usize,
    n_tiny: usize,
}

/// Checks the 1e-10 specification for one evaluation and records the error.
fn check(w: &mut Worst, row: &BesselRow, got: f64, what: &str) {
    let r = row.value;
    if r.abs() > 1e-30 && r.abs() >= 1e-4 * row.envelope {
        let e = (got - r).abs() / r.abs();
        if e > w.rel {
            w.rel = e;
            w.rel_at = (row.l, row.x);
        }
        w.env = w.env.max((got - r).abs() / row.envelope);
        if r.abs() >= 1e-2 * row.envelope {
            w.rel_far = w.rel_far.max(e);
        }
        w.n_rel += 1;
        assert!(
            e < 1e-10,
            "{what}: l={} x={} got {got:e} want {r:e} rel {e:.2e}",
            row.l,
            row.x
        );
    } else if r.abs() > 1e-30 {
        // Within 1e-4 of a zero: the error relative to the envelope sqrt(j^2 + y^2).
        let e = (got - r).abs() / row.envelope;
        w.env = w.env.max(e);
        w.n_env += 1;
        assert!(
            e < 1e-13,
            "{what}: l={} x={} got {got:e} want {r:e} envelope-rel {e:.2e}",
            row.l,
            row.x
        );
    } else {
        // |j| <= 1e-30: zero, or accurate where representable above 1e-300.
        w.n_tiny += 1;
        if got != 0.0 {
            if r.abs() >= 1e-300 {
                let e = (got - r).abs() / r.abs();
                if e > w.rel {
                    w.rel = e;
                    w.rel_at = (row.l, row.x);
                }
                assert!(
                    e < 1e-10,
                    "{what}: l={} x={} got {got:e} want {r:e}",
                    row.l,
                    row.x
                );
            } else {
                assert!(
                    got.abs() < 1e-290,
                    "{what}: l={} x={} got {got:e}",
                    row.l,
                    row.x
                );
            }
        }
    }
}

#[test]
fn sph_bessel_against_mpmath() {
    // Reference: mpmath 1.3.0 (besselj and the DLMF 10.49.1 finite sum), see table header.
    let rows = bessel_rows();
    assert!(rows.len() > 700, "table has {} rows", rows.len());
    let mut scalar: BTreeMap<String, Worst> = BTreeMap::new();
    let mut batch: BTreeMap<String, Worst> = BTreeMap::new();
    let mut buf = vec![0.0; 10_001];
    for row in &rows {
        let s = sph_bessel(row.l, row.x);
        check(
            scalar.entry(row.region.clone()).or_default(),
            row,
            s,
            "scalar",
        );
        sph_bessel_all_l(row.l, row.x, &mut buf);
        let b = buf[row.l as usize];
        check(
            batch.entry(row.region.clone()).or_default(),
            row,
            b,
            "batch",
        );
    }
    println!(
        "sph_bessel vs mpmath ({} rows); rel = relative error where |j| > 1e-30 and |j| >= 1e-4 envelope,",
        rows.len()
    );
    println!(
        "rel_far = same where |j| >= 1e-2 envelope, env = |error| / envelope over all |j| > 1e-30,"
    );
    println!(
        "n_zero = rows within 1e-4 envelope of a zero (env only), n_tiny = rows with |j| <= 1e-30"
    );
    println!(
        "{:<12} {:>5} {:>6} {:>6} | {:>9} {:>22} {:>9} {:>9} | batch {:>9} {:>22} {:>9} {:>9}",
        "region",
        "n_rel",
        "n_zero",
        "n_tiny",
        "rel",
        "at (l, x)",
        "rel_far",
        "env",
        "rel",
        "at (l, x)",
        "rel_far",
        "env"
    );
    let at = |w: &Worst| format!("({}, {:.6e})", w.rel_at.0, w.rel_at.1);
    for (k, w) in &scalar {
        let b = &batch[k];
        println!(
            "{:<12} {:>5} {:>6} {:>6} | {:>9.2e} {:>22} {:>9.2e} {:>9.2e} | batch {:>9.2e} {:>22} {:>9.2e} {:>9.2e}",
            k,
            w.n_rel,
            w.n_env,
            w.n_tiny,
            w.rel,
            at(w),
            w.rel_far,
            w.env,
            b.rel,
            at(b),
            b.rel_far,
            b.env
        );
    }
}

#[test]
fn kapteyn_bound_holds_for_reference_values() {
    // Kapteyn's inequality |J_nu(nu sech a)| <= exp(nu (tanh a - a)) (the basis of the 1e-300
    // cut-off), checked against the mpmath values below the turning point.
    let mut n = 0;
    for row in bessel_rows() {
        let nu = row.l as f64 + 0.5;
        if row.x >= nu || row.value <= 0.0 {
            continue;
        }
        let r = row.x / nu;
        let eta = nu * ((1.0 - r) * (1.0 + r)).sqrt() - nu * (nu / row.x).acosh();
        let bound = 0.5 * (PI / (2.0 * row.x)).ln() + eta;
        assert!(
            row.value.ln() <= bound + 1e-12,
            "l={} x={}: ln j = {} > bound {bound}",
            row.l,
            row.x,
            row.value.ln()
        );
        n += 1;
    }
    assert!(n > 100);
}

#[test]
fn bessel_table_against_mpmath() {
    // Interpolated values at the reference points of moderate l, tables with h = 0.05.
    let rows = bessel_rows();
    let mut worst: f64 = 0.0;
    let mut n = 0;
    for row in rows.iter().filter(|r| {
        r.l >= 100 && r.value.abs() > 1e-30 && r.value.abs() >= 1e-4 * r.envelope && r.x < 3e4
    }) {
        let lo = (row.x - 3.0).max(0.0);
        let t = BesselTable::new(row.l, lo, lo + 6.0, 121).unwrap();
        let e = (t.eval(row.x) - row.value).abs() / row.envelope.max(row.value.abs());
        worst = worst.max(e);
        n += 1;
        assert!(
            e < 1e-10,
            "l={} x={}: table {} want {}",
            row.l,
            row.x,
            t.eval(row.x),
            row.value
        );
    }
    assert!(n > 50);
    println!("BesselTable (h = 0.05) vs mpmath: {n} points, worst error / envelope {worst:.2e}");
}

struct WignerRow {
    l: [u32; 3],
    value: f64,
}

fn wigner_rows() -> Vec<WignerRow> {
    WIGNER_TSV
        .lines()
        .filter(|s| !s.starts_with('#') && !s.trim().is_empty())
        .map(|s| {
            let f: Vec<&str> = s.split('\t').collect();
            WignerRow {
                l: [
                    f[0].parse().unwrap(),
                    f[1].parse().unwrap(),
                    f[2].parse().unwrap(),
                ],
                value: f[3].parse().unwrap(),
            }
        })
        .collect()
}

#[test]
fn wigner000_against_sympy_and_exact_integers() {
    // Reference: sympy 1.14.0 wigner_3j (l <= 400) and exact integer factorials (l <= 10000),
    // 25 digits, see table header.
    let rows = wigner_rows();
    assert!(rows.len() > 300);
    let plan = Wigner000::new(5000);
    let (mut w_val, mut w_sq, mut w_gaunt, mut w_rec, mut w_plan) =
        (0.0f64, 0.0f64, 0.0f64, 0.0f64, 0.0f64);
    let mut zeros = 0;
    let mut buf = vec![0.0; 20_001];
    for row in &rows {
        let [a, b, c] = row.l;
        let v = wigner3j_000(a, b, c);
        let p = plan.value(a, b, c);
        let n = (a + b + 1) as usize;
        wigner3j_000_fill_l3_recursive(a, b, &mut buf[..n]);
        let rec = if (c as usize) < n {
            buf[c as usize]
        } else {
            0.0
        };
        if row.value == 0.0 {
            zeros += 1;
            assert_eq!(v, 0.0);
            assert_eq!(p, 0.0);
            assert_eq!(rec, 0.0);
            assert_eq!(gaunt_000(a, b, c), 0.0);
            continue;
        }
        let r = row.value;
        let rel = |x: f64, y: f64| (x - y).abs() / y.abs();
        let e_val = rel(v, r);
        let e_sq = rel(wigner3j_000_squared(a, b, c), r * r);
        let pref =
            ((2 * a + 1) as f64 * (2 * b + 1) as f64 * (2 * c + 1) as f64 / (4.0 * PI)).sqrt();
        let e_g = rel(gaunt_000(a, b, c), pref * r);
        let e_rec = rel(rec, r);
        let e_plan = rel(p, r);
        for (e, what) in [
            (e_val, "value"),
            (e_sq, "squared"),
            (e_g, "gaunt"),
            (e_rec, "recursion"),
            (e_plan, "plan"),
        ] {
            assert!(e < 1e-12, "{what} ({a} {b} {c}): rel error {e:.2e}");
        }
        w_val = w_val.max(e_val);
        w_sq = w_sq.max(e_sq);
        w_gaunt = w_gaunt.max(e_g);
        w_rec = w_rec.max(e_rec);
        w_plan = w_plan.max(e_plan);
    }
    println!(
        "wigner000 vs reference ({} rows, {zeros} zeros): worst rel value {w_val:.2e}, squared {w_sq:.2e}, \
         gaunt {w_gaunt:.2e}, recursion {w_rec:.2e}, planned table {w_plan:.2e}",
        rows.len()
    );
}

#[test]
#[ignore = "timing print, run with --ignored --nocapture"]
fn timing_sph_bessel_all_l() {
    use std::time::Instant;
    let lmax = 5000u32;
    let mut out = vec![0.0; lmax as usize + 1];
    for (label, xmax) in [
        ("x in (0, 500]", 500.0),
        ("x in (0, 6000]", 6000.0),
        ("x in (0, 2e5]", 2e5),
    ] {
        let xs: Vec<f64> = (1..=1000).map(|i| xmax * i as f64 / 1000.0).collect();
        let mut check = 0.0;
        let t = Instant::now();
        for &x in &xs {
            sph_bessel_all_l(lmax, x, &mut out);
            check += out[lmax as usize / 2];
        }
        let dt = t.elapsed();
        println!(
            "sph_bessel_all_l lmax={lmax}, 1000 x ({label}): {:.1} ms total, {:.2} ns per value (checksum {check:.3e})",
            dt.as_secs_f64() * 1e3,
            dt.as_secs_f64() * 1e9 / (1000.0 * (lmax + 1) as f64)
        );
    }
    // Scalar and table, for comparison.
    let t = Instant::now();
    let mut s = 0.0;
    for i in 1..=10_000 {
        s += sph_bessel(2000, 0.5 * i as f64);
    }
    let dt = t.elapsed();
    println!(
        "sph_bessel(2000, x) at 10000 x in (0, 5000]: {:.2} us per call (checksum {s:.3e})",
        dt.as_secs_f64() * 1e6 / 1e4
    );
    let t = Instant::now();
    let tab = BesselTable::new(2000, 0.0, 2e4, 200_001).unwrap();
    let build = t.elapsed();
    let t = Instant::now();
    let mut s = 0.0;
    for i in 0..1_000_000 {
        s += tab.eval(0.02 * i as f64 + 0.0037);
    }
    let ev = t.elapsed();
    println!(
        "BesselTable l=2000 on [0, 2e4], h=0.1: build {:.1} ms, eval {:.1} ns (checksum {s:.3e}), bound {:.1e}",
        build.as_secs_f64() * 1e3,
        ev.as_secs_f64() * 1e9 / 1e6,
        tab.interpolation_bound()
    );
}
