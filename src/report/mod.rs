//! Output: tables, CSV and JSON built from plain result rows. Nothing in the physics
//! modules prints; commands build a [`Report`] and render it here.
//!
//! Every rendering carries the units: column names and JSON keys carry their unit in the
//! name (`_mpc`, `_h_mpc`, `_uk2`, ...); the table form starts with `# ` comment lines
//! (the command, the version, the conventions). CSV is one header row and the data, so
//! NumPy and pandas read it without options; ECSV adds the units, notes and summary
//! values in its header. JSON is one object with `version`, the resolved `inputs`, any
//! top-level summary values, and `rows`.
//!
//! A JSON null is a number with no finite value: an infinite sigma (no information) in
//! columns named `sigma*`, otherwise an undefined value (for example a log slope on a
//! one-point grid). Text renderings say `inf` for the first and leave the second empty
//! (CSV) or write `-` (table).

pub mod artifacts;
pub mod budget;
pub mod console;
pub mod figures;
pub mod html;
pub mod latex;
pub mod lensing_outputs;
pub mod matrices;
pub mod outputs;
pub mod table;
pub mod tau_outputs;

use serde_json::{Map, Value};

/// Output format of a command.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum, serde::Serialize, serde::Deserialize,
)]
#[serde(rename_all = "lowercase")]
pub enum Format {
    /// Aligned text for the terminal.
    Table,
    /// One JSON object.
    Json,
    /// Comma-separated values: one header row, then the rows.
    Csv,
    /// ECSV 1.0 (astropy's self-describing table): units and notes in its header.
    Ecsv,
}

/// Output format of `run`'s terminal summary.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum SummaryFormat {
    /// The compact text summary.
    Table,
    /// The summary.json object.
    Json,
}

/// A tabular result with its metadata.
#[derive(Debug, Clone)]
pub struct Report {
    /// The command that made it (`background`, ...).
    pub command: String,
    /// Comment lines stating units and conventions (without the leading `# `).
    pub notes: Vec<String>,
    /// The resolved inputs.
    pub inputs: Value,
    /// Top-level summary values (shown above the table; top-level keys in JSON).
    pub summary: Vec<(String, Value)>,
    /// Column names (JSON row keys, CSV header).
    pub columns: Vec<String>,
    /// Rows of cells, one per column.
    pub rows: Vec<Vec<Value>>,
    /// Extra top-level JSON values not shown in table/CSV form (e.g. Fisher matrices).
    pub json_extra: Vec<(String, Value)>,
}

impl Report {
    /// An empty report for a command.
    pub fn new(command: &str) -> Self {
        Self {
            command: command.to_string(),
            notes: Vec::new(),
            inputs: Value::Null,
            summary: Vec::new(),
            columns: Vec::new(),
            rows: Vec::new(),
            json_extra: Vec::new(),
        }
    }

    /// Renders in a format.
    pub fn render(&self, format: Format) -> String {
        match format {
            Format::Json => self.to_json_string(),
            Format::Csv => self.to_file_table().to_csv(),
            Format::Ecsv => {
                let mut meta = serde_json::Map::new();
                meta.insert(
                    "generator".into(),
                    Value::String(format!("ngreach {}", crate::VERSION)),
                );
                meta.insert("command".into(), Value::String(self.command.clone()));
                meta.insert("inputs".into(), self.inputs.clone());
                for (k, v) in &self.summary {
                    meta.insert(k.clone(), v.clone());
                }
                self.to_file_table().to_ecsv(&Value::Object(meta))
            }
            Format::Table => self.to_table(),
        }
    }

    /// The JSON object.
    pub fn to_json(&self) -> Value {
        let mut obj = Map::new();
        obj.insert("version".into(), Value::String(crate::VERSION.into()));
        obj.insert("command".into(), Value::String(self.command.clone()));
        obj.insert(
            "units".into(),
            Value::Array(self.notes.iter().cloned().map(Value::String).collect()),
        );
        obj.insert("inputs".into(), self.inputs.clone());
        for (k, v) in self.summary.iter().chain(&self.json_extra) {
            obj.insert(k.clone(), v.clone());
        }
        let rows = self
            .rows
            .iter()
            .map(|r| {
                let mut m = Map::new();
                for (c, v) in self.columns.iter().zip(r) {
                    m.insert(c.clone(), v.clone());
                }
                Value::Object(m)
            })
            .collect();
        obj.insert("rows".into(), Value::Array(rows));
        Value::Object(obj)
    }

