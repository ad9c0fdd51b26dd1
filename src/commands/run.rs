//! `ngreach run`: the main job on a scenario (the embedded demo when none is given):
//! both engines, the combiner, and every output file.

use std::path::Path;

use crate::error::Result;
use crate::pipeline::{RunResult, RunSettings, run_scenario};
use crate::report::outputs::{OutputOptions, terminal_summary, write_outputs_with};
use crate::scenario::{Scenario, demo_scenario, load_scenario};

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

/// Runs a scenario, writes its outputs into `out`, returns the terminal summary. Stages
/// are announced to `settings.progress`.
///
/// # Errors
/// Any stage's failure; I/O errors writing the outputs.
pub fn run_to_dir(
    sc: &Scenario,
    out: &Path,
    settings: &RunSettings,
) -> Result<(String, RunResult)> {
    run_to_dir_with(sc, out, settings, &OutputOptions::default())
}

/// [`run_to_dir`] with output options (table format, report page).
///
/// # Errors
/// Any stage's failure; I/O errors writing the outputs.
pub fn run_to_dir_with(
    sc: &Scenario,
    out: &Path,
    settings: &RunSettings,
    outputs: &OutputOptions,
) -> Result<(String, RunResult)> {
    let progress = settings.progress;
    let result = run_scenario(sc, settings, &mut |_| {})?;
    progress.step("writing tables and figures", None);
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
