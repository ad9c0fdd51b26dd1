//! Benchmark of the ISW-lensing Fisher terms (run with `cargo bench --bench lensing_bias`).
//! Prints stage times, the flop rate and the numbers themselves; asserts only that the one-pass
//! run and the separate runs of its two parts give the same numbers.
//!
//! The case: the ISW-lensing bias of the full scan of `ngreach cmb --ideal`: T, E and
//! T+E, three shapes (local, equilateral, orthogonal), l_max = 500, 1000, ..., 3000 in
//! one pass, the full (Boltzmann) transfer table and the lensed spectra read from the
//! cache (solved and stored on the first run). Environment: `NGREACH_BENCH_LMAX`
//! (default 3000), `NGREACH_BENCH_REPS` (repetitions, default 3; the minimum is printed,
//! as other work on a shared machine only ever adds time).
//!
//! Prints the wall time of the cross terms F_lens,s and of the self terms F_lens,lens
//! (all field sets and l_max of the grid; each builds its own mu rule), of both in one
//! pass as the command runs them (wall and process CPU time, the best of the runs), the
//! flop count of the cross terms' matrix products as a dense sum over every l and
//! radial node would do them (so the rate is "dense-equivalent" when the sums skip
//! inactive radial nodes), and every cross and self term to 10 digits, for comparing two
//! versions of the code.

use std::time::Instant;

use ngreach::cmb::bispectrum::{BispectrumPlan, CmbFisherInput, FieldSet};
use ngreach::cmb::boltzmann::CacheOptions;
use ngreach::cmb::experiment::Experiment;
use ngreach::cmb::lensing::bias::{cross_fisher_terms, lensing_fisher, self_fisher_terms};
use ngreach::cmb::lensing::cached_lensing;
use ngreach::cmb::lensing::isw_bispectrum::isw_lensing_for;
use ngreach::cmb::thermal::ThermalHistory;
use ngreach::cosmology::{Background, Cosmology, Primordial};
use ngreach::shapes::Shape;

fn env_usize(name: &str, default: usize) -> usize {
    std::env::var(name)
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(default)
}

/// Best of `reps` wall times of `f`, the best of its process CPU times (all threads),
/// and its last result.
fn best_of<T>(reps: usize, mut f: impl FnMut() -> T) -> ((f64, f64), T) {
    let (mut best, mut best_cpu) = (f64::INFINITY, f64::INFINITY);
    let mut out = None;
    for _ in 0..reps {
        let (t, c) = (Instant::now(), cpu_seconds());
        let v = f();
        best = best.min(t.elapsed().as_secs_f64());
        best_cpu = best_cpu.min(cpu_seconds() - c);
        out = Some(v);
    }
    ((best, best_cpu), out.expect("at least one repetition"))
}

