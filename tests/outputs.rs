//! The files of `ngreach run` as a notebook user reads them: CSV tables as NumPy's
//! `genfromtxt(path, delimiter=",", names=True)` and a bare `pandas.read_csv(path)` see
//! them, ECSV as astropy's reader sees it (header syntax, datatypes, units), and the
//! Fisher matrices as `numpy.load` sees them. The rules checked here are those readers'
//! (NumPy 2.x `genfromtxt`: `#` starts a comment anywhere on a line, names are cleaned
//! of punctuation and `file`, `print`, `return` get a `_` appended; pandas: the first
//! line is the header, double quotes delimit fields; ECSV 1.0: `# %ECSV 1.0`, `# ---`,
//! a YAML header with `datatype` entries, then the header line of column names).

mod common;

use std::collections::HashSet;
use std::path::{Path, PathBuf};

use common::*;
use ndarray::Array2;
use ndarray_npy::ReadNpyExt;
use serde_json::Value;

fn tmp(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("ngreach-out-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn run_to(out: &Path, extra: &[&str], scenario: &str) -> Value {
    let mut args = vec!["run", scenario, "--out", out.to_str().unwrap(), "--quiet"];
    args.extend(extra);
    let o = run(&args);
    assert!(o.status.success(), "{}", stderr(&o));
    serde_json::from_str(&std::fs::read_to_string(out.join("summary.json")).unwrap()).unwrap()
}

fn files_with(dir: &Path, ext: &str) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == ext))
        .collect();
    v.sort();
    v
}

/// A column name that genfromtxt keeps exactly and pandas reads as written.
fn clean_name(n: &str) -> bool {
    let mut ch = n.chars();
    ch.next().is_some_and(|c| c.is_ascii_lowercase())
        && ch.all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '_')
        && !["file", "print", "return"].contains(&n)
}

/// A body cell of a float64 column: a number, `inf`, `-inf` or empty (NaN).
fn numeric(c: &str) -> bool {
    c.is_empty() || c == "inf" || c == "-inf" || c.parse::<f64>().is_ok()
}

/// Checks a comma-separated body: header of clean unique names, rows of equal length,
/// no comment marks or quotes. Returns (names, rows).
fn check_body(path: &Path, lines: &[&str]) -> (Vec<String>, Vec<Vec<String>>) {
    let names: Vec<String> = lines[0].split(',').map(str::to_string).collect();
    let unique: HashSet<&String> = names.iter().collect();
    assert_eq!(
        unique.len(),
        names.len(),
        "{}: duplicate names",
        path.display()
    );
    for n in &names {
        assert!(clean_name(n), "{}: column `{n}`", path.display());
    }
    let mut rows = Vec::new();
    for l in &lines[1..] {
        assert!(
            !l.contains('#') && !l.contains('"'),
            "{}: `{l}`",
            path.display()
        );
        let cells: Vec<String> = l.split(',').map(str::to_string).collect();
        assert_eq!(cells.len(), names.len(), "{}: `{l}`", path.display());
        rows.push(cells);
    }
    assert!(!rows.is_empty(), "{} has no rows", path.display());
    (names, rows)
}

