//! Fisher matrices as NumPy `.npy` files (`numpy.load(path)` gives the matrix), one per
//! experiment, field set and l_max; per survey, probe and k_max; and per survey bin,
//! probe and k_max; with an index table (`fisher/index.csv` or `.ecsv`) and
//! `fisher/index.json` naming each file's parameters in matrix order. Written with
//! `ndarray` and `ndarray-npy`.

use std::path::Path;

use ndarray::Array2;
use ndarray_npy::WriteNpyExt;
use serde_json::{Value, json};

use crate::error::{Error, Result};
use crate::fisher::FisherMatrix;
use crate::pipeline::RunResult;
use crate::report::artifacts::pidx;
use crate::report::format_sig;
use crate::report::outputs::slug;
use crate::report::table::{Cell, Column, Table, TableFormat, identifier};

/// Folder of the matrices inside a run's output folder.
pub const FOLDER: &str = "fisher";

/// The matrix as an ndarray (row-major, parameters in `names()` order).
pub fn to_array(f: &FisherMatrix) -> Array2<f64> {
    let n = f.len();
    Array2::from_shape_fn((n, n), |(i, j)| f.get(i, j))
}

/// The bytes of a `.npy` file holding `f`.
///
/// # Errors
/// [`Error::Numerical`] if the encoder fails (it writes to memory).
pub fn npy_bytes(f: &FisherMatrix) -> Result<Vec<u8>> {
    let mut buf = Vec::new();
    to_array(f)
        .write_npy(&mut buf)
        .map_err(|e| Error::Numerical {
            stage: "writing a .npy matrix",
            message: e.to_string(),
        })?;
    Ok(buf)
}

/// One matrix with what it belongs to.
struct Entry<'a> {
    file: String,
    probe_kind: &'static str,
    experiment: String,
    survey: String,
    probe: String,
    bin: Option<(usize, f64, f64)>,
    lmax: Option<usize>,
    kmax_h_mpc: Option<f64>,
    matrix: &'a FisherMatrix,
}

fn entries(r: &RunResult) -> Vec<Entry<'_>> {
    let sc = &r.scenario;
    let kslug = |k: f64| slug(&crate::report::trim_zeros_public(&format_sig(k, 4)));
    let mut v = Vec::new();
    for c in &r.cmb {
        for (ifs, fs) in c.forecast.field_sets.iter().enumerate() {
            for (m, &l) in c.forecast.lmax.iter().enumerate() {
                v.push(Entry {
                    file: format!(
                        "cmb_{}_{}_lmax{l}.npy",
                        slug(&c.experiment.name),
                        identifier(fs.label())
                    ),
                    probe_kind: "cmb",
                    experiment: c.experiment.name.clone(),
                    survey: String::new(),
                    probe: fs.label().into(),
                    bin: None,
                    lmax: Some(l),
                    kmax_h_mpc: None,
                    matrix: &c.forecast.fisher[ifs][m],
                });
            }
        }
    }
    for s in &r.surveys {
        for (ik, &k) in sc.kmax_h_mpc.iter().enumerate() {
            for &p in &sc.probes {
                v.push(Entry {
                    file: format!(
                        "survey_{}_{}_kmax{}.npy",
                        slug(&s.survey.name),
                        identifier(p.label()),
                        kslug(k)
                    ),
                    probe_kind: "survey",
                    experiment: String::new(),
                    survey: s.survey.name.clone(),
                    probe: p.label().into(),
                    bin: None,
                    lmax: None,
                    kmax_h_mpc: Some(k),
                    matrix: &s.forecast.total[ik][pidx(p)],
                });
                for (ib, b) in s.forecast.bins.iter().enumerate() {
                    v.push(Entry {
                        file: format!(
                            "survey_{}_bin{ib:02}_{}_kmax{}.npy",
                            slug(&s.survey.name),
                            identifier(p.label()),
                            kslug(k)
                        ),
                        probe_kind: "survey_bin",
                        experiment: String::new(),
                        survey: s.survey.name.clone(),
                        probe: p.label().into(),
                        bin: Some((ib, b.bin.z_min, b.bin.z_max)),
                        lmax: None,
                        kmax_h_mpc: Some(k),
                        matrix: &b.fisher[ik][pidx(p)],
                    });
                }
            }
        }
    }
    v
}

