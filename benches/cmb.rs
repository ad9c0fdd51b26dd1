//! Benchmark of the CMB bispectrum engine (run with `cargo bench --bench cmb`; set
//! `NGREACH_BENCH_LMAX`, default 1000).
//!
//! T+E, three shapes (local, equilateral, orthogonal), the whole l_max scan in one pass,
//! on the shell-model transfer functions. Prints the wall time of the transfer table, the
//! radial functions and the mu-factorized sums, and the flop count and rate of the
//! dominant kernel (the blocked matrix products, counted for the full radial grid, so an
//! upper bound). Asserts nothing. The target (issue: l_max 3000 in 30 s) is not met yet.

use std::time::Instant;

use ngreach::cmb::bispectrum::{BispectrumPlan, CmbFisherInput, FieldSet, cmb_fisher_with_plan};
use ngreach::cmb::experiment::Experiment;
use ngreach::cmb::thermal::ThermalHistory;
use ngreach::cosmology::{Background, Cosmology, Primordial};
use ngreach::shapes::Shape;

fn main() {
    let lmax: usize = std::env::var("NGREACH_BENCH_LMAX")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(1000);
    let c = Cosmology::planck2018();
    let bg = Background::new(&c);
    let th = ThermalHistory::new(&c, &bg).expect("thermal history");
    let t0 = Instant::now();
    let (table, radial, _) =
        ngreach::cmb::shell_transfer_for(&th, None, true, lmax).expect("shell transfer");
    let t_transfer = t0.elapsed().as_secs_f64();
    let shapes = [Shape::Local, Shape::Equilateral, Shape::Orthogonal];
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
    };
    let t1 = Instant::now();
    let plan = BispectrumPlan::new(&inp);
    let t_plan = t1.elapsed().as_secs_f64();
    let t2 = Instant::now();
    let fc = cmb_fisher_with_plan(&plan, &grid, true);
    let t_sum = t2.elapsed().as_secs_f64();
    let n_r = radial.len() as f64;
    let ne = plan.exponents().len() as f64;
    let n_mu = ((3 * lmax).div_ceil(2) + 1) as f64;
    let flops = n_mu * (ne * (ne + 1.0) / 2.0) * 2.0 * 2.0 * n_r * n_r * lmax as f64;
    let sig = fc.fisher[0].last().expect("grid").sigma_marginal_or_inf();
    println!(
        "CMB engine, T+E, 3 shapes, l_max = {lmax}, {} radial nodes, {} k nodes, {} threads:",
        radial.len(),
        table.k().len(),
        rayon::current_num_threads()
    );
    println!(
        "  transfer table {t_transfer:.2} s, radial functions {t_plan:.2} s, mu sums {t_sum:.2} s, total {:.2} s",
        t_transfer + t_plan + t_sum
    );
    println!(
        "  matrix products: at most {flops:.3e} flop, at least {:.2} Gflop/s effective",
        flops / t_sum / 1e9
    );
    println!(
        "  sigma_marginal(local, equilateral, orthogonal) at l_max = {lmax}: {:.3}, {:.2}, {:.2}",
        sig[0], sig[1], sig[2]
    );
}
