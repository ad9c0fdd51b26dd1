//! A seeded, time-bounded mutation test of `check` over the shipped input files (lines
//! deleted, duplicated or swapped, numbers replaced by absurd values, bytes flipped,
//! files truncated): every mutant must end within 30 s with exit 0 or 2, never a panic;
//! an exit-2 mutant must print one `error:` line naming the file. And the shipped files
//! themselves: each passes `check` and runs (cheaply: small l_max and k_max).

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::{bin, root};

/// A small deterministic generator (xorshift64*), so that a failure can be replayed.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n.max(1) as u64) as usize
    }
}

const ABSURD: [&str; 16] = [
    "0",
    "-1",
    "1e300",
    "-1e300",
    "1e-300",
    "nan",
    "inf",
    "-inf",
    "0.0",
    "99999999999",
    "-0.0",
    "\"x\"",
    "[]",
    "[[]]",
    "{}",
    "true",
];

fn mutate(text: &str, rng: &mut Rng) -> String {
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    let n = lines.len().max(1);
    for _ in 0..1 + rng.below(3) {
        match rng.below(7) {
            0 if !lines.is_empty() => {
                lines.remove(rng.below(lines.len()));
            }
            1 if !lines.is_empty() => {
                let i = rng.below(lines.len());
                let l = lines[i].clone();
                lines.insert(i, l);
            }
            2 if lines.len() > 1 => {
                let (a, b) = (rng.below(lines.len()), rng.below(lines.len()));
                lines.swap(a, b);
            }
            3 | 4 => {
                // Replace the value of a `key = value` line.
                let i = rng.below(n);
                if let Some(l) = lines.get_mut(i)
                    && let Some((k, _)) = l.split_once('=')
                {
                    *l = format!("{k}= {}", ABSURD[rng.below(ABSURD.len())]);
                }
            }
            5 => {
                // Flip one character.
                let i = rng.below(n);
                if let Some(l) = lines.get_mut(i)
                    && !l.is_empty()
                {
                    let mut b = l.clone().into_bytes();
                    let j = rng.below(b.len());
                    b[j] = b"[]=\"#.,0-{}ax\n"[rng.below(14)];
                    *l = String::from_utf8_lossy(&b).into_owned();
                }
            }
            _ => {
                lines.truncate(rng.below(n));
            }
        }
    }
    lines.join("\n") + "\n"
}

fn run_check(dir: &Path, file: &str) -> (Option<i32>, String, f64) {
    let t0 = Instant::now();
    let mut child = Command::new(bin())
        .args(["check", file])
        .current_dir(dir)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .expect("binary starts");
    loop {
        if let Some(st) = child.try_wait().expect("wait") {
            let mut err = String::new();
            use std::io::Read;
            if let Some(mut e) = child.stderr.take() {
                let _ = e.read_to_string(&mut err);
            }
            return (st.code(), err, t0.elapsed().as_secs_f64());
        }
        if t0.elapsed() > Duration::from_secs(30) {
            let _ = child.kill();
            let _ = child.wait();
            return (None, "HANG".into(), 30.0);
        }
        std::thread::sleep(Duration::from_millis(2));
    }
}

fn shipped() -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(root().join("surveys"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "toml"))
        .collect();
    v.sort();
    v
}

fn scratch(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("ngreach-fuzz-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    for p in shipped() {
        std::fs::copy(&p, d.join(p.file_name().unwrap())).unwrap();
    }
    d
}

