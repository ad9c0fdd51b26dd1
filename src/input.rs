//! Reading TOML input files with positions.
//!
//! Every input file (cosmology, CMB experiment, survey, scenario, batch plan) goes through
//! [`parse_toml`], which turns TOML syntax errors, unknown keys and type errors into
//! [`Error`] values that name the file, line and column. Numeric fields are read as
//! [`toml::Spanned`] so that a later range check can point at the offending line too.

use std::path::{Path, PathBuf};

use serde::de::DeserializeOwned;

use crate::error::{Error, Location};

/// The largest input file ngreach reads, in bytes (1 MiB): input files are short
/// TOML tables, and a limit keeps a device or a huge file from being read whole.
pub const MAX_INPUT_BYTES: u64 = 1 << 20;

/// The text of an input file, kept so that byte offsets can be turned into lines.
#[derive(Debug, Clone)]
pub struct Source {
    path: PathBuf,
    text: String,
}

impl Source {
    /// Reads a file: only a regular file (not a device, pipe or folder) of at most
    /// [`MAX_INPUT_BYTES`], as UTF-8 text.
    ///
    /// # Errors
    /// [`Error::Io`] when the file cannot be read; [`Error::BadField`] naming the file
    /// when it is not a regular file, is too large, or is not text.
    pub fn read(path: &Path) -> Result<Self, Error> {
        use std::io::Read;
        let io = |source| Error::Io {
            path: path.to_path_buf(),
            source,
        };
        let bad = |message: String| Error::BadField {
            at: Location::WholeFile(path.to_path_buf()),
            field: "file".into(),
            message,
        };
        let meta = std::fs::metadata(path).map_err(io)?;
        if !meta.is_file() {
            return Err(bad(
                "not a regular file; ngreach reads input only from regular files (not folders, devices or pipes)".into(),
            ));
        }
        if meta.len() > MAX_INPUT_BYTES {
            return Err(bad(format!(
                "{} bytes, above the input limit of {MAX_INPUT_BYTES} bytes (1 MiB); input files are short TOML tables",
                meta.len()
            )));
        }
        // Read at most one byte past the limit, in case the file grows meanwhile.
        let mut bytes = Vec::new();
        std::fs::File::open(path)
            .map_err(io)?
            .take(MAX_INPUT_BYTES + 1)
            .read_to_end(&mut bytes)
            .map_err(io)?;
        if bytes.len() as u64 > MAX_INPUT_BYTES {
            return Err(bad(format!(
                "more than {MAX_INPUT_BYTES} bytes (1 MiB), the input limit"
            )));
        }
        let text = String::from_utf8(bytes).map_err(|e| {
            bad(format!(
                "not UTF-8 text (invalid byte at offset {})",
                e.utf8_error().valid_up_to()
            ))
        })?;
        Ok(Self {
            path: path.to_path_buf(),
            text,
        })
    }

    /// Wraps text that did not come from disk (an embedded demo file, a test).
    pub fn from_text(name: &str, text: &str) -> Self {
        Self {
            path: PathBuf::from(name),
            text: text.to_string(),
        }
    }

    /// The file's path (or name).
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The file's text.
    pub fn text(&self) -> &str {
        &self.text
    }

    /// The location of a byte offset (1-based line and column).
    pub fn locate(&self, offset: usize) -> Location {
        let offset = offset.min(self.text.len());
        let before = &self.text[..offset];
        let line = before.matches('\n').count() + 1;
        let column = before.rfind('\n').map_or(offset, |nl| offset - nl - 1) + 1;
        Location::File {
            path: self.path.clone(),
            line,
            column,
        }
    }

    /// The location of a span.
    pub fn locate_span(&self, span: &std::ops::Range<usize>) -> Location {
        self.locate(span.start)
    }

    /// The location of `key = ...` inside `[table]` (a dotted name such as
    /// `survey.priors`; empty for the top level), found in the text; the whole file when
    /// the key is not written there (a default, or a value set by an override).
    pub fn find_key(&self, table: &str, key: &str) -> Location {
        let mut current = String::new();
        let mut offset = 0;
        for line in self.text.split_inclusive('\n') {
            let t = line.trim();
            if t.starts_with('[') {
                current = t.trim_matches(|c| c == '[' || c == ']').trim().to_string();
            } else if current == table {
                let k = t.split('=').next().unwrap_or("").trim().trim_matches('"');
                if t.contains('=') && k == key {
                    let col = line.len() - line.trim_start().len();
                    return self.locate(offset + col);
                }
            }
            offset += line.len();
        }
        Location::WholeFile(self.path.clone())
    }

    /// The location of a spanned value.
    pub fn at<T>(&self, value: &toml::Spanned<T>) -> Location {
        self.locate_span(&value.span())
    }
}

/// Checks, before a computation, that output files can be written into `dir`: creates
/// it if needed and writes and removes a probe file.
///
/// # Errors
/// [`Error::BadField`] naming the folder and the flag `flag` when it cannot be created
/// or written.
pub fn check_output_dir(dir: &Path, flag: &str) -> Result<(), Error> {
    let bad = |what: &str, e: std::io::Error| Error::BadField {
        at: Location::Flag(flag.into()),
        field: dir.display().to_string(),
        message: format!("the output folder {what}: {e}"),
    };
    std::fs::create_dir_all(dir).map_err(|e| bad("cannot be created", e))?;
    let probe = dir.join(format!(".ngreach-write-probe-{}", std::process::id()));
    std::fs::write(&probe, b"").map_err(|e| bad("is not writable", e))?;
    let _ = std::fs::remove_file(&probe);
    Ok(())
}

