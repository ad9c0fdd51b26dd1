//! Tables written to files: one header row of unit-bearing column names, then data, as
//! plain CSV (what `numpy.genfromtxt(path, delimiter=",", names=True)` and a bare
//! `pandas.read_csv(path)` read) or as ECSV 1.0, the astronomy community's self-describing
//! text table (a `# %ECSV 1.0` line, a YAML header with each column's datatype, unit and
//! description and the table's metadata, then the same comma-separated body; astropy's
//! `Table.read(path)` reads it).
//!
//! Rules that keep both readers happy without options:
//! - column names are lower-case identifiers (`[a-z0-9_]`, not starting with a digit),
//!   so genfromtxt keeps them as written; the unit is in the name (`kmax_h_mpc`);
//! - text cells never hold a comma, a double quote, a `#` (genfromtxt's comment mark) or
//!   a line break: they are replaced by `;`, `'`, `no.` and a space;
//! - a number that is not defined (for example a log slope on a one-point grid) is an
//!   empty cell (NaN for both readers); infinities are written `inf`.
//!
//! The ECSV header is written in YAML's flow style using JSON syntax (every JSON object
//! is a YAML flow mapping), so the tests can read it back without a YAML parser.

use serde_json::{Value, json};

/// Which file format tables are written in.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    Default,
    clap::ValueEnum,
    serde::Serialize,
    serde::Deserialize,
)]
#[serde(rename_all = "lowercase")]
pub enum TableFormat {
    /// Plain CSV: one header row; provenance in the `tables.json` sidecar.
    #[default]
    Csv,
    /// ECSV 1.0 (astropy): units, descriptions and provenance in the file's header.
    Ecsv,
}

impl TableFormat {
    /// The file extension.
    pub fn extension(self) -> &'static str {
        match self {
            TableFormat::Csv => "csv",
            TableFormat::Ecsv => "ecsv",
        }
    }
}

/// One cell.
#[derive(Debug, Clone, PartialEq)]
pub enum Cell {
    /// Text.
    Text(String),
    /// A real number (non-finite allowed: NaN is written as an empty cell).
    Float(f64),
    /// An integer.
    Int(i64),
}

impl From<&str> for Cell {
    fn from(s: &str) -> Self {
        Cell::Text(s.to_string())
    }
}

impl From<String> for Cell {
    fn from(s: String) -> Self {
        Cell::Text(s)
    }
}

impl From<f64> for Cell {
    fn from(x: f64) -> Self {
        Cell::Float(x)
    }
}

impl From<usize> for Cell {
    fn from(x: usize) -> Self {
        Cell::Int(x as i64)
    }
}

impl Cell {
    /// A cell from a JSON value (numbers keep their integer/real kind; null is an
    /// undefined number; arrays and objects become their compact text).
    pub fn from_json(v: &Value) -> Cell {
        match v {
            Value::Number(n) => match (n.as_i64(), n.as_f64()) {
                (Some(i), _) if !n.is_f64() => Cell::Int(i),
                (_, Some(x)) => Cell::Float(x),
                _ => Cell::Text(n.to_string()),
            },
            Value::Null => Cell::Float(f64::NAN),
            Value::String(s) => Cell::Text(s.clone()),
            Value::Bool(b) => Cell::Text(b.to_string()),
            Value::Array(a) => Cell::Text(
                a.iter()
                    .map(|x| match x {
                        Value::String(s) => s.clone(),
                        other => other.to_string(),
                    })
                    .collect::<Vec<_>>()
                    .join(";"),
            ),
            other => Cell::Text(other.to_string()),
        }
    }

    fn datatype(&self) -> &'static str {
        match self {
            Cell::Text(_) => "string",
            Cell::Float(_) => "float64",
            Cell::Int(_) => "int64",
        }
    }

    /// The cell as written in the body of both formats.
    pub fn render(&self) -> String {
        match self {
            Cell::Text(s) => clean_text(s),
            Cell::Int(i) => i.to_string(),
            Cell::Float(x) if x.is_nan() => String::new(),
            Cell::Float(x) if x.is_infinite() => {
                if *x > 0.0 {
                    "inf".into()
                } else {
                    "-inf".into()
                }
            }
            Cell::Float(x) => format!("{x:?}"),
        }
    }
}

