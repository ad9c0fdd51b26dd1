//! `ngreach check`: validates input files of any kind and says what they would compute.

use std::path::Path;

use crate::error::{Error, Location, Result};
use crate::input::Source;

/// The kind of an input file, from its top-level tables.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FileKind {
    /// `[scenario]`.
    Scenario,
    /// `[plan]`.
    Plan,
    /// `[survey]`.
    Survey,
    /// `[experiment]`.
    Experiment,
    /// Only `[cosmology]`.
    Cosmology,
}

/// Detects the kind of a file.
///
/// # Errors
/// Syntax errors; a file with none of the known tables.
pub fn kind_of(src: &Source) -> Result<FileKind> {
    let doc: toml::Table = crate::input::parse_toml(src)?;
    for (key, kind) in [
        ("scenario", FileKind::Scenario),
        ("plan", FileKind::Plan),
        ("survey", FileKind::Survey),
        ("experiment", FileKind::Experiment),
        ("cosmology", FileKind::Cosmology),
    ] {
        if doc.contains_key(key) {
            return Ok(kind);
        }
    }
    Err(Error::BadField {
        at: Location::WholeFile(src.path().to_path_buf()),
        field: "top level".into(),
        message: "not an ngreach input: expected a [scenario], [plan], [survey], [experiment] or [cosmology] table".into(),
    })
}

/// Validates one file and describes it.
///
/// # Errors
/// The file's first input error.
pub fn check_file(path: &Path) -> Result<String> {
    let src = Source::read(path)?;
    let kind = kind_of(&src)?;
    let d = path.display();
    Ok(match kind {
        FileKind::Cosmology => {
            let c = crate::cosmology::load_cosmology_file(path)?;
            let p = c.params();
            format!(
                "{d}: cosmology, valid: omega_b = {}, omega_c = {}, h = {}, n_s = {}, A_s = {:.4e}, Omega_m = {:.4}",
                p.omega_b,
                p.omega_c,
                p.h,
                p.n_s,
                p.a_s,
                c.omega_m()
            )
        }
        FileKind::Experiment => {
            let e = crate::cmb::experiment::load_experiment(path)?;
            format!(
                "{d}: CMB experiment `{}`, valid: f_sky = {}, l = {}..{} (T) / {} (E), {} channel(s); `ngreach cmb --experiment {d}` forecasts T, E, T+E",
                e.name,
                e.f_sky,
                e.l_min,
                e.lmax_t,
                e.lmax_e,
                e.channels.len()
            )
        }
        FileKind::Survey => {
            let (s, _, _) = super::survey::load_survey(path, None)?;
            format!(
                "{d}: survey `{}`, valid: f_sky = {:.4}, {} redshift bin(s) from z = {} to {}, {} tracer(s); `ngreach survey {d}` forecasts P, B, P+B",
                s.name,
                s.f_sky,
                s.bins.len(),
                s.bins.first().map_or(0.0, |b| b.z_min),
                s.bins.last().map_or(0.0, |b| b.z_max),
                s.tracers.len()
            )
        }
        FileKind::Scenario => {
            let s = crate::scenario::load_scenario(path)?;
            format!(
                "{d}: scenario `{}`, valid: {} experiment(s), {} survey(s), shapes {}, l_max {:?}, k_max {:?} h/Mpc, transfer {:?}, linear power {}; `ngreach run {d}` computes it",
                s.name,
                s.experiments.len(),
                s.surveys.len(),
                s.shapes
                    .iter()
                    .map(|x| x.name())
                    .chain(s.tau_nl.then(|| crate::shapes::TAU_NL.to_string()))
                    .collect::<Vec<_>>()
                    .join(","),
                s.lmax,
                s.kmax_h_mpc,
                s.transfer,
                s.linear_power.name()
            )
        }
        FileKind::Plan => {
            let p = crate::batch::load_plan(path)?;
            format!(
                "{d}: batch plan `{}`, valid: {} scenario(s); `ngreach batch {d}` runs them",
                p.name,
                p.points.len()
            )
        }
    })
}