    fn to_json_string(&self) -> String {
        let mut s = serde_json::to_string_pretty(&self.to_json()).unwrap_or_else(|_| "{}".into());
        s.push('\n');
        s
    }

    fn header_lines(&self) -> String {
        let mut s = format!("# ngreach {} {}\n", crate::VERSION, self.command);
        for n in &self.notes {
            s.push_str(&format!("# {n}\n"));
        }
        s
    }

    /// The rows as a file table (units read from the column names).
    fn to_file_table(&self) -> table::Table {
        let cols = self
            .columns
            .iter()
            .map(|c| table::Column::new(c, ""))
            .collect();
        let mut t = table::Table::new(&self.command, &format!("ngreach {}", self.command), cols);
        t.notes = self.notes.clone();
        for r in &self.rows {
            t.push(
                r.iter()
                    .zip(&self.columns)
                    .map(|(v, c)| match v {
                        Value::Null if c.starts_with("sigma") => table::Cell::Float(f64::INFINITY),
                        other => table::Cell::from_json(other),
                    })
                    .collect(),
            );
        }
        t
    }

    fn to_table(&self) -> String {
        let mut s = self.header_lines();
        for (k, v) in &self.summary {
            s.push_str(&format!("{k} = {}\n", cell_plain(v)));
        }
        if !self.summary.is_empty() {
            s.push('\n');
        }
        let cells: Vec<Vec<String>> = self
            .rows
            .iter()
            .map(|r| {
                r.iter()
                    .zip(&self.columns)
                    .map(|(v, c)| match v {
                        Value::Null if !c.starts_with("sigma") => "-".to_string(),
                        other => cell_short(other),
                    })
                    .collect()
            })
            .collect();
        let mut width: Vec<usize> = self.columns.iter().map(|c| c.len()).collect();
        for r in &cells {
            for (i, c) in r.iter().enumerate() {
                if i < width.len() {
                    width[i] = width[i].max(c.len());
                }
            }
        }
        let line = |items: &[String]| -> String {
            items
                .iter()
                .enumerate()
                .map(|(i, c)| format!("{:>w$}", c, w = width[i]))
                .collect::<Vec<_>>()
                .join("  ")
        };
        s.push_str(&line(&self.columns));
        s.push('\n');
        for r in &cells {
            s.push_str(&line(r));
            s.push('\n');
        }
        s
    }
}

fn cell_plain(v: &Value) -> String {
    match v {
        Value::Number(n) => match n.as_f64() {
            Some(x) if n.is_f64() => format_sig(x, 6),
            _ => n.to_string(),
        },
        Value::String(t) => t.clone(),
        Value::Null => "inf".into(),
        other => other.to_string(),
    }
}

/// A table cell: reals with four significant digits, trailing zeros kept, so a column
/// reads at one precision ("5.000" next to "5.240").
fn cell_short(v: &Value) -> String {
    match v {
        Value::Number(n) if n.is_f64() => n.as_f64().map_or_else(String::new, |x| format_sig(x, 4)),
        other => cell_plain(other),
    }
}

/// [`trim_zeros`] for the figure code.
pub(crate) fn trim_zeros_public(s: &str) -> String {
    trim_zeros(s)
}

/// Drops trailing zeros of a decimal mantissa: "1.50000" -> "1.5", "2.000e3" -> "2e3".
fn trim_zeros(s: &str) -> String {
    let (mant, exp) = match s.find('e') {
        Some(i) => (&s[..i], &s[i..]),
        None => (s, ""),
    };
    if !mant.contains('.') || mant.parse::<f64>().is_err() {
        return s.to_string();
    }
    let m = mant.trim_end_matches('0').trim_end_matches('.');
    format!("{m}{exp}")
}

/// Formats with `sig` significant digits, switching to exponent form for very large or
/// small magnitudes.
pub fn format_sig(x: f64, sig: usize) -> String {
    if !x.is_finite() {
        return if x.is_nan() {
            "nan".into()
        } else if x > 0.0 {
            "inf".into()
        } else {
            "-inf".into()
        };
    }
    if x == 0.0 {
        return "0".into();
    }
    let mag = x.abs().log10().floor() as i32;
    if !(-3..6).contains(&mag) {
        format!("{:.*e}", sig.saturating_sub(1), x)
    } else {
        let decimals = (sig as i32 - 1 - mag).max(0) as usize;
        format!("{x:.decimals$}")
    }
}

