//! The `ngreach` binary: parse, dispatch, report errors. No physics here.

use std::io::{IsTerminal, Write};
use std::process::ExitCode;
use std::time::Duration;

use clap::Parser;
use ngreach::cli::{Cli, Command};
use ngreach::commands;
use ngreach::error::{Error, Location};
use ngreach::limits::{self, Limits};
use ngreach::progress::{LogLines, Progress, TerminalBar};

/// How often plain progress lines are written when stderr is not a terminal.
const LOG_INTERVAL: Duration = Duration::from_secs(30);

/// Prints a warning on stderr (always, also with --quiet).
fn warn(msg: &str) {
    eprintln!("warning: {msg}");
}

/// The progress handle for this invocation: nothing with --quiet, a bar on a terminal,
/// timestamped lines otherwise.
fn progress_for(quiet: bool) -> Progress {
    if quiet {
        Progress::silent()
    } else if std::io::stderr().is_terminal() {
        Progress::leak(Box::new(TerminalBar::new()))
    } else {
        Progress::leak(Box::new(LogLines::new(
            Box::new(std::io::stderr()),
            LOG_INTERVAL,
        )))
    }
}

/// Validates the environment variables ngreach reads as numbers.
fn check_env() -> ngreach::Result<()> {
    if let Some(v) = std::env::var_os("NGREACH_CACHE_MAX_GB") {
        let text = v.to_string_lossy();
        match text.trim().parse::<f64>() {
            Ok(x) if x.is_finite() && x > 0.0 && x <= 1e6 => {}
            _ => {
                return Err(Error::BadField {
                    at: Location::Env("NGREACH_CACHE_MAX_GB".into()),
                    field: "NGREACH_CACHE_MAX_GB".into(),
                    message: format!(
                        "`{text}` is not a cache size: give a number of gigabytes, 0 < size <= 1e6 (or unset it for the default)"
                    ),
                });
            }
        }
    }
    Ok(())
}

/// Refuses an empty list or a repeated entry given with `flag`.
fn distinct_flag<T: PartialEq + std::fmt::Debug>(items: &[T], flag: &str) -> ngreach::Result<()> {
    ngreach::scenario::distinct(
        items,
        &Location::Flag(flag.into()),
        flag.trim_start_matches('-'),
    )
}

/// The full CMB transfer needs a cosmological constant: refused at the cosmology file
/// that was given with `--cosmology`.
fn check_transfer_cosmology(
    transfer: ngreach::scenario::TransferChoice,
    c: &ngreach::cosmology::Cosmology,
    path: Option<&std::path::Path>,
) -> ngreach::Result<()> {
    let at = path.map_or(Location::Builtin, |p| Location::WholeFile(p.to_path_buf()));
    transfer.check(c, at, "w0")
}

/// Ends a progress step left open when a command returns early (an error), so that
/// the error is not drawn over a bar.
struct StopOnDrop(Progress);

impl Drop for StopOnDrop {
    fn drop(&mut self) {
        self.0.abort();
    }
}

