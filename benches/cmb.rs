//! Benchmark of the CMB bispectrum engine (run with `cargo bench --bench cmb`; set
//! `NGREACH_BENCH_LMAX`, default 3000). Asserts nothing; prints ratios and rates.
//!
//! The case: T+E, three shapes (local, equilateral, orthogonal), the full
//! (Boltzmann) transfer, the whole l_max scan in one pass. Prints
//! - wall times of the transfer table (solved, no cache), the radial functions and the
//!   mu-factorized sums, and their total against the 30 s target (stretch 10 s);
//! - the flop count of the dominant kernel (the blocked matrix products) and of the
//!   triple products, the achieved rate, and its fraction of the machine's double-
//!   precision peak, both the nominal one (reported cpu MHz x flop/cycle from the vector
//!   width x threads; see `nominal_peak`) and the rate of a large dgemm measured here;
//! - the speed-up over the brute-force oracle (direct triple sum with exact 3j) at
//!   l_max = 300, T only, three shapes, and how well the two agree.

use std::time::Instant;

use ngreach::cmb::bispectrum::{
    BispectrumPlan, CmbFisherInput, FieldSet, brute_force_fisher, cmb_fisher_with_plan,
};
use ngreach::cmb::boltzmann::CacheOptions;
use ngreach::cmb::experiment::Experiment;
use ngreach::cmb::thermal::ThermalHistory;
use ngreach::cmb::transfer::{RadialGrid, TransferTable};
use ngreach::cosmology::{Background, Cosmology, Primordial};
use ngreach::shapes::Shape;
use rayon::prelude::*;

/// The full transfer table (solved, never cached) and its radial grid.
fn solve(
    c: &Cosmology,
    th: &ThermalHistory,
    bg: &Background,
    lmax: usize,
) -> (TransferTable, RadialGrid) {
    let (table, radial, _) =
        ngreach::cmb::full_transfer_for(c, th, bg, lmax, &CacheOptions::disabled())
            .expect("full transfer");
    (table, radial)
}

/// Nominal peak in Gflop/s: first "cpu MHz" of /proc/cpuinfo (in a virtual machine often
/// the base clock) x flop per cycle per core (32 with AVX-512, 16 with AVX2 + FMA: two FMA
/// units of the vector width; an assumption) x threads.
fn nominal_peak(threads: usize) -> Option<(f64, f64)> {
    let info = std::fs::read_to_string("/proc/cpuinfo").ok()?;
    let flags = info.lines().find(|l| l.starts_with("flags"))?;
    let per_cycle = if flags.contains(" avx512f") {
        32.0
    } else if flags.contains(" fma") {
        16.0
    } else {
        4.0
    };
    let mhz: f64 = info
        .lines()
        .find(|l| l.starts_with("cpu MHz"))?
        .split(':')
        .nth(1)?
        .trim()
        .parse()
        .ok()?;
    Some((mhz * 1e-3 * per_cycle * threads as f64, per_cycle))
}

/// Measured rate of large dgemms, one per thread, in Gflop/s.
fn dgemm_rate(threads: usize) -> f64 {
    let n = 768;
    let a: Vec<f64> = (0..n * n).map(|i| (i as f64 * 1e-3).sin()).collect();
    let reps = 6;
    let t = Instant::now();
    (0..threads).into_par_iter().for_each(|_| {
        let mut c = vec![0.0; n * n];
        for _ in 0..reps {
            ngreach::numerics::gemm::gemm(n, n, n, &a, (n, 1), &a, (n, 1), 1.0, &mut c, (n, 1));
        }
        std::hint::black_box(&c);
    });
    (threads * reps) as f64 * 2.0 * (n * n * n) as f64 / t.elapsed().as_secs_f64() / 1e9
}

