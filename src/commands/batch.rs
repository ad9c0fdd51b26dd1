//! `ngreach batch`.

use std::path::Path;

use rayon::prelude::*;

use crate::batch::{Plan, Shard, write_combined, write_point};
use crate::error::{Error, Result};
use crate::pipeline::{CmbCache, RunSettings, run_scenario_cached};
use crate::report::outputs::{OutputOptions, write_outputs_with};

pub use crate::commands::merge::merge;

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
    outputs: &OutputOptions,
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
            write_point(&dir, p, outputs.tables)?;
            let r = run_scenario_cached(&p.scenario, &inner, &cache, &mut |_| {})?;
            write_outputs_with(&r, &dir, outputs)?;
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
    report.combined = write_combined(out, outputs.tables)?;
    Ok(report)
}
