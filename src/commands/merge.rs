//! `ngreach merge`: collects the scenario folders of sharded batch runs into one folder
//! and rebuilds the combined table; `--expect N` fails when grid points are missing.

use std::path::{Path, PathBuf};

use crate::batch::{folder_table_format, write_combined};
use crate::error::{Error, Location, Result};

/// Merges shard outputs: copies the scenario folders of `parts` into `out` (those not
/// already complete there) and rebuilds the combined table, in the table format the
/// scenarios were written in.
///
/// # Errors
/// I/O errors.
pub fn merge(out: &Path, parts: &[PathBuf]) -> Result<usize> {
    if parts.is_empty() && !out.is_dir() {
        return Err(Error::BadField {
            at: Location::WholeFile(out.to_path_buf()),
            field: "OUT".into(),
            message: "no such folder to rebuild; give shard folders to merge into it".into(),
        });
    }
    for part in parts {
        if !part.is_dir() {
            return Err(Error::BadField {
                at: Location::WholeFile(part.clone()),
                field: "SHARD_DIR".into(),
                message: "not a folder: give the --out folders of the shard runs".into(),
            });
        }
    }
    std::fs::create_dir_all(out).map_err(|source| Error::Io {
        path: out.to_path_buf(),
        source,
    })?;
    for part in parts {
        let entries = std::fs::read_dir(part).map_err(|source| Error::Io {
            path: part.clone(),
            source,
        })?;
        for e in entries.flatten() {
            let src = e.path();
            if !(src.join("summary.json").is_file() && src.join("point.json").is_file()) {
                continue;
            }
            let dst = out.join(e.file_name());
            if dst.join("summary.json").is_file() {
                continue;
            }
            copy_dir(&src, &dst)?;
        }
    }
    write_combined(out, table_format(out)?)
}

/// [`merge`], then a check that `expect` scenarios (grid points 0 to expect - 1) are
/// all there.
///
/// # Errors
/// I/O errors; [`Error::BadField`] on `--expect` naming the missing grid points.
pub fn merge_expecting(out: &Path, parts: &[PathBuf], expect: Option<usize>) -> Result<usize> {
    let n = merge(out, parts)?;
    if let Some(expect) = expect {
        let have = grid_indices(out)?;
        let missing: Vec<usize> = (0..expect).filter(|i| !have.contains(i)).collect();
        if !missing.is_empty() || have.len() != expect {
            let list = missing
                .iter()
                .take(20)
                .map(|i| i.to_string())
                .collect::<Vec<_>>()
                .join(", ");
            return Err(Error::BadField {
                at: Location::Flag("--expect".into()),
                field: "expect".into(),
                message: format!(
                    "expected {expect} scenario(s) in {}, found {}{}; rerun the shards that own them (grid point i belongs to shard i mod N) and merge again",
                    out.display(),
                    have.len(),
                    if list.is_empty() {
                        String::new()
                    } else {
                        format!("; missing grid point(s) {list}")
                    }
                ),
            });
        }
    }
    Ok(n)
}

/// Grid indices of the finished scenario folders under `out`.
fn grid_indices(out: &Path) -> Result<Vec<usize>> {
    let mut v = Vec::new();
    for e in std::fs::read_dir(out)
        .map_err(|source| Error::Io {
            path: out.to_path_buf(),
            source,
        })?
        .flatten()
    {
        let p = e.path();
        if !p.join("summary.json").is_file() {
            continue;
        }
        let idx = std::fs::read_to_string(p.join("point.json"))
            .ok()
            .and_then(|t| serde_json::from_str::<serde_json::Value>(&t).ok())
            .and_then(|j| j["index"].as_u64());
        if let Some(i) = idx {
            v.push(i as usize);
        }
    }
    v.sort_unstable();
    Ok(v)
}

/// The table format of the first finished scenario folder under `out` (CSV if none).
fn table_format(out: &Path) -> Result<crate::report::table::TableFormat> {
    let mut dirs: Vec<PathBuf> = std::fs::read_dir(out)
        .map_err(|source| Error::Io {
            path: out.to_path_buf(),
            source,
        })?
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.join("point.json").is_file())
        .collect();
    dirs.sort();
    Ok(dirs
        .first()
        .map(|d| folder_table_format(d))
        .unwrap_or_default())
}

fn copy_dir(src: &Path, dst: &Path) -> Result<()> {
    let io = |p: &Path| {
        let p = p.to_path_buf();
        move |source| Error::Io {
            path: p.clone(),
            source,
        }
    };
    std::fs::create_dir_all(dst).map_err(io(dst))?;
    let mut names: Vec<_> = std::fs::read_dir(src)
        .map_err(io(src))?
        .flatten()
        .map(|e| e.path())
        .collect();
    // summary.json last, so an interrupted merge leaves the folder incomplete.
    names.sort_by_key(|p| p.file_name().is_some_and(|n| n == "summary.json"));
    for p in names {
        let name = p
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        if p.is_dir() {
            copy_dir(&p, &dst.join(name))?;
        } else if p.is_file() {
            let bytes = std::fs::read(&p).map_err(io(&p))?;
            crate::report::write_atomic(&dst.join(name), &bytes)?;
        }
    }
    Ok(())
}