/// Text made safe for a comma-separated body read without options.
fn clean_text(s: &str) -> String {
    s.replace(',', ";")
        .replace('"', "'")
        .replace('#', "no.")
        .replace(['\n', '\r'], " ")
}

/// A column: its name (with the unit in it), the unit in astropy's notation (None for
/// dimensionless or text columns), and a description.
#[derive(Debug, Clone, PartialEq)]
pub struct Column {
    /// Identifier with the unit in it (`kmax_h_mpc`).
    pub name: String,
    /// Unit in astropy's string notation (`littleh / Mpc`), None when dimensionless.
    pub unit: Option<String>,
    /// What the column holds.
    pub description: String,
}

impl Column {
    /// A column whose unit is read from its name's suffix (see [`unit_of`]); an empty
    /// description is filled from [`default_description`] for the columns it knows.
    pub fn new(name: &str, description: &str) -> Self {
        let description = if description.is_empty() {
            default_description(name).unwrap_or_default()
        } else {
            description
        };
        Self {
            name: identifier(name),
            unit: unit_of(name).map(str::to_string),
            description: description.to_string(),
        }
    }
}

/// The description of a column that some reports carry without one of their own (the
/// ISW-lensing bias columns of `ngreach cmb`).
pub fn default_description(name: &str) -> Option<&'static str> {
    match name {
        "lensing_bias" => Some(
            "Delta f_NL from the ISW-lensing bispectrum (f_NL units, CMB convention; positive mimics a positive f_NL), single-shape: F_ss^-1 F_s,lens",
        ),
        "lensing_bias_marginal" => Some(
            "Delta f_NL from the ISW-lensing bispectrum (f_NL units, CMB convention), joint over the shapes of the run: (F^-1 F_lens)_s",
        ),
        _ => None,
    }
}

/// The astropy unit string of a unit-suffixed column name: `_h_mpc` on a wavenumber is
/// h/Mpc, `_mpc` on a wavenumber (a name starting with `k`) 1/Mpc and on anything else
/// Mpc, `_h3_mpc3` h^3 Mpc^-3, `_gpc3_h3` (Gpc/h)^3, `_uk2` microkelvin^2, `_deg2`
/// square degrees, `_km_s` km/s, `_arcmin` arcminutes, `_uk_arcmin` microkelvin
/// arcminutes. Other names are dimensionless.
pub fn unit_of(name: &str) -> Option<&'static str> {
    let wavenumber = name.starts_with('k');
    let rules: [(&str, &str); 9] = [
        ("_uk_arcmin", "uK arcmin"),
        ("_h3_mpc3", "littleh3 / Mpc3"),
        ("_gpc3_h3", "Gpc3 / littleh3"),
        ("_h_mpc", "littleh / Mpc"),
        ("_uk2", "uK2"),
        ("_deg2", "deg2"),
        ("_km_s", "km / s"),
        ("_arcmin", "arcmin"),
        ("_mpc", "Mpc"),
    ];
    for (suffix, unit) in rules {
        if name.ends_with(suffix) {
            if suffix == "_mpc" && wavenumber {
                return Some("1 / Mpc");
            }
            return Some(unit);
        }
    }
    None
}

/// A lower-case identifier from any label: runs of other characters become one `_`; a
/// leading digit gets a `c` in front.
pub fn identifier(s: &str) -> String {
    let mut out = String::new();
    for ch in s.chars() {
        if ch.is_ascii_alphanumeric() || ch == '_' {
            out.push(ch.to_ascii_lowercase());
        } else if ch == '+' {
            out.push_str("_plus_");
        } else if !out.ends_with('_') {
            out.push('_');
        }
    }
    let mut out = out.trim_matches('_').replace("__", "_");
    if out.is_empty() || out.starts_with(|c: char| c.is_ascii_digit()) {
        out.insert(0, 'c');
    }
    out
}

