//! The library's error type.
//!
//! Every error that a user can cause names *where* it came from (a file with line and
//! column, or a command-line flag) and *which field* is wrong, and says what would be
//! accepted instead. Numerical failures that the user cannot fix (a solver that does not
//! converge) are separate variants so that the command line can tell the two apart:
//! bad input exits with code 2, everything else with code 1.

use std::fmt;
use std::path::PathBuf;

/// Where a value came from.
#[derive(Debug, Clone, PartialEq)]
pub enum Location {
    /// A place in an input file (1-based line and column).
    File {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
    },
    /// A whole file, when no finer position is known.
    WholeFile(PathBuf),
    /// A command-line flag such as `--z`.
    Flag(String),
    /// An environment variable such as `NGREACH_CACHE_MAX_GB`.
    Env(String),
    /// A built-in default or a value computed from other inputs.
    Builtin,
}

impl fmt::Display for Location {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Location::File { path, line, column } => {
                write!(f, "{}:{}:{}", path.display(), line, column)
            }
            Location::WholeFile(path) => write!(f, "{}", path.display()),
            Location::Flag(name) => write!(f, "command-line flag {name}"),
            Location::Env(name) => write!(f, "environment variable {name}"),
            Location::Builtin => write!(f, "built-in input"),
        }
    }
}

/// Everything that can go wrong in ngreach.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The operating-system error.
        #[source]
        source: std::io::Error,
    },
    /// The file is not valid TOML.
    #[error("{at}: TOML syntax error: {message}")]
    Syntax {
        /// Where the parser stopped.
        at: Location,
        /// The parser's explanation.
        message: String,
    },
    /// A key that ngreach does not know.
    #[error("{at}: unknown key `{key}` in [{table}]; valid keys are: {valid}")]
    UnknownKey {
        /// Where the key stands.
        at: Location,
        /// The table it stands in.
        table: String,
        /// The key as written.
        key: String,
        /// The keys that are accepted there, comma separated.
        valid: String,
    },
    /// A value of the wrong type, or a required key that is missing.
    #[error("{at}: field `{field}`: {message}")]
    BadField {
        /// Where the value stands.
        at: Location,
        /// The field.
        field: String,
        /// What is wrong and what would be accepted.
        message: String,
    },
    /// A number outside its allowed range.
    #[error("{at}: field `{field}` = {value} is out of range: allowed {allowed}")]
    OutOfRange {
        /// Where the value stands.
        at: Location,
        /// The field.
        field: String,
        /// The offending value.
        value: f64,
        /// The allowed range in words, e.g. `0 < h <= 2`.
        allowed: String,
    },
    /// Two inputs that cannot be given together, or a combination that makes no sense.
    #[error("{at}: {message}")]
    Conflict {
        /// Where the second of the two stands.
        at: Location,
        /// What conflicts and how to resolve it.
        message: String,
    },
    /// A request whose estimated work exceeds the sane limits (see [`crate::limits`]).
    #[error("{at}: {what}: estimated {estimate}; {hint}")]
    TooLarge {
        /// Which input asks for it.
        at: Location,
        /// What would be computed.
        what: String,
        /// The estimate and the limit, with their unit.
        estimate: String,
        /// How to proceed.
        hint: String,
    },
    /// A numerical method did not reach its target (not the user's fault).
    #[error("numerical failure in {stage}: {message}")]
    Numerical {
        /// Which computation failed.
        stage: &'static str,
        /// What happened.
        message: String,
    },
}

impl Error {
    /// True for errors that the user caused with an input (exit code 2).
    pub fn is_input_error(&self) -> bool {
        !matches!(self, Error::Numerical { .. })
    }

    /// Shorthand for an out-of-range error.
    pub fn out_of_range(at: Location, field: &str, value: f64, allowed: &str) -> Self {
        Error::OutOfRange {
            at,
            field: field.to_string(),
            value,
            allowed: allowed.to_string(),
        }
    }
}

/// Result alias used throughout the library.
pub type Result<T, E = Error> = std::result::Result<T, E>;