fn run(cli: Cli) -> ngreach::Result<String> {
    check_env()?;
    let progress = progress_for(cli.quiet);
    let _stop = StopOnDrop(progress);
    let lim = Limits {
        allow_large: cli.allow_large,
    };
    match cli.command {
        Command::Background(a) => {
            let (c, src) = commands::resolve_cosmology(a.common.cosmology.as_deref())?;
            let z =
                a.z.unwrap_or_else(|| commands::background::DEFAULT_Z.to_vec());
            lim.list(Location::Flag("--z".into()), "z", z.len())?;
            distinct_flag(&z, "--z")?;
            Ok(commands::background::background_report(&c, &src, &z)?.render(a.common.format))
        }
        Command::Survey(a) => {
            set_threads(a.threads)?;
            let cosmo = match a.common.cosmology.as_deref() {
                Some(p) => Some(commands::resolve_cosmology(Some(p))?),
                None => None,
            };
            let (survey, c, src) = match (&a.file, a.volume) {
                (Some(f), _) => {
                    commands::survey::load_survey(f, cosmo.as_ref().map(|(c, s)| (c, s.as_str())))?
                }
                (None, Some(v)) => {
                    let (c, s) = cosmo.unwrap_or_else(|| {
                        (
                            ngreach::cosmology::Cosmology::planck2018(),
                            "built-in Planck 2018 base LCDM".into(),
                        )
                    });
                    let sv = ngreach::survey::Survey::quick(
                        v,
                        a.z.unwrap_or(0.0),
                        a.nbar.unwrap_or(0.0),
                        a.b1.unwrap_or(0.0),
                        a.real_space,
                        c.h(),
                    )?;
                    (sv, c, s)
                }
                (None, None) => {
                    return Err(ngreach::Error::BadField {
                        at: ngreach::Location::Flag("survey".into()),
                        field: "FILE".into(),
                        message: "give a survey file, or the quick mode --volume GPC3 --z Z --nbar N --b1 B".into(),
                    });
                }
            };
            let probes = commands::survey::parse_probes(&a.probes)?;
            distinct_flag(&probes, "--probes")?;
            let shapes = commands::survey::parse_shapes(&a.shapes, "--shapes")?;
            distinct_flag(
                &shapes.iter().map(|s| s.name()).collect::<Vec<_>>(),
                "--shapes",
            )?;
            // Every k_max is checked for range, repeats, modes and cost before the work.
            let h = c.h();
            let kmax_list = a
                .kmax
                .clone()
                .unwrap_or_else(|| vec![survey.kmax_default_mpc / h]);
            let kat = Location::Flag(if a.kmax.is_some() {
                "--kmax".into()
            } else {
                "--kmax (default)".into()
            });
            lim.list(kat.clone(), "kmax", kmax_list.len())?;
            if a.kmax.is_some() {
                distinct_flag(&kmax_list, "--kmax")?;
            }
            for &k in &kmax_list {
                if !(k.is_finite() && (1e-3..=5.0).contains(&k)) {
                    return Err(Error::out_of_range(
                        kat,
                        "kmax",
                        k,
                        "1e-3 <= kmax <= 5 h/Mpc",
                    ));
                }
            }
            let growth = ngreach::cosmology::LinearPower::eisenstein_hu(&c);
            let kmax_mpc: Vec<f64> = kmax_list.iter().map(|k| k * h).collect();
            let warnings = limits::check_kmax_modes(&survey, &kmax_mpc, &growth, h, &kat, "kmax")?;
            let top = kmax_mpc.iter().copied().fold(0.0, f64::max);
            let settings = ngreach::survey::fisher::SurveySettings {
                parallel: a.threads != Some(1),
                progress,
                ..Default::default()
            };
            let cost_at = Location::Flag(if a.volume.is_some() {
                "--kmax / --volume".into()
            } else {
                "--kmax".into()
            });
            limits::check_survey_cost(&survey, top, &growth, settings.dk_over_kf, cost_at, &lim)?;
            for w in &warnings {
                warn(w);
            }
            let opts = commands::survey::SurveyOptions {
                kmax_h_mpc: a.kmax,
                probes,
                shapes,
                tau_nl: ngreach::shapes::lists_tau_nl(&a.shapes),
                linear_power: a.linear_power,
                covariance: a.covariance,
                settings,
            };
            progress.step(
                &format!("survey Fisher: {} (redshift bins)", survey.name),
                Some(survey.bins.len() as u64),
            );
            let res = commands::survey::survey_report(&survey, &c, &src, &opts);
            progress.finish();
            let (mut r, _) = res?;
            with_warnings(&mut r, &warnings);
            Ok(r.render(a.common.format))
        }
        Command::Spectra(a) => {
            let (c, src) = commands::resolve_cosmology(a.common.cosmology.as_deref())?;
            if a.transfer == commands::spectra::TransferKind::Full {
                check_transfer_cosmology(
                    ngreach::scenario::TransferChoice::Full,
                    &c,
                    a.common.cosmology.as_deref(),
                )?;
            }
            let opts = commands::spectra::SpectraOptions {
                transfer: a.transfer,
                lmax: a.lmax,
                shell_sigma_mpc: a.shell_width,
                damping: !a.no_damping,
                cache: cache_options(&a.cache),
                lensed: a.lensed,
            };
            Ok(commands::spectra::spectra_report(&c, &src, &opts)?.render(a.common.format))
        }
        Command::Cmb(a) => {
            set_threads(a.threads)?;
            let (c, src) = commands::resolve_cosmology(a.common.cosmology.as_deref())?;
            let mut exp = match &a.experiment {
                Some(p) => ngreach::cmb::experiment::load_experiment(p)?,
                None => ngreach::cmb::experiment::Experiment::ideal(2000),
            };
            if let Some(f) = a.fsky {
                ngreach::cmb::experiment::check_f_sky(f, Location::Flag("--fsky".into()), "fsky")?;
                exp.f_sky = f;
            }
            if let Some(l) = &a.lmax {
                lim.list(Location::Flag("--lmax".into()), "lmax", l.len())?;
                distinct_flag(l, "--lmax")?;
            }
            let lmax = match a.lmax {
                Some(v) => v,
                None => {
                    let top = exp.lmax();
                    let mut v: Vec<usize> = [250, 500, 1000, 1500, 2000]
                        .into_iter()
                        .filter(|&l| l < top)
                        .collect();
                    v.push(top);
                    v
                }
            };
            if a.experiment.is_none() {
                let top = lmax.iter().copied().max().unwrap_or(2000);
                exp.lmax_t = top;
                exp.lmax_e = top;
            }
            // Full transfer unless the shell model's own options ask for the shell.
            let transfer = a
                .transfer
                .unwrap_or(if a.shell_width.is_some() || a.no_damping {
                    ngreach::scenario::TransferChoice::Shell
                } else {
                    ngreach::scenario::TransferChoice::Full
                });
            check_transfer_cosmology(transfer, &c, a.common.cosmology.as_deref())?;
            let fields = commands::cmb::parse_fields(&a.fields)?;
            distinct_flag(&fields, "--fields")?;
            let shapes = commands::survey::parse_shapes(&a.shapes, "--shapes")?;
            // `--shapes tau_nl` alone is a valid CMB request (no f_NL shape).
            if !(shapes.is_empty() && ngreach::shapes::lists_tau_nl(&a.shapes)) {
                distinct_flag(
                    &shapes.iter().map(|s| s.name()).collect::<Vec<_>>(),
                    "--shapes",
                )?;
            }
            let opts = commands::cmb::CmbOptions {
                experiment: exp,
                transfer,
                shell_width_mpc: a.shell_width,
                damping: !a.no_damping,
                lmax,
                fields,
                shapes,
                tau_nl: ngreach::shapes::lists_tau_nl(&a.shapes),
                parallel: a.threads != Some(1),
                cache: cache_options(&a.cache),
                spectra: a.spectra.unwrap_or(
                    if transfer == ngreach::scenario::TransferChoice::Shell {
                        ngreach::cmb::lensing::CovarianceSpectra::Unlensed
                    } else {
                        ngreach::cmb::lensing::CovarianceSpectra::Lensed
                    },
                ),
                delensing: a.delensing,
            };
            progress.step(
                "CMB forecast: transfer functions, radial functions, Fisher sums",
                None,
            );
            let res = commands::cmb::cmb_report(&c, &src, &opts);
            progress.finish();
            Ok(res?.0.render(a.common.format))
        }
        Command::Batch(a) => {
            set_threads(a.threads)?;
            let shard = a
                .shard
                .as_deref()
                .map(ngreach::batch::Shard::parse)
                .transpose()?;
            let plan = ngreach::batch::load_plan_with(&a.plan, &lim)?;
            for p in &plan.points {
                for w in limits::check_scenario(&p.scenario, &lim)? {
                    warn(&format!("grid point {}: {w}", p.index));
                }
            }
            ngreach::input::check_output_dir(&a.out, "--out")?;
            let settings = ngreach::pipeline::RunSettings {
                parallel: a.threads != Some(1),
                cache: cache_options(&a.cache),
                progress,
                ..Default::default()
            };
            let outputs = ngreach::report::outputs::OutputOptions {
                tables: a.tables,
                report: true,
            };
            let r = commands::batch::run_batch(&plan, &a.out, shard, &settings, &outputs)?;
            Ok(format!(
                "batch `{}`: {} scenario(s) computed, {} already complete (skipped), {} left to other shards; combined table of {} scenario(s) in {}/batch_summary.csv\n",
                plan.name,
                r.ran.len(),
                r.skipped.len(),
                r.other_shards,
                r.combined,
                a.out.display()
            ))
        }
        Command::Merge(a) => {
            let n = commands::merge::merge_expecting(&a.out, &a.parts, a.expect)?;
            if n == 0 {
                return Err(Error::BadField {
                    at: Location::WholeFile(a.out.clone()),
                    field: "OUT".into(),
                    message: "no finished scenario folders (with summary.json and point.json) in it or in the shard folders given; nothing was merged".into(),
                });
            }
            if let Some(w) = ngreach::batch::grid_gaps(&a.out) {
                warn(&w);
            }
            Ok(format!(
                "merged: combined table of {n} scenario(s) in {}/batch_summary.csv\n",
                a.out.display()
            ))
        }
        Command::Check(_) => Err(Error::Conflict {
            at: Location::Builtin,
            message: "`check` is dispatched before the other commands".into(),
        }),
        Command::Run(a) => {
            set_threads(a.threads)?;
            let mut sc = commands::run::scenario_for(a.scenario.as_deref())?;
            if let Some(p) = a.cosmology.as_deref() {
                sc.cosmology = ngreach::cosmology::load_cosmology_file(p)?;
                let at = Location::WholeFile(p.to_path_buf());
                if !sc.experiments.is_empty() {
                    sc.transfer.check(&sc.cosmology, at.clone(), "w0")?;
                }
                if !sc.surveys.is_empty() {
                    sc.linear_power.check(&sc.cosmology, at, "w0")?;
                }
            }
            let warnings = limits::check_scenario(&sc, &lim)?;
            for w in &warnings {
                warn(w);
            }
            ngreach::input::check_output_dir(&a.out, "--out")?;
            let settings = ngreach::pipeline::RunSettings {
                parallel: a.threads != Some(1),
                cache: cache_options(&a.cache),
                progress,
                ..Default::default()
            };
            let outputs = ngreach::report::outputs::OutputOptions {
                tables: a.tables,
                report: true,
            };
            let (text, result) = commands::run::run_to_dir_with(&sc, &a.out, &settings, &outputs)?;
            if !warnings.is_empty() {
                add_warnings_to_summary(&a.out.join("summary.json"), &warnings)?;
            }
            Ok(match a.format {
                ngreach::report::SummaryFormat::Json => {
                    let mut j = ngreach::report::outputs::summary_json(&result);
                    if let serde_json::Value::Object(m) = &mut j {
                        m.insert("warnings".into(), warnings.clone().into());
                    }
                    serde_json::to_string_pretty(&j).unwrap_or_default() + "\n"
                }
                _ => text,
            })
        }
    }
}

