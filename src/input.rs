//! Reading TOML input files with positions.
//!
//! Every input file (cosmology, CMB experiment, survey, scenario, batch plan) goes through
//! [`parse_toml`], which turns TOML syntax errors, unknown keys and type errors into
//! [`Error`] values that name the file, line and column. Numeric fields are read as
//! [`toml::Spanned`] so that a later range check can point at the offending line too.

use std::path::{Path, PathBuf};

use serde::de::DeserializeOwned;

use crate::error::{Error, Location};

/// The text of an input file, kept so that byte offsets can be turned into lines.
#[derive(Debug, Clone)]
pub struct Source {
    path: PathBuf,
    text: String,
}

impl Source {
    /// Reads a file.
    ///
    /// # Errors
    /// [`Error::Io`] when the file cannot be read.
    pub fn read(path: &Path) -> Result<Self, Error> {
        let text = std::fs::read_to_string(path).map_err(|source| Error::Io {
            path: path.to_path_buf(),
            source,
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

    /// The location of a spanned value.
    pub fn at<T>(&self, value: &toml::Spanned<T>) -> Location {
        self.locate_span(&value.span())
    }
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
    if let Some(rest) = message.strip_prefix("unknown field `") {
        if let Some((key, tail)) = rest.split_once('`') {
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
    }
    if let Some(rest) = message.strip_prefix("missing field `") {
        if let Some((key, _)) = rest.split_once('`') {
            return Error::BadField {
                at,
                field: key.to_string(),
                message: "this key is required here".to_string(),
            };
        }
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
