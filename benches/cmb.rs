//! Benchmark of the CMB bispectrum engine (run with `cargo bench --bench cmb`).
//! Asserts nothing; prints stage times, rates and ratios.
//!
//! The case: the full scan of `ngreach cmb --ideal`: T, E and T+E, three shapes (local,
//! equilateral, orthogonal), l_max = 500, 1000, ..., 3000 in one pass, the full
//! (Boltzmann) transfer table read from the cache (solved and stored on the first run),
//! the lensed covariance. Environment: `NGREACH_BENCH_LMAX` (default 3000),
//! `NGREACH_BENCH_REPS` (repetitions of the engine stages, default 3; the minimum is
//! printed, as other work on a shared machine only ever adds time),
//! `NGREACH_BENCH_ORACLE=0` skips the brute-force comparison (about a minute),
//! `NGREACH_BENCH_TOL` sets the compression tolerance (default: the engine's).
//!
//! Prints
//! - the wall time of each stage: transfer table (cache read), lensed covariance spectra,
//!   radial functions (computed, with their CPU time, and read from the radial-function
//!   cache beside the transfer table: written on the first run), inverse covariances (the 2x2 T+E inverse per l), active ranges and
//!   compressed bases, mu sums; and the scan total;
//! - the flop count of the dominant kernel (the blocked matrix products of the mu sums)
//!   and of the triple products, the achieved rate, and its fraction of the machine's
//!   double-precision peak: cores x clock x flop per cycle for the vector width the dgemm
//!   actually uses (see `peak`), and of a large dgemm measured here;
//! - the speed-up over the brute-force oracle (direct triple sum with exact 3j) at
//!   l_max = 300, T only, three shapes, and how well the two agree.

use std::time::Instant;

use ngreach::cmb::bispectrum::{
    BispectrumPlan, CmbFisherInput, CmbForecast, EngineOptions, FieldSet, brute_force_fisher,
    cmb_fisher_with_options,
};
use ngreach::cmb::boltzmann::CacheOptions;
use ngreach::cmb::experiment::Experiment;
use ngreach::cmb::thermal::ThermalHistory;
use ngreach::cosmology::{Background, Cosmology, Primordial};
use ngreach::shapes::Shape;
use rayon::prelude::*;

/// Nominal double-precision peak in Gflop/s of the dgemm: cores x the "cpu MHz" of
/// /proc/cpuinfo (in a virtual machine usually the base clock) x flop per cycle per
/// core. matrixmultiply picks its kernel at run time: AVX-512 (8 doubles) where the CPU
/// has AVX-512F, else AVX2 + FMA (4 doubles); two FMA pipes of that width give 32 or 16
/// flop per cycle (an assumption: some cores run 512-bit operations as two halves, so
/// their true peak is the AVX2 one). Returns (peak, flop per cycle, vector name).
fn peak(threads: usize) -> Option<(f64, f64, &'static str)> {
    let info = std::fs::read_to_string("/proc/cpuinfo").ok()?;
    let flags = info.lines().find(|l| l.starts_with("flags"))?;
    let (per_cycle, name) = if flags.contains(" avx512f") {
        (32.0, "AVX-512")
    } else if flags.contains(" fma") {
        (16.0, "AVX2+FMA")
    } else {
        (4.0, "SSE2")
    };
    let mhz: f64 = info
        .lines()
        .find(|l| l.starts_with("cpu MHz"))?
        .split(':')
        .nth(1)?
        .trim()
        .parse()
        .ok()?;
    Some((mhz * 1e-3 * per_cycle * threads as f64, per_cycle, name))
}

/// Measured rate of large dgemms, one per thread, in Gflop/s (best of three).
fn dgemm_rate(threads: usize) -> f64 {
    let n = 768;
    let a: Vec<f64> = (0..n * n).map(|i| (i as f64 * 1e-3).sin()).collect();
    let reps = 4;
    (0..3)
        .map(|_| {
            let t = Instant::now();
            (0..threads).into_par_iter().for_each(|_| {
                let mut c = vec![0.0; n * n];
                for _ in 0..reps {
                    ngreach::numerics::gemm::gemm(
                        n,
                        n,
                        n,
                        &a,
                        (n, 1),
                        &a,
                        (n, 1),
                        1.0,
                        &mut c,
                        (n, 1),
                    );
                }
                std::hint::black_box(&c);
            });
            (threads * reps) as f64 * 2.0 * (n * n * n) as f64 / t.elapsed().as_secs_f64() / 1e9
        })
        .fold(0.0, f64::max)
}

