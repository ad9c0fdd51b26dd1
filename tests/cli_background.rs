//! End-to-end tests of `ngreach background` and of input errors.

mod common;

use common::*;

#[test]
fn help_lists_subcommands() {
    let o = run(&["--help"]);
    assert!(o.status.success());
    let s = stdout(&o);
    for cmd in ["run", "background"] {
        assert!(s.contains(cmd), "--help lacks {cmd}: {s}");
    }
}

#[test]
fn background_json_contract() {
    let j = run_json(&["background", "--format", "json", "--z", "0,0.5,1,1100"]);
    assert!(j["version"].is_string());
    let c = &j["inputs"]["cosmology"];
    assert!((c["hubble_constant_km_s_mpc"].as_f64().unwrap() - 67.36).abs() < 1e-9);
    // The echo uses the input-file key names, so it can be pasted back into a file.
    for key in [
        "baryon_density_h2",
        "reionization_optical_depth",
        "dark_energy_w0",
    ] {
        assert!(c[key].is_number(), "{key}");
    }
    for old in ["h", "omega_b", "tau_reio", "A_s", "N_eff"] {
        assert!(c.get(old).is_none(), "{old}");
    }
    let s8 = j["sigma8"].as_f64().unwrap();
    assert!(s8 > 0.7 && s8 < 0.9, "{s8}");
    let rows = j["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 4);
    for key in [
        "z",
        "hubble_km_s_mpc",
        "comoving_distance_mpc",
        "growth",
        "growth_rate",
    ] {
        assert!(rows[1][key].is_number(), "row lacks {key}");
    }
    assert_eq!(rows[0]["growth"].as_f64().unwrap(), 1.0);
    assert!((rows[0]["hubble_km_s_mpc"].as_f64().unwrap() - 67.36).abs() < 1e-9);
}

#[test]
fn background_csv_and_table() {
    let o = run(&["background", "--format", "csv", "--z", "0.5"]);
    assert!(o.status.success());
    let s = stdout(&o);
    // CSV: the header row first (NumPy and pandas read it without options).
    let header = s.lines().next().unwrap();
    assert!(
        header.starts_with("z,hubble_km_s_mpc,comoving_distance_mpc"),
        "{header}"
    );
    // ECSV: the same columns with units and the notes in the header.
    let o = run(&["background", "--format", "ecsv", "--z", "0.5"]);
    let e = stdout(&o);
    assert!(
        e.starts_with("# %ECSV 1.0") && e.contains("\"unit\":\"Mpc\""),
        "{e}"
    );
    let o = run(&["background", "--z", "0.5"]);
    assert!(stdout(&o).contains("Mpc"));
}

#[test]
fn cosmology_file_changes_results() {
    let dir = std::env::temp_dir().join(format!("ngreach-bg-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let f = dir.join("c.toml");
    std::fs::write(
        &f,
        "[cosmology]\nhubble_constant_km_s_mpc = 70.0\ncdm_density_h2 = 0.11\n",
    )
    .unwrap();
    let j = run_json(&[
        "background",
        "--format",
        "json",
        "--z",
        "0",
        "--cosmology",
        f.to_str().unwrap(),
    ]);
    assert!((j["rows"][0]["hubble_km_s_mpc"].as_f64().unwrap() - 70.0).abs() < 1e-9);
    assert_eq!(
        j["inputs"]["cosmology"]["cdm_density_h2"].as_f64().unwrap(),
        0.11
    );
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn example_cosmology_files_are_valid() {
    for entry in std::fs::read_dir(root().join("surveys")).unwrap() {
        let p = entry.unwrap().path();
        let name = p.file_name().unwrap().to_string_lossy().into_owned();
        if name.starts_with("cosmology") && name.ends_with(".toml") {
            let o = run(&["background", "--cosmology", p.to_str().unwrap(), "--z", "1"]);
            assert!(o.status.success(), "{name}: {}", stderr(&o));
        }
    }
}

/// Every file in tests/bad_inputs/ names, in `# expect:` lines, fragments its error must
/// contain. The binary must exit with 2, print one `error:` line and never panic.
#[test]
fn bad_cosmology_files_are_rejected_clearly() {
    let dir = root().join("tests/bad_inputs");
    let mut n = 0;
    let mut entries: Vec<_> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    entries.sort();
    for p in entries {
        if p.extension().is_none_or(|e| e != "toml") {
            continue;
        }
        let text = std::fs::read_to_string(&p).unwrap();
        let expect: Vec<&str> = text
            .lines()
            .filter_map(|l| l.strip_prefix("# expect: "))
            .collect();
        assert!(!expect.is_empty(), "{} has no expectation", p.display());
        let o = run(&["background", "--cosmology", p.to_str().unwrap()]);
        let err = stderr(&o);
        assert_eq!(
            o.status.code(),
            Some(2),
            "{}: exit {:?}, stderr {err}",
            p.display(),
            o.status.code()
        );
        assert!(
            !err.contains("panicked") && !err.contains("RUST_BACKTRACE"),
            "{err}"
        );
        assert!(err.starts_with("error: "), "{err}");
        assert_eq!(
            err.trim_end().lines().count(),
            1,
            "one line expected: {err}"
        );
        let fname = p.file_name().unwrap().to_string_lossy().into_owned();
        assert!(err.contains(&fname), "message must name the file: {err}");
        for frag in expect {
            assert!(
                err.contains(frag),
                "{}: expected `{frag}` in: {err}",
                p.display()
            );
        }
        n += 1;
    }
    assert!(n >= 10, "only {n} bad-input files");
}

#[test]
fn missing_file_and_bad_flags() {
    let o = run(&["background", "--cosmology", "no/such/file.toml"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("no/such/file.toml"));
    let o = run(&["background", "--z", "-1"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("--z"), "{}", stderr(&o));
    let o = run(&["background", "--z", "abc"]);
    assert_eq!(o.status.code(), Some(2));
    let o = run(&["background", "--format", "xml"]);
    assert_eq!(o.status.code(), Some(2));
}

#[test]
fn run_rejects_a_missing_scenario_file() {
    let o = run(&["run", "no/such/scenario.toml", "--quiet"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("no/such/scenario.toml"),
        "{}",
        stderr(&o)
    );
}
