//! Batch runs: a plan expands a grid over any scenario field, runs the scenarios in
//! parallel, reuses the expensive CMB pieces between scenarios that share a cosmology
//! and transfer model, writes one folder per scenario plus a combined table, resumes
//! (skips scenarios whose `summary.json` exists; every file is written to a temporary
//! name and renamed), and splits across array jobs (`--shard I/N`, or `--shard auto`
//! inside a SLURM array job, merged afterwards by `ngreach merge`).
//!
//! ```toml
//! [plan]
//! name = "area by density"
//! scenario = "scenario_demo.toml"      # relative to the plan; "demo" for the embedded one
//!
//! [[plan.vary]]
//! path = "survey.0.area_deg2"          # survey N's table, cmb N's table, or
//! values = [5000.0, 10000.0, 15000.0]  # scenario.*, cosmology.*, cmb.N.file, ...
//!
//! [[plan.vary]]
//! path = "survey.0.tracer.0.nbar_h3_mpc3"
//! values = [1e-4, 3e-4, 1e-3]
//! ```
//! Paths `survey.N.<key>` and `cmb.N.<key>` (other than `file`, `ideal`) go into that
//! entry's `set` overrides; anything else is set in the scenario document itself.

use std::path::{Path, PathBuf};

use serde::Deserialize;
use serde_json::{Value, json};
use toml::Spanned;

