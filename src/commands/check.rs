//! `ngreach check`: validates input files of any kind and says what they would compute.

use std::path::Path;

use crate::error::{Error, Location, Result};
use crate::input::Source;
use crate::limits::{self, Limits};

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

/// Validates one file and describes it (default cost limits).
///
/// # Errors
/// The file's first input error.
pub fn check_file(path: &Path) -> Result<String> {
    check_file_with(path, &Limits::default()).map(|(text, _)| text)
}

/// Validates one file with every rule a run of it applies (including the cost guards of
/// `limits`) and describes it; returns the description and warnings.
///
/// # Errors
/// The file's first input error.
pub fn check_file_with(path: &Path, limits: &Limits) -> Result<(String, Vec<String>)> {
    let src = Source::read(path)?;
    let kind = kind_of(&src)?;
    let d = path.display();
    let mut warnings = Vec::new();
    let text = match kind {
        FileKind::Cosmology => {
            let c = crate::cosmology::load_cosmology_file(path)?;
            let p = c.params();
            let full = crate::scenario::TransferChoice::Full
                .check(
                    &c,
                    src.find_key("cosmology", "dark_energy_w0"),
                    "dark_energy_w0",
                )
                .err()
                .map_or(String::new(), |_| {
                    "; dark_energy_w0 != -1 or dark_energy_wa != 0: CMB forecasts need the shell transfer (--transfer shell), the full Boltzmann transfer models a cosmological constant only".to_string()
                });
            format!(
                "{d}: cosmology, valid: baryon_density_h2 = {}, cdm_density_h2 = {}, hubble_constant_km_s_mpc = {}, spectral_index = {}, scalar_amplitude = {:.4e}, Omega_m = {:.4}{full}",
                p.omega_b,
                p.omega_c,
                100.0 * p.h,
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
            let (s, c, _) = super::survey::load_survey(path, None)?;
            let g = crate::cosmology::LinearPower::eisenstein_hu(&c);
            let at = src.find_key("survey", "kmax_h_mpc");
            warnings.extend(limits::check_kmax_modes(
                &s,
                &[s.kmax_default_mpc],
                &g,
                c.h(),
                &at,
                "kmax_h_mpc",
            )?);
            let dk = crate::survey::fisher::SurveySettings::default().dk_over_kf;
            limits::check_survey_cost(&s, s.kmax_default_mpc, &g, dk, at, limits)?;
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
            warnings.extend(limits::check_scenario(&s, limits)?);
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
            let p = crate::batch::load_plan_with(path, limits)?;
            for pt in &p.points {
                for w in limits::check_scenario(&pt.scenario, limits)? {
                    warnings.push(format!("grid point {}: {w}", pt.index));
                }
            }
            format!(
                "{d}: batch plan `{}`, valid: {} scenario(s); `ngreach batch {d}` runs them",
                p.name,
                p.points.len()
            )
        }
    };
    Ok((text, warnings))
}