/// Parses a TOML file into `T`, turning every failure into a located [`Error`].
///
/// Structures deserialized here use `#[serde(deny_unknown_fields)]`, so a misspelt key
/// becomes [`Error::UnknownKey`] with the list of valid keys.
///
/// # Errors
/// [`Error::Syntax`], [`Error::UnknownKey`] or [`Error::BadField`].
pub fn parse_toml<T: DeserializeOwned>(source: &Source) -> Result<T, Error> {
    toml::from_str::<T>(source.text()).map_err(|e| toml_error(source, &e))
}

fn toml_error(source: &Source, e: &toml::de::Error) -> Error {
    let at = match e.span() {
        Some(span) => source.locate_span(&span),
        None => Location::WholeFile(source.path().to_path_buf()),
    };
    let message = e.message().trim().to_string();
    // serde's wording: "unknown field `x`, expected one of `a`, `b`" (or "expected `a`").
    if let Some(rest) = message.strip_prefix("unknown field `")
        && let Some((key, tail)) = rest.split_once('`')
    {
        let valid = tail
            .trim_start_matches(',')
            .trim()
            .trim_start_matches("expected one of")
            .trim_start_matches("expected")
            .trim()
            .replace('`', "");
        let table = table_at(source.text(), e.span().map_or(0, |s| s.start));
        return Error::UnknownKey {
            at,
            table,
            key: key.to_string(),
            valid,
        };
    }
    if let Some(rest) = message.strip_prefix("missing field `")
        && let Some((key, _)) = rest.split_once('`')
    {
        return Error::BadField {
            at,
            field: key.to_string(),
            message: "this key is required here".to_string(),
        };
    }
    // Value-level problems name the field; everything else is a syntax error.
    let value_problem = [
        "invalid type",
        "invalid value",
        "unknown variant",
        "invalid length",
    ]
    .iter()
    .any(|p| message.starts_with(p));
    if value_problem {
        let field = key_at(source.text(), e.span().map_or(0, |s| s.start));
        Error::BadField { at, field, message }
    } else {
        Error::Syntax { at, message }
    }
}

/// The name of the `[table]` header above a byte offset (empty for the root).
fn table_at(text: &str, offset: usize) -> String {
    let before = &text[..offset.min(text.len())];
    before
        .lines()
        .rev()
        .find_map(|l| {
            let t = l.trim();
            (t.starts_with('[') && t.ends_with(']'))
                .then(|| t.trim_matches(|c| c == '[' || c == ']').trim().to_string())
        })
        .unwrap_or_else(|| "top level".to_string())
}

/// The key on the line of a byte offset, for type errors.
fn key_at(text: &str, offset: usize) -> String {
    let offset = offset.min(text.len());
    let start = text[..offset].rfind('\n').map_or(0, |p| p + 1);
    let line = text[start..].lines().next().unwrap_or("");
    line.split('=').next().unwrap_or("").trim().to_string()
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde::Deserialize;

    #[derive(Debug, Deserialize)]
    #[serde(deny_unknown_fields)]
    #[allow(dead_code)]
    struct Inner {
        alpha: Option<toml::Spanned<f64>>,
        beta: Option<f64>,
    }

    #[derive(Debug, Deserialize)]
    #[serde(deny_unknown_fields)]
    #[allow(dead_code)]
    struct Outer {
        thing: Inner,
    }

    #[test]
    fn line_and_column_of_offsets() {
        let s = Source::from_text("x.toml", "a\nbc\ndef");
        assert_eq!(
            s.locate(6),
            Location::File {
                path: "x.toml".into(),
                line: 3,
                column: 2
            }
        );
        assert_eq!(
            s.locate(0),
            Location::File {
                path: "x.toml".into(),
                line: 1,
                column: 1
            }
        );
    }

    #[test]
    fn unknown_key_lists_valid_keys() {
        let s = Source::from_text("x.toml", "[thing]\nalpha = 1.0\ngamma = 2.0\n");
        let e = parse_toml::<Outer>(&s).unwrap_err();
        match e {
            Error::UnknownKey {
                key, valid, table, ..
            } => {
                assert_eq!(key, "gamma");
                assert_eq!(table, "thing");
                assert!(valid.contains("alpha") && valid.contains("beta"), "{valid}");
            }
            other => panic!("wrong error {other:?}"),
        }
    }

    #[test]
    fn finds_keys_in_tables() {
        let s = Source::from_text("x.toml", "[a]\nk = 1\n[a.b]\nk = 2\n");
        assert_eq!(s.find_key("a.b", "k").to_string(), "x.toml:4:1");
        assert_eq!(s.find_key("a", "k").to_string(), "x.toml:2:1");
        assert_eq!(s.find_key("a", "z").to_string(), "x.toml");
    }

    #[test]
    fn reads_only_regular_files() {
        let e = Source::read(Path::new("/dev/zero")).unwrap_err();
        assert!(e.to_string().contains("not a regular file"), "{e}");
        let e = Source::read(Path::new("/")).unwrap_err();
        assert!(e.to_string().contains("not a regular file"), "{e}");
    }

    #[test]
    fn syntax_error_has_line() {
        let s = Source::from_text("x.toml", "[thing]\nalpha = = 1\n");
        let e = parse_toml::<Outer>(&s).unwrap_err();
        assert!(matches!(e, Error::Syntax { .. }), "{e:?}");
        assert!(e.to_string().starts_with("x.toml:2:"), "{e}");
    }

    #[test]
    fn type_error_names_field() {
        let s = Source::from_text("x.toml", "[thing]\nbeta = \"big\"\n");
        let e = parse_toml::<Outer>(&s).unwrap_err();
        let msg = e.to_string();
        assert!(msg.contains("beta") && msg.contains("x.toml:2"), "{msg}");
    }
}