/// Writes every Fisher matrix of a run into `dir/fisher/` with the index table and
/// `index.json`. Returns the file names written (relative to `dir`).
///
/// # Errors
/// I/O errors.
pub fn write_matrices(r: &RunResult, dir: &Path, format: TableFormat) -> Result<Vec<String>> {
    let sub = dir.join(FOLDER);
    std::fs::create_dir_all(&sub).map_err(|source| Error::Io {
        path: sub.clone(),
        source,
    })?;
    let mut written = Vec::new();
    let mut t = Table::new(
        "index",
        "Fisher matrices of the f_NL parameters (nuisances marginalized), one .npy file each",
        vec![
            Column::new("file_name", ".npy file in this folder"),
            Column::new("kind", "cmb, survey (summed over bins) or survey_bin"),
            Column::new("experiment", "CMB experiment (empty for surveys)"),
            Column::new("survey", "survey (empty for CMB)"),
            Column::new("probe", "CMB field set or survey probe"),
            Column::new("bin", "redshift bin index (empty unless kind = survey_bin)"),
            Column::new("z_min", "bin lower edge"),
            Column::new("z_max", "bin upper edge"),
            Column::new("lmax", "CMB l_max grid value"),
            Column::new("kmax_h_mpc", "survey k_max grid value"),
            Column::new(
                "parameters",
                "parameter names in matrix order, separated by spaces",
            ),
        ],
    );
    let mut index = Vec::new();
    for e in entries(r) {
        crate::report::write_atomic(&sub.join(&e.file), &npy_bytes(e.matrix)?)?;
        written.push(format!("{FOLDER}/{}", e.file));
        let nan = f64::NAN;
        t.push(vec![
            e.file.clone().into(),
            e.probe_kind.into(),
            e.experiment.clone().into(),
            e.survey.clone().into(),
            e.probe.clone().into(),
            e.bin.map_or(Cell::Float(nan), |b| b.0.into()),
            e.bin.map_or(nan, |b| b.1).into(),
            e.bin.map_or(nan, |b| b.2).into(),
            e.lmax.map_or(Cell::Float(nan), Cell::from),
            e.kmax_h_mpc.unwrap_or(nan).into(),
            e.matrix.names().join(" ").into(),
        ]);
        index.push(json!({
            "file": e.file, "kind": e.probe_kind, "experiment": e.experiment, "survey": e.survey,
            "probe": e.probe, "bin": e.bin.map(|b| b.0), "z_min": e.bin.map(|b| b.1), "z_max": e.bin.map(|b| b.2),
            "lmax": e.lmax, "kmax_h_mpc": e.kmax_h_mpc, "parameters": e.matrix.names(),
        }));
    }
    let prov = json!({"version": crate::VERSION, "scenario": r.scenario.name});
    crate::report::write_atomic(
        &sub.join(t.file_name(format)),
        t.render(format, &prov).as_bytes(),
    )?;
    written.push(format!("{FOLDER}/{}", t.file_name(format)));
    let j: Value = json!({"version": crate::VERSION, "scenario": r.scenario.name,
        "note": "numpy.load(file) gives the matrix; rows and columns in the order of parameters",
        "matrices": index});
    crate::report::write_atomic(
        &sub.join("index.json"),
        (serde_json::to_string_pretty(&j).unwrap_or_default() + "\n").as_bytes(),
    )?;
    written.push(format!("{FOLDER}/index.json"));
    Ok(written)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray_npy::ReadNpyExt;

    #[test]
    fn npy_round_trip() {
        let f = FisherMatrix::from_rows(
            vec!["fnl_local".into(), "fnl_equilateral".into()],
            vec![4.0, 1.5, 1.5, 9.0],
        );
        let bytes = npy_bytes(&f).unwrap();
        // The magic string and a little-endian float64 C-order header.
        assert_eq!(&bytes[..6], b"\x93NUMPY");
        let header = String::from_utf8_lossy(&bytes[10..80]);
        assert!(header.contains("'descr': '<f8'") && header.contains("'fortran_order': False"));
        let a = Array2::<f64>::read_npy(&bytes[..]).unwrap();
        assert_eq!(a.shape(), &[2, 2]);
        assert_eq!(a[[0, 1]], 1.5);
        assert_eq!(a[[1, 1]], 9.0);
    }
}