#[test]
fn csv_tables_npy_matrices_and_the_sidecar() {
    let out = tmp("csv");
    let j = run_to(&out, &[], "tests/data/scenario_small.toml");
    let csvs = files_with(&out, "csv");
    assert!(csvs.len() >= 10, "{csvs:?}");
    let sidecar: Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("tables.json")).unwrap()).unwrap();
    let described: Vec<&str> = sidecar["tables"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t["file"].as_str().unwrap())
        .collect();
    for p in csvs.iter().chain([&out.join("fisher/index.csv")]) {
        let text = std::fs::read_to_string(p).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        let (names, rows) = check_body(p, &lines);
        // Columns that hold a number in any row hold numbers in every row.
        for (i, n) in names.iter().enumerate() {
            if rows.iter().any(|r| r[i].parse::<f64>().is_ok())
                && rows.iter().all(|r| numeric(&r[i]))
            {
                continue;
            }
            assert!(
                rows.iter()
                    .all(|r| !r[i].is_empty() || n == "experiment" || n == "survey"),
                "{}: text column {n} has empty cells",
                p.display()
            );
        }
        let file = p.file_name().unwrap().to_string_lossy().into_owned();
        if p.parent() == Some(out.as_path()) {
            assert!(
                described.contains(&file.as_str()),
                "{file} not in tables.json"
            );
        }
    }
    // Every Fisher matrix in the index reads back as the matrix of summary.json.
    let index: Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("fisher/index.json")).unwrap())
            .unwrap();
    let mats = index["matrices"].as_array().unwrap();
    // 1 experiment x 2 field sets x 3 l_max + 1 survey x 3 k_max x 3 probes x (1 + 1 bin).
    assert_eq!(mats.len(), 6 + 18);
    for m in mats {
        let bytes = std::fs::read(out.join("fisher").join(m["file"].as_str().unwrap())).unwrap();
        let a = Array2::<f64>::read_npy(&bytes[..]).unwrap();
        let n = m["parameters"].as_array().unwrap().len();
        assert_eq!(a.shape(), &[n, n]);
        let want = match m["kind"].as_str().unwrap() {
            "cmb" => j["fisher"]["cmb"].as_array().unwrap().iter().find(|f| {
                f["experiment"] == m["experiment"]
                    && f["fields"] == m["probe"]
                    && f["lmax"] == m["lmax"]
            }),
            "survey" => j["fisher"]["survey"].as_array().unwrap().iter().find(|f| {
                f["survey"] == m["survey"]
                    && f["probe"] == m["probe"]
                    && f["kmax_h_mpc"] == m["kmax_h_mpc"]
            }),
            _ => None,
        };
        if let Some(w) = want {
            assert_eq!(w["parameters"], m["parameters"]);
            for i in 0..n {
                for k in 0..n {
                    // serde_json's default float parser may be one ulp off.
                    let x = w["matrix"][i][k].as_f64().unwrap();
                    assert!(
                        (a[[i, k]] - x).abs() <= 1e-15 * x.abs(),
                        "{}: {} vs {x}",
                        m["file"],
                        a[[i, k]]
                    );
                }
            }
        }
    }
    // The information budgets are in summary.json too.
    let info = j["information"].as_array().unwrap();
    assert!(
        info.iter()
            .any(|t| t["table"] == "information_vs_kmax_test_patch")
    );
    let by_bin = info
        .iter()
        .find(|t| t["table"] == "information_by_bin_test_patch")
        .unwrap();
    for r in by_bin["rows"].as_array().unwrap() {
        if let Some(s) = r["share"].as_f64() {
            assert!((s - 1.0).abs() < 1e-12, "one bin holds everything: {r}");
        }
    }
    // The configuration and triangle-class budgets: shares add up to one, the CMB cell
    // sum agrees with the engine (l_max = 200: cells of one multipole below 30, 1.7% for
    // the toy test's worst case at cells this narrow), local information is mostly
    // squeezed.
    let info = j["information"].as_array().unwrap();
    let table = |prefix: &str| {
        info.iter()
            .find(|t| t["table"].as_str().unwrap().starts_with(prefix))
            .unwrap_or_else(|| panic!("no {prefix} table"))
    };
    for prefix in ["information_by_configuration_", "information_by_class_"] {
        let t = table(prefix);
        assert!(
            t["description"]
                .as_str()
                .unwrap()
                .contains("nearest corner")
        );
        for r in t["rows"].as_array().unwrap() {
            let s: f64 = ["squeezed_share", "equilateral_share", "flattened_share"]
                .iter()
                .map(|k| r[*k].as_f64().unwrap())
                .sum();
            assert!((s - 1.0).abs() < 1e-9, "{r}");
            if let Some(q) = r.get("cell_sum_over_engine") {
                let q = q.as_f64().unwrap();
                assert!((q - 1.0).abs() < 0.03, "cell sum / engine {q}: {r}");
                assert_eq!(r["lmax"], 200);
            }
            if r["shape"] == "local" {
                assert!(r["squeezed_share"].as_f64().unwrap() > 0.5, "{r}");
            }
        }
        assert!(
            out.join(format!("{}.svg", t["table"].as_str().unwrap()))
                .is_file()
        );
    }
    std::fs::remove_dir_all(&out).ok();
}

