//! Scenarios: one cosmology, one or more CMB experiments, one or more surveys, the shapes,
//! the l_max and k_max grids and the output options, in one TOML file.
//!
//! ```toml
//! [scenario]
//! name = "..."
//! shapes = ["local", "equilateral", "orthogonal", "tau_nl"]   # tau_nl optional
//! lmax = [500, 1000, 2000, 3000]
//! kmax_h_mpc = [0.05, 0.1, 0.2]
//! fields = ["T", "E", "T+E"]         # optional
//! probes = ["P", "B", "P+B"]         # optional
//! transfer = "full"                  # or "shell" (default "full")
//! cmb_spectra = "lensed"              # covariance: "lensed" (default with "full") or "unlensed"
//! delensing = 0.0                     # fraction of C^{phi phi} removed before lensing, 0..=1
//! linear_power = "eisenstein-hu"     # or "boltzmann" (the survey side's T(k))
//!
//! [cosmology]                        # optional; Planck 2018 defaults
//!
//! [[cmb]]
//! file = "cmb_satellite.toml"        # relative to the scenario file; or ideal = true
//!
//! [[survey]]
//! file = "survey_wide_spectro.toml"
//! ```
//! Referenced files are read relative to the scenario file; the embedded demo scenario
//! resolves them from copies compiled into the binary.

use std::path::{Path, PathBuf};

use serde::Deserialize;
use toml::Spanned;

use crate::cmb::bispectrum::FieldSet;
use crate::cmb::experiment::{Experiment, ExperimentFile};
use crate::cmb::lensing::CovarianceSpectra;
use crate::cosmology::{Background, Cosmology, CosmologyTable, Growth};
use crate::error::{Error, Location, Result};
use crate::input::{Source, parse_toml};
use crate::shapes::Shape;
use crate::survey::fisher::Probe;
use crate::survey::{Survey, SurveyFile};

/// Which CMB transfer functions to use.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize, clap::ValueEnum)]
#[serde(rename_all = "lowercase")]
pub enum TransferChoice {
    /// The finite-thickness Sachs-Wolfe shell with damping.
    Shell,
    /// The line-of-sight Boltzmann solution.
    Full,
}

impl TransferChoice {
    /// Checks that the transfer model can be computed for a cosmology: the Boltzmann
    /// solver behind `full` models a cosmological constant only.
    ///
    /// # Errors
    /// [`Error::BadField`] at `at` naming `field`, with w0 and wa, for `full` with
    /// w0 != -1 or wa != 0.
    pub fn check(self, cosmo: &Cosmology, at: Location, field: &str) -> Result<()> {
        let p = cosmo.params();
        if self == Self::Full && (p.w0 != -1.0 || p.wa != 0.0) {
            return Err(Error::BadField {
                at,
                field: field.into(),
                message: format!(
                    "the full CMB transfer (line-of-sight Boltzmann solver) needs a cosmological \
                     constant (dark_energy_w0 = -1, dark_energy_wa = 0; dark-energy perturbations \
                     are not modelled), the cosmology has dark_energy_w0 = {}, dark_energy_wa = {}; \
                     use transfer = \"shell\" (--transfer shell)",
                    p.w0, p.wa
                ),
            });
        }
        Ok(())
    }
}

/// Which linear matter power spectrum the survey side uses: the transfer function T(k)
/// of Eisenstein & Hu (1998) or the z = 0 matter transfer function of the line-of-sight
/// Boltzmann solver ([`crate::cmb::boltzmann::matter_transfer_of`]).
#[derive(
    Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, serde::Serialize, clap::ValueEnum,
)]
#[serde(rename_all = "kebab-case")]
pub enum LinearPowerChoice {
    /// The Eisenstein & Hu (1998) fitting formula with baryon features (the default).
    #[default]
    EisensteinHu,
    /// The Boltzmann solver's matter transfer function (cold dark matter plus baryons).
    Boltzmann,
}