/// Writes a file atomically: a temporary file in the same folder, then a rename, so an
/// interrupted run never leaves a half-written output.
///
/// # Errors
/// [`crate::Error::Io`].
pub fn write_atomic(path: &std::path::Path, bytes: &[u8]) -> crate::Result<()> {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = path.with_file_name(format!(".{name}.tmp"));
    let io = |source| crate::Error::Io {
        path: path.to_path_buf(),
        source,
    };
    std::fs::write(&tmp, bytes).map_err(io)?;
    std::fs::rename(&tmp, path).map_err(io)
}

/// A JSON number that stays valid for non-finite values (null for NaN/inf).
pub fn num(x: f64) -> Value {
    serde_json::Number::from_f64(x).map_or(Value::Null, Value::Number)
}

/// The name of the survey k_max grid value for one survey: `k_max(z = 0)` when the
/// survey's rule scales k_max with redshift, else `k_max` (each bin's own value, after
/// the tree-level cap, is in the per-bin tables).
pub fn kmax_name(s: &crate::survey::Survey) -> &'static str {
    if s.kmax_scales_with_z() {
        "k_max(z = 0)"
    } else {
        "k_max"
    }
}

/// The k_max axis label of a figure over the surveys of a run (Unicode subscripts):
/// `kₘₐₓ(z = 0)` when every survey scales k_max with redshift, a mixed label when some
/// do, and a note that each bin is capped at its tree-level limit.
pub fn kmax_axis_label<'a>(surveys: impl IntoIterator<Item = &'a crate::survey::Survey>) -> String {
    let (mut growth, mut other) = (0, 0);
    for s in surveys {
        if s.kmax_scales_with_z() {
            growth += 1;
        } else {
            other += 1;
        }
    }
    let name = match (growth, other) {
        (0, _) => "kₘₐₓ",
        (_, 0) => "kₘₐₓ(z = 0)",
        _ => "kₘₐₓ (z = 0 for growth-rule surveys)",
    };
    format!("{name} [h/Mpc], each bin capped at its tree-level limit")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sig_formatting() {
        assert_eq!(format_sig(1234.5678, 6), "1234.57");
        assert_eq!(format_sig(0.000123456, 3), "1.23e-4");
        assert_eq!(format_sig(f64::INFINITY, 3), "inf");
        assert_eq!(trim_zeros("1.50000"), "1.5");
        assert_eq!(trim_zeros("2.000e3"), "2e3");
        assert_eq!(trim_zeros("100"), "100");
    }

    #[test]
    fn json_has_contract_keys() {
        let mut r = Report::new("x");
        r.columns = vec!["a".into()];
        r.rows = vec![vec![num(1.5)]];
        r.summary.push(("s".into(), num(2.0)));
        let j = r.to_json();
        assert!(j["version"].is_string());
        assert_eq!(j["rows"][0]["a"], 1.5);
        assert_eq!(j["s"], 2.0);
        assert!(j.get("inputs").is_some());
    }

    #[test]
    fn csv_is_header_then_rows_and_ecsv_keeps_the_notes() {
        let mut r = Report::new("x");
        r.notes.push("lengths in Mpc".into());
        r.columns = vec!["a".into(), "b".into(), "sigma".into(), "log_slope".into()];
        r.rows = vec![vec![
            num(1.0),
            Value::String("q".into()),
            Value::Null,
            Value::Null,
        ]];
        let csv = r.render(Format::Csv);
        let lines: Vec<&str> = csv.lines().collect();
        assert_eq!(lines, ["a,b,sigma,log_slope", "1.0,q,inf,"]);
        let ecsv = r.render(Format::Ecsv);
        assert!(ecsv.starts_with("# %ECSV 1.0") && ecsv.contains("lengths in Mpc"));
        let table = r.render(Format::Table);
        let last = table.lines().last().unwrap();
        assert!(
            last.contains("inf") && last.trim_end().ends_with('-'),
            "{last}"
        );
    }
}