use crate::error::{Error, Location, Result};
use crate::input::{Source, parse_toml};
use crate::report::table::{Cell, Column, Table, TableFormat};
use crate::scenario::{
    DiskResolver, EmbeddedResolver, FileResolver, Scenario, resolve_scenario, set_path,
};

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct VaryTable {
    path: Spanned<String>,
    values: Spanned<Vec<toml::Value>>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct PlanTable {
    name: Option<String>,
    scenario: Spanned<String>,
    #[serde(default)]
    vary: Vec<VaryTable>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct PlanFile {
    plan: PlanTable,
}

/// One point of the grid.
#[derive(Debug, Clone)]
pub struct PlanPoint {
    /// Index in the full (unsharded) grid.
    pub index: usize,
    /// Number of points of the full (unsharded) grid.
    pub grid_size: usize,
    /// Folder name.
    pub folder: String,
    /// (path, value) pairs of this point.
    pub values: Vec<(String, toml::Value)>,
    /// The resolved scenario.
    pub scenario: Scenario,
}

/// An expanded plan.
#[derive(Debug, Clone)]
pub struct Plan {
    /// Label.
    pub name: String,
    /// Grid points in order.
    pub points: Vec<PlanPoint>,
}

/// A shard `I/N` (0-based I).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shard {
    /// This shard.
    pub index: usize,
    /// Number of shards.
    pub count: usize,
}

impl Shard {
    /// Parses `I/N` with 0 <= I < N, or `auto`: the shard of this task of a SLURM array
    /// job, from the process environment (see [`Shard::from_array_job`]).
    ///
    /// # Errors
    /// A malformed value; `auto` outside an array job.
    pub fn parse(s: &str) -> Result<Self> {
        if s.trim() == "auto" {
            return Self::from_array_job(|k| std::env::var(k).ok());
        }
        Self::parse_index(s)
    }

    /// The shard of an array-job task: index (SLURM_ARRAY_TASK_ID - SLURM_ARRAY_TASK_MIN)
    /// / step and count SLURM_ARRAY_TASK_COUNT, where the step is SLURM_ARRAY_TASK_STEP
    /// (1 when unset). `var` looks a variable up (the process environment in
    /// [`Shard::parse`]).
    ///
    /// # Errors
    /// [`Error::BadField`] on `--shard` naming the missing or malformed variable.
    pub fn from_array_job(var: impl Fn(&str) -> Option<String>) -> Result<Self> {
        let bad = |message: String| Error::BadField {
            at: Location::Flag("--shard".into()),
            field: "shard".into(),
            message,
        };
        let get = |k: &str| -> Result<usize> {
            let v = var(k).ok_or_else(|| {
                bad(format!(
                    "`auto` takes the shard from the array-job variables SLURM_ARRAY_TASK_ID, SLURM_ARRAY_TASK_COUNT and SLURM_ARRAY_TASK_MIN, but {k} is not set: run inside an array job (sbatch --array=0-N) or give --shard I/N"
                ))
            })?;
            v.trim()
                .parse()
                .map_err(|_| bad(format!("{k} = `{v}` is not a non-negative integer")))
        };
        let (id, count, min) = (
            get("SLURM_ARRAY_TASK_ID")?,
            get("SLURM_ARRAY_TASK_COUNT")?,
            get("SLURM_ARRAY_TASK_MIN")?,
        );
        let step = match var("SLURM_ARRAY_TASK_STEP") {
            Some(v) => v
                .trim()
                .parse::<usize>()
                .ok()
                .filter(|&s| s > 0)
                .ok_or_else(|| {
                    bad(format!(
                        "SLURM_ARRAY_TASK_STEP = `{v}` is not a positive integer"
                    ))
                })?,
            None => 1,
        };
        if id < min || (id - min) % step != 0 || (id - min) / step >= count || count == 0 {
            return Err(bad(format!(
                "array task {id} is not one of the {count} tasks from {min} in steps of {step}; an array like --array=0-{} gives one task per shard",
                count.saturating_sub(1)
            )));
        }
        Ok(Self {
            index: (id - min) / step,
            count,
        })
    }

    fn parse_index(s: &str) -> Result<Self> {
        let bad = || Error::BadField {
            at: Location::Flag("--shard".into()),
            field: "shard".into(),
            message: format!(
                "`{s}` is not I/N with 0 <= I < N (for example 0/4), nor `auto` (inside an array job)"
            ),
        };
        let (a, b) = s.split_once('/').ok_or_else(bad)?;
        let (index, count): (usize, usize) = (
            a.trim().parse().map_err(|_| bad())?,
            b.trim().parse().map_err(|_| bad())?,
        );
        if count == 0 || index >= count {
            return Err(bad());
        }
        Ok(Self { index, count })
    }

    /// Whether grid point `i` belongs to this shard.
    pub fn owns(&self, i: usize) -> bool {
        i % self.count == self.index
    }
}

/// Reads and expands a plan file.
///
/// # Errors
/// Located input errors in the plan or in any expanded scenario.
pub fn load_plan(path: &Path) -> Result<Plan> {
    load_plan_with(path, &crate::limits::Limits::default())
}

/// [`load_plan`] with cost limits: the grid size is estimated before any scenario is
/// expanded, and a plan above [`crate::limits::MAX_PLAN_POINTS`] points is refused
/// unless `limits` allow it.
///
/// # Errors
/// As [`load_plan`]; [`Error::TooLarge`] for a grid above the limits.
pub fn load_plan_with(path: &Path, limits: &crate::limits::Limits) -> Result<Plan> {
    let src = Source::read(path)?;
    let pf: PlanFile = parse_toml(&src)?;
    for (i, v) in pf.plan.vary.iter().enumerate() {
        if pf.plan.vary[..i]
            .iter()
            .any(|o| o.path.get_ref() == v.path.get_ref())
        {
            return Err(Error::BadField {
                at: src.at(&v.path),
                field: "vary.path".into(),
                message: format!(
                    "`{}` is varied twice; give all its values in one [[plan.vary]]",
                    v.path.get_ref()
                ),
            });
        }
        limits.list(src.at(&v.values), "values", v.values.get_ref().len())?;
        let vals = v.values.get_ref();
        if let Some(d) = (0..vals.len()).find(|&i| vals[..i].contains(&vals[i])) {
            return Err(Error::BadField {
                at: src.at(&v.values),
                field: "values".into(),
                message: format!(
                    "{} is listed twice for `{}`; list each value once",
                    vals[d],
                    v.path.get_ref()
                ),
            });
        }
    }
    let points_estimate = pf
        .plan
        .vary
        .iter()
        .map(|v| v.values.get_ref().len() as f64)
        .product::<f64>();
    limits.guard(
        Location::WholeFile(path.to_path_buf()),
        "the plan's grid (the product of its [[plan.vary]] list lengths)",
        points_estimate,
        crate::limits::MAX_PLAN_POINTS as f64,
        "scenarios",
        "vary fewer values or split the plan",
    )?;
    let dir = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let base_name = pf.plan.scenario.get_ref().clone();
    let (base_src, resolver): (Source, Box<dyn FileResolver>) = if base_name == "demo" {
        (
            EmbeddedResolver.read("scenario_demo.toml")?,
            Box::new(EmbeddedResolver),
        )
    } else {
        let p: PathBuf = dir.join(&base_name);
        let s = Source::read(&p).map_err(|e| match e {
            Error::Io { source, .. } => Error::BadField {
                at: src.at(&pf.plan.scenario),
                field: "scenario".into(),
                message: format!("cannot read {}: {source}", p.display()),
            },
            other => other,
        })?;
        let sdir = p.parent().map(Path::to_path_buf).unwrap_or_default();
        (s, Box::new(DiskResolver(sdir)))
    };
    let base: toml::Table = toml::from_str(base_src.text()).map_err(|e| Error::Syntax {
        at: Location::WholeFile(base_src.path().to_path_buf()),
        message: e.message().to_string(),
    })?;
    for v in &pf.plan.vary {
        if v.values.get_ref().is_empty() {
            return Err(Error::BadField {
                at: src.at(&v.values),
                field: "values".into(),
                message: "give at least one value".into(),
            });
        }
    }
    // Cartesian product, the last `vary` changing fastest.
    let dims: Vec<usize> = pf
        .plan
        .vary
        .iter()
        .map(|v| v.values.get_ref().len())
        .collect();
    let total: usize = dims.iter().product::<usize>().max(1);
    let mut points = Vec::with_capacity(total);
    for index in 0..total {
        let mut rem = index;
        let mut idx = vec![0; dims.len()];
        for d in (0..dims.len()).rev() {
            idx[d] = rem % dims[d];
            rem /= dims[d];
        }
        let mut doc = base.clone();
        let mut values = Vec::new();
        let mut label = format!("s{index:04}");
        for (d, v) in pf.plan.vary.iter().enumerate() {
            let val = v.values.get_ref()[idx[d]].clone();
            let p = v.path.get_ref();
            apply(&mut doc, p, val.clone()).map_err(|m| Error::BadField {
                at: src.at(&v.path),
                field: format!("vary.path `{p}`"),
                message: m,
            })?;
            label.push('_');
            label.push_str(&crate::report::outputs::slug(&format!(
                "{}={}",
                p.rsplit('.').next().unwrap_or(p),
                short_value(&val)
            )));
            values.push((p.clone(), val));
        }
        let text = toml::to_string(&doc).map_err(|e| Error::Numerical {
            stage: "expanding the plan",
            message: e.to_string(),
        })?;
        let s = Source::from_text(&format!("{} [grid point {index}]", path.display()), &text);
        let scenario = resolve_scenario(&s, resolver.as_ref()).map_err(|e| {
            if !e.is_input_error() {
                return e;
            }
            let grid = values
                .iter()
                .map(|(p, v)| format!("{p} = {v}"))
                .collect::<Vec<_>>()
                .join(", ");
            Error::BadField {
                at: Location::WholeFile(path.to_path_buf()),
                field: "plan.vary".into(),
                message: format!("grid point {index} ({grid}) is not a valid scenario: {e}"),
            }
        })?;
        points.push(PlanPoint {
            index,
            grid_size: total,
            folder: label,
            values,
            scenario,
        });
    }
    Ok(Plan {
        name: pf.plan.name.unwrap_or_else(|| path.display().to_string()),
        points,
    })
}

fn short_value(v: &toml::Value) -> String {
    match v {
        toml::Value::String(s) => s.trim_end_matches(".toml").to_string(),
        toml::Value::Float(f) => crate::report::format_sig(*f, 3),
        other => other.to_string(),
    }
}

/// Applies a plan path to the scenario document.
fn apply(doc: &mut toml::Table, path: &str, value: toml::Value) -> std::result::Result<(), String> {
    let segs: Vec<&str> = path.split('.').collect();
    if segs.len() >= 3
        && (segs[0] == "survey" || segs[0] == "cmb")
        && segs[1].parse::<usize>().is_ok()
        && !["file", "ideal", "set"].contains(&segs[2])
    {
        let entry = doc
            .get_mut(segs[0])
            .and_then(|v| v.as_array_mut())
            .and_then(|a| a.get_mut(segs[1].parse::<usize>().unwrap_or(usize::MAX)))
            .and_then(|v| v.as_table_mut())
            .ok_or_else(|| format!("the scenario has no [[{}]] number {}", segs[0], segs[1]))?;
        let set = entry
            .entry("set")
            .or_insert_with(|| toml::Value::Table(toml::Table::new()));
        let set = set.as_table_mut().ok_or("`set` is not a table")?;
        set.insert(segs[2..].join("."), value);
        return Ok(());
    }
    set_path(doc, path, value)
}

/// The row of `batch_summary.json` for one finished scenario: the grid values, the
/// headline rows, every (l_max, k_max) pair, and the crossovers of its summary.
pub fn combined_row(point_values: &[(String, Value)], folder: &str, summary: &Value) -> Value {
    let mut row = serde_json::Map::new();
    row.insert("folder".into(), folder.into());
    for (p, v) in point_values {
        row.insert(p.clone(), v.clone());
    }
    row.insert("rows".into(), summary["rows"].clone());
    row.insert("joint".into(), summary["joint"].clone());
    row.insert("crossover".into(), summary["crossover"].clone());
    Value::Object(row)
}

/// The combined table's column for a plan path: `survey.0.area_deg2` ->
/// `survey_0_area_deg2` (the unit stays in the name).
pub fn grid_column(path: &str) -> String {
    crate::report::table::identifier(path)
}

/// The combined table of finished scenario folders: one row per (scenario, experiment,
/// survey, probe, shape, l_max, k_max), i.e. the whole grid each scenario computed, with
/// each varied plan path in its own column.
///
/// # Errors
/// I/O and JSON errors reading the folders.
fn combined_table(folders: &[PathBuf]) -> Result<(Table, Vec<Value>, Vec<String>)> {
    let io = |p: &Path| {
        let p = p.to_path_buf();
        move |source| Error::Io {
            path: p.clone(),
            source,
        }
    };
    let mut loaded = Vec::new();
    let mut paths: Vec<String> = Vec::new();
    for f in folders {
        let read = |name: &str| -> Result<Value> {
            let p = f.join(name);
            let text = std::fs::read_to_string(&p).map_err(io(&p))?;
            serde_json::from_str(&text).map_err(|e| Error::Syntax {
                at: Location::WholeFile(p.clone()),
                message: e.to_string(),
            })
        };
        let summary = read("summary.json")?;
        let point = read("point.json")?;
        let vals: Vec<(String, Value)> = point["values"]
            .as_object()
            .map(|m| m.iter().map(|(k, v)| (k.clone(), v.clone())).collect())
            .unwrap_or_default();
        for (k, _) in &vals {
            if !paths.contains(k) {
                paths.push(k.clone());
            }
        }
        let folder = f
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        loaded.push((folder, vals, summary));
    }
    let mut cols = vec![Column::new("folder", "scenario folder")];
    for p in &paths {
        cols.push(Column::new(
            &grid_column(p),
            &format!("plan value of `{p}`"),
        ));
    }
    for (name, desc) in [
        ("experiment", "CMB experiment"),
        ("cmb_fields", "CMB field set"),
        ("survey", "survey"),
        ("probe", "survey probe"),
        ("shape", "primordial shape"),
        ("lmax", "CMB l_max"),
        ("kmax_h_mpc", "survey k_max"),
        (
            "sigma_cmb",
            "CMB sigma(f_NL) at this l_max, single-shape (other f_NL fixed)",
        ),
        (
            "sigma_survey",
            "survey sigma(f_NL) at this k_max, single-shape (other f_NL fixed, nuisances marginalized)",
        ),
        ("sigma_joint", "joint sigma(f_NL), single-shape"),
        (
            "sigma_joint_marginal",
            "joint sigma(f_NL), marginalized over the other shapes",
        ),
        (
            "improvement",
            "best single-probe sigma / joint sigma (single-shape)",
        ),
        (
            "crossover_kmax_h_mpc",
            "k_max where the survey beats the CMB at its largest l_max, single-shape sigmas (empty: not reached)",
        ),
        (
            "crossover_status",
            "found, below_grid (a bound: at or below the value), or not_reached",
        ),
    ] {
        cols.push(Column::new(name, desc));
    }
    let mut t = Table::new(
        "batch_summary",
        "one row per (scenario, experiment, survey, probe, shape, l_max, k_max): the whole grid",
        cols,
    );
    t.notes
        .push("sigma(f_NL) single-shape (other f_NL fixed, survey nuisances marginalized) unless the column says marginal, CMB convention; k in h/Mpc".into());
    let mut rows = Vec::new();
    let mut names = Vec::new();
    for (folder, vals, summary) in &loaded {
        for r in summary["joint"].as_array().cloned().unwrap_or_default() {
            let cross = summary["crossover"].as_array().and_then(|a| {
                a.iter()
                    .find(|c| {
                        c["experiment"] == r["experiment"]
                            && c["survey"] == r["survey"]
                            && c["probe"] == r["probe"]
                            && c["shape"] == r["shape"]
                    })
                    .cloned()
            });
            let mut row: Vec<Cell> = vec![folder.clone().into()];
            for p in &paths {
                row.push(
                    vals.iter()
                        .find(|(k, _)| k == p)
                        .map_or(Cell::Float(f64::NAN), |(_, v)| Cell::from_json(v)),
                );
            }
            for k in [
                "experiment",
                "cmb_fields",
                "survey",
                "probe",
                "shape",
                "lmax",
                "kmax_h_mpc",
            ] {
                row.push(Cell::from_json(&r[k]));
            }
            for k in [
                "sigma_cmb",
                "sigma_survey",
                "sigma_joint",
                "sigma_joint_marginal",
            ] {
                row.push(match &r[k] {
                    Value::Null => Cell::Float(f64::INFINITY),
                    v => Cell::from_json(v),
                });
            }
            row.push(Cell::from_json(&r["improvement"]));
            let (k, status) = match &cross {
                Some(c) => match (&c["kmax_h_mpc"], c["below_grid"].as_bool()) {
                    (Value::Null, _) => (Cell::Float(f64::NAN), "not_reached"),
                    (v, Some(true)) => (Cell::from_json(v), "below_grid"),
                    (v, _) => (Cell::from_json(v), "found"),
                },
                None => (Cell::Float(f64::NAN), ""),
            };
            row.push(k);
            row.push(status.into());
            t.push(row);
        }
        rows.push(combined_row(vals, folder, summary));
        names.push(folder.clone());
    }
    Ok((t, rows, names))
}

/// Writes the combined table (`batch_summary.json`, `batch_summary.csv` or `.ecsv`) and
/// the batch's `report.html` from the scenario folders under `out` that hold a
/// `summary.json` (a merge of shards reads the same files, so it produces the same
/// table). Returns the number of scenarios.
///
/// # Errors
/// I/O errors.
pub fn write_combined(out: &Path, format: TableFormat) -> Result<usize> {
    let mut folders: Vec<PathBuf> = std::fs::read_dir(out)
        .map_err(|source| Error::Io {
            path: out.to_path_buf(),
            source,
        })?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.join("summary.json").is_file() && p.join("point.json").is_file())
        .collect();
    folders.sort();
    let (t, rows, names) = combined_table(&folders)?;
    let n = rows.len();
    let prov =
        json!({"generator": format!("ngreach {}", crate::VERSION), "version": crate::VERSION});
    crate::report::write_atomic(
        &out.join(t.file_name(format)),
        t.render(format, &prov).as_bytes(),
    )?;
    let all = json!({"version": crate::VERSION, "scenarios": rows});
    crate::report::write_atomic(
        &out.join("batch_summary.json"),
        (serde_json::to_string_pretty(&all).unwrap_or_default() + "\n").as_bytes(),
    )?;
    let page =
        crate::report::html::batch_page(&out.display().to_string(), &t.to_json_rows(), &names);
    crate::report::write_atomic(&out.join("report.html"), page.as_bytes())?;
    Ok(n)
}

