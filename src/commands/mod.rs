//! The work behind each subcommand: typed options in, a [`crate::report::Report`] out.

pub mod background;
pub mod batch;
pub mod check;
pub mod cmb;
pub mod merge;
pub mod run;
pub mod spectra;
pub mod survey;

use std::path::Path;

use crate::cosmology::{Cosmology, load_cosmology_file};
use crate::error::Result;

/// Loads the cosmology named by `--cosmology`, or the Planck 2018 default.
///
/// # Errors
/// Any input error of the file.
pub fn resolve_cosmology(path: Option<&Path>) -> Result<(Cosmology, String)> {
    match path {
        Some(p) => Ok((load_cosmology_file(p)?, p.display().to_string())),
        None => Ok((
            Cosmology::planck2018(),
            "built-in Planck 2018 base LCDM".to_string(),
        )),
    }
}

/// The resolved cosmology as a JSON object (parameters and derived densities).
pub fn cosmology_json(c: &Cosmology, source: &str) -> serde_json::Value {
    let mut v = serde_json::to_value(c.params()).unwrap_or(serde_json::Value::Null);
    if let serde_json::Value::Object(m) = &mut v {
        m.insert("source".into(), source.into());
        m.insert("Omega_m".into(), crate::report::num(c.omega_m()));
        m.insert("Omega_r".into(), crate::report::num(c.omega_r()));
        m.insert("Omega_de".into(), crate::report::num(c.omega_de()));
        m.insert("neutrinos".into(), "massless".into());
    }
    v
}