/// The tau_NL figures appear in the report page, not only as files, and every figure's
/// "numbers" link names a file that was written (here with ECSV tables).
#[test]
fn tau_nl_figures_are_in_the_page() {
    let out = tmp("tau-page");
    run_to(
        &out,
        &["--tables", "ecsv"],
        "tests/data/scenario_tau_nl.toml",
    );
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    let links: Vec<&str> = html
        .split("numbers: <a href=\"")
        .skip(1)
        .map(|rest| rest.split('"').next().unwrap())
        .collect();
    assert!(links.len() >= 3, "{links:?}");
    for l in &links {
        assert!(
            out.join(l).is_file(),
            "report links {l}, which was not written"
        );
    }
    assert!(html.contains("<figure id=\"sigma_vs_kmax_tau_nl\">"));
    // The tau_NL figure tables follow --tables like every other table.
    assert!(
        files_with(&out, "csv").is_empty(),
        "CSV written with --tables ecsv"
    );
    let tau = std::fs::read_to_string(out.join("sigma_vs_kmax_tau_nl.ecsv")).unwrap();
    assert!(tau.starts_with("# %ECSV 1.0") && tau.contains("kmax_h_mpc"));
    let lmax_tau = html
        .match_indices("<figure id=\"sigma_vs_lmax_")
        .filter(|(i, _)| html[*i..].split('>').next().unwrap().ends_with("_tau_nl\""))
        .count();
    assert_eq!(
        lmax_tau, 1,
        "one sigma(tau_NL) versus l_max figure per experiment"
    );
    assert!(html.contains("collapsed CMB trispectrum"));
    std::fs::remove_dir_all(&out).ok();
}

/// The astropy unit strings the tables may carry (each token a unit astropy knows).
const UNIT_TOKENS: [&str; 11] = [
    "littleh", "littleh3", "Mpc", "Mpc3", "Gpc3", "uK", "uK2", "deg2", "km", "s", "arcmin",
];

#[test]
fn ecsv_tables_and_a_single_lmax() {
    // A single l_max: the log slope is undefined (null / empty), never inf.
    let out = tmp("ecsv");
    let scen = out.join("one_lmax.toml");
    let root = root().display().to_string();
    std::fs::write(
        &scen,
        format!(
            "[scenario]\nname = \"one l_max\"\nshapes = [\"local\", \"equilateral\"]\nlmax = [120]\nkmax_h_mpc = [0.03, 0.05]\nfields = [\"T\", \"T+E\"]\nprobes = [\"P\", \"P+B\"]\ntransfer = \"shell\"\n[[cmb]]\nfile = \"{root}/surveys/cmb_satellite.toml\"\n[[survey]]\nfile = \"{root}/tests/data/survey_small.toml\"\n[output]\nfigures = false\nlatex = true\n"
        ),
    )
    .unwrap();
    let res = out.join("res");
    let j = run_to(&res, &["--tables", "ecsv"], scen.to_str().unwrap());
    for r in j["cmb"].as_array().unwrap() {
        assert!(r["log_slope"].is_null(), "{r}");
    }
    assert!(
        files_with(&res, "csv").is_empty(),
        "CSV written with --tables ecsv"
    );
    let ecsvs = files_with(&res, "ecsv");
    assert!(ecsvs.len() >= 5, "{ecsvs:?}");
    for p in ecsvs.iter().chain([&res.join("fisher/index.ecsv")]) {
        let text = std::fs::read_to_string(p).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines[0], "# %ECSV 1.0", "{}", p.display());
        assert_eq!(lines[1], "# ---");
        assert_eq!(lines[2], "# delimiter: ','");
        let header_len = lines.iter().take_while(|l| l.starts_with('#')).count();
        assert_eq!(lines[header_len - 1], "# schema: astropy-2.0");
        let cols: Vec<Value> = lines[..header_len]
            .iter()
            .filter_map(|l| l.strip_prefix("# - "))
            .map(|l| serde_json::from_str(l).expect("datatype entry is a JSON/YAML flow map"))
            .collect();
        let meta: Value = serde_json::from_str(
            lines
                .iter()
                .find_map(|l| l.strip_prefix("# meta: "))
                .unwrap(),
        )
        .unwrap();
        assert_eq!(meta["version"], env!("CARGO_PKG_VERSION"));
        let (names, rows) = check_body(p, &lines[header_len..]);
        let col_names: Vec<&str> = cols.iter().map(|c| c["name"].as_str().unwrap()).collect();
        assert_eq!(col_names, names, "{}", p.display());
        for (i, c) in cols.iter().enumerate() {
            let dt = c["datatype"].as_str().unwrap();
            assert!(["string", "float64", "int64"].contains(&dt));
            for r in &rows {
                match dt {
                    "float64" => assert!(numeric(&r[i]), "{}: {}", p.display(), r[i]),
                    "int64" => assert!(r[i].parse::<i64>().is_ok() || r[i].is_empty()),
                    _ => {}
                }
            }
            if let Some(u) = c["unit"].as_str() {
                for tok in u.split([' ', '/']).filter(|t| !t.is_empty() && *t != "1") {
                    assert!(UNIT_TOKENS.contains(&tok), "{}: unit {u}", p.display());
                }
            }
            if c["name"] == "kmax_h_mpc" {
                assert_eq!(c["unit"], "littleh / Mpc");
            }
        }
        if p.file_name()
            .unwrap()
            .to_string_lossy()
            .starts_with("sigma_vs_lmax")
        {
            let i = names.iter().position(|n| n == "log_slope").unwrap();
            assert!(rows.iter().all(|r| r[i].is_empty()), "{}", p.display());
        }
    }
    // table.tex: one table per survey, with the crossover against every experiment.
    let tex = std::fs::read_to_string(res.join("table.tex")).unwrap();
    assert_eq!(tex.matches("\\begin{table}").count(), 1);
    assert!(tex.contains("$k_\\times$ Halcyon"));
    // Headline cells: single-shape sigma with the shape-marginalized value in parentheses.
    assert!(tex.contains("single-shape") && tex.contains("in parentheses"));
    let row = tex.lines().find(|l| l.starts_with("local &")).unwrap();
    assert!(row.matches(" (").count() >= 2, "{row}");
    std::fs::remove_dir_all(&out).ok();
}