/// The table format a finished scenario folder was written in (from its `point.json`;
/// CSV when not recorded).
pub fn folder_table_format(dir: &Path) -> TableFormat {
    std::fs::read_to_string(dir.join("point.json"))
        .ok()
        .and_then(|t| serde_json::from_str::<Value>(&t).ok())
        .and_then(|v| serde_json::from_value(v["tables"].clone()).ok())
        .unwrap_or_default()
}

/// Writes `point.json` for a grid point (its values), before the scenario runs.
///
/// # Errors
/// I/O errors.
pub fn write_point(dir: &Path, p: &PlanPoint, tables: TableFormat) -> Result<()> {
    std::fs::create_dir_all(dir).map_err(|source| Error::Io {
        path: dir.to_path_buf(),
        source,
    })?;
    let mut vals = serde_json::Map::new();
    for (k, v) in &p.values {
        vals.insert(k.clone(), serde_json::to_value(v).unwrap_or(Value::Null));
    }
    let j = json!({"index": p.index, "grid_size": p.grid_size, "folder": p.folder, "scenario": p.scenario.name,
        "values": vals, "tables": tables});
    crate::report::write_atomic(
        &dir.join("point.json"),
        (serde_json::to_string_pretty(&j).unwrap_or_default() + "\n").as_bytes(),
    )
}