/// `--cache-dir DIR` / `--no-cache`; without either, the cache resolves its directory from
/// the environment (see `CacheOptions::resolve_dir`): flag > environment > default.
fn cache_options(a: &ngreach::cli::CacheArgs) -> ngreach::cmb::boltzmann::CacheOptions {
    use ngreach::cmb::boltzmann::CacheOptions;
    match (&a.cache_dir, a.no_cache) {
        (_, true) => CacheOptions::disabled(),
        (Some(d), false) => CacheOptions::in_dir(d),
        (None, false) => CacheOptions::default(),
    }
}

/// Adds `warnings` to the summary.json a run wrote.
fn add_warnings_to_summary(path: &std::path::Path, warnings: &[String]) -> ngreach::Result<()> {
    let io = |source| Error::Io {
        path: path.to_path_buf(),
        source,
    };
    let text = std::fs::read_to_string(path).map_err(io)?;
    let mut j: serde_json::Value = serde_json::from_str(&text).map_err(|e| Error::Syntax {
        at: Location::WholeFile(path.to_path_buf()),
        message: e.to_string(),
    })?;
    if let serde_json::Value::Object(m) = &mut j {
        m.insert("warnings".into(), warnings.to_vec().into());
    }
    ngreach::report::write_atomic(
        path,
        (serde_json::to_string_pretty(&j).unwrap_or_default() + "\n").as_bytes(),
    )
}