#[test]
fn mutated_inputs_never_panic_or_hang() {
    let dir = scratch("mutants");
    let files = shipped();
    let mut rng = Rng(0x5EED_0F4E_6EAC);
    let budget = Duration::from_secs(4);
    let t0 = Instant::now();
    let (mut n, mut refused) = (0, 0);
    let mut failures = Vec::new();
    while t0.elapsed() < budget || n < 40 {
        let f = &files[rng.below(files.len())];
        let name = f.file_name().unwrap().to_string_lossy().into_owned();
        let mutant = mutate(&std::fs::read_to_string(f).unwrap(), &mut rng);
        let mname = format!("mutant_{name}");
        std::fs::write(dir.join(&mname), &mutant).unwrap();
        let (code, err, secs) = run_check(&dir, &mname);
        n += 1;
        let ok = match code {
            Some(0) => true,
            Some(2) => {
                refused += 1;
                err.lines()
                    .next()
                    .is_some_and(|l| l.starts_with("error: ") && l.contains(&mname))
            }
            _ => false,
        };
        if !ok || err.contains("panicked") {
            failures.push(format!(
                "mutant {n} of {name} (exit {code:?}, {secs:.1} s): {err}\n--- mutant:\n{mutant}"
            ));
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
    println!(
        "{n} mutants checked, {refused} refused with exit 2, {} failures",
        failures.len()
    );
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

/// The kind of a shipped file from its first table.
fn kind(text: &str) -> &'static str {
    for (table, kind) in [
        ("[scenario]", "scenario"),
        ("[plan]", "plan"),
        ("[survey]", "survey"),
        ("[experiment]", "experiment"),
        ("[cosmology]", "cosmology"),
    ] {
        if text.lines().any(|l| l.trim() == table) {
            return kind;
        }
    }
    "unknown"
}

fn ok(dir: &Path, args: &[&str]) {
    let o = Command::new(bin())
        .args(args)
        .arg("--quiet")
        .current_dir(dir)
        .output()
        .expect("binary runs");
    assert!(
        o.status.success(),
        "ngreach {args:?} failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
}

#[test]
fn every_shipped_file_passes_check_and_runs() {
    let dir = scratch("shipped");
    let mut kinds = Vec::new();
    for p in shipped() {
        let name = p.file_name().unwrap().to_string_lossy().into_owned();
        let text = std::fs::read_to_string(&p).unwrap();
        ok(&dir, &["check", &name]);
        let k = kind(&text);
        kinds.push(format!("{name}: {k}"));
        match k {
            "cosmology" => {
                ok(&dir, &["background", "--cosmology", &name]);
                ok(
                    &dir,
                    &[
                        "survey",
                        "--volume",
                        "0.5",
                        "--z",
                        "1",
                        "--nbar",
                        "1e-3",
                        "--b1",
                        "2",
                        "--kmax",
                        "0.05",
                        "--cosmology",
                        &name,
                    ],
                );
                ok(
                    &dir,
                    &[
                        "cmb",
                        "--transfer",
                        "shell",
                        "--lmax",
                        "100",
                        "--fields",
                        "T",
                        "--shapes",
                        "local",
                        "--cosmology",
                        &name,
                    ],
                );
            }
            "experiment" => ok(
                &dir,
                &[
                    "cmb",
                    "--experiment",
                    &name,
                    "--transfer",
                    "shell",
                    "--lmax",
                    "100",
                    "--fields",
                    "T",
                    "--shapes",
                    "local",
                ],
            ),
            "survey" => ok(&dir, &["survey", &name, "--kmax", "0.02"]),
            "scenario" => {
                // The same scenario with a small grid and the shell transfer.
                let mut doc: toml::Table = toml::from_str(&text).unwrap();
                let sc = doc["scenario"].as_table_mut().unwrap();
                sc.insert(
                    "lmax".into(),
                    toml::Value::Array(vec![toml::Value::Integer(100)]),
                );
                sc.insert(
                    "kmax_h_mpc".into(),
                    toml::Value::Array(vec![toml::Value::Float(0.02)]),
                );
                sc.insert("transfer".into(), toml::Value::String("shell".into()));
                let mut out = toml::Table::new();
                out.insert("figures".into(), toml::Value::Boolean(false));
                out.insert("latex".into(), toml::Value::Boolean(false));
                doc.insert("output".into(), toml::Value::Table(out));
                let small = format!("small_{name}");
                std::fs::write(dir.join(&small), toml::to_string(&doc).unwrap()).unwrap();
                ok(&dir, &["check", &small]);
                ok(&dir, &["run", &small, "--out", &format!("out_{name}")]);
            }
            // A shipped plan runs the full demo per grid point (minutes): `check` above
            // validates every grid point; running a plan end to end is covered by the
            // array-job test on tests/data/plan_small.toml.
            "plan" => {}
            other => panic!("{name}: unknown kind {other}"),
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
    println!("{}", kinds.join("\n"));
}
