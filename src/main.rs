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
