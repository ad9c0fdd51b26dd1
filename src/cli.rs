//! The command-line definition (clap derive). Parsing only: each subcommand's arguments
//! are turned into typed options in [`crate::commands`], which do the work.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::report::table::TableFormat;
use crate::report::{Format, SummaryFormat};

/// Forecasts of primordial non-Gaussianity from CMB bispectra and 3D galaxy surveys.
///
/// Units: CMB lengths in Mpc; survey wavenumbers in h/Mpc; f_NL in the CMB convention
/// (growth normalized to a in matter domination). Every command states its units in its
/// output header.
#[derive(Debug, Parser)]
#[command(name = "ngreach", version, about, long_about = None, propagate_version = true)]
pub struct Cli {
    /// What to compute.
    #[command(subcommand)]
    pub command: Command,
    /// No progress bar or progress lines on stderr (warnings and errors still show).
    #[arg(long, short, global = true)]
    pub quiet: bool,
    /// Run requests whose estimated work exceeds the built-in limits (survey triangles,
    /// plan grid points, list lengths); without it such requests are refused with the
    /// estimate.
    #[arg(long, global = true)]
    pub allow_large: bool,
}

/// Options every physics command accepts.
#[derive(Debug, Clone, Args)]
pub struct CommonArgs {
    /// TOML file with a [cosmology] table (missing keys: Planck 2018 base LCDM).
    #[arg(long, value_name = "FILE")]
    pub cosmology: Option<PathBuf>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

/// Where the Boltzmann solver's transfer tables are cached, for the commands that can run
/// it (with the full transfer model).
#[derive(Debug, Clone, Args)]
pub struct CacheArgs {
    /// Cache transfer tables in DIR (default: $NGREACH_CACHE_DIR, else
    /// $XDG_CACHE_HOME/ngreach, else ~/.cache/ngreach).
    #[arg(long, value_name = "DIR", conflicts_with = "no_cache")]
    pub cache_dir: Option<PathBuf>,
    /// Neither read nor write cached transfer tables.
    #[arg(long)]
    pub no_cache: bool,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the main forecast on a scenario (the embedded demo when no file is given).
    Run(RunArgs),
    /// Background cosmology: H(z), distances, growth, sigma_8.
    Background(BackgroundArgs),
    /// 3D survey forecast: sigma(f_NL) from P, B and P+B versus k_max.
    Survey(SurveyArgs),
    /// CMB bispectrum forecast: sigma(f_NL) from T, E and T+E versus l_max.
    Cmb(CmbArgs),
    /// Run a grid of scenarios from a plan file (parallel, resumable, shardable).
    Batch(BatchArgs),
    /// Merge the outputs of sharded batch runs into one combined table.
    Merge(MergeArgs),
    /// Validate input files (scenario, survey, experiment, cosmology, plan).
    Check(CheckArgs),
    /// CMB spectra D_l^TT, D_l^EE, D_l^TE (microkelvin^2) from a transfer model; lensed
    /// (with BB and the lensing potential) with --lensed.
    Spectra(SpectraArgs),
}

/// `ngreach batch`.
#[derive(Debug, Args)]
pub struct BatchArgs {
    /// Plan file (TOML with a [plan] table).
    #[arg(value_name = "PLAN")]
    pub plan: PathBuf,
    /// Folder for the scenario folders and the combined table.
    #[arg(long, value_name = "DIR", default_value = "ngreach-batch")]
    pub out: PathBuf,
    /// Run only shard I of N (0-based), or `auto`: the shard of this task of a SLURM
    /// array job (from SLURM_ARRAY_TASK_ID, SLURM_ARRAY_TASK_COUNT, SLURM_ARRAY_TASK_MIN).
    #[arg(long, value_name = "I/N|auto")]
    pub shard: Option<String>,
    /// File format of every table: csv (one header row; descriptions and units in
    /// tables.json) or ecsv (astropy's ECSV: units and provenance in the header).
    #[arg(long, value_enum, default_value_t = TableFormat::Csv)]
    pub tables: TableFormat,
    /// Worker threads (at most 4 per core).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Transfer-table cache.
    #[command(flatten)]
    pub cache: CacheArgs,
}

/// `ngreach merge`.
#[derive(Debug, Args)]
pub struct MergeArgs {
    /// Output folder of the merged batch.
    #[arg(value_name = "OUT")]
    pub out: PathBuf,
    /// Shard output folders to merge into OUT (none: rebuild OUT's combined table).
    #[arg(value_name = "SHARD_DIR")]
    pub parts: Vec<PathBuf>,
    /// Fail (exit 2) unless OUT then holds all N scenarios of the plan's grid, naming
    /// the missing grid points.
    #[arg(long, value_name = "N")]
    pub expect: Option<usize>,
}

/// `ngreach check`.
#[derive(Debug, Args)]
pub struct CheckArgs {
    /// Files to validate.
    #[arg(value_name = "FILE", required = true)]
    pub files: Vec<PathBuf>,
}

/// `ngreach run`.
#[derive(Debug, Args)]
pub struct RunArgs {
    /// Scenario file (TOML). Without it, the embedded demo scenario runs.
    #[arg(value_name = "SCENARIO")]
    pub scenario: Option<PathBuf>,
    /// Folder for the output files.
    #[arg(long, value_name = "DIR", default_value = "ngreach-out")]
    pub out: PathBuf,
    /// Worker threads (1 runs the serial path; at most 4 per core).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Override the scenario's cosmology with a [cosmology] file.
    #[arg(long, value_name = "FILE")]
    pub cosmology: Option<PathBuf>,
    /// Format of the terminal summary: table (the text summary) or json (the
    /// summary.json object).
    #[arg(long, value_enum, default_value_t = SummaryFormat::Table)]
    pub format: SummaryFormat,
    /// File format of every table written to DIR: csv (one header row; descriptions and
    /// units in tables.json) or ecsv (astropy's ECSV: units and provenance in the
    /// header). Always written as well: summary.json, report.html, fisher/*.npy,
    /// table.tex, figures as PNG and SVG.
    #[arg(long, value_enum, default_value_t = TableFormat::Csv)]
    pub tables: TableFormat,
    /// Transfer-table cache.
    #[command(flatten)]
    pub cache: CacheArgs,
}

/// `ngreach background`.
#[derive(Debug, Args)]
pub struct BackgroundArgs {
    /// Redshifts, comma separated (default: a grid from 0 to 1100).
    #[arg(
        long,
        value_name = "LIST",
        value_delimiter = ',',
        allow_hyphen_values = true
    )]
    pub z: Option<Vec<f64>>,
    /// Shared options.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// `ngreach survey`.
