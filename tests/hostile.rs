//! A hostile corpus: malformed, absurd and oversized inputs of every kind (cosmology,
//! experiment, survey, scenario and plan files, special files, command-line flags,
//! environment variables), generated at test time. Every case must end within 30 s with
//! exit code 2 and one `error:` line naming where the problem is: no panic, no hang, no
//! exit 0 on nonsense. Cases whose result is still meaningful must exit 0 with a
//! `warning:` on stderr.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::{bin, root};

/// A scratch folder with copies of the shipped input files.
fn scratch(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("ngreach-hostile-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    for e in std::fs::read_dir(root().join("surveys")).unwrap() {
        let p = e.unwrap().path();
        std::fs::copy(&p, d.join(p.file_name().unwrap())).unwrap();
    }
    d
}

/// The outcome of one invocation.
struct Outcome {
    code: Option<i32>,
    stderr: String,
    seconds: f64,
}

/// Runs the binary in `dir` with a 30 s deadline (a hang is killed and reported).
fn run_bounded(dir: &Path, args: &[String], env: &[(&str, &str)]) -> Outcome {
    let t0 = Instant::now();
    let mut cmd = Command::new(bin());
    cmd.args(args)
        .current_dir(dir)
        .env("NGREACH_CACHE_DIR", dir.join("cache"))
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
    for (k, v) in env {
        cmd.env(k, v);
    }
    let mut child = cmd.spawn().expect("binary starts");
    let deadline = Duration::from_secs(30);
    loop {
        if let Some(status) = child.try_wait().expect("wait") {
            let mut stderr = String::new();
            use std::io::Read;
            if let Some(mut e) = child.stderr.take() {
                let _ = e.read_to_string(&mut stderr);
            }
            return Outcome {
                code: status.code(),
                stderr,
                seconds: t0.elapsed().as_secs_f64(),
            };
        }
        if t0.elapsed() > deadline {
            let _ = child.kill();
            let _ = child.wait();
            return Outcome {
                code: None,
                stderr: "HANG: killed after 30 s".into(),
                seconds: t0.elapsed().as_secs_f64(),
            };
        }
        std::thread::sleep(Duration::from_millis(5));
    }
}

