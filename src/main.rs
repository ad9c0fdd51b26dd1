//! The `ngreach` binary: parse, dispatch, report errors. No physics here.

use std::io::Write;
use std::process::ExitCode;

use clap::Parser;
use ngreach::cli::{Cli, Command};
use ngreach::commands;

fn run(cli: Cli) -> ngreach::Result<String> {
    match cli.command {
        Command::Background(a) => {
            let (c, src) = commands::resolve_cosmology(a.common.cosmology.as_deref())?;
            let z =
                a.z.unwrap_or_else(|| commands::background::DEFAULT_Z.to_vec());
            Ok(commands::background::background_report(&c, &src, &z)?.render(a.common.format))
        }
        Command::Survey(a) => {
            if let Some(n) = a.threads {
                // A second call (tests) keeps the first pool; that is harmless.
                let _ = rayon::ThreadPoolBuilder::new()
                    .num_threads(n.max(1))
                    .build_global();
            }
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
            let opts = commands::survey::SurveyOptions {
                kmax_h_mpc: a.kmax,
                probes: commands::survey::parse_probes(&a.probes)?,
                shapes: commands::survey::parse_shapes(&a.shapes, "--shapes")?,
                linear_power: a.linear_power,
                settings: ngreach::survey::fisher::SurveySettings {
                    parallel: a.threads != Some(1),
                    ..Default::default()
                },
            };
            let (r, _) = commands::survey::survey_report(&survey, &c, &src, &opts)?;
            Ok(r.render(a.common.format))
        }
        Command::Spectra(a) => {
            let (c, src) = commands::resolve_cosmology(a.common.cosmology.as_deref())?;
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
            set_threads(a.threads);
            let (c, src) = commands::resolve_cosmology(a.common.cosmology.as_deref())?;
            let mut exp = match &a.experiment {
                Some(p) => ngreach::cmb::experiment::load_experiment(p)?,
                None => ngreach::cmb::experiment::Experiment::ideal(2000),
            };
            if let Some(f) = a.fsky {
                if !(f > 0.0 && f <= 1.0) {
                    return Err(ngreach::Error::out_of_range(
                        ngreach::Location::Flag("--fsky".into()),
                        "fsky",
                        f,
                        "0 < fsky <= 1",
                    ));
                }
                exp.f_sky = f;
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
            let opts = commands::cmb::CmbOptions {
                experiment: exp,
                transfer,
                shell_width_mpc: a.shell_width,
                damping: !a.no_damping,
                lmax,
                fields: commands::cmb::parse_fields(&a.fields)?,
                shapes: commands::survey::parse_shapes(&a.shapes, "--shapes")?,
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
            let (r, _) = commands::cmb::cmb_report(&c, &src, &opts)?;
            Ok(r.render(a.common.format))
        }
        Command::Batch(a) => {
            set_threads(a.threads);
            let shard = a
                .shard
                .as_deref()
                .map(ngreach::batch::Shard::parse)
                .transpose()?;
            let plan = ngreach::batch::load_plan(&a.plan)?;
            let settings = ngreach::pipeline::RunSettings {
                parallel: a.threads != Some(1),
                cache: cache_options(&a.cache),
                ..Default::default()
            };
            let r = commands::batch::run_batch(&plan, &a.out, shard, &settings)?;
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
            let n = commands::batch::merge(&a.out, &a.parts)?;
            Ok(format!(
                "merged: combined table of {n} scenario(s) in {}/batch_summary.csv\n",
                a.out.display()
            ))
        }
        Command::Check(a) => {
            let mut out = String::new();
            for f in &a.files {
                out.push_str(&commands::check::check_file(f)?);
                out.push('\n');
            }
            Ok(out)
        }
        Command::Run(a) => {
            set_threads(a.threads);
            let mut sc = commands::run::scenario_for(a.scenario.as_deref())?;
            if let Some(p) = a.cosmology.as_deref() {
                sc.cosmology = ngreach::cosmology::load_cosmology_file(p)?;
            }
            let settings = ngreach::pipeline::RunSettings {
                parallel: a.threads != Some(1),
                cache: cache_options(&a.cache),
                ..Default::default()
            };
            let (text, result) = commands::run::run_to_dir(&sc, &a.out, &settings, a.quiet)?;
            Ok(match a.format {
                ngreach::report::Format::Json => {
                    serde_json::to_string_pretty(&ngreach::report::outputs::summary_json(&result))
                        .unwrap_or_default()
                        + "\n"
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

/// Sizes the global thread pool (`--threads`); without it rayon uses every core.
fn set_threads(n: Option<usize>) {
    if let Some(n) = n {
        // Only the first call can size the pool; later calls are harmless no-ops.
        let _ = rayon::ThreadPoolBuilder::new()
            .num_threads(n.max(1))
            .build_global();
    }
}

fn main() -> ExitCode {
    let cli = Cli::parse();
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
