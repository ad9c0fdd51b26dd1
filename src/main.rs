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
            };
            Ok(commands::spectra::spectra_report(&c, &src, &opts)?.render(a.common.format))
        }
        Command::Run(a) => {
            let (c, src) = commands::resolve_cosmology(a.common.cosmology.as_deref())?;
            let r = commands::run::run_report(a.scenario.as_deref(), &c, &src)?;
            Ok(r.render(a.common.format))
        }
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
