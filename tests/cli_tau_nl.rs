//! End-to-end: `tau_nl` in shape lists of `run` (scenario), `survey` and `cmb`.

mod common;

use std::process::Command;

use common::*;

fn tau_rows<'a>(v: &'a serde_json::Value, key: &str) -> Vec<&'a serde_json::Value> {
    v[key]
        .as_array()
        .unwrap_or_else(|| panic!("{key} missing"))
        .iter()
        .filter(|r| r["shape"] == "tau_nl")
        .collect()
}

fn num(v: &serde_json::Value) -> f64 {
    v.as_f64().unwrap_or(f64::INFINITY)
}

/// The scenario with `tau_nl` writes tau rows (CMB, survey, joint, headline, crossover),
/// the convention, and the two figures; the joint error beats both probes; the CMB rows
/// agree with `ngreach cmb` run on its own.
#[test]
fn run_reports_tau_nl_rows_figures_and_joint() {
    let out = std::env::temp_dir().join(format!("ngreach-taunl-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&out);
    let o = Command::new(bin())
        .env("NGREACH_CACHE_DIR", test_cache_dir())
        .args([
            "run",
            "tests/data/scenario_tau_nl.toml",
            "--out",
            out.to_str().unwrap(),
        ])
        .current_dir(root())
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(stdout(&o).contains("sigma(tau_NL)"), "{}", stdout(&o));
    let j: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("summary.json")).unwrap()).unwrap();
    let cmb = tau_rows(&j, "cmb");
    let survey = tau_rows(&j, "survey");
    let joint = tau_rows(&j, "joint");
    let head = tau_rows(&j, "rows");
    let cross = tau_rows(&j, "crossover");
    assert_eq!(cmb.len(), 3 * 2, "3 l_max x (T, T+E)");
    assert_eq!(survey.len(), 3);
    assert_eq!(joint.len(), 9);
    assert_eq!(head.len(), 1);
    assert_eq!(cross.len(), 1);
    for r in &survey {
        assert!(num(&r["sigma_marginal"]) >= num(&r["sigma_conditional"]));
    }
    let h = head[0];
    let (c, s, jt) = (
        num(&h["sigma_cmb"]),
        num(&h["sigma_survey"]),
        num(&h["sigma_joint"]),
    );
    assert!(
        jt < c.min(s) && c.is_finite() && s.is_finite(),
        "{c} {s} {jt}"
    );
    assert!(
        j["tau_nl"]["notes"][0]
            .as_str()
            .unwrap()
            .contains("(6 f_NL / 5)^2")
    );
    assert_eq!(
        j["tau_nl"]["fisher_cross_term_with_fnl_cmb"].as_f64(),
        Some(0.0)
    );
    for stem in ["sigma_vs_kmax_tau_nl", "sigma_vs_lmax_halcyon_tau_nl"] {
        for ext in ["csv", "png", "svg"] {
            assert!(out.join(format!("{stem}.{ext}")).exists(), "{stem}.{ext}");
        }
    }
    // The CMB rows equal the `cmb` command's.
    let c = run_json(&[
        "cmb",
        "--transfer",
        "shell",
        "--experiment",
        "surveys/cmb_satellite.toml",
        "--lmax",
        "60,120,200",
        "--fields",
        "T,T+E",
        "--shapes",
        "local,equilateral,tau_nl",
        "--format",
        "json",
    ]);
    let alone = tau_rows(&c, "rows");
    for r in &cmb {
        let m = alone
            .iter()
            .find(|a| a["lmax"] == r["lmax"] && a["fields"] == r["fields"])
            .expect("row");
        let (a, b) = (num(&m["sigma_marginal"]), num(&r["sigma_marginal"]));
        assert!((a / b - 1.0).abs() < 1e-12, "{a} {b}");
    }
    let _ = std::fs::remove_dir_all(&out);
}

/// `survey --shapes local,tau_nl`: tau rows on probe P with the covariance named, and
/// the f_NL rows unchanged by the extra parameter.
#[test]
fn survey_command_reports_tau_nl() {
    let args = |shapes: &'static str| {
        vec![
            "survey",
            "tests/data/survey_small.toml",
            "--kmax",
            "0.05,0.1",
            "--probes",
            "P",
            "--shapes",
            shapes,
            "--format",
            "json",
        ]
    };
    let with = run_json(&args("local,tau_nl"));
    let without = run_json(&args("local"));
    let t = tau_rows(&with, "rows");
    assert_eq!(t.len(), 2);
    assert!(t.iter().all(|r| r["probe"] == "P"));
    assert!(num(&t[1]["sigma_marginal"]) < num(&t[0]["sigma_marginal"]));
    assert_eq!(with["tau_nl"]["covariance"], "gaussian");
    let local = |v: &serde_json::Value| -> Vec<f64> {
        v["rows"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|r| r["shape"] == "local")
            .map(|r| num(&r["sigma_marginal"]))
            .collect()
    };
    assert_eq!(local(&with), local(&without));
}