#[test]
fn run_help_lists_every_format() {
    let o = run(&["run", "--help"]);
    let h = stdout(&o);
    for word in ["--format", "table", "json", "--tables", "csv", "ecsv"] {
        assert!(
            h.contains(word),
            "`run --help` does not mention {word}:\n{h}"
        );
    }
    let o = run(&["run", "--format", "csv"]);
    assert_eq!(o.status.code(), Some(2), "run accepted a format it ignores");
}

/// Every figure of a run with two experiments and two surveys (three probes each, the
/// layout where a survey line once took a CMB band's colour) keeps its items apart: no
/// two series of one figure share colour and dash, no band takes a series' colour.
#[test]
fn every_series_of_a_figure_is_distinguishable() {
    let root = env!("CARGO_MANIFEST_DIR");
    let dir = tmp("styles");
    let path = dir.join("scenario.toml");
    std::fs::write(
        &path,
        format!(
            "[scenario]\nname = \"styles\"\nshapes = [\"local\", \"equilateral\"]\nlmax = [60, 120]\nkmax_h_mpc = [0.03, 0.05]\nfields = [\"T\", \"E\", \"T+E\"]\nprobes = [\"P\", \"B\", \"P+B\"]\ntransfer = \"shell\"\n[[cmb]]\nfile = \"{root}/surveys/cmb_satellite.toml\"\n[[cmb]]\nfile = \"{root}/surveys/cmb_ground.toml\"\n[[survey]]\nfile = \"{root}/tests/data/survey_small.toml\"\n[[survey]]\nfile = \"{root}/tests/data/survey_small.toml\"\nset = {{ name = \"Second Small\" }}\n"
        ),
    )
    .unwrap();
    let sc = ngreach::scenario::load_scenario(&path).unwrap();
    let r = ngreach::pipeline::run_scenario(&sc, &Default::default(), &mut |_| {}).unwrap();
    let arts = ngreach::report::artifacts::all(&r);
    let mut n = 0;
    for a in &arts {
        if let Some(f) = &a.figure {
            n += 1;
            let c = ngreach::report::figures::style_clashes(f);
            assert!(c.is_empty(), "{}: {c:?}", a.table.stem);
        }
    }
    assert!(n >= 8, "only {n} figures");
    let _ = std::fs::remove_dir_all(&dir);
}
