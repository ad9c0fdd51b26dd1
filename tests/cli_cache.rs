//! The transfer-table cache flags of the commands that can run the Boltzmann solver
//! (`spectra`, `cmb`, `run`, `batch`): `--cache-dir DIR` > `$NGREACH_CACHE_DIR` > the
//! default directory, and `--no-cache`. One solve at l_max = 300 (a few seconds); every
//! later command reads it back.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use common::*;

fn tmp(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("ngreach-cache-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// Runs the binary with `NGREACH_CACHE_DIR` set (so that the default directory is never
/// the user's).
fn run_env(env_dir: &Path, args: &[&str]) -> Output {
    Command::new(bin())
        .args(args)
        .current_dir(root())
        .env("NGREACH_CACHE_DIR", env_dir)
        .output()
        .expect("binary runs")
}

fn json(o: &Output) -> serde_json::Value {
    assert!(o.status.success(), "{}", stderr(o));
    serde_json::from_slice(&o.stdout).expect("JSON on stdout")
}

fn files_in(d: &Path) -> Vec<PathBuf> {
    match std::fs::read_dir(d) {
        Ok(it) => it.map(|e| e.unwrap().path()).collect(),
        Err(_) => Vec::new(),
    }
}

fn cat<'a>(a: &[&'a str], b: &[&'a str]) -> Vec<&'a str> {
    a.iter().chain(b).copied().collect()
}

const SPECTRA: [&str; 7] = [
    "spectra",
    "--transfer",
    "full",
    "--lmax",
    "300",
    "--format",
    "json",
];

#[test]
fn cache_dir_and_no_cache_flags() {
    let (env_dir, flag_dir, work) = (tmp("env"), tmp("flag"), tmp("work"));
    // --no-cache: nothing read or written, not even in $NGREACH_CACHE_DIR.
    let a = json(&run_env(&env_dir, &cat(&SPECTRA, &["--no-cache"])));
    assert_eq!(a["inputs"]["solver"]["cache"]["status"], "disabled");
    assert!(files_in(&env_dir).is_empty(), "{:?}", files_in(&env_dir));

    // --cache-dir wins over the environment: one file there, none in $NGREACH_CACHE_DIR.
    let fd = flag_dir.to_str().unwrap();
    let v = cat(&SPECTRA, &["--cache-dir", fd]);
    let b = json(&run_env(&env_dir, &v));
    let cache = &b["inputs"]["solver"]["cache"];
    assert_eq!(cache["status"], "stored", "{cache}");
    let stored = files_in(&flag_dir);
    assert_eq!(stored.len(), 1, "{stored:?}");
    assert_eq!(cache["file"], stored[0].to_str().unwrap());
    assert!(files_in(&env_dir).is_empty());
    // The cached table gives the computed spectra exactly.
    assert_eq!(a["rows"], b["rows"]);

    // A second run reads it.
    let c = json(&run_env(&env_dir, &v));
    assert_eq!(c["inputs"]["solver"]["cache"]["status"], "hit");
    assert_eq!(b["rows"], c["rows"]);
    // Without the flag the environment is used: pointing it at the same folder hits too.
    let d = json(&run_env(&flag_dir, &SPECTRA));
    assert_eq!(d["inputs"]["solver"]["cache"]["status"], "hit");
    assert_eq!(files_in(&flag_dir).len(), 1);

    // cmb, run and batch take the same flags; the same table (l_max 300, precision 1)
    // is a hit for each of them.
    let e = json(&run_env(
        &env_dir,
        &[
            "cmb",
            "--transfer",
            "full",
            "--lmax",
            "300",
            "--fields",
            "T",
            "--shapes",
            "local",
            "--cache-dir",
            fd,
            "--format",
            "json",
        ],
    ));
    assert_eq!(
        e["inputs"]["transfer"]["cache"]["status"], "hit",
        "{}",
        e["inputs"]
    );
    // Its radial functions are stored beside the table ...
    assert_eq!(e["inputs"]["radial_cache"], "stored", "{}", e["inputs"]);
    let scenario = work.join("s.toml");
    std::fs::write(
        &scenario,
        "[scenario]\nshapes = [\"local\"]\nlmax = [100, 300]\nfields = [\"T\"]\ntransfer = \"full\"\n\n[[cmb]]\nideal = true\n\n[output]\nfigures = false\nlatex = false\n",
    )
    .unwrap();
    let out = work.join("out");
    let r = json(&run_env(
        &env_dir,
        &[
            "run",
            scenario.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--quiet",
            "--cache-dir",
            fd,
            "--format",
            "json",
        ],
    ));
    assert_eq!(r["inputs"]["transfer"]["cache"]["status"], "hit");
    // ... and read back by a run on the same table, shapes, radial grid and l_max.
    assert_eq!(
        r["inputs"]["transfer"]["radial_cache"], "hit",
        "{}",
        r["inputs"]
    );
    let plan = work.join("p.toml");
    std::fs::write(
        &plan,
        "[plan]\nscenario = \"s.toml\"\n\n[[plan.vary]]\npath = \"scenario.shapes\"\nvalues = [[\"local\"]]\n",
    )
    .unwrap();
    let bout = work.join("batch");
    let o = run_env(
        &env_dir,
        &[
            "batch",
            plan.to_str().unwrap(),
            "--out",
            bout.to_str().unwrap(),
            "--cache-dir",
            fd,
        ],
    );
    assert!(o.status.success(), "{}", stderr(&o));
    let summaries: Vec<PathBuf> = files_in(&bout)
        .into_iter()
        .map(|p| p.join("summary.json"))
        .filter(|p| p.is_file())
        .collect();
    assert_eq!(summaries.len(), 1, "{:?}", files_in(&bout));
    let s: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&summaries[0]).unwrap()).unwrap();
    assert_eq!(s["inputs"]["transfer"]["cache"]["status"], "hit");
    assert_eq!(s["inputs"]["transfer"]["radial_cache"], "hit");
    // One transfer table, plus the lensed spectra of the runs (lensed covariance) and
    // one file of radial functions.
    let names: Vec<String> = files_in(&flag_dir)
        .iter()
        .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
        .collect();
    assert!(files_in(&env_dir).is_empty(), "{:?}", files_in(&env_dir));
    assert_eq!(
        names.iter().filter(|n| n.starts_with("transfer-")).count(),
        1,
        "{names:?}"
    );
    assert_eq!(
        names.iter().filter(|n| n.starts_with("radial-")).count(),
        1,
        "{names:?}"
    );
    assert!(
        names.iter().all(|n| n.starts_with("transfer-")
            || n.starts_with("lensing-")
            || n.starts_with("radial-")),
        "{names:?}"
    );
    assert_eq!(s["inputs"]["transfer"]["lensing_cache"], "hit");

    // The two flags together are refused.
    let o = run_env(
        &env_dir,
        &[
            "spectra",
            "--transfer",
            "full",
            "--no-cache",
            "--cache-dir",
            fd,
        ],
    );
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("--no-cache"), "{}", stderr(&o));
    for d in [env_dir, flag_dir, work] {
        std::fs::remove_dir_all(&d).ok();
    }
}