fn main() {
    let lmax: usize = std::env::var("NGREACH_BENCH_LMAX")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(3000);
    let threads = rayon::current_num_threads();
    let c = Cosmology::planck2018();
    let bg = Background::new(&c);
    let th = ThermalHistory::new(&c, &bg).expect("thermal history");
    let shapes = [Shape::Local, Shape::Equilateral, Shape::Orthogonal];

    let t0 = Instant::now();
    let (table, radial) = solve(&c, &th, &bg, lmax);
    let t_transfer = t0.elapsed().as_secs_f64();
    let exp = Experiment::ideal(lmax);
    let mut grid: Vec<usize> = [100, 200, 300, 500, 750, 1000, 1500, 2000, 2500, 3000]
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
        field_sets: &[FieldSet::TE],
        radial: &radial,
        parallel: true,
        signal_cl: None,
    };
    let t1 = Instant::now();
    let plan = BispectrumPlan::new(&inp);
    let t_plan = t1.elapsed().as_secs_f64();
    let t2 = Instant::now();
    let fc = cmb_fisher_with_plan(&plan, &grid, true);
    let t_sum = t2.elapsed().as_secs_f64();
    let st = &fc.stats;
    let sig = fc.fisher[0].last().expect("grid").sigma_marginal_or_inf();
    let total = t_transfer + t_plan + t_sum;
    println!(
        "CMB engine, T+E, 3 shapes, full transfer, l_max = {lmax} ({} grid points), \
         {} radial nodes, {} k nodes, {threads} threads:",
        grid.len(),
        radial.len(),
        table.k().len()
    );
    println!(
        "  transfer table {t_transfer:.2} s, radial functions {t_plan:.2} s, mu sums {t_sum:.2} s; \
         total {total:.2} s (target 30 s: {:.2}x under; stretch 10 s: {:.2}x)",
        30.0 / total,
        10.0 / total
    );
    println!(
        "  with a cached transfer table (load < 1 s): {:.2} s",
        t_plan + t_sum
    );
    println!(
        "  blocks {}, mean rank {:.1} (largest {}), mean radial width {:.1}, low/high split at l = {:?} (core {:?} nodes), {} mu nodes",
        st.blocks,
        st.mean_rank,
        st.max_rank,
        st.mean_width,
        st.split_lmax,
        st.core_width,
        st.mu_nodes
    );
    let rate = (st.gemm_flops + st.triple_flops) / t_sum / 1e9;
    println!(
        "  dominant kernel (dgemm) {:.1} Gflop, triple products {:.1} Gflop: {rate:.1} Gflop/s overall",
        st.gemm_flops / 1e9,
        st.triple_flops / 1e9
    );
    let measured = dgemm_rate(threads);
    match nominal_peak(threads) {
        Some((p, per_cycle)) => println!(
            "  fraction of peak: {:.0}% of nominal {p:.0} Gflop/s ({per_cycle} flop/cycle/core at the reported clock); \
             {:.0}% of a 768^3 dgemm here ({measured:.1} Gflop/s)",
            100.0 * rate / p,
            100.0 * rate / measured
        ),
        None => println!(
            "  fraction of peak: {:.0}% of a 768^3 dgemm here ({measured:.1} Gflop/s); nominal peak unknown",
            100.0 * rate / measured
        ),
    }
    println!(
        "  sigma_marginal(local, equilateral, orthogonal) at l_max = {lmax}: {:.3}, {:.2}, {:.2}",
        sig[0], sig[1], sig[2]
    );

    // Speed-up over the brute-force oracle at l_max = 300 (T only).
    let lb = 300;
    let (table_b, radial_b) = solve(&c, &th, &bg, lb);
    let exp_b = Experiment::ideal(lb);
    let inp_b = CmbFisherInput {
        transfer: &table_b,
        experiment: &exp_b,
        lmax_grid: &[lb],
        field_sets: &[FieldSet::T],
        radial: &radial_b,
        ..inp
    };
    let plan_b = BispectrumPlan::new(&inp_b);
    let t3 = Instant::now();
    let fast = cmb_fisher_with_plan(&plan_b, &[lb], true);
    let t_fast = t3.elapsed().as_secs_f64();
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