impl LinearPowerChoice {
    /// The name used in input files, flags and outputs.
    pub fn name(self) -> &'static str {
        match self {
            Self::EisensteinHu => "eisenstein-hu",
            Self::Boltzmann => "boltzmann",
        }
    }

    /// Checks that the choice can be computed for a cosmology: the Boltzmann solver
    /// models a cosmological constant only.
    ///
    /// # Errors
    /// [`Error::BadField`] at `at` naming `field`, with w0 and wa, for `boltzmann` with
    /// w0 != -1 or wa != 0.
    pub fn check(self, cosmo: &Cosmology, at: Location, field: &str) -> Result<()> {
        let p = cosmo.params();
        if self == Self::Boltzmann && (p.w0 != -1.0 || p.wa != 0.0) {
            return Err(Error::BadField {
                at,
                field: field.into(),
                message: format!(
                    "`boltzmann` needs a cosmological constant (dark_energy_w0 = -1, \
                     dark_energy_wa = 0; dark-energy perturbations are not modelled), the \
                     cosmology has dark_energy_w0 = {}, dark_energy_wa = {}; use `eisenstein-hu`",
                    p.w0, p.wa
                ),
            });
        }
        Ok(())
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct ScenarioTable {
    name: Option<String>,
    shapes: Option<Spanned<Vec<String>>>,
    lmax: Option<Spanned<Vec<i64>>>,
    kmax_h_mpc: Option<Spanned<Vec<f64>>>,
    fields: Option<Spanned<Vec<String>>>,
    probes: Option<Spanned<Vec<String>>>,
    transfer: Option<Spanned<TransferChoice>>,
    linear_power: Option<Spanned<LinearPowerChoice>>,
    shell_width_mpc: Option<Spanned<f64>>,
    #[serde(default = "yes")]
    damping: bool,
    /// Survey covariance model for every survey ("realistic" or "gaussian"); overrides
    /// the survey files' `covariance`.
    covariance: Option<crate::survey::CovarianceModel>,
    cmb_spectra: Option<Spanned<CovarianceSpectra>>,
    delensing: Option<Spanned<f64>>,
}

fn yes() -> bool {
    true
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct CmbEntry {
    file: Option<Spanned<String>>,
    #[serde(default)]
    ideal: bool,
    /// Overrides applied to the experiment table: dotted paths to values.
    set: Option<toml::Table>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct SurveyEntry {
    file: Spanned<String>,
    /// Overrides applied to the survey table: dotted paths to values
    /// (e.g. `set = { area_deg2 = 5000.0, "tracer.0.p" = 1.6 }`).
    set: Option<toml::Table>,
}

/// Output options.
#[derive(Debug, Clone, Copy, Deserialize, serde::Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct OutputOptions {
    /// Write figures.
    #[serde(default = "yes")]
    pub figures: bool,
    /// Write the LaTeX table.
    #[serde(default = "yes")]
    pub latex: bool,
}

impl Default for OutputOptions {
    fn default() -> Self {
        Self {
            figures: true,
            latex: true,
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct ScenarioFile {
    scenario: ScenarioTable,
    cosmology: Option<CosmologyTable>,
    #[serde(default)]
    cmb: Vec<CmbEntry>,
    #[serde(default)]
    survey: Vec<SurveyEntry>,
    #[serde(default)]
    output: OutputOptions,
}

/// A resolved scenario.
#[derive(Debug, Clone)]
pub struct Scenario {
    /// Label.
    pub name: String,
    /// Where it came from.
    pub source: String,
    /// The cosmology.
    pub cosmology: Cosmology,
    /// CMB experiments.
    pub experiments: Vec<Experiment>,
    /// Surveys.
    pub surveys: Vec<Survey>,
    /// Shapes.
    pub shapes: Vec<Shape>,
    /// Also tau_NL (collapsed trispectrum; `tau_nl` in `shapes`).
    pub tau_nl: bool,
    /// l_max grid (increasing).
    pub lmax: Vec<usize>,
    /// k_max grid in h/Mpc (increasing).
    pub kmax_h_mpc: Vec<f64>,
    /// CMB field sets.
    pub fields: Vec<FieldSet>,
    /// Survey probes.
    pub probes: Vec<Probe>,
    /// Transfer model.
    pub transfer: TransferChoice,
    /// Linear matter power of the survey side.
    pub linear_power: LinearPowerChoice,
    /// Shell width override in Mpc (shell model).
    pub shell_width_mpc: Option<f64>,
    /// Spectra of the CMB covariance (`cmb_spectra`; lensed by default with the full
    /// transfer, unlensed with the shell model).
    pub cmb_spectra: CovarianceSpectra,
    /// Fraction of the lensing-potential power removed (`delensing`, 0..=1).
    pub delensing: f64,
    /// Diffusion damping on (shell model).
    pub damping: bool,
    /// Output options.
    pub output: OutputOptions,
}

/// Where referenced files come from.
pub trait FileResolver {
    /// Reads a file named in the scenario.
    ///
    /// # Errors
    /// I/O errors naming the file.
    fn read(&self, name: &str) -> Result<Source>;
}

/// Files relative to a folder on disk.
pub struct DiskResolver(pub PathBuf);

impl FileResolver for DiskResolver {
    fn read(&self, name: &str) -> Result<Source> {
        Source::read(&self.0.join(name))
    }
}

/// Files compiled into the binary (the demo scenario).
pub struct EmbeddedResolver;

/// The embedded demo scenario and the files it names.
pub const DEMO_FILES: [(&str, &str); 5] = [
    (
        "scenario_demo.toml",
        include_str!("../surveys/scenario_demo.toml"),
    ),
    (
        "cmb_satellite.toml",
        include_str!("../surveys/cmb_satellite.toml"),
    ),
    (
        "cmb_ground.toml",
        include_str!("../surveys/cmb_ground.toml"),
    ),
    (
        "survey_wide_spectro.toml",
        include_str!("../surveys/survey_wide_spectro.toml"),
    ),
    (
        "survey_deep_photo.toml",
        include_str!("../surveys/survey_deep_photo.toml"),
    ),
];

impl FileResolver for EmbeddedResolver {
    fn read(&self, name: &str) -> Result<Source> {
        DEMO_FILES
            .iter()
            .find(|(n, _)| *n == name)
            .map(|(n, t)| Source::from_text(&format!("(embedded) surveys/{n}"), t))
            .ok_or_else(|| Error::BadField {
                at: Location::Builtin,
                field: "file".into(),
                message: format!("the embedded demo has no file `{name}`"),
            })
    }
}

/// Loads a scenario file from disk.
///
/// # Errors
/// Located input errors in the scenario or any file it names.
pub fn load_scenario(path: &Path) -> Result<Scenario> {
    let src = Source::read(path)?;
    let dir = path.parent().map(Path::to_path_buf).unwrap_or_default();
    resolve_scenario(&src, &DiskResolver(dir))
}

/// The embedded demo scenario.
///
/// # Errors
/// Never for the shipped files (tested).
pub fn demo_scenario() -> Result<Scenario> {
    let src = EmbeddedResolver.read("scenario_demo.toml")?;
    resolve_scenario(&src, &EmbeddedResolver)
}

/// Resolves a scenario's text.
///
/// # Errors
/// Located input errors.
pub fn resolve_scenario(src: &Source, files: &dyn FileResolver) -> Result<Scenario> {
    let f: ScenarioFile = parse_toml(src)?;
    let t = &f.scenario;
    let cosmology = match &f.cosmology {
        Some(c) => c.resolve(src)?,
        None => Cosmology::planck2018(),
    };
    let bg = Background::new(&cosmology);
    let growth = Growth::new(&cosmology);
    let whole = Location::WholeFile(src.path().to_path_buf());
    let flag_at =
        |s: &Option<Spanned<Vec<String>>>| s.as_ref().map_or(whole.clone(), |v| src.at(v));
    let shapes: Vec<Shape> = match &t.shapes {
        Some(v) => v
            .get_ref()
            .iter()
            .filter(|s| !crate::shapes::is_tau_nl(s))
            .map(|s| Shape::parse(s, src.at(v)))
            .collect::<Result<_>>()?,
        None => vec![Shape::Local, Shape::Equilateral, Shape::Orthogonal],
    };
    let tau_nl = t
        .shapes
        .as_ref()
        .is_some_and(|v| crate::shapes::lists_tau_nl(v.get_ref()));
    if shapes.is_empty() {
        return Err(Error::BadField {
            at: flag_at(&t.shapes),
            field: "shapes".into(),
            message: "list at least one f_NL shape (tau_nl may be listed in addition)".into(),
        });
    }
    let names: Vec<String> = shapes.iter().map(|s| s.name()).collect();
    distinct(&names, &flag_at(&t.shapes), "shapes")?;
    let mut lmax: Vec<usize> = match &t.lmax {
        Some(v) => {
            let mut out = Vec::new();
            for &l in v.get_ref() {
                if !(10..=5000).contains(&l) {
                    return Err(Error::out_of_range(
                        src.at(v),
                        "lmax",
                        l as f64,
                        "10 <= lmax <= 5000",
                    ));
                }
                out.push(l as usize);
            }
            out
        }
        None => vec![500, 1000, 1500, 2000, 2500],
    };
    if let Some(v) = &t.lmax {
        distinct(&lmax, &src.at(v), "lmax")?;
    }
    lmax.sort_unstable();
    let mut kmax: Vec<f64> = match &t.kmax_h_mpc {
        Some(v) => {
            for &k in v.get_ref() {
                if !(k.is_finite() && (1e-3..=5.0).contains(&k)) {
                    return Err(Error::out_of_range(
                        src.at(v),
                        "kmax_h_mpc",
                        k,
                        "1e-3 <= kmax_h_mpc <= 5",
                    ));
                }
            }
            v.get_ref().clone()
        }
        None => vec![0.05, 0.1, 0.15, 0.2],
    };
    if let Some(v) = &t.kmax_h_mpc {
        distinct(&kmax, &src.at(v), "kmax_h_mpc")?;
    }
    kmax.sort_by(f64::total_cmp);
    if lmax.is_empty() || kmax.is_empty() {
        return Err(Error::BadField {
            at: whole,
            field: "lmax".into(),
            message: "the l_max and k_max grids need at least one value each".into(),
        });
    }
    let fields = match &t.fields {
        Some(v) => v
            .get_ref()
            .iter()
            .map(|s| {
                FieldSet::parse(s).ok_or_else(|| Error::BadField {
                    at: src.at(v),
                    field: "fields".into(),
                    message: format!("unknown field set `{s}`; use T, E or T+E"),
                })
            })
            .collect::<Result<Vec<_>>>()?,
        None => vec![FieldSet::T, FieldSet::E, FieldSet::TE],
    };
    if let Some(v) = &t.fields {
        distinct(&fields, &src.at(v), "fields")?;
    }
    let probes = match &t.probes {
        Some(v) => v
            .get_ref()
            .iter()
            .map(|s| {
                Probe::parse(s).ok_or_else(|| Error::BadField {
                    at: src.at(v),
                    field: "probes".into(),
                    message: format!("unknown probe `{s}`; use P, B or P+B"),
                })
            })
            .collect::<Result<Vec<_>>>()?,
        None => vec![Probe::P, Probe::B, Probe::PB],
    };
    if let Some(v) = &t.probes {
        distinct(&probes, &src.at(v), "probes")?;
    }
    let shell_width_mpc = match &t.shell_width_mpc {
        Some(v) => {
            let x = *v.get_ref();
            if !(x.is_finite() && (0.0..=500.0).contains(&x)) {
                return Err(Error::out_of_range(
                    src.at(v),
                    "shell_width_mpc",
                    x,
                    "0 <= shell_width_mpc <= 500",
                ));
            }
            Some(x)
        }
        None => None,
    };
    let transfer = t
        .transfer
        .as_ref()
        .map_or(TransferChoice::Full, |v| *v.get_ref());
    let cmb_spectra = match &t.cmb_spectra {
        Some(v) => {
            if *v.get_ref() == CovarianceSpectra::Lensed && transfer == TransferChoice::Shell {
                return Err(Error::Conflict {
                    at: src.at(v),
                    message: "cmb_spectra = \"lensed\" needs transfer = \"full\"".into(),
                });
            }
            *v.get_ref()
        }
        None if transfer == TransferChoice::Shell => CovarianceSpectra::Unlensed,
        None => CovarianceSpectra::Lensed,
    };
    let delensing = match &t.delensing {
        Some(v) => {
            let x = *v.get_ref();
            if !(x.is_finite() && (0.0..=1.0).contains(&x)) {
                return Err(Error::out_of_range(
                    src.at(v),
                    "delensing",
                    x,
                    "0 <= delensing <= 1 (fraction of the lensing-potential power removed)",
                ));
            }
            if cmb_spectra == CovarianceSpectra::Unlensed && x != 0.0 {
                return Err(Error::Conflict {
                    at: src.at(v),
                    message: "delensing applies to cmb_spectra = \"lensed\" only".into(),
                });
            }
            x
        }
        None => 0.0,
    };
    let mut experiments = Vec::new();
    for c in &f.cmb {
        match (&c.file, c.ideal) {
            (Some(_), true) | (None, false) => {
                return Err(Error::BadField {
                    at: whole.clone(),
                    field: "cmb".into(),
                    message: "each [[cmb]] needs either `file = \"...\"` or `ideal = true`".into(),
                });
            }
            (None, true) => experiments.push(Experiment::ideal(*lmax.last().unwrap_or(&3000))),
            (Some(fname), false) => {
                let s = files
                    .read(fname.get_ref())
                    .map_err(|e| relocate(e, src.at(fname)))?;
                let s = with_overrides(s, "experiment", c.set.as_ref(), src.at(fname))?;
                let ef: ExperimentFile = parse_toml(&s)?;
                experiments.push(ef.experiment.resolve(&s)?);
            }
        }
    }
    let mut surveys = Vec::new();
    for s in &f.survey {
        let text = files
            .read(s.file.get_ref())
            .map_err(|e| relocate(e, src.at(&s.file)))?;
        let text = with_overrides(text, "survey", s.set.as_ref(), src.at(&s.file))?;
        let sf: SurveyFile = parse_toml(&text)?;
        let mut sv = sf.survey.resolve(&text, &bg, &growth)?;
        if let Some(cv) = t.covariance {
            sv.covariance = cv;
        }
        surveys.push(sv);
    }
    let linear_power = match &t.linear_power {
        Some(v) => {
            let choice = *v.get_ref();
            choice.check(&cosmology, src.at(v), "linear_power")?;
            choice
        }
        None => LinearPowerChoice::default(),
    };
    let transfer = t
        .transfer
        .as_ref()
        .map_or(TransferChoice::Full, |v| *v.get_ref());
    if !experiments.is_empty() {
        // The rule the run applies, checked here so that `check` refuses what `run` would.
        let at = match (&t.transfer, &f.cosmology) {
            (Some(v), _) => src.at(v),
            (None, Some(_)) => src.find_key("cosmology", "dark_energy_w0"),
            (None, None) => whole.clone(),
        };
        transfer.check(&cosmology, at, "transfer")?;
    }
    for (i, a) in surveys.iter().enumerate() {
        if surveys[..i].iter().any(|b| b.name == a.name) {
            return Err(Error::BadField {
                at: src.at(&f.survey[i].file),
                field: "survey".into(),
                message: format!(
                    "survey `{}` is named twice; each [[survey]] needs its own name (set `name` in an override)",
                    a.name
                ),
            });
        }
    }
    for (i, a) in experiments.iter().enumerate() {
        if experiments[..i].iter().any(|b| b.name == a.name) {
            return Err(Error::BadField {
                at: whole.clone(),
                field: "cmb".into(),
                message: format!(
                    "experiment `{}` is named twice; each [[cmb]] needs its own name",
                    a.name
                ),
            });
        }
    }
    if experiments.is_empty() && surveys.is_empty() {
        return Err(Error::BadField {
            at: whole,
            field: "cmb".into(),
            message: "the scenario names no [[cmb]] experiment and no [[survey]]".into(),
        });
    }
    Ok(Scenario {
        name: t
            .name
            .clone()
            .unwrap_or_else(|| src.path().display().to_string()),
        source: src.path().display().to_string(),
        cosmology,
        experiments,
        surveys,
        shapes,
        tau_nl,
        lmax,
        kmax_h_mpc: kmax,
        fields,
        probes,
        transfer,
        linear_power,
        shell_width_mpc,
        cmb_spectra,
        delensing,
        damping: t.damping,
        output: f.output,
    })
}

/// Applies `set` overrides (dotted paths below the file's `[top]` table) and returns the
/// modified file; without overrides the file is returned as it is (exact positions).
fn with_overrides(
    src: Source,
    top: &str,
    set: Option<&toml::Table>,
    at: Location,
) -> Result<Source> {
    let Some(set) = set.filter(|t| !t.is_empty()) else {
        return Ok(src);
    };
    let mut doc: toml::Table = toml::from_str(src.text()).map_err(|e| Error::Syntax {
        at: Location::WholeFile(src.path().to_path_buf()),
        message: e.message().to_string(),
    })?;
    let table = doc
        .get_mut(top)
        .and_then(|v| v.as_table_mut())
        .ok_or_else(|| Error::BadField {
            at: Location::WholeFile(src.path().to_path_buf()),
            field: top.into(),
            message: format!("no [{top}] table"),
        })?;
    for (path, value) in set {
        set_path(table, path, value.clone()).map_err(|m| Error::BadField {
            at: at.clone(),
            field: format!("set.{path}"),
            message: m,
        })?;
    }
    let mut wrapped = toml::Table::new();
    wrapped.insert(top.into(), toml::Value::Table(table.clone()));
    for (k, v) in doc {
        if k != top {
            wrapped.insert(k, v);
        }
    }
    let text = toml::to_string(&wrapped).map_err(|e| Error::Numerical {
        stage: "applying overrides",
        message: e.to_string(),
    })?;
    Ok(Source::from_text(
        &format!("{} (with overrides)", src.path().display()),
        &text,
    ))
}

/// Sets `value` at a dotted path (`a.b`, `tracer.0.p`) inside a TOML table; missing
/// tables on the way are created, list indices must exist.
///
/// # Errors
/// A message when the path runs through something that is not a table or list.
pub fn set_path(
    table: &mut toml::Table,
    path: &str,
    value: toml::Value,
) -> std::result::Result<(), String> {
    let segs: Vec<&str> = path.split('.').collect();
    let Some((first, rest)) = segs.split_first() else {
        return Err("empty path".into());
    };
    if rest.is_empty() {
        table.insert((*first).to_string(), value);
        return Ok(());
    }
    let next = table
        .entry((*first).to_string())
        .or_insert_with(|| toml::Value::Table(toml::Table::new()));
    set_in_value(next, rest, value)
}

fn set_in_value(
    cur: &mut toml::Value,
    segs: &[&str],
    value: toml::Value,
) -> std::result::Result<(), String> {
    let Some((seg, rest)) = segs.split_first() else {
        *cur = value;
        return Ok(());
    };
    if let Ok(idx) = seg.parse::<usize>() {
        let arr = cur
            .as_array_mut()
            .ok_or_else(|| format!("`{seg}` indexes something that is not a list"))?;
        let n = arr.len();
        let el = arr
            .get_mut(idx)
            .ok_or_else(|| format!("index {idx} is past the end of a list of {n}"))?;
        set_in_value(el, rest, value)
    } else {
        let t = cur
            .as_table_mut()
            .ok_or_else(|| format!("`{seg}` is below something that is not a table"))?;
        if rest.is_empty() {
            t.insert((*seg).to_string(), value);
            return Ok(());
        }
        let next = t
            .entry((*seg).to_string())
            .or_insert_with(|| toml::Value::Table(toml::Table::new()));
        set_in_value(next, rest, value)
    }
}

/// Refuses an empty list or one that names the same entry twice (a duplicate would be
/// computed twice or silently dropped).
///
/// # Errors
/// [`Error::BadField`] at `at` naming `field` and the repeated entry.
pub fn distinct<T: PartialEq + std::fmt::Debug>(
    items: &[T],
    at: &Location,
    field: &str,
) -> Result<()> {
    if items.is_empty() {
        return Err(Error::BadField {
            at: at.clone(),
            field: field.into(),
            message:
                "the list is empty; give at least one entry (or leave the key out for the default)"
                    .into(),
        });
    }
    for (i, a) in items.iter().enumerate() {
        if items[..i].contains(a) {
            return Err(Error::BadField {
                at: at.clone(),
                field: field.into(),
                message: format!("{a:?} is listed twice; list each entry once"),
            });
        }
    }
    Ok(())
}

/// A missing referenced file is reported at the line that names it.
fn relocate(e: Error, at: Location) -> Error {
    match e {
        Error::Io { path, source } => Error::BadField {
            at,
            field: "file".into(),
            message: format!("cannot read {}: {source}", path.display()),
        },
        other => other,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn demo_scenario_resolves() {
        let s = demo_scenario().unwrap();
        assert!(!s.experiments.is_empty() && !s.surveys.is_empty());
        assert!(s.lmax.windows(2).all(|w| w[0] < w[1]));
    }

    #[test]
    fn dotted_paths() {
        let mut t: toml::Table = toml::from_str("a = 1\n[b]\nc = [1, 2]\n[[d]]\ne = 3\n").unwrap();
        set_path(&mut t, "b.c.1", toml::Value::Integer(5)).unwrap();
        set_path(&mut t, "d.0.e", toml::Value::Integer(7)).unwrap();
        set_path(&mut t, "x.y", toml::Value::Boolean(true)).unwrap();
        assert_eq!(t["b"]["c"][1].as_integer(), Some(5));
        assert_eq!(t["d"][0]["e"].as_integer(), Some(7));
        assert_eq!(t["x"]["y"].as_bool(), Some(true));
        assert!(set_path(&mut t, "b.c.9", toml::Value::Integer(1)).is_err());
        assert!(set_path(&mut t, "a.z", toml::Value::Integer(1)).is_err());
    }

    #[test]
    fn missing_file_names_the_line() {
        let src = Source::from_text(
            "s.toml",
            "[scenario]\nname = \"x\"\n\n[[survey]]\nfile = \"nope.toml\"\n",
        );
        let e = resolve_scenario(&src, &DiskResolver(PathBuf::from("/nonexistent"))).unwrap_err();
        assert!(e.to_string().contains("s.toml:5"), "{e}");
    }
}