#[derive(Debug, Args)]
pub struct SurveyArgs {
    /// Survey file (TOML with a [survey] table). Or use the quick-mode flags instead.
    #[arg(value_name = "FILE")]
    pub file: Option<PathBuf>,
    /// Quick mode: volume in (Gpc/h)^3 of a single bin.
    #[arg(long, value_name = "GPC3", requires_all = ["z", "nbar", "b1"], conflicts_with = "file", allow_hyphen_values = true)]
    pub volume: Option<f64>,
    /// Quick mode: redshift of the bin.
    #[arg(
        long,
        value_name = "Z",
        requires = "volume",
        allow_hyphen_values = true
    )]
    pub z: Option<f64>,
    /// Quick mode: number density in h^3 Mpc^-3.
    #[arg(
        long,
        value_name = "N",
        requires = "volume",
        allow_hyphen_values = true
    )]
    pub nbar: Option<f64>,
    /// Quick mode: linear bias.
    #[arg(
        long,
        value_name = "B",
        requires = "volume",
        allow_hyphen_values = true
    )]
    pub b1: Option<f64>,
    /// Quick mode: no redshift-space distortions.
    #[arg(long, requires = "volume")]
    pub real_space: bool,
    /// k_max values in h/Mpc, comma separated (default: the file's kmax_h_mpc, or 0.2).
    #[arg(
        long,
        value_name = "LIST",
        value_delimiter = ',',
        allow_hyphen_values = true
    )]
    pub kmax: Option<Vec<f64>>,
    /// Probes: P, B, P+B.
    #[arg(
        long,
        value_name = "LIST",
        value_delimiter = ',',
        default_value = "P,B,P+B"
    )]
    pub probes: Vec<String>,
    /// Shapes: local, equilateral, orthogonal, delta=D, mass=M (m/H); tau_nl adds the
    /// collapsed-trispectrum amplitude from the tracers' power spectra.
    #[arg(
        long,
        value_name = "LIST",
        value_delimiter = ',',
        default_value = "local,equilateral,orthogonal"
    )]
    pub shapes: Vec<String>,
    /// Linear matter power: the Eisenstein-Hu fit, or the Boltzmann solver's z = 0 matter
    /// transfer function (a matter-only solve, about a second).
    #[arg(long, value_enum, value_name = "MODEL", default_value_t = crate::scenario::LinearPowerChoice::EisensteinHu)]
    pub linear_power: crate::scenario::LinearPowerChoice,
    /// Covariance model (default: the survey file's `covariance`, else realistic).
    #[arg(long, value_enum, value_name = "MODEL")]
    pub covariance: Option<crate::survey::CovarianceModel>,
    /// Worker threads (1 runs the serial path; at most 4 per core).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Shared options.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// `ngreach cmb`.
