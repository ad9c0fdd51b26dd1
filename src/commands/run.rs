//! `ngreach run`: the main job. Until the CMB and survey Fisher engines exist it runs the
//! stages that do exist on the demo cosmology and says plainly which stages are missing.

use std::path::Path;

use crate::cosmology::Cosmology;
use crate::error::{Error, Location, Result};
use crate::report::Report;

/// Stages of the pipeline that are not built yet (listed in the output).
pub const NOT_BUILT: [&str; 4] = [
    "CMB bispectrum Fisher engine",
    "survey Fisher engine",
    "combiner and crossover k_max",
    "figures",
];

/// Runs the available stages.
///
/// # Errors
/// Scenario files are not readable yet; giving one is an input error.
pub fn run_report(scenario: Option<&Path>, c: &Cosmology, source: &str) -> Result<Report> {
    if let Some(p) = scenario {
        return Err(Error::Conflict {
            at: Location::WholeFile(p.to_path_buf()),
            message: "scenario files are not supported yet: the combiner is not built; \
                      run `ngreach run` without a file for the demo"
                .into(),
        });
    }
    let mut r = super::background::background_report(c, source, &[0.0, 0.5, 1.0, 2.0, 1100.0])?;
    r.command = "run (demo)".into();
    r.notes
        .push(format!("not built yet: {}", NOT_BUILT.join("; ")));
    Ok(r)
}