fn main() {
    let lmax = env_usize("NGREACH_BENCH_LMAX", 3000);
    let reps = env_usize("NGREACH_BENCH_REPS", 3).max(1);
    let threads = rayon::current_num_threads();
    let load = std::fs::read_to_string("/proc/loadavg").unwrap_or_default();
    let c = Cosmology::planck2018();
    let bg = Background::new(&c);
    let th = ThermalHistory::new(&c, &bg).expect("thermal history");
    let shapes = [Shape::Local, Shape::Equilateral, Shape::Orthogonal];
    let cache = CacheOptions::default();
    let (table, radial, _) =
        ngreach::cmb::full_transfer_for(&c, &th, &bg, lmax, &cache).expect("full transfer");
    let (lensing, _) =
        cached_lensing(&c, &th, &bg, &table, lmax, 0.0, 1, true, &cache).expect("lensed spectra");
    let exp = Experiment::ideal(lmax);
    let mut grid: Vec<usize> = [500, 1000, 1500, 2000, 2500, 3000]
        .iter()
        .copied()
        .filter(|&l| l < lmax)
        .collect();
    grid.push(lmax);
    let fsets = [FieldSet::T, FieldSet::E, FieldSet::TE];
    let plan = BispectrumPlan::new(&CmbFisherInput {
        transfer: &table,
        primordial: Primordial::new(&c),
        shapes: &shapes,
        experiment: &exp,
        t_cmb_k: c.params().t_cmb_k,
        lmax_grid: &grid,
        field_sets: &fsets,
        radial: &radial,
        parallel: true,
        signal_cl: Some(&lensing.lensed),
    });
    let isw = isw_lensing_for(&c, &th, &bg, &table, Some(&lensing), lmax, true)
        .expect("ISW-lensing bispectrum");

    let (t_cross, cross) = best_of(reps, || {
        cross_fisher_terms(&plan, &radial, &isw, &grid, true)
    });
    let (t_self, self_t) = best_of(reps, || self_fisher_terms(&plan, &isw, &grid, true));
    let (t_all, all) = best_of(reps, || lensing_fisher(&plan, &radial, &isw, &grid, true));
    assert!(
        all.cross == cross && all.self_term == self_t,
        "one pass differs from the parts"
    );

    // Dense-equivalent flops of the cross terms' products: per field set with n_z lensed
    // fields, on the mu >= 0 half of the ceil(3 l_max / 2) + 1 nodes, (2l+1) Q_l and P_l
    // against n_r x n_e x (1 + 2 n_z) weighted radial functions, 2 flop each.
    let n_mu = (3 * lmax).div_ceil(2) + 1;
    let ne = plan.exponents().len();
    let gflop: f64 = fsets
        .iter()
        .map(|fs| {
            let nz = if *fs == FieldSet::TE { 2 } else { 1 };
            2.0 * n_mu.div_ceil(2) as f64
                * (lmax + 1) as f64
                * (radial.len() * ne * (1 + 2 * nz)) as f64
        })
        .sum::<f64>()
        / 1e9;
    println!(
        "ISW-lensing Fisher terms: T, E, T+E; local, equilateral, orthogonal; l_max = {grid:?}; \
         {} radial nodes, {ne} exponents, {n_mu} mu nodes; {threads} threads; load average at start {}",
        radial.len(),
        load.split_whitespace()
            .take(3)
            .collect::<Vec<_>>()
            .join(" ")
    );
    println!("  stage times (best of {reps}; wall, and CPU of both threads):");
    println!(
        "    cross terms F_lens,s (3 field sets)         {:7.3} s wall {:7.3} s CPU",
        t_cross.0, t_cross.1
    );
    println!(
        "    self terms F_lens,lens (3 field sets)       {:7.3} s wall {:7.3} s CPU",
        t_self.0, t_self.1
    );
    println!(
        "    both in one pass (as `ngreach cmb` runs)    {:7.3} s wall {:7.3} s CPU",
        t_all.0, t_all.1
    );
    println!(
        "  cross terms: {gflop:.1} Gflop as a dense sum over all l and radial nodes: {:.1} Gflop/s dense-equivalent",
        gflop / t_cross.0
    );
    for (ifs, fs) in fsets.iter().enumerate() {
        for (m, l) in grid.iter().enumerate() {
            println!(
                "  {:>3} l_max {l:5}: cross {:+.10e} {:+.10e} {:+.10e}  self {:.10e}",
                fs.label(),
                cross[ifs][m][0],
                cross[ifs][m][1],
                cross[ifs][m][2],
                self_t[ifs][m]
            );
        }
    }
}

/// User + system CPU time of this process, s (from /proc/self/stat; 0 where absent).
fn cpu_seconds() -> f64 {
    let Ok(s) = std::fs::read_to_string("/proc/self/stat") else {
        return 0.0;
    };
    // Fields after the command name (which ends with ')'): utime and stime are the 12th
    // and 13th of them, in clock ticks (100 per second on Linux).
    let rest = s.rsplit(')').next().unwrap_or("");
    let f: Vec<&str> = rest.split_whitespace().collect();
    let tick = |i: usize| f.get(i).and_then(|x| x.parse::<f64>().ok()).unwrap_or(0.0);
    (tick(11) + tick(12)) / 100.0
}
