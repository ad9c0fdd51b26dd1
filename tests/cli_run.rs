//! End-to-end tests of the main job: `run`, `batch`, `merge`, `check`, and `cmb`.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::*;

fn tmp(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("ngreach-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn run_small(out: &Path, threads: &str) -> serde_json::Value {
    let o = Command::new(bin())
        .env("NGREACH_CACHE_DIR", test_cache_dir())
        .args([
            "run",
            "tests/data/scenario_small.toml",
            "--out",
            out.to_str().unwrap(),
            "--quiet",
        ])
        .env("RAYON_NUM_THREADS", threads)
        .current_dir(root())
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    let text = std::fs::read_to_string(out.join("summary.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

fn find(rows: &serde_json::Value, pred: impl Fn(&serde_json::Value) -> bool) -> &serde_json::Value {
    rows.as_array()
        .unwrap()
        .iter()
        .find(|r| pred(r))
        .expect("row present")
}

/// PNG decodes, has the expected size and is not blank (many distinct colours).
fn check_png(p: &Path) {
    let dec = png::Decoder::new(std::fs::File::open(p).unwrap());
    let mut reader = dec.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).unwrap();
    assert_eq!((info.width, info.height), (1200, 900), "{}", p.display());
    let px = &buf[..info.buffer_size()];
    let mut colours = std::collections::HashSet::new();
    for c in px.chunks(3).step_by(7) {
        colours.insert([c[0], c[1], c[2]]);
    }
    let dark = px
        .chunks(3)
        .filter(|c| (c[0] as u32 + c[1] as u32 + c[2] as u32) < 200)
        .count();
    assert!(
        colours.len() > 20 && dark > 1000,
        "{} looks blank ({} colours, {dark} dark pixels)",
        p.display(),
        colours.len()
    );
}

#[test]
fn run_writes_every_output_and_matches_the_engines() {
    let out = tmp("run");
    let j = run_small(&out, "2");
    for key in [
        "version",
        "inputs",
        "rows",
        "crossover",
        "cmb",
        "survey",
        "joint",
        "per_bin",
    ] {
        assert!(j.get(key).is_some(), "summary.json lacks {key}");
    }
    for c in j["crossover"].as_array().unwrap() {
        assert!(c["kmax_h_mpc"].is_number() || c["kmax_h_mpc"].is_null());
        for k in ["experiment", "survey", "probe", "shape"] {
            assert!(c[k].is_string());
        }
    }
    // Files: tables, LaTeX, figures.
    let names: Vec<String> = std::fs::read_dir(&out)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    for prefix in [
        "sigma_vs_kmax_local",
        "sigma_vs_lmax_halcyon_local",
        "joint_plane_halcyon_test_patch_local",
        "ellipses_halcyon_test_patch_local_equilateral",
        "per_bin_test_patch",
    ] {
        for ext in ["csv", "png", "svg"] {
            let f = format!("{prefix}.{ext}");
            assert!(names.contains(&f), "missing {f}; have {names:?}");
        }
        check_png(&out.join(format!("{prefix}.png")));
        let svg = std::fs::read_to_string(out.join(format!("{prefix}.svg"))).unwrap();
        assert!(
            svg.contains("<svg") && svg.matches("<text").count() > 5,
            "{prefix}.svg has no text"
        );
    }
    let tex = std::fs::read_to_string(out.join("table.tex")).unwrap();
    assert!(
        tex.contains("\\toprule") && tex.contains("\\bottomrule") && tex.contains("equilateral")
    );
    assert!(
        !names
            .iter()
            .any(|n| n.ends_with(".tmp") || n.contains(".tmp.")),
        "temporary files left: {names:?}"
    );

    // The CMB engine run on its own gives the same numbers.
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
        "local,equilateral",
        "--format",
        "json",
    ]);
    for shape in ["local", "equilateral"] {
        let a = find(&c["rows"], |r| {
            r["lmax"] == 200 && r["fields"] == "T+E" && r["shape"] == shape
        })["sigma_marginal"]
            .as_f64()
            .unwrap();
        let b = find(&j["cmb"], |r| {
            r["lmax"] == 200 && r["fields"] == "T+E" && r["shape"] == shape
        })["sigma_marginal"]
            .as_f64()
            .unwrap();
        assert!((a / b - 1.0).abs() < 1e-12, "{shape}: cmb {a} vs run {b}");
    }
    // And the survey engine.
    let s = run_json(&[
        "survey",
        "tests/data/survey_small.toml",
        "--kmax",
        "0.03,0.05,0.1",
        "--shapes",
        "local,equilateral",
        "--format",
        "json",
    ]);
    for probe in ["P", "B", "P+B"] {
        let a = find(&s["rows"], |r| {
            r["kmax_h_mpc"] == 0.1 && r["probe"] == probe && r["shape"] == "local"
        })["sigma_marginal"]
            .as_f64()
            .unwrap();
        let b = find(&j["survey"], |r| {
            r["kmax_h_mpc"] == 0.1 && r["probe"] == probe && r["shape"] == "local"
        })["sigma_marginal"]
            .as_f64()
            .unwrap();
        assert!(
            (a / b - 1.0).abs() < 1e-12,
            "{probe}: survey {a} vs run {b}"
        );
    }
    // Crossover against a direct log-log interpolation of the survey rows, on both bases:
    // single-shape sigmas (the headline keys) and sigmas marginalized over the other shapes
    // (the `_marginal` keys), the CMB on the same basis as the survey.
    for cr in j["crossover"].as_array().unwrap() {
        let (probe, shape) = (cr["probe"].as_str().unwrap(), cr["shape"].as_str().unwrap());
        for (row_key, k_key, target_key, note_key) in [
            ("sigma_conditional", "kmax_h_mpc", "cmb_sigma", "note"),
            (
                "sigma_marginal",
                "kmax_marginal_h_mpc",
                "cmb_sigma_marginal",
                "note_marginal",
            ),
        ] {
            let target = cr[target_key].as_f64().unwrap();
            let cmb = j["cmb"]
                .as_array()
                .unwrap()
                .iter()
                .filter(|r| {
                    r["experiment"] == cr["experiment"]
                        && r["fields"] == "T+E"
                        && r["shape"] == shape
                })
                .max_by_key(|r| r["lmax"].as_u64().unwrap())
                .unwrap()[row_key]
                .as_f64()
                .unwrap();
            assert!(
                (cmb / target - 1.0).abs() < 1e-12,
                "{row_key}: {cmb} vs {target}"
            );
            let pts: Vec<(f64, f64)> = [0.03, 0.05, 0.1]
                .iter()
                .map(|&k| {
                    (
                        k,
                        find(&j["survey"], |r| {
                            r["kmax_h_mpc"] == k && r["probe"] == probe && r["shape"] == shape
                        })[row_key]
                            .as_f64()
                            .unwrap_or(f64::INFINITY),
                    )
                })
                .collect();
            let mut expect = None;
            if pts[0].1 <= target {
                expect = Some(pts[0].0);
            } else {
                for w in pts.windows(2) {
                    if w[1].1 <= target {
                        let t = (target.ln() - w[0].1.ln()) / (w[1].1.ln() - w[0].1.ln());
                        expect = Some((w[0].0.ln() + t * (w[1].0.ln() - w[0].0.ln())).exp());
                        break;
                    }
                }
            }
            match (expect, cr[k_key].as_f64()) {
                (Some(e), Some(g)) => {
                    assert!(
                        (e / g - 1.0).abs() < 1e-9,
                        "{probe} {shape} {k_key}: {e} vs {g}"
                    )
                }
                (None, None) => assert!(
                    cr[note_key]
                        .as_str()
                        .unwrap()
                        .contains("not reached below k = 0.1")
                ),
                (e, g) => panic!("{probe} {shape} {k_key}: expected {e:?}, got {g:?}"),
            }
        }
    }
    std::fs::remove_dir_all(&out).ok();
}

#[test]
fn summary_is_identical_with_one_and_two_threads() {
    let (a, b) = (tmp("t1"), tmp("t2"));
    run_small(&a, "1");
    run_small(&b, "2");
    let sa = std::fs::read_to_string(a.join("summary.json")).unwrap();
    let sb = std::fs::read_to_string(b.join("summary.json")).unwrap();
    assert_eq!(sa, sb, "summary.json depends on the thread count");
    std::fs::remove_dir_all(&a).ok();
    std::fs::remove_dir_all(&b).ok();
}

fn batch(args: &[&str]) -> String {
    let o = run(args);
    assert!(o.status.success(), "{}", stderr(&o));
    stdout(&o)
}

#[test]
fn batch_resumes_and_shards_merge_to_the_unsharded_table() {
    let (full, s0, s1, merged) = (tmp("b-full"), tmp("b-s0"), tmp("b-s1"), tmp("b-merged"));
    let out = batch(&[
        "batch",
        "tests/data/plan_small.toml",
        "--out",
        full.to_str().unwrap(),
    ]);
    assert!(
        out.contains("4 scenario(s) computed, 0 already complete"),
        "{out}"
    );
    let again = batch(&[
        "batch",
        "tests/data/plan_small.toml",
        "--out",
        full.to_str().unwrap(),
    ]);
    assert!(
        again.contains("0 scenario(s) computed, 4 already complete"),
        "{again}"
    );
    let a = batch(&[
        "batch",
        "tests/data/plan_small.toml",
        "--out",
        s0.to_str().unwrap(),
        "--shard",
        "0/2",
    ]);
    assert!(
        a.contains("2 scenario(s) computed") && a.contains("2 left to other shards"),
        "{a}"
    );
    batch(&[
        "batch",
        "tests/data/plan_small.toml",
        "--out",
        s1.to_str().unwrap(),
        "--shard",
        "1/2",
    ]);
    batch(&[
        "merge",
        merged.to_str().unwrap(),
        s0.to_str().unwrap(),
        s1.to_str().unwrap(),
    ]);
    let t_full = std::fs::read_to_string(full.join("batch_summary.csv")).unwrap();
    let t_merged = std::fs::read_to_string(merged.join("batch_summary.csv")).unwrap();
    assert_eq!(t_full, t_merged);
    // One header row; the varied values in their own columns; the whole grid: 4
    // scenarios x 1 experiment x 1 survey x 3 probes x 2 shapes x 3 l_max x 3 k_max.
    let lines: Vec<&str> = t_full.lines().collect();
    let header: Vec<&str> = lines[0].split(',').collect();
    for col in [
        "folder",
        "survey_0_area_deg2",
        "survey_0_tracer_0_nbar_h3_mpc3",
        "lmax",
        "kmax_h_mpc",
        "sigma_joint",
        "crossover_status",
    ] {
        assert!(header.contains(&col), "no column {col}: {header:?}");
    }
    assert_eq!(lines.len() - 1, 4 * 3 * 2 * 3 * 3, "{t_full}");
    let at = |c: &str| header.iter().position(|h| *h == c).unwrap();
    let (ia, il, ik) = (at("survey_0_area_deg2"), at("lmax"), at("kmax_h_mpc"));
    let mut areas = std::collections::BTreeSet::new();
    let mut grid = std::collections::BTreeSet::new();
    for l in &lines[1..] {
        let cells: Vec<&str> = l.split(',').collect();
        assert_eq!(cells.len(), header.len(), "{l}");
        areas.insert(cells[ia].to_string());
        grid.insert((cells[il].to_string(), cells[ik].to_string()));
    }
    assert_eq!(areas.into_iter().collect::<Vec<_>>(), ["2000.0", "8000.0"]);
    assert_eq!(grid.len(), 9, "every (l_max, k_max) pair: {grid:?}");
    assert!(full.join("report.html").is_file());
    for d in [full, s0, s1, merged] {
        std::fs::remove_dir_all(&d).ok();
    }
}

/// `--shard auto` inside a SLURM-style array job (2 tasks, ids 1 and 2), then
/// `merge --expect 4`: complete after both tasks, a clear failure with one missing.
#[test]
fn array_job_shards_and_merge_expect() {
    let (t1, t2, merged, partial) = (
        tmp("aj-1"),
        tmp("aj-2"),
        tmp("aj-merged"),
        tmp("aj-partial"),
    );
    for (id, dir) in [("1", &t1), ("2", &t2)] {
        let o = Command::new(bin())
            .env("NGREACH_CACHE_DIR", test_cache_dir())
            .args([
                "batch",
                "tests/data/plan_small.toml",
                "--out",
                dir.to_str().unwrap(),
                "--shard",
                "auto",
            ])
            .env("SLURM_ARRAY_TASK_ID", id)
            .env("SLURM_ARRAY_TASK_COUNT", "2")
            .env("SLURM_ARRAY_TASK_MIN", "1")
            .current_dir(root())
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", stderr(&o));
        assert!(
            stdout(&o).contains("2 scenario(s) computed") && stdout(&o).contains("2 left"),
            "{}",
            stdout(&o)
        );
    }
    let o = run(&[
        "merge",
        partial.to_str().unwrap(),
        t1.to_str().unwrap(),
        "--expect",
        "4",
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("--expect") && stderr(&o).contains("missing grid point(s) 1, 3"),
        "{}",
        stderr(&o)
    );
    let o = run(&[
        "merge",
        merged.to_str().unwrap(),
        t1.to_str().unwrap(),
        t2.to_str().unwrap(),
        "--expect",
        "4",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(
        stdout(&o).contains("combined table of 4 scenario(s)"),
        "{}",
        stdout(&o)
    );
    // Outside an array job, `auto` names the variables it needs.
    let o = Command::new(bin())
        .env("NGREACH_CACHE_DIR", test_cache_dir())
        .args([
            "batch",
            "tests/data/plan_small.toml",
            "--out",
            t1.to_str().unwrap(),
            "--shard",
            "auto",
        ])
        .env_remove("SLURM_ARRAY_TASK_ID")
        .env_remove("SLURM_ARRAY_TASK_COUNT")
        .env_remove("SLURM_ARRAY_TASK_MIN")
        .current_dir(root())
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("SLURM_ARRAY_TASK_ID"), "{}", stderr(&o));
    for d in [t1, t2, merged, partial] {
        std::fs::remove_dir_all(&d).ok();
    }
}

#[test]
fn check_validates_every_shipped_input() {
    let mut files: Vec<String> = std::fs::read_dir(root().join("surveys"))
        .unwrap()
        .map(|e| e.unwrap().path().to_string_lossy().into_owned())
        .filter(|p| p.ends_with(".toml"))
        .collect();
    files.sort();
    files.push("tests/data/scenario_small.toml".into());
    files.push("tests/data/plan_small.toml".into());
    let mut args = vec!["check"];
    args.extend(files.iter().map(|s| s.as_str()));
    let o = run(&args);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(stdout(&o).lines().count(), files.len());
    assert!(stdout(&o).contains("valid"));
    let o = run(&["check", "tests/bad_inputs/03_negative_hubble.toml"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("03_negative_hubble.toml:4"),
        "{}",
        stderr(&o)
    );
}

/// `linear_power = "boltzmann"` in a scenario reaches the survey engine and the resolved
/// choice is reported in summary.json `inputs` (survey-only scenario, so no CMB work).
#[test]
fn scenario_linear_power_reaches_the_survey_side() {
    let d = tmp("linpow");
    let survey = root().join("tests/data/survey_small.toml");
    let mut sigma = Vec::new();
    for model in ["eisenstein-hu", "boltzmann"] {
        let f = d.join(format!("{model}.toml"));
        std::fs::write(
            &f,
            format!(
                "[scenario]\nshapes = [\"local\"]\nkmax_h_mpc = [0.1]\nprobes = [\"P+B\"]\nlinear_power = \"{model}\"\n\n[[survey]]\nfile = {:?}\n\n[output]\nfigures = false\nlatex = false\n",
                survey.to_str().unwrap()
            ),
        )
        .unwrap();
        let out = d.join(model);
        let j = run_json(&[
            "run",
            f.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--quiet",
            "--format",
            "json",
        ]);
        assert_eq!(
            j["inputs"]["linear_power"]["model"], model,
            "{}",
            j["inputs"]
        );
        sigma.push(j["survey"][0]["sigma_marginal"].as_f64().unwrap());
    }
    // Measured: -0.28% (the Boltzmann transfer function against Eisenstein-Hu).
    let rel = sigma[1] / sigma[0] - 1.0;
    println!(
        "P+B local: eisenstein-hu {:.4}, boltzmann {:.4} ({rel:+.4})",
        sigma[0], sigma[1]
    );
    assert!(rel.abs() < 0.03 && rel != 0.0, "{sigma:?}");
    std::fs::remove_dir_all(&d).ok();
}

/// Every scenario in tests/bad_inputs/scenarios/ names, in `# expect:` lines, fragments
/// of the error `ngreach check` must print (one `error:` line, exit code 2, no panic).
#[test]
fn bad_scenario_files_are_rejected_clearly() {
    let mut files: Vec<_> = std::fs::read_dir(root().join("tests/bad_inputs/scenarios"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "toml"))
        .collect();
    files.sort();
    assert!(!files.is_empty());
    for p in files {
        let text = std::fs::read_to_string(&p).unwrap();
        let expect: Vec<&str> = text
            .lines()
            .filter_map(|l| l.strip_prefix("# expect: "))
            .collect();
        assert!(!expect.is_empty(), "{} has no expectation", p.display());
        let o = run(&["check", p.to_str().unwrap()]);
        let err = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{}: {err}", p.display());
        assert!(
            err.starts_with("error: ") && !err.contains("panicked"),
            "{err}"
        );
        assert_eq!(err.trim_end().lines().count(), 1, "{err}");
        for frag in expect {
            assert!(err.contains(frag), "{}: `{frag}` not in {err}", p.display());
        }
    }
}

#[test]
fn bad_scenario_and_cmb_inputs_exit_2() {
    let d = tmp("bad");
    let f = d.join("s.toml");
    std::fs::write(&f, "[scenario]\nlmax = [5]\n\n[[cmb]]\nideal = true\n").unwrap();
    let o = run(&["run", f.to_str().unwrap(), "--out", d.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("s.toml:2") && stderr(&o).contains("lmax"),
        "{}",
        stderr(&o)
    );
    std::fs::write(&f, "[scenario]\n\n[[survey]]\nfile = \"missing.toml\"\n").unwrap();
    let o = run(&["run", f.to_str().unwrap(), "--out", d.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("s.toml:4") && stderr(&o).contains("missing.toml"),
        "{}",
        stderr(&o)
    );
    for args in [
        vec!["cmb", "--lmax", "1"],
        vec!["cmb", "--fields", "B"],
        vec!["cmb", "--fsky", "2"],
        vec!["cmb", "--experiment", "nope.toml"],
        vec!["cmb", "--transfer", "full", "--no-damping"],
        vec!["cmb", "--transfer", "full", "--shell-width", "20"],
    ] {
        let o = run(&args);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {}", stderr(&o));
        assert!(!stderr(&o).contains("panicked"));
    }
    // The shell model's own options select it when --transfer is not given.
    let v = run_json(&[
        "cmb",
        "--no-damping",
        "--lmax",
        "40",
        "--fields",
        "T",
        "--shapes",
        "local",
        "--format",
        "json",
    ]);
    assert_eq!(v["inputs"]["transfer"]["model"], "shell", "{}", v["inputs"]);
    std::fs::remove_dir_all(&d).ok();
}