/// A table with its description and metadata.
#[derive(Debug, Clone)]
pub struct Table {
    /// File stem (`sigma_vs_kmax_local`).
    pub stem: String,
    /// One sentence on what the table holds.
    pub description: String,
    /// Notes (conventions, units beyond the column names).
    pub notes: Vec<String>,
    /// Columns.
    pub columns: Vec<Column>,
    /// Rows, one cell per column.
    pub rows: Vec<Vec<Cell>>,
}

impl Table {
    /// An empty table.
    pub fn new(stem: &str, description: &str, columns: Vec<Column>) -> Self {
        Self {
            stem: stem.to_string(),
            description: description.to_string(),
            notes: Vec::new(),
            columns,
            rows: Vec::new(),
        }
    }

    /// Appends a row (padded or cut to the number of columns).
    pub fn push(&mut self, mut row: Vec<Cell>) {
        row.resize(self.columns.len(), Cell::Float(f64::NAN));
        self.rows.push(row);
    }

    /// The file name in a format.
    pub fn file_name(&self, format: TableFormat) -> String {
        format!("{}.{}", self.stem, format.extension())
    }

    /// The datatype of each column: the kind of its first non-empty cell, widened to
    /// float when integers and reals mix and to string when text mixes with numbers.
    fn datatypes(&self) -> Vec<&'static str> {
        (0..self.columns.len())
            .map(|i| {
                let mut kind: Option<&'static str> = None;
                for r in &self.rows {
                    let k = r[i].datatype();
                    kind = Some(match (kind, k) {
                        (None, k) => k,
                        (Some(a), b) if a == b => a,
                        (Some("string"), _) | (_, "string") => "string",
                        _ => "float64",
                    });
                }
                kind.unwrap_or("float64")
            })
            .collect()
    }

    fn body(&self) -> String {
        let mut s = self
            .columns
            .iter()
            .map(|c| c.name.as_str())
            .collect::<Vec<_>>()
            .join(",");
        s.push('\n');
        for r in &self.rows {
            s.push_str(&r.iter().map(Cell::render).collect::<Vec<_>>().join(","));
            s.push('\n');
        }
        s
    }

    /// Plain CSV: one header row, then the rows.
    pub fn to_csv(&self) -> String {
        self.body()
    }

    /// ECSV 1.0 with the columns' datatypes, units and descriptions and the table's
    /// metadata (`meta`: the given provenance plus the description and notes).
    pub fn to_ecsv(&self, provenance: &Value) -> String {
        let mut s = String::from("# %ECSV 1.0\n# ---\n# delimiter: ','\n# datatype:\n");
        for (c, dt) in self.columns.iter().zip(self.datatypes()) {
            let mut m = serde_json::Map::new();
            m.insert("name".into(), json!(c.name));
            if let Some(u) = &c.unit {
                m.insert("unit".into(), json!(u));
            }
            m.insert("datatype".into(), json!(dt));
            if !c.description.is_empty() {
                m.insert("description".into(), json!(c.description));
            }
            s.push_str(&format!("# - {}\n", Value::Object(m)));
        }
        let mut meta = serde_json::Map::new();
        meta.insert("description".into(), json!(self.description));
        if !self.notes.is_empty() {
            meta.insert("notes".into(), json!(self.notes));
        }
        if let Value::Object(p) = provenance {
            for (k, v) in p {
                meta.insert(k.clone(), v.clone());
            }
        }
        s.push_str(&format!("# meta: {}\n", Value::Object(meta)));
        s.push_str("# schema: astropy-2.0\n");
        s.push_str(&self.body());
        s
    }

    /// The table in a format.
    pub fn render(&self, format: TableFormat, provenance: &Value) -> String {
        match format {
            TableFormat::Csv => self.to_csv(),
            TableFormat::Ecsv => self.to_ecsv(provenance),
        }
    }

    /// The rows as JSON objects keyed by column name (undefined numbers as null).
    pub fn to_json_rows(&self) -> Vec<Value> {
        self.rows
            .iter()
            .map(|r| {
                let mut m = serde_json::Map::new();
                for (c, v) in self.columns.iter().zip(r) {
                    let v = match v {
                        Cell::Text(s) => json!(s),
                        Cell::Int(i) => json!(i),
                        Cell::Float(x) => crate::report::num(*x),
                    };
                    m.insert(c.name.clone(), v);
                }
                Value::Object(m)
            })
            .collect()
    }

    /// The sidecar entry of this table: file, description, notes, columns with units.
    pub fn describe(&self, format: TableFormat) -> Value {
        json!({
            "file": self.file_name(format),
            "description": self.description,
            "notes": self.notes,
            "columns": self.columns.iter().map(|c| json!({
                "name": c.name, "unit": c.unit, "description": c.description,
            })).collect::<Vec<_>>(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> Table {
        let mut t = Table::new(
            "t",
            "a test",
            vec![
                Column::new("shape", "primordial shape"),
                Column::new("kmax_h_mpc", "k_max"),
                Column::new("lmax", "l_max"),
                Column::new("log_slope", "d ln F / d ln l_max"),
            ],
        );
        t.push(vec![
            "local, #1".into(),
            0.1.into(),
            3000usize.into(),
            f64::NAN.into(),
        ]);
        t.push(vec![
            "delta=0.5".into(),
            f64::INFINITY.into(),
            2usize.into(),
            1.5.into(),
        ]);
        t
    }

    #[test]
    fn csv_is_one_header_row_and_clean_cells() {
        let csv = sample().to_csv();
        let lines: Vec<&str> = csv.lines().collect();
        assert_eq!(lines[0], "shape,kmax_h_mpc,lmax,log_slope");
        assert_eq!(lines[1], "local; no.1,0.1,3000,");
        assert_eq!(lines[2], "delta=0.5,inf,2,1.5");
        assert!(!csv.contains('#') && !csv.contains('"'));
    }

    #[test]
    fn units_follow_the_name_suffix() {
        assert_eq!(unit_of("kmax_h_mpc"), Some("littleh / Mpc"));
        assert_eq!(unit_of("k_mpc"), Some("1 / Mpc"));
        assert_eq!(unit_of("chi_mpc"), Some("Mpc"));
        assert_eq!(unit_of("nbar_h3_mpc3"), Some("littleh3 / Mpc3"));
        assert_eq!(unit_of("volume_gpc3_h3"), Some("Gpc3 / littleh3"));
        assert_eq!(unit_of("d_tt_uk2"), Some("uK2"));
        assert_eq!(unit_of("sigma_marginal"), None);
        assert_eq!(identifier("sigma(f_NL) P+B"), "sigma_f_nl_p_plus_b");
        assert_eq!(identifier("2nd"), "c2nd");
    }

    #[test]
    fn ecsv_header_is_json_flow_yaml() {
        let e = sample().to_ecsv(&json!({"version": "x"}));
        let lines: Vec<&str> = e.lines().collect();
        assert_eq!(lines[0], "# %ECSV 1.0");
        assert_eq!(lines[1], "# ---");
        let cols: Vec<Value> = lines
            .iter()
            .filter_map(|l| l.strip_prefix("# - "))
            .map(|l| serde_json::from_str(l).unwrap())
            .collect();
        assert_eq!(cols.len(), 4);
        assert_eq!(cols[1]["unit"], "littleh / Mpc");
        assert_eq!(cols[0]["datatype"], "string");
        assert_eq!(cols[2]["datatype"], "int64");
        assert_eq!(cols[3]["datatype"], "float64");
        let meta = lines
            .iter()
            .find_map(|l| l.strip_prefix("# meta: "))
            .unwrap();
        let meta: Value = serde_json::from_str(meta).unwrap();
        assert_eq!(meta["version"], "x");
        assert_eq!(meta["description"], "a test");
    }
}