/// One case: files to write, the command line, what must happen.
struct Case {
    kind: &'static str,
    label: String,
    files: Vec<(String, String)>,
    args: Vec<String>,
    env: Vec<(&'static str, String)>,
    /// Fragment the error (or warning) must contain.
    expect: String,
    /// Exit 0 with this warning instead of an error.
    warning: bool,
}

fn case(
    kind: &'static str,
    label: &str,
    files: &[(&str, String)],
    args: &[&str],
    expect: &str,
) -> Case {
    Case {
        kind,
        label: label.into(),
        files: files
            .iter()
            .map(|(n, t)| ((*n).to_string(), t.clone()))
            .collect(),
        args: args.iter().map(|s| (*s).to_string()).collect(),
        env: Vec::new(),
        expect: expect.into(),
        warning: false,
    }
}

const SURVEY: &str = "[survey]\nname = \"S\"\narea_deg2 = 1000.0\nz_edges = [0.5, 1.0]\n\n[[survey.tracer]]\nname = \"g\"\nnbar_h3_mpc3 = 1e-3\nb1 = 1.5\n";
const EXPERIMENT: &str = "[experiment]\nname = \"E\"\nf_sky = 0.5\nlmax_t = 1000\n\n[[experiment.channel]]\nnoise_t_uk_arcmin = 10.0\nfwhm_arcmin = 5.0\n";

fn scenario(scenario_keys: &str, body: &str) -> String {
    format!("[scenario]\nname = \"x\"\n{scenario_keys}\n{body}")
}

const WITH_SURVEY: &str = "[[survey]]\nfile = \"survey_wide_spectro.toml\"\n";
const WITH_CMB: &str = "[[cmb]]\nfile = \"cmb_satellite.toml\"\n";

/// Values that are wrong for any numeric key, as TOML text.
const BAD_NUMBERS: [&str; 7] = ["-1.0", "1e300", "nan", "-inf", "\"0.5\"", "true", "[1.0]"];

/// The quick-mode survey command line plus `extra` flags.
fn qf(extra: &[&'static str]) -> Vec<&'static str> {
    let mut a = vec![
        "survey", "--volume", "1", "--z", "1", "--nbar", "1e-3", "--b1", "2",
    ];
    a.extend_from_slice(extra);
    a
}

/// The quick-mode survey command line with the given values.
fn qv(
    volume: &'static str,
    z: &'static str,
    nbar: &'static str,
    b1: &'static str,
) -> Vec<&'static str> {
    vec![
        "survey", "--volume", volume, "--z", z, "--nbar", nbar, "--b1", b1,
    ]
}

fn corpus() -> Vec<Case> {
    let mut v = Vec::new();
    // --- cosmology files: every key with every bad value (through `check`).
    for key in [
        "baryon_density_h2",
        "cdm_density_h2",
        "hubble_constant_km_s_mpc",
        "spectral_index",
        "scalar_amplitude",
        "ln_1e10_scalar_amplitude",
        "pivot_k_per_mpc",
        "reionization_optical_depth",
        "cmb_temperature_k",
        "effective_neutrino_number",
        "helium_mass_fraction",
        "dark_energy_w0",
        "dark_energy_wa",
    ] {
        for val in BAD_NUMBERS {
            if key.starts_with("dark_energy") && val == "-1.0" {
                continue; // valid dark-energy values
            }
            v.push(case(
                "cosmology",
                &format!("{key} = {val}"),
                &[("c.toml", format!("[cosmology]\n{key} = {val}\n"))],
                &["check", "c.toml"],
                key,
            ));
        }
    }
    for (label, text, expect) in [
        ("unknown key", "[cosmology]\nhubble = 70\n", "unknown key"),
        (
            "old key name",
            "[cosmology]\nomega_b = 0.022\n",
            "unknown key `omega_b`",
        ),
        (
            "both amplitudes",
            "[cosmology]\nscalar_amplitude = 2e-9\nln_1e10_scalar_amplitude = 3.0\n",
            "not both",
        ),
        (
            "duplicate key",
            "[cosmology]\nspectral_index = 0.9\nspectral_index = 0.9\n",
            ":3:",
        ),
        ("syntax", "[cosmology\nspectral_index = 0.9\n", "syntax"),
        ("empty", "", "not an ngreach input"),
        ("binary", "\u{1}\u{2}\u{3}", "c.toml"),
    ] {
        v.push(case(
            "cosmology",
            label,
            &[("c.toml", text.into())],
            &["check", "c.toml"],
            expect,
        ));
    }
    // --- experiment files.
    let experiment_with = |top: &[(&str, &str)], channel: &[(&str, &str)]| {
        let mut t: Vec<(String, String)> =
            [("name", "\"E\""), ("f_sky", "0.5"), ("lmax_t", "1000")]
                .iter()
                .map(|(k, v)| ((*k).to_string(), (*v).to_string()))
                .collect();
        let mut c: Vec<(String, String)> = [("noise_t_uk_arcmin", "10.0"), ("fwhm_arcmin", "5.0")]
            .iter()
            .map(|(k, v)| ((*k).to_string(), (*v).to_string()))
            .collect();
        for (list, over) in [(&mut t, top), (&mut c, channel)] {
            for (k, v) in over {
                match list.iter_mut().find(|(a, _)| a == k) {
                    Some(e) => e.1 = (*v).to_string(),
                    None => list.push(((*k).to_string(), (*v).to_string())),
                }
            }
        }
        let lines = |l: &[(String, String)]| {
            l.iter()
                .map(|(k, v)| format!("{k} = {v}\n"))
                .collect::<String>()
        };
        format!(
            "[experiment]\n{}\n[[experiment.channel]]\n{}",
            lines(&t),
            lines(&c)
        )
    };
    for (key, val) in [
        ("f_sky", "0.0"),
        ("f_sky", "1e-300"),
        ("f_sky", "1.5"),
        ("f_sky", "nan"),
        ("l_min", "1"),
        ("l_min", "5000"),
        ("lmax_t", "5"),
        ("lmax_t", "100000"),
        ("lmax_t", "-3"),
        ("lmax_e", "9"),
        ("lmax_e", "1.5"),
    ] {
        v.push(case(
            "experiment",
            &format!("{key} = {val}"),
            &[("e.toml", experiment_with(&[(key, val)], &[]))],
            &["check", "e.toml"],
            key,
        ));
    }
    for (key, val) in [
        ("noise_t_uk_arcmin", "-1.0"),
        ("noise_t_uk_arcmin", "1e300"),
        ("noise_t_uk_arcmin", "inf"),
        ("noise_p_uk_arcmin", "-2.0"),
        ("fwhm_arcmin", "-1.0"),
        ("fwhm_arcmin", "1e9"),
        ("beam", "1.0"),
    ] {
        v.push(case(
            "experiment",
            &format!("channel {key} = {val}"),
            &[("e.toml", experiment_with(&[], &[(key, val)]))],
            &["check", "e.toml"],
            key,
        ));
    }
    v.push(case(
        "experiment",
        "channel labelled twice",
        &[("e.toml", format!("{EXPERIMENT}label = \"a\"\n[[experiment.channel]]\nlabel = \"a\"\nnoise_t_uk_arcmin = 1.0\nfwhm_arcmin = 1.0\n"))],
        &["check", "e.toml"],
        "labelled",
    ));
    v.push(case(
        "experiment",
        "no f_sky",
        &[("e.toml", "[experiment]\nlmax_t = 100\n".into())],
        &["check", "e.toml"],
        "f_sky",
    ));
    // --- survey files.
    let survey_key =
        |key: &str, val: &str| SURVEY.replace("z_edges", &format!("{key} = {val}\nz_edges"));
    for (key, val, expect) in [
        ("redshift_error", "-0.1", "redshift_error"),
        ("redshift_error", "nan", "redshift_error"),
        ("velocity_dispersion_km_s", "1e9", "velocity_dispersion"),
        ("kmin_h_mpc", "0.5", "kmin_h_mpc"),
        ("kmin_h_mpc", "-1.0", "kmin_h_mpc"),
        ("kmax_h_mpc", "0.0", "kmax_h_mpc"),
        ("kmax_h_mpc", "100.0", "kmax_h_mpc"),
        ("sigma_nl", "0.0", "sigma_nl"),
        ("kmax_rule", "\"wild\"", "kmax_rule"),
        ("f_sky", "0.5", "not both"),
    ] {
        v.push(case(
            "survey",
            &format!("{key} = {val}"),
            &[("s.toml", survey_key(key, val))],
            &["check", "s.toml"],
            expect,
        ));
    }
    for (from, to, expect) in [
        ("area_deg2 = 1000.0", "area_deg2 = 1e-300", "area_deg2"),
        ("area_deg2 = 1000.0", "area_deg2 = -5.0", "area_deg2"),
        ("area_deg2 = 1000.0", "area_deg2 = 1e9", "area_deg2"),
        ("area_deg2 = 1000.0", "f_sky = 1e-300", "f_sky"),
        ("z_edges = [0.5, 1.0]", "z_edges = []", "z_edges"),
        ("z_edges = [0.5, 1.0]", "z_edges = [1.0, 0.5]", "z_edges"),
        ("z_edges = [0.5, 1.0]", "z_edges = [0.5, 0.5]", "z_edges"),
        ("z_edges = [0.5, 1.0]", "z_edges = [0.5, 100.0]", "z_edges"),
        ("nbar_h3_mpc3 = 1e-3", "nbar_h3_mpc3 = 0.0", "nbar"),
        ("nbar_h3_mpc3 = 1e-3", "nbar_h3_mpc3 = 1e300", "nbar"),
        (
            "nbar_h3_mpc3 = 1e-3",
            "nbar_h3_mpc3 = [1e-3, 1e-3]",
            "nbar_h3_mpc3",
        ),
        ("b1 = 1.5", "b1 = 0.0", "b1"),
        ("b1 = 1.5", "b1 = 1e300", "b1"),
        ("b1 = 1.5", "b1 = 1.5\nb2 = 1e300", "b2"),
        ("b1 = 1.5", "b1 = 1.5\nb2 = nan", "b2"),
        ("b1 = 1.5", "b1 = 1.5\nbs2 = -1e10", "bs2"),
        ("b1 = 1.5", "b1 = 1.5\np = 10.0", "p"),
        ("b1 = 1.5", "b1 = 1.5\nb0 = 1.0", "not both"),
        ("b1 = 1.5", "", "b1"),
        ("nbar_h3_mpc3 = 1e-3\n", "", "nbar_h3_mpc3"),
        (
            "[[survey.tracer]]",
            "[[survey.tracer]]\nname = \"g\"\nnbar_h3_mpc3 = 1e-3\nb1 = 1.5\n[[survey.tracer]]",
            "named",
        ),
        (
            "b1 = 1.5",
            "b1 = 1.5\n[survey.priors]\nb2 = -1.0",
            "priors.b2",
        ),
        (
            "b1 = 1.5",
            "b1 = 1.5\n[survey.priors]\nb1 = 0.0",
            "priors.b1",
        ),
        (
            "b1 = 1.5",
            "b1 = 1.5\n[survey.priors]\np_shot = nan",
            "priors.p_shot",
        ),
        (
            "b1 = 1.5",
            "b1 = 1.5\n[survey.nuisance]\nb9 = true",
            "unknown key",
        ),
    ] {
        v.push(case(
            "survey",
            &format!("{from} -> {to}"),
            &[("s.toml", SURVEY.replace(from, to))],
            &["check", "s.toml"],
            expect,
        ));
    }
    v.push(case(
        "survey",
        "no tracer",
        &[(
            "s.toml",
            "[survey]\narea_deg2 = 10.0\nz_edges = [0.5, 1.0]\ntracer = []\n".into(),
        )],
        &["check", "s.toml"],
        "tracer",
    ));
    // --- scenario files.
    for (keys, body, expect) in [
        ("probes = []", WITH_SURVEY, "probes"),
        ("fields = []", WITH_CMB, "fields"),
        ("shapes = []", WITH_SURVEY, "shapes"),
        ("lmax = []", WITH_CMB, "lmax"),
        ("kmax_h_mpc = []", WITH_SURVEY, "kmax_h_mpc"),
        ("shapes = [\"local\", \"local\"]", WITH_SURVEY, "twice"),
        ("shapes = [\"local\", \"LOCAL\"]", WITH_SURVEY, "twice"),
        ("probes = [\"P\", \"P\"]", WITH_SURVEY, "twice"),
        ("fields = [\"T\", \"T\"]", WITH_CMB, "twice"),
        ("lmax = [500, 500]", WITH_CMB, "twice"),
        ("kmax_h_mpc = [0.1, 0.1]", WITH_SURVEY, "twice"),
        ("lmax = [5]", WITH_CMB, "lmax"),
        ("lmax = [1000000]", WITH_CMB, "lmax"),
        ("lmax = [-1]", WITH_CMB, "lmax"),
        ("kmax_h_mpc = [0.0]", WITH_SURVEY, "kmax_h_mpc"),
        ("kmax_h_mpc = [nan]", WITH_SURVEY, "kmax_h_mpc"),
        ("kmax_h_mpc = [1e300]", WITH_SURVEY, "kmax_h_mpc"),
        ("shapes = [\"cubic\"]", WITH_SURVEY, "cubic"),
        ("probes = [\"Q\"]", WITH_SURVEY, "probes"),
        ("fields = [\"B\"]", WITH_CMB, "fields"),
        ("transfer = \"magic\"", WITH_CMB, "transfer"),
        ("linear_power = \"guess\"", WITH_SURVEY, "linear_power"),
        ("shell_width_mpc = -1.0", WITH_CMB, "shell_width_mpc"),
        ("shell_width_mpc = 1e9", WITH_CMB, "shell_width_mpc"),
        ("damping = \"yes\"", WITH_CMB, "damping"),
        ("", "", "no [[cmb]]"),
        ("", "[[survey]]\nfile = \"nope.toml\"\n", "nope.toml"),
        ("", "[[survey]]\nfile = \"/dev/zero\"\n", "regular file"),
        (
            "",
            "[[cmb]]\nideal = true\nfile = \"cmb_satellite.toml\"\n",
            "either",
        ),
        ("", "[[cmb]]\n", "either"),
        (
            "",
            "[[cmb]]\nideal = true\n[[cmb]]\nideal = true\n",
            "twice",
        ),
        (
            "",
            "[[survey]]\nfile = \"survey_wide_spectro.toml\"\n[[survey]]\nfile = \"survey_wide_spectro.toml\"\n",
            "twice",
        ),
        (
            "",
            "[[survey]]\nfile = \"survey_wide_spectro.toml\"\nset = { area_deg2 = -1.0 }\n",
            "area_deg2",
        ),
        (
            "",
            "[[survey]]\nfile = \"survey_wide_spectro.toml\"\nset = { \"tracer.7.p\" = 1.0 }\n",
            "set.tracer.7.p",
        ),
        (
            "",
            "[[cmb]]\nfile = \"cmb_satellite.toml\"\nset = { f_sky = 1e-300 }\n",
            "f_sky",
        ),
        (
            "",
            "[[cmb]]\nfile = \"cmb_satellite.toml\"\n[cosmology]\ndark_energy_w0 = -0.9\n",
            "dark_energy_w0",
        ),
        (
            "",
            "[[survey]]\nfile = \"survey_wide_spectro.toml\"\n[output]\nfigures = 3\n",
            "figures",
        ),
        (
            "",
            "[[survey]]\nfile = \"survey_wide_spectro.toml\"\n[cosmology]\nhubble_constant_km_s_mpc = 500.0\n",
            "hubble_constant_km_s_mpc",
        ),
        (
            "kmax_h_mpc = [0.1]\nkmax_h_mpc = [0.2]",
            WITH_SURVEY,
            "duplicate key",
        ),
        (
            "linear_power = \"boltzmann\"",
            "[[survey]]\nfile = \"survey_wide_spectro.toml\"\n[cosmology]\ndark_energy_w0 = -0.8\n",
            "dark_energy_w0",
        ),
    ] {
        v.push(case(
            "scenario",
            &format!("{keys} | {}", body.lines().next().unwrap_or("")),
            &[("sc.toml", scenario(keys, body))],
            &["check", "sc.toml"],
            expect,
        ));
    }
    // A k_max below every bin's k_min: no modes anywhere.
    v.push(case(
        "scenario",
        "kmax below kmin",
        &[
            (
                "s.toml",
                SURVEY.replace("z_edges", "kmin_h_mpc = 0.5\nkmax_h_mpc = 1.0\nz_edges"),
            ),
            (
                "sc.toml",
                scenario("kmax_h_mpc = [0.1]", "[[survey]]\nfile = \"s.toml\"\n"),
            ),
        ],
        &["check", "sc.toml"],
        "no Fourier modes",
    ));
    // The same rule through `run` (refused before any work).
    v.push(case(
        "scenario",
        "run: kmax below kmin",
        &[
            (
                "s.toml",
                SURVEY.replace("z_edges", "kmin_h_mpc = 0.5\nkmax_h_mpc = 1.0\nz_edges"),
            ),
            (
                "sc.toml",
                scenario("kmax_h_mpc = [0.1]", "[[survey]]\nfile = \"s.toml\"\n"),
            ),
        ],
        &["run", "sc.toml", "--out", "o"],
        "no Fourier modes",
    ));
    // A huge grid list (generated).
    let many: Vec<String> = (0..5000)
        .map(|i| format!("{:.6}", 0.01 + 1e-5 * i as f64))
        .collect();
    v.push(case(
        "scenario",
        "5000 k_max values",
        &[(
            "sc.toml",
            scenario(&format!("kmax_h_mpc = [{}]", many.join(", ")), WITH_SURVEY),
        )],
        &["check", "sc.toml"],
        "allow-large",
    ));
    // --- plans.
    let plan =
        |vary: &str| format!("[plan]\nname = \"p\"\nscenario = \"scenario_demo.toml\"\n{vary}");
    let vary =
        |path: &str, values: &str| format!("[[plan.vary]]\npath = \"{path}\"\nvalues = {values}\n");
    let hundred: Vec<String> = (0..100).map(|i| format!("{}.0", 1000 + 10 * i)).collect();
    let hundred = format!("[{}]", hundred.join(", "));
    let million: Vec<String> = (0..1_000_000).map(|i| format!("{i}.0")).collect();
    let million = format!("[{}]", million.join(","));
    for (label, text, expect) in [
        (
            "100x100x100 grid",
            plan(
                &(vary("survey.0.area_deg2", &hundred)
                    + &vary("survey.1.area_deg2", &hundred)
                    + &vary(
                        "survey.0.tracer.0.p",
                        "[0.5, 0.6, 0.7, 0.8, 0.9, 1.0, 1.1, 1.2, 1.3, 1.4, 1.5]",
                    )),
            ),
            "allow-large",
        ),
        (
            "10^6 values",
            plan(&vary("survey.0.area_deg2", &million)),
            "input limit",
        ),
        (
            "path varied twice",
            plan(
                &(vary("survey.0.area_deg2", "[1000.0]") + &vary("survey.0.area_deg2", "[2000.0]")),
            ),
            "twice",
        ),
        (
            "empty values",
            plan(&vary("survey.0.area_deg2", "[]")),
            "values",
        ),
        (
            "bad index",
            plan(&vary("survey.9.area_deg2", "[1000.0]")),
            "survey.9",
        ),
        (
            "bad value",
            plan(&vary("survey.0.area_deg2", "[-5.0]")),
            "area_deg2",
        ),
        (
            "bad value type",
            plan(&vary("survey.0.area_deg2", "[\"big\"]")),
            "area_deg2",
        ),
        (
            "scenario missing",
            "[plan]\nscenario = \"nope.toml\"\n".into(),
            "nope.toml",
        ),
        (
            "no scenario key",
            "[plan]\nname = \"x\"\n".into(),
            "scenario",
        ),
        (
            "unknown key",
            "[plan]\nscenario = \"demo\"\nspeed = 3\n".into(),
            "unknown key",
        ),
        (
            "dark_energy_w0 with full transfer",
            plan(&vary("cosmology.dark_energy_w0", "[-0.9]")),
            "dark_energy_w0",
        ),
        (
            "empty probes",
            plan(&vary("scenario.probes", "[[]]")),
            "probes",
        ),
        (
            "duplicate shapes",
            plan(&vary("scenario.shapes", "[[\"local\", \"local\"]]")),
            "twice",
        ),
    ] {
        v.push(case(
            "plan",
            label,
            &[("p.toml", text)],
            &["check", "p.toml"],
            expect,
        ));
    }
    // The 10^6-value plan above 1 MiB is refused by size; a 10^5-value list under the
    // size limit is refused by the grid guard.
    let many: Vec<String> = (0..100_000).map(|i| format!("{i}")).collect();
    v.push(case(
        "plan",
        "10^5 values",
        &[(
            "p.toml",
            plan(&vary(
                "survey.0.area_deg2",
                &format!("[{}]", many.join(",")),
            )),
        )],
        &["check", "p.toml"],
        "allow-large",
    ));
    v.push(case(
        "plan",
        "batch: path varied twice",
        &[(
            "p.toml",
            plan(
                &(vary("survey.0.area_deg2", "[1000.0]") + &vary("survey.0.area_deg2", "[2000.0]")),
            ),
        )],
        &["batch", "p.toml", "--out", "b"],
        "twice",
    ));
    // --- special files.
    for (label, path, expect) in [
        ("/dev/zero", "/dev/zero", "regular file"),
        ("/dev/urandom", "/dev/urandom", "regular file"),
        ("/dev/null", "/dev/null", "regular file"),
        ("a folder", ".", "regular file"),
        ("missing", "missing.toml", "missing.toml"),
    ] {
        v.push(case(
            "special file",
            &format!("check {label}"),
            &[],
            &["check", path],
            expect,
        ));
        v.push(case(
            "special file",
            &format!("--cosmology {label}"),
            &[],
            &["background", "--cosmology", path],
            expect,
        ));
        v.push(case(
            "special file",
            &format!("run {label}"),
            &[],
            &["run", path, "--out", "o"],
            expect,
        ));
        v.push(case(
            "special file",
            &format!("survey {label}"),
            &[],
            &["survey", path],
            expect,
        ));
        v.push(case(
            "special file",
            &format!("--experiment {label}"),
            &[],
            &["cmb", "--experiment", path],
            expect,
        ));
        v.push(case(
            "special file",
            &format!("batch {label}"),
            &[],
            &["batch", path, "--out", "b"],
            expect,
        ));
    }
    let big = "# padding\n".repeat(200_000);
    v.push(case(
        "special file",
        "2 MB file",
        &[("big.toml", big)],
        &["check", "big.toml"],
        "input limit",
    ));
    v.push(case(
        "special file",
        "not UTF-8",
        &[(
            "bin.toml",
            String::from_utf8_lossy(&[0x5b, 0x63, 0x5d]).into_owned(),
        )],
        &["check", "bin.toml"],
        "bin.toml",
    ));
    // --- command-line flags.
    for (label, args, expect) in [
        (
            "--volume 1e9 (cost)",
            vec![
                "survey", "--volume", "1e9", "--z", "1", "--nbar", "1e-3", "--b1", "2",
            ],
            "allow-large",
        ),
        (
            "--volume 1e-12 (no modes)",
            vec![
                "survey", "--volume", "1e-12", "--z", "1", "--nbar", "1e-3", "--b1", "2",
            ],
            "no Fourier modes",
        ),
        (
            "--volume -1",
            vec![
                "survey", "--volume", "-1", "--z", "1", "--nbar", "1e-3", "--b1", "2",
            ],
            "volume",
        ),
        (
            "--volume nan",
            vec![
                "survey", "--volume", "nan", "--z", "1", "--nbar", "1e-3", "--b1", "2",
            ],
            "volume",
        ),
        ("--z -1", qv("1", "-1", "1e-3", "2"), "--z"),
        ("--z 1e9", qv("1", "1e9", "1e-3", "2"), "--z"),
        ("--nbar 0", qv("1", "1", "0", "2"), "--nbar"),
        ("--nbar 1e300", qv("1", "1", "1e300", "2"), "--nbar"),
        ("--b1 1e300", qv("1", "1", "1e-3", "1e300"), "--b1"),
        ("--b1 -2", qv("1", "1", "1e-3", "-2"), "--b1"),
        ("--kmax 0", qf(&["--kmax", "0"]), "--kmax"),
        ("--kmax nan", qf(&["--kmax", "nan"]), "--kmax"),
        ("--kmax 0.1,0.1", qf(&["--kmax", "0.1,0.1"]), "twice"),
        ("--kmax x", qf(&["--kmax", "x"]), "--kmax"),
        ("--probes P,P", qf(&["--probes", "P,P"]), "twice"),
        ("--probes X", qf(&["--probes", "X"]), "--probes"),
        (
            "--shapes local,local",
            qf(&["--shapes", "local,local"]),
            "twice",
        ),
        ("--shapes cubic", qf(&["--shapes", "cubic"]), "--shapes"),
        ("--threads 0", qf(&["--threads", "0"]), "--threads"),
        ("--threads -1", qf(&["--threads", "-1"]), "-1"),
        ("--threads 1e9", qf(&["--threads", "1e9"]), "--threads"),
        (
            "--linear-power x",
            qf(&["--linear-power", "x"]),
            "--linear-power",
        ),
        ("survey without input", vec!["survey"], "FILE"),
        ("cmb --fsky 0", vec!["cmb", "--fsky", "0"], "--fsky"),
        (
            "cmb --fsky 1e-300",
            vec!["cmb", "--fsky", "1e-300"],
            "--fsky",
        ),
        ("cmb --fsky 2", vec!["cmb", "--fsky", "2"], "--fsky"),
        ("cmb --fsky nan", vec!["cmb", "--fsky", "nan"], "--fsky"),
        ("cmb --lmax 1", vec!["cmb", "--lmax", "1"], "lmax"),
        ("cmb --lmax 100000", vec!["cmb", "--lmax", "100000"], "lmax"),
        (
            "cmb --lmax 500,500",
            vec!["cmb", "--lmax", "500,500"],
            "twice",
        ),
        ("cmb --lmax -5", vec!["cmb", "--lmax", "-5"], "-5"),
        ("cmb --fields T,T", vec!["cmb", "--fields", "T,T"], "twice"),
        ("cmb --fields B", vec!["cmb", "--fields", "B"], "--fields"),
        (
            "cmb --shapes local,local",
            vec!["cmb", "--shapes", "local,local"],
            "twice",
        ),
        (
            "cmb --shell-width -1",
            vec!["cmb", "--shell-width", "-1", "--lmax", "100"],
            "-1",
        ),
        (
            "cmb thawing cosmology, full transfer",
            vec![
                "cmb",
                "--cosmology",
                "cosmology_thawing_de.toml",
                "--lmax",
                "100",
            ],
            "cosmology_thawing_de.toml",
        ),
        (
            "spectra full thawing",
            vec![
                "spectra",
                "--transfer",
                "full",
                "--cosmology",
                "cosmology_thawing_de.toml",
                "--lmax",
                "100",
            ],
            "cosmology_thawing_de.toml",
        ),
        (
            "spectra --lmax 1",
            vec!["spectra", "--transfer", "shell", "--lmax", "1"],
            "lmax",
        ),
        (
            "spectra --lmax 10^6",
            vec!["spectra", "--transfer", "shell", "--lmax", "1000000"],
            "lmax",
        ),
        (
            "spectra --shell-width 1e9",
            vec!["spectra", "--transfer", "shell", "--shell-width", "1e9"],
            "shell",
        ),
        ("background --z -5", vec!["background", "--z", "-5"], "z"),
        ("background --z nan", vec!["background", "--z", "nan"], "z"),
        (
            "background --z 1e30",
            vec!["background", "--z", "1e30"],
            "z",
        ),
        (
            "run thawing cosmology",
            vec![
                "run",
                "--cosmology",
                "cosmology_thawing_de.toml",
                "--out",
                "o",
            ],
            "cosmology_thawing_de.toml",
        ),
        (
            "run --threads 0",
            vec!["run", "--threads", "0", "--out", "o"],
            "--threads",
        ),
        (
            "run unwritable --out",
            vec!["run", "--out", "/proc/ngreach-no"],
            "--out",
        ),
        (
            "run --out is a file",
            vec!["run", "--out", "cmb_ground.toml"],
            "--out",
        ),
        (
            "batch --shard 3/3",
            vec!["batch", "p.toml", "--shard", "3/3"],
            "--shard",
        ),
        (
            "batch --shard x",
            vec!["batch", "p.toml", "--shard", "x"],
            "--shard",
        ),
        (
            "batch --shard 0/0",
            vec!["batch", "p.toml", "--shard", "0/0"],
            "--shard",
        ),
        (
            "merge missing folder",
            vec!["merge", "no-such-out"],
            "no-such-out",
        ),
        (
            "merge missing shard",
            vec!["merge", "out", "no-such-shard"],
            "no-such-shard",
        ),
        (
            "merge a file as shard",
            vec!["merge", "out", "cmb_ground.toml"],
            "cmb_ground.toml",
        ),
        ("check nothing", vec!["check"], "FILE"),
        ("unknown command", vec!["frobnicate"], "frobnicate"),
    ] {
        v.push(case("flag", label, &[], &args, expect));
    }
    let zs: Vec<String> = (0..5000).map(|i| format!("{}", i as f64 * 1e-3)).collect();
    let zs = zs.join(",");
    v.push(Case {
        kind: "flag",
        label: "background --z with 5000 values".into(),
        files: Vec::new(),
        args: vec!["background".into(), "--z".into(), zs],
        env: Vec::new(),
        expect: "allow-large".into(),
        warning: false,
    });
    v.push(case(
        "flag",
        "background --z 1,1",
        &[],
        &["background", "--z", "1,1"],
        "twice",
    ));
    v.push(case(
        "plan",
        "value listed twice",
        &[("p.toml", "[plan]\nscenario = \"demo\"\n[[plan.vary]]\npath = \"survey.0.area_deg2\"\nvalues = [1000.0, 1000.0]\n".into())],
        &["check", "p.toml"],
        "twice",
    ));
    v.push(case(
        "survey",
        "sigma rule leaves no modes",
        &[(
            "s.toml",
            SURVEY
                .replace(
                    "area_deg2 = 1000.0\nz_edges = [0.5, 1.0]",
                    "area_deg2 = 100.0\nz_edges = [0.1, 0.2]",
                )
                .replace("z_edges", "kmax_rule = \"sigma\"\nsigma_nl = 0.05\nz_edges"),
        )],
        &["survey", "s.toml"],
        "no Fourier modes",
    ));
    v.push(case(
        "scenario",
        "every l_max below the experiment's l_min",
        &[(
            "sc.toml",
            scenario(
                "lmax = [20, 25]\ntransfer = \"shell\"",
                "[[cmb]]\nfile = \"cmb_ground.toml\"\n",
            ),
        )],
        &["check", "sc.toml"],
        "l_min",
    ));
    v.push(case(
        "flag",
        "merge of an empty folder",
        &[("empty/.keep", String::new())],
        &["merge", "empty"],
        "no finished scenario",
    ));
    // --- environment variables.
    for val in ["abc", "-1", "0", "nan", "inf", ""] {
        let mut c = case(
            "environment",
            &format!("NGREACH_CACHE_MAX_GB={val:?}"),
            &[],
            &["check", "cmb_ground.toml"],
            "NGREACH_CACHE_MAX_GB",
        );
        c.env.push(("NGREACH_CACHE_MAX_GB", val.into()));
        v.push(c);
    }
    // --- still meaningful: warnings, exit 0.
    let mut w = case(
        "warning",
        "k_max below k_min in one bin only",
        &[(
            "s.toml",
            SURVEY.replace("z_edges = [0.5, 1.0]", "z_edges = [0.5, 0.51, 1.5]"),
        )],
        &["survey", "s.toml", "--kmax", "0.02", "--format", "json"],
        "redshift bins",
    );
    w.warning = true;
    v.push(w);
    // Half of the shards merged: grid points 0 and 2 of a round-robin split are present.
    let point = |i: usize| format!("{{\"index\": {i}, \"folder\": \"s{i:04}\", \"values\": {{}}}}");
    let summary = "{\"rows\": [], \"crossover\": []}".to_string();
    let mut w = case(
        "warning",
        "merge of half the shards",
        &[
            ("shard0/s0000/point.json", point(0)),
            ("shard0/s0000/summary.json", summary.clone()),
            ("shard0/s0002/point.json", point(2)),
            ("shard0/s0002/summary.json", summary),
        ],
        &["merge", "merged", "shard0"],
        "missing",
    );
    w.warning = true;
    v.push(w);
    let mut w = case(
        "warning",
        "--threads 100000 capped",
        &[],
        &qf(&["--threads", "100000", "--kmax", "0.05"]),
        "capped",
    );
    w.warning = true;
    v.push(w);
    v
}

#[test]
fn hostile_corpus_is_refused_cleanly() {
    let dir = scratch("corpus");
    // A valid plan for the shard-flag cases.
    std::fs::write(
        dir.join("p.toml"),
        "[plan]\nscenario = \"scenario_demo.toml\"\n",
    )
    .unwrap();
    let cases = corpus();
    let mut counts: BTreeMap<&str, usize> = BTreeMap::new();
    let mut failures = Vec::new();
    let mut slowest = (0.0, String::new());
    for (i, c) in cases.iter().enumerate() {
        let cdir = dir.join(format!("case{i:03}"));
        std::fs::create_dir_all(&cdir).unwrap();
        for e in std::fs::read_dir(&dir).unwrap() {
            let p = e.unwrap().path();
            if p.is_file() {
                std::fs::copy(&p, cdir.join(p.file_name().unwrap())).unwrap();
            }
        }
        for (name, text) in &c.files {
            let path = cdir.join(name);
            std::fs::create_dir_all(path.parent().unwrap()).unwrap();
            std::fs::write(path, text).unwrap();
        }
        let env: Vec<(&str, &str)> = c.env.iter().map(|(k, v)| (*k, v.as_str())).collect();
        let o = run_bounded(&cdir, &c.args, &env);
        *counts.entry(c.kind).or_default() += 1;
        if o.seconds > slowest.0 {
            slowest = (o.seconds, c.label.clone());
        }
        let what = format!("[{}] {} ({:?})", c.kind, c.label, c.args);
        let panicked = o.stderr.contains("panicked") || o.code == Some(101);
        let ok = if c.warning {
            o.code == Some(0)
                && o.stderr
                    .lines()
                    .any(|l| l.starts_with("warning:") && l.contains(&c.expect))
        } else {
            o.code == Some(2)
                && o.stderr.lines().any(|l| l.starts_with("error:"))
                && o.stderr.contains(&c.expect)
        };
        if panicked || !ok {
            failures.push(format!(
                "{what}: exit {:?} after {:.1} s: {}",
                o.code,
                o.seconds,
                o.stderr.trim()
            ));
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
    println!(
        "hostile corpus: {} cases {counts:?}; slowest {:.2} s ({})",
        cases.len(),
        slowest.0,
        slowest.1
    );
    assert!(cases.len() >= 150, "{} cases", cases.len());
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n")
    );
}
