//! Benchmark of the line-of-sight Boltzmann solver (run with
//! `cargo bench --bench boltzmann`): T and E transfer functions at every l to
//! l_max = 3000 for the default cosmology, then C_l^TT, EE, TE, at precision 1. Target: at
//! most 20 s wall on a 2-core machine for the whole chain (thermal history, mode
//! integrations, every-l projection, C_l). Also times the sampled-l route to C_l. Prints
//! the times and the process CPU time; asserts nothing.

use std::time::Instant;

use ngreach::cmb::ThermalHistory;
use ngreach::cmb::boltzmann::{BoltzmannSolver, Settings, Spectra};
use ngreach::cosmology::{Background, Cosmology, Primordial};

/// User + system CPU time of this process in seconds (Linux /proc; 0 elsewhere).
fn cpu_seconds() -> f64 {
    let Ok(stat) = std::fs::read_to_string("/proc/self/stat") else {
        return 0.0;
    };
    // Fields after the command name (which is in parentheses): utime is field 14, stime 15.
    let after = stat.rsplit(')').next().unwrap_or("");
    let f: Vec<&str> = after.split_whitespace().collect();
    let ticks = |i: usize| f.get(i).and_then(|v| v.parse::<f64>().ok()).unwrap_or(0.0);
    (ticks(11) + ticks(12)) / 100.0
}

fn main() {
    let lmax = 3000;
    let threads = rayon::current_num_threads();
    let c = Cosmology::planck2018();
    let t_all = Instant::now();
    let cpu0 = cpu_seconds();
    let bg = Background::new(&c);
    let th = ThermalHistory::new(&c, &bg).expect("thermal history");
    let t_thermal = t_all.elapsed().as_secs_f64();
    let t = Instant::now();
    let settings = Settings {
        lmax,
        ..Settings::default()
    };
    let solver = BoltzmannSolver::new(&c, &th, &bg, settings).expect("solver");
    let t_modes = t.elapsed().as_secs_f64();
    let t = Instant::now();
    let table = solver.transfer_table();
    let t_table = t.elapsed().as_secs_f64();
    let t = Instant::now();
    let cl = Spectra::from_table(&table, &Primordial::new(&c));
    let t_cl = t.elapsed().as_secs_f64();
    let wall = t_all.elapsed().as_secs_f64();
    let cpu = cpu_seconds() - cpu0;
    let d = Spectra::d_l_uk2(&cl.tt, c.params().t_cmb_k);
    println!(
        "boltzmann, l_max = {lmax}, precision 1, {threads} threads: thermal {t_thermal:.2} s, \
         {} modes ({} steps) {t_modes:.2} s, every-l T+E table ({} k x {} l) {t_table:.2} s, \
         C_l {t_cl:.2} s; total {wall:.2} s wall (target <= 20 s), {cpu:.2} s CPU; \
         D_220^TT = {:.1} uK^2",
        solver.mode_k().len(),
        solver.mode_steps(),
        table.k().len(),
        lmax + 1,
        d[220],
    );
    let t = Instant::now();
    let cpu1 = cpu_seconds();
    let s = solver.cl_sampled();
    let _all = s.interpolate();
    println!(
        "boltzmann, l_max = {lmax}: sampled-l C_l ({} multipoles) {:.2} s wall, {:.2} s CPU \
         (after the mode integrations)",
        s.l.len(),
        t.elapsed().as_secs_f64(),
        cpu_seconds() - cpu1
    );
}