/// Adds the warnings to a report's JSON (`warnings`, always present) and notes.
fn with_warnings(r: &mut ngreach::report::Report, warnings: &[String]) {
    r.json_extra
        .push(("warnings".into(), warnings.to_vec().into()));
    for w in warnings {
        r.notes.push(format!("warning: {w}"));
    }
}

/// Sizes the global thread pool (`--threads`, capped at 4 per core); without it rayon
/// uses every core.
fn set_threads(n: Option<usize>) -> ngreach::Result<()> {
    if let Some(n) = n {
        let (n, capped) = limits::thread_count(n)?;
        if let Some(w) = capped {
            warn(&w);
        }
        // Only the first call can size the pool; later calls are harmless no-ops.
        let _ = rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build_global();
    }
    Ok(())
}

/// `ngreach check FILE...`: every file is checked and every bad one reported (exit 2
/// when any is bad).
fn check_all(files: &[std::path::PathBuf], allow_large: bool) -> ExitCode {
    let lim = Limits { allow_large };
    let mut out = std::io::stdout().lock();
    let mut bad = 0;
    for f in files {
        match commands::check::check_file_with(f, &lim) {
            Ok((text, warnings)) => {
                for w in &warnings {
                    warn(w);
                }
                let _ = writeln!(out, "{text}");
            }
            Err(e) => {
                bad += 1;
                eprintln!("error: {e}");
            }
        }
    }
    if bad > 0 {
        if files.len() > 1 {
            eprintln!("error: {bad} of {} files failed the check", files.len());
        }
        ExitCode::from(2)
    } else {
        ExitCode::SUCCESS
    }
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    if let Command::Check(a) = &cli.command {
        if let Err(e) = check_env() {
            eprintln!("error: {e}");
            return ExitCode::from(2);
        }
        return check_all(&a.files, cli.allow_large);
    }
    match run(cli) {
        Ok(text) => {
            let mut out = std::io::stdout().lock();
            // A closed pipe (e.g. `| head`) is not an error worth reporting.
            let _ = out.write_all(text.as_bytes());
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("error: {e}");
            if e.is_input_error() {
                ExitCode::from(2)
            } else {
                ExitCode::from(1)
            }
        }
    }
}