/// CPU time of this process so far (user + system, all threads), s, from /proc/self/stat
/// (clock ticks, assumed 100 per second); 0 where unavailable.
fn cpu_s() -> f64 {
    let Ok(stat) = std::fs::read_to_string("/proc/self/stat") else {
        return 0.0;
    };
    // Fields after the parenthesized command name: utime and stime are the 12th and 13th.
    let rest = stat.rsplit_once(')').map_or("", |r| r.1);
    let f: Vec<f64> = rest
        .split_whitespace()
        .skip(11)
        .take(2)
        .filter_map(|v| v.parse().ok())
        .collect();
    f.iter().sum::<f64>() / 100.0
}

fn env_usize(name: &str, default: usize) -> usize {
    std::env::var(name)
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(default)
}

fn main() {
    let lmax = env_usize("NGREACH_BENCH_LMAX", 3000);
    let reps = env_usize("NGREACH_BENCH_REPS", 3).max(1);
    let opts = EngineOptions {
        tol: std::env::var("NGREACH_BENCH_TOL")
            .ok()
            .and_then(|s| s.parse().ok())
            .unwrap_or(EngineOptions::default().tol),
        ..EngineOptions::default()
    };
    let threads = rayon::current_num_threads();
    let c = Cosmology::planck2018();
    let bg = Background::new(&c);
    let th = ThermalHistory::new(&c, &bg).expect("thermal history");
    let shapes = [Shape::Local, Shape::Equilateral, Shape::Orthogonal];
    let load = std::fs::read_to_string("/proc/loadavg").unwrap_or_default();

    // Warm the cache (solves and stores on the first run), then time a read.
    let cache = CacheOptions::default();
    ngreach::cmb::full_transfer_for(&c, &th, &bg, lmax, &cache).expect("full transfer");
    let t0 = Instant::now();
    let (table, radial, meta) =
        ngreach::cmb::full_transfer_for(&c, &th, &bg, lmax, &cache).expect("full transfer");
    let t_transfer = t0.elapsed().as_secs_f64();
    let t1 = Instant::now();
    let lensing = ngreach::cmb::lensing::lensing_of(&c, &th, &bg, &table, lmax, 0.0, 1, true)
        .expect("lensing");
    let t_lensing = t1.elapsed().as_secs_f64();

    let exp = Experiment::ideal(lmax);
    let mut grid: Vec<usize> = [500, 1000, 1500, 2000, 2500, 3000]
        .iter()
        .copied()
        .filter(|&l| l < lmax)
        .collect();
    grid.push(lmax);
    let inp = CmbFisherInput {
        transfer: &table,
        primordial: Primordial::new(&c),
        shapes: &shapes,
        experiment: &exp,
        t_cmb_k: c.params().t_cmb_k,
        lmax_grid: &grid,
        field_sets: &[FieldSet::T, FieldSet::E, FieldSet::TE],
        radial: &radial,
        parallel: true,
        signal_cl: Some(&lensing.lensed),
    };
    // Engine stages, best of `reps`.
    let mut best = [f64::INFINITY; 5];
    let mut cpu_radial = f64::INFINITY;
    let mut fc: Option<CmbForecast> = None;
    for _ in 0..reps {
        let t = Instant::now();
        let c0 = cpu_s();
        let plan = BispectrumPlan::new(&inp);
        cpu_radial = cpu_radial.min(cpu_s() - c0);
        let t_plan = t.elapsed().as_secs_f64();
        let t = Instant::now();
        let f = cmb_fisher_with_options(&plan, &grid, true, &opts);
        let t_engine = t.elapsed().as_secs_f64();
        let pt = plan.times();
        let st = &f.stats;
        let now = [
            pt.radial_s,
            pt.inverse_covariance_s,
            st.time_compress_s,
            st.time_mu_sums_s,
            t_plan + t_engine,
        ];
        for (b, n) in best.iter_mut().zip(now) {
            *b = b.min(n);
        }
        fc = Some(f);
    }
    let fc = fc.expect("at least one repetition");
    // The same radial functions through the on-disk cache (written on the first run of
    // the bench, read afterwards): best of `reps` reads.
    let (_, first) = BispectrumPlan::new_cached(&inp, &cache);
    let mut t_radial_read = f64::INFINITY;
    let mut read_status = first.label();
    for _ in 0..reps {
        let (plan, st) = BispectrumPlan::new_cached(&inp, &cache);
        t_radial_read = t_radial_read.min(plan.times().radial_s);
        read_status = st.label();
    }
    let radial_file_mb = first
        .path()
        .and_then(|p| std::fs::metadata(p).ok())
        .map_or(0.0, |m| m.len() as f64 / 1e6);
    let st = &fc.stats;
    let [t_radial, t_cinv, t_compress, t_sums, t_engine] = best;
    let total = t_transfer + t_lensing + t_engine;
    println!(
        "CMB scan: T, E, T+E; local, equilateral, orthogonal; l_max = {grid:?}; full transfer \
         ({} k nodes, cache {}), {} radial nodes, lensed covariance; {threads} threads; \
         load average at start {}",
        table.k().len(),
        meta["cache"]["status"].as_str().unwrap_or("?"),
        radial.len(),
        load.split_whitespace()
            .take(3)
            .collect::<Vec<_>>()
            .join(" ")
    );
    println!("  stage times (engine stages: best of {reps}):");
    println!("    transfer table, read from the cache    {t_transfer:7.2} s");
    println!("    lensed covariance spectra (lensing)    {t_lensing:7.2} s");
    println!("    radial functions X_l(r), computed      {t_radial:7.2} s (CPU {cpu_radial:.2} s)");
    println!(
        "    radial functions, read from the cache  {t_radial_read:7.2} s ({radial_file_mb:.1} MB file; first request {}, then {read_status})",
        first.label()
    );
    println!("    inverse covariances (2x2 T+E per l)    {t_cinv:7.2} s");
    println!("    active ranges + compressed bases       {t_compress:7.2} s");
    println!("    mu sums (block products + triples)     {t_sums:7.2} s");
    println!(
        "  scan total {total:.2} s (target 10 s: {:.2}x; stretch 6 s: {:.2}x); engine alone {t_engine:.2} s",
        10.0 / total,
        6.0 / total
    );
    println!(
        "  compression tolerance {:e}; blocks {}, mean rank {:.1} (largest {}), mean radial width {:.1}, low/high split at l = {:?} (core {:?} nodes), {} mu nodes, {} triples",
        st.compression_tol,
        st.blocks,
        st.mean_rank,
        st.max_rank,
        st.mean_width,
        st.split_lmax,
        st.core_width,
        st.mu_nodes,
        st.triples
    );
    let rate = (st.gemm_flops + st.triple_flops) / t_sums / 1e9;
    println!(
        "  mu sums: dominant kernel (dgemm) {:.1} Gflop, triple products {:.1} Gflop: {rate:.1} Gflop/s",
        st.gemm_flops / 1e9,
        st.triple_flops / 1e9
    );
    let measured = dgemm_rate(threads);
    match peak(threads) {
        Some((p, per_cycle, name)) => println!(
            "  fraction of peak: {:.0}% of {p:.0} Gflop/s ({threads} cores x reported clock x {per_cycle} flop/cycle, {name} dgemm kernel); \
             {:.0}% of a 768^3 dgemm measured here ({measured:.1} Gflop/s)",
            100.0 * rate / p,
            100.0 * rate / measured
        ),
        None => println!(
            "  fraction of peak: {:.0}% of a 768^3 dgemm measured here ({measured:.1} Gflop/s); nominal peak unknown",
            100.0 * rate / measured
        ),
    }
    for (ifs, fs) in fc.field_sets.iter().enumerate() {
        let sig = fc.fisher[ifs].last().expect("grid").sigma_marginal_or_inf();
        println!(
            "  {:>3} sigma_marginal(local, equilateral, orthogonal) at l_max = {lmax}: {:.7e}, {:.7e}, {:.7e}",
            fs.label(),
            sig[0],
            sig[1],
            sig[2]
        );
    }

    if std::env::var("NGREACH_BENCH_ORACLE").as_deref() == Ok("0") {
        return;
    }
    // Speed-up over the brute-force oracle at l_max = 300 (T only).
    let lb = 300;
    let (table_b, radial_b, _) =
        ngreach::cmb::full_transfer_for(&c, &th, &bg, lb, &cache).expect("full transfer");
    let exp_b = Experiment::ideal(lb);
    let inp_b = CmbFisherInput {
        transfer: &table_b,
        experiment: &exp_b,
        lmax_grid: &[lb],
        field_sets: &[FieldSet::T],
        radial: &radial_b,
        signal_cl: None,
        ..inp
    };
    let plan_b = BispectrumPlan::new(&inp_b);
    let t_fast = (0..reps)
        .map(|_| {
            let t = Instant::now();
            std::hint::black_box(cmb_fisher_with_options(&plan_b, &[lb], true, &opts));
            t.elapsed().as_secs_f64()
        })
        .fold(f64::INFINITY, f64::min);
    let fast = cmb_fisher_with_options(&plan_b, &[lb], true, &opts);
    let t4 = Instant::now();
    let brute = brute_force_fisher(&plan_b, 0, lb, true);
    let t_brute = t4.elapsed().as_secs_f64();
    let f = &fast.fisher[0][0];
    let n = shapes.len();
    let worst = (0..n * n)
        .map(|ij| {
            let (i, j) = (ij / n, ij % n);
            (f.get(i, j) - brute[ij]).abs() / (f.get(i, i) * f.get(j, j)).sqrt()
        })
        .fold(0.0, f64::max);
    println!(
        "  brute force at l_max = {lb} (T, 3 shapes, {} radial nodes): {t_brute:.2} s; fast {t_fast:.3} s: \
         speed-up {:.0}x; worst |dF| / sqrt(F_ii F_jj) = {worst:.1e}",
        radial_b.len(),
        t_brute / t_fast
    );
}
