//! `ngreach run`: the main job on a scenario (the embedded demo when none is given):
//! both engines, the combiner, and every output file.

use std::io::{IsTerminal, Write};
use std::path::Path;
use std::time::Instant;

use crate::error::Result;
use crate::pipeline::{RunResult, RunSettings, run_scenario};
use crate::report::outputs::{OutputOptions, terminal_summary, write_outputs_with};
use crate::scenario::{Scenario, demo_scenario, load_scenario};

/// Progress on stderr: one self-overwriting line with the stage and the elapsed time,
/// shown only when stderr is a terminal and `--quiet` is not set. The stage counter is
/// the number of stages started so far.
pub struct Progress {
    enabled: bool,
    start: Instant,
    stage: usize,
}

impl Progress {
    /// Progress for an interactive run unless `quiet`.
    pub fn new(quiet: bool) -> Self {
        Self {
            enabled: !quiet && std::io::stderr().is_terminal(),
            start: Instant::now(),
            stage: 0,
        }
    }

    /// Announces a stage.
    pub fn stage(&mut self, name: &str) {
        self.stage += 1;
        if self.enabled {
            let mut e = std::io::stderr().lock();
            let _ = write!(
                e,
                "\r\x1b[K[{:>6.1} s] stage {}: {name}",
                self.start.elapsed().as_secs_f64(),
                self.stage
            );
            let _ = e.flush();
        }
    }

    /// Clears the line.
    pub fn finish(&mut self) {
        if self.enabled {
            let mut e = std::io::stderr().lock();
            let _ = write!(e, "\r\x1b[K");
            let _ = e.flush();
        }
    }
}

/// Loads the scenario (or the demo).
///
/// # Errors
/// Input errors of the scenario and the files it names.
pub fn scenario_for(path: Option<&Path>) -> Result<Scenario> {
    match path {
        Some(p) => load_scenario(p),
        None => demo_scenario(),
    }
}

/// Runs a scenario, writes its outputs into `out` (default options), returns the
/// terminal summary.
///
/// # Errors
/// Any stage's failure; I/O errors writing the outputs.
pub fn run_to_dir(
    sc: &Scenario,
    out: &Path,
    settings: &RunSettings,
    quiet: bool,
) -> Result<(String, RunResult)> {
    run_to_dir_with(sc, out, settings, quiet, &OutputOptions::default())
}

/// [`run_to_dir`] with output options (table format, report page).
///
/// # Errors
/// Any stage's failure; I/O errors writing the outputs.
pub fn run_to_dir_with(
    sc: &Scenario,
    out: &Path,
    settings: &RunSettings,
    quiet: bool,
    outputs: &OutputOptions,
) -> Result<(String, RunResult)> {
    let mut progress = Progress::new(quiet);
    let result = run_scenario(sc, settings, &mut |s| progress.stage(s))?;
    progress.stage("writing tables and figures");
    let files = write_outputs_with(&result, out, outputs)?;
    progress.finish();
    let mut text = terminal_summary(&result);
    text.push_str(&format!(
        "\nwrote {} files to {}: report.html (open in a browser), summary.json, {} tables, fisher/*.npy, table.tex, figures as PNG and SVG\n",
        files.len(),
        out.display(),
        outputs.tables.extension().to_uppercase()
    ));
    Ok((text, result))
}