#[derive(Debug, Args)]
pub struct CmbArgs {
    /// CMB experiment file (TOML with an [experiment] table).
    #[arg(long, value_name = "FILE", conflicts_with = "ideal")]
    pub experiment: Option<PathBuf>,
    /// The ideal experiment: no noise, full sky (the default without --experiment).
    #[arg(long)]
    pub ideal: bool,
    /// Transfer functions: the full Boltzmann solution (the default; solved once per
    /// cosmology and cached), or the finite-thickness shell model (the default when
    /// --shell-width or --no-damping is given).
    #[arg(long, value_enum)]
    pub transfer: Option<crate::scenario::TransferChoice>,
    /// Shell model: Gaussian width of the last-scattering shell in Mpc (0 = zero thickness).
    #[arg(long, value_name = "MPC")]
    pub shell_width: Option<f64>,
    /// Shell model: switch diffusion damping off.
    #[arg(long)]
    pub no_damping: bool,
    /// l_max values, comma separated (default: 250,500,1000,1500,2000 capped at the experiment's l_max).
    #[arg(long, value_name = "LIST", value_delimiter = ',')]
    pub lmax: Option<Vec<usize>>,
    /// Field sets: T, E, T+E.
    #[arg(
        long,
        value_name = "LIST",
        value_delimiter = ',',
        default_value = "T,E,T+E"
    )]
    pub fields: Vec<String>,
    /// Shapes: local, equilateral, orthogonal, delta=D, mass=M (m/H); tau_nl adds the
    /// collapsed-trispectrum amplitude (tau_nl alone skips the bispectrum).
    #[arg(
        long,
        value_name = "LIST",
        value_delimiter = ',',
        default_value = "local,equilateral,orthogonal"
    )]
    pub shapes: Vec<String>,
    /// Override the experiment's sky fraction.
    #[arg(long, value_name = "F", allow_hyphen_values = true)]
    pub fsky: Option<f64>,
    /// Worker threads (1 runs the serial path; at most 4 per core).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Spectra in the covariance of the Fisher sum: lensed (the default; needs the full
    /// transfer) or unlensed.
    #[arg(long, value_enum, value_name = "KIND")]
    pub spectra: Option<crate::cmb::lensing::CovarianceSpectra>,
    /// Fraction F of the lensing-potential power removed before lensing the covariance
    /// spectra, 0 <= F <= 1 (default 0).
    #[arg(
        long,
        value_name = "F",
        default_value_t = 0.0,
        allow_hyphen_values = true
    )]
    pub delensing: f64,
    /// Transfer-table cache.
    #[command(flatten)]
    pub cache: CacheArgs,
    /// Shared options.
    #[command(flatten)]
    pub common: CommonArgs,
}

/// `ngreach spectra`.
#[derive(Debug, Args)]
pub struct SpectraArgs {
    /// Transfer model: `shell`, the idealized last-scattering shell (Sachs-Wolfe T,
    /// tight-coupling E model).
    #[arg(long, value_enum, value_name = "MODEL")]
    pub transfer: crate::commands::spectra::TransferKind,
    /// Highest multipole, 2..=5000.
    #[arg(long, value_name = "L", default_value_t = 2500)]
    pub lmax: usize,
    /// Gaussian sigma of the shell in comoving distance, Mpc, 0..=500 (not the FWHM;
    /// default: the visibility FWHM / 2.3548).
    #[arg(long, value_name = "MPC", allow_hyphen_values = true)]
    pub shell_width: Option<f64>,
    /// Switch diffusion damping off.
    #[arg(long)]
    pub no_damping: bool,
    /// Lensed spectra (full transfer only): adds D_l^BB and the lensing potential.
    #[arg(long)]
    pub lensed: bool,
    /// Transfer-table cache.
    #[command(flatten)]
    pub cache: CacheArgs,
    /// Shared options.
    #[command(flatten)]
    pub common: CommonArgs,
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn verify_cli() {
        Cli::command().debug_assert();
    }
}
