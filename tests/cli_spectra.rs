//! End-to-end tests of `ngreach spectra --transfer shell`.

mod common;

use common::*;

#[test]
fn help_lists_spectra() {
    let o = run(&["--help"]);
    assert!(o.status.success());
    assert!(stdout(&o).contains("spectra"), "{}", stdout(&o));
}

#[test]
fn csv_header_units_and_rows() {
    let o = run(&[
        "spectra",
        "--transfer",
        "shell",
        "--lmax",
        "300",
        "--format",
        "csv",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let s = stdout(&o);
    let lines: Vec<&str> = s.lines().collect();
    // One header row, then the data; the units and conventions are in the ECSV header.
    let header = lines[0];
    assert_eq!(header, "multipole,dl_tt_uk2,dl_ee_uk2,dl_te_uk2");
    let e = run(&[
        "spectra",
        "--transfer",
        "shell",
        "--lmax",
        "300",
        "--format",
        "ecsv",
    ]);
    let e = stdout(&e);
    assert!(
        e.lines()
            .take_while(|l| l.starts_with('#'))
            .any(|l| l.contains("microkelvin^2") && l.contains("unlensed") && l.contains("T_CMB")),
        "units note missing from the ECSV header"
    );
    assert!(e.contains("\"unit\":\"uK2\""));
    let rows = &lines[1..];
    assert_eq!(rows.len(), 299);
    let first: Vec<&str> = rows[0].split(',').collect();
    assert_eq!(first[0], "2");
    let tt: f64 = first[1].parse().unwrap();
    // Sachs-Wolfe plateau (A_s/25) T_CMB^2 ~ 6e2 uK^2, tilted up at low k by n_s < 1.
    assert!(tt > 500.0 && tt < 1000.0, "{tt}");
    let last: Vec<&str> = rows[298].split(',').collect();
    assert_eq!(last[0], "300");
    for cell in &last[1..] {
        assert!(cell.parse::<f64>().unwrap().is_finite());
    }
}

#[test]
fn json_shape_and_resolved_inputs() {
    let j = run_json(&[
        "spectra",
        "--transfer",
        "shell",
        "--lmax",
        "60",
        "--format",
        "json",
    ]);
    assert!(j["version"].is_string());
    assert_eq!(j["command"], "spectra");
    let inp = &j["inputs"];
    assert_eq!(inp["transfer"], "shell");
    assert_eq!(inp["lmax"], 60);
    for key in [
        "shell_sigma_mpc",
        "k_damping_mpc",
        "chi_star_mpc",
        "t_cmb_k",
    ] {
        assert!(inp[key].is_number(), "inputs lack {key}: {inp}");
    }
    assert!(inp["cosmology"]["hubble_constant_km_s_mpc"].is_number());
    let rows = j["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 59);
    for key in ["multipole", "dl_tt_uk2", "dl_ee_uk2", "dl_te_uk2"] {
        assert!(rows[10][key].is_number(), "row lacks {key}");
    }
    assert_eq!(rows[0]["multipole"], 2);
    assert_eq!(rows[0].as_object().unwrap().len(), 4);
}

#[test]
fn width_and_damping_flags_reach_the_model() {
    let j = run_json(&[
        "spectra",
        "--transfer",
        "shell",
        "--lmax",
        "40",
        "--shell-width",
        "0",
        "--no-damping",
        "--format",
        "json",
    ]);
    assert_eq!(j["inputs"]["shell_sigma_mpc"].as_f64().unwrap(), 0.0);
    assert!(j["inputs"]["k_damping_mpc"].is_null());
    assert_eq!(j["inputs"]["damping"], false);
    // Zero thickness, no damping: D_l is the Sachs-Wolfe plateau, flat to the tilt.
    let rows = j["rows"].as_array().unwrap();
    let d = |i: usize| rows[i]["dl_tt_uk2"].as_f64().unwrap();
    assert!((d(38) / d(0) - 1.0).abs() < 0.2, "{} {}", d(0), d(38));
    let o = run(&["spectra", "--transfer", "shell", "--lmax", "40"]);
    assert!(o.status.success());
    assert!(stdout(&o).contains("uK^2"));
}

#[test]
fn bad_values_exit_2_with_a_clear_message() {
    for (args, flag) in [
        (vec!["--lmax", "1"], "--lmax"),
        (vec!["--lmax", "5001"], "--lmax"),
        (vec!["--shell-width", "-1"], "--shell-width"),
        (vec!["--shell-width", "501"], "--shell-width"),
        (vec!["--shell-width", "nan"], "--shell-width"),
    ] {
        let mut a = vec!["spectra", "--transfer", "shell"];
        a.extend(args.iter().copied());
        let o = run(&a);
        let err = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {err}");
        assert!(err.starts_with("error: "), "{err}");
        assert!(err.contains(flag), "{args:?}: {err}");
        assert!(!err.contains("panicked"), "{err}");
    }
    // Unknown model, missing model, bad number: clap's own usage errors, also exit 2.
    for a in [
        vec!["spectra", "--transfer", "warp"],
        vec!["spectra"],
        vec!["spectra", "--transfer", "shell", "--lmax", "abc"],
    ] {
        let o = run(&a);
        assert_eq!(o.status.code(), Some(2), "{a:?}: {}", stderr(&o));
    }
}
