//! `ngreach batch` and `ngreach merge`.

use std::path::{Path, PathBuf};

use rayon::prelude::*;

use crate::batch::{Plan, Shard, write_combined, write_point};
use crate::error::{Error, Result};
use crate::pipeline::{CmbCache, RunSettings, run_scenario_cached};
use crate::report::outputs::write_outputs;

/// What a batch run did.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct BatchReport {
    /// Scenarios computed now.
    pub ran: Vec<String>,
    /// Scenarios skipped because their outputs were complete.
    pub skipped: Vec<String>,
    /// Scenarios of other shards.
    pub other_shards: usize,
    /// Rows in the combined table.
    pub combined: usize,
}

/// Runs the plan's scenarios (those of `shard`), in parallel, into `out/<folder>`.
///
/// # Errors
/// The first failing scenario's error (the others still finish and stay resumable).
pub fn run_batch(
    plan: &Plan,
    out: &Path,
    shard: Option<Shard>,
    settings: &RunSettings,
) -> Result<BatchReport> {
    std::fs::create_dir_all(out).map_err(|source| Error::Io {
        path: out.to_path_buf(),
        source,
    })?;
    let cache = CmbCache::default();
    // The steps inside each scenario stay silent; the bar counts scenarios.
    let inner = RunSettings {
        progress: crate::progress::Progress::silent(),
        ..settings.clone()
    };
    let mine: Vec<_> = plan
        .points
        .iter()
        .filter(|p| shard.is_none_or(|s| s.owns(p.index)))
        .collect();
    let other_shards = plan.points.len() - mine.len();
    settings
        .progress
        .step("batch scenarios", Some(mine.len() as u64));
    let results: Vec<Result<(String, bool)>> = mine
        .par_iter()
        .map(|p| {
            let dir = out.join(&p.folder);
            if dir.join("summary.json").is_file() {
                settings.progress.inc(1);
                return Ok((p.folder.clone(), false));
            }
            write_point(&dir, p)?;
            let r = run_scenario_cached(&p.scenario, &inner, &cache, &mut |_| {})?;
            write_outputs(&r, &dir)?;
            settings.progress.inc(1);
            Ok((p.folder.clone(), true))
        })
        .collect();
    let mut report = BatchReport {
        other_shards,
        ..Default::default()
    };
    let mut first_err = None;
    for r in results {
        match r {
            Ok((f, true)) => report.ran.push(f),
            Ok((f, false)) => report.skipped.push(f),
            Err(e) => {
                if first_err.is_none() {
                    first_err = Some(e);
                }
            }
        }
    }
    settings.progress.finish();
    if let Some(e) = first_err {
        return Err(e);
    }
    report.combined = write_combined(out)?;
    Ok(report)
}

/// Merges shard outputs: copies the scenario folders of `parts` into `out` (those not
/// already complete there) and rebuilds the combined table.
///
/// # Errors
/// I/O errors.
pub fn merge(out: &Path, parts: &[PathBuf]) -> Result<usize> {
    if parts.is_empty() && !out.is_dir() {
        return Err(Error::BadField {
            at: crate::error::Location::WholeFile(out.to_path_buf()),
            field: "OUT".into(),
            message: "no such folder to rebuild; give shard folders to merge into it".into(),
        });
    }
    std::fs::create_dir_all(out).map_err(|source| Error::Io {
        path: out.to_path_buf(),
        source,
    })?;
    for part in parts {
        if !part.is_dir() {
            return Err(Error::BadField {
                at: crate::error::Location::WholeFile(part.clone()),
                field: "SHARD_DIR".into(),
                message: "not a folder: give the --out folders of the shard runs".into(),
            });
        }
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
    write_combined(out)
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
        if p.is_file() {
            let name = p
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default();
            let bytes = std::fs::read(&p).map_err(io(&p))?;
            crate::report::write_atomic(&dst.join(name), &bytes)?;
        }
    }
    Ok(())
}