/// A warning when the finished scenario folders under `out` do not cover the whole grid:
/// fewer folders than the `grid_size` their `point.json` files record, or gaps below the
/// largest index (as after merging only some of the shards); None when complete.
pub fn grid_gaps(out: &Path) -> Option<String> {
    let points: Vec<Value> = std::fs::read_dir(out)
        .ok()?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.join("summary.json").is_file())
        .filter_map(|p| {
            let text = std::fs::read_to_string(p.join("point.json")).ok()?;
            serde_json::from_str::<Value>(&text).ok()
        })
        .collect();
    let mut idx: Vec<u64> = points.iter().filter_map(|p| p["index"].as_u64()).collect();
    idx.sort_unstable();
    idx.dedup();
    let top = *idx.last()?;
    let size = points
        .iter()
        .filter_map(|p| p["grid_size"].as_u64())
        .max()
        .unwrap_or(0)
        .max(top + 1);
    let missing = size.saturating_sub(idx.len() as u64);
    (missing > 0).then(|| {
        format!(
            "{}: {missing} of {size} grid points are missing (only {} finished); merge the remaining shards",
            out.display(),
            idx.len(),
        )
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shard_parsing_and_ownership() {
        let s = Shard::parse("1/3").unwrap();
        assert!(s.owns(1) && s.owns(4) && !s.owns(0));
        assert!(
            Shard::parse("3/3").is_err()
                && Shard::parse("x").is_err()
                && Shard::parse("0/0").is_err()
        );
    }

    #[test]
    fn shard_from_array_job_variables() {
        let env = |pairs: &'static [(&'static str, &'static str)]| {
            move |k: &str| pairs.iter().find(|p| p.0 == k).map(|p| p.1.to_string())
        };
        let s = Shard::from_array_job(env(&[
            ("SLURM_ARRAY_TASK_ID", "3"),
            ("SLURM_ARRAY_TASK_COUNT", "4"),
            ("SLURM_ARRAY_TASK_MIN", "1"),
        ]))
        .unwrap();
        assert_eq!(s, Shard { index: 2, count: 4 });
        let s = Shard::from_array_job(env(&[
            ("SLURM_ARRAY_TASK_ID", "4"),
            ("SLURM_ARRAY_TASK_COUNT", "3"),
            ("SLURM_ARRAY_TASK_MIN", "0"),
            ("SLURM_ARRAY_TASK_STEP", "2"),
        ]))
        .unwrap();
        assert_eq!(s, Shard { index: 2, count: 3 });
        let e = Shard::from_array_job(env(&[("SLURM_ARRAY_TASK_ID", "0")])).unwrap_err();
        assert!(
            e.to_string().contains("SLURM_ARRAY_TASK_COUNT is not set"),
            "{e}"
        );
        let e = Shard::from_array_job(env(&[
            ("SLURM_ARRAY_TASK_ID", "7"),
            ("SLURM_ARRAY_TASK_COUNT", "4"),
            ("SLURM_ARRAY_TASK_MIN", "0"),
        ]))
        .unwrap_err();
        assert!(e.to_string().contains("--shard"), "{e}");
        assert_eq!(grid_column("survey.0.area_deg2"), "survey_0_area_deg2");
    }

    #[test]
    fn apply_routes_entry_fields_to_overrides() {
        let mut doc: toml::Table =
            toml::from_str("[scenario]\nname = \"a\"\n[[survey]]\nfile = \"s.toml\"\n").unwrap();
        apply(&mut doc, "survey.0.area_deg2", toml::Value::Float(5.0)).unwrap();
        apply(
            &mut doc,
            "scenario.kmax_h_mpc",
            toml::Value::Array(vec![toml::Value::Float(0.1)]),
        )
        .unwrap();
        assert_eq!(doc["survey"][0]["set"]["area_deg2"].as_float(), Some(5.0));
        assert!(doc["scenario"]["kmax_h_mpc"].is_array());
        assert!(apply(&mut doc, "survey.3.area_deg2", toml::Value::Float(1.0)).is_err());
    }
}
