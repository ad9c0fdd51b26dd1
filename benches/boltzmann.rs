//! Benchmark of the line-of-sight Boltzmann solver (run with
//! `cargo bench --bench boltzmann`): T and E transfer functions at every l to
//! l_max = 3000 for the default cosmology, then C_l^TT, EE, TE, at precision 1: the whole
//! chain (thermal history, mode integrations, every-l projection, C_l), best wall time of
//! a few repeats. Also times the sampled-l route to C_l. Prints the times and the process
//! CPU time; asserts nothing.
//!
//! Environment:
//! - `NGREACH_BENCH_REFERENCE_S`: a reference library's wall time for the same job on the
//!   same machine; the bench then prints our time / reference time.
//!   `tests/reference/bench_camb.py` measures camb and runs this bench side by side.
//! - `NGREACH_BENCH_REPEATS`: repeats of the chain (default 3; the best is quoted).
//! - `NGREACH_BENCH_LMAX`: l_max (default 3000).
//!
//! The last line, `boltzmann-bench total_s=... cpu_s=... reference_s=... ratio=...` (the best
//! run's wall and CPU seconds), is for scripts.

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

fn env_num<T: std::str::FromStr>(name: &str) -> Option<T> {
    std::env::var(name).ok().and_then(|v| v.trim().parse().ok())
}

/// Wall times of one chain: thermal, modes, table, C_l.
struct Stages {
    thermal: f64,
    modes: f64,
    table: f64,
    cl: f64,
    cpu: f64,
    /// CPU seconds of the modes and of the table.
    cpu_modes: f64,
    cpu_table: f64,
}

impl Stages {
    fn total(&self) -> f64 {
        self.thermal + self.modes + self.table + self.cl
    }
}

fn chain(c: &Cosmology, lmax: usize, last: bool) -> (Stages, Option<BoltzmannSolver>) {
    let t_all = Instant::now();
    let cpu0 = cpu_seconds();
    let bg = Background::new(c);
    let th = ThermalHistory::new(c, &bg).expect("thermal history");
    let thermal = t_all.elapsed().as_secs_f64();
    let t = Instant::now();
    let cpu1 = cpu_seconds();
    let settings = Settings {
        lmax,
        ..Settings::default()
    };
    let solver = BoltzmannSolver::new(c, &th, &bg, settings).expect("solver");
    let modes = t.elapsed().as_secs_f64();
    let cpu2 = cpu_seconds();
    let t = Instant::now();
    let table = solver.transfer_table();
    let table_s = t.elapsed().as_secs_f64();
    let cpu3 = cpu_seconds();
    let t = Instant::now();
    let cl = Spectra::from_table(&table, &Primordial::new(c));
    let cl_s = t.elapsed().as_secs_f64();
    let cpu = cpu_seconds() - cpu0;
    let stages = Stages {
        thermal,
        modes,
        table: table_s,
        cl: cl_s,
        cpu,
        cpu_modes: cpu2 - cpu1,
        cpu_table: cpu3 - cpu2,
    };
    if last {
        let d = Spectra::d_l_uk2(&cl.tt, c.params().t_cmb_k);
        println!(
            "  table {} k x {} l, {} modes ({} steps), D_220^TT = {:.1} uK^2",
            table.k().len(),
            lmax + 1,
            solver.mode_k().len(),
            solver.mode_steps(),
            d[220.min(lmax)],
        );
        (stages, Some(solver))
    } else {
        (stages, None)
    }
}

fn main() {
    let lmax: usize = env_num("NGREACH_BENCH_LMAX").unwrap_or(3000);
    let repeats: usize = env_num("NGREACH_BENCH_REPEATS").unwrap_or(3).max(1);
    let reference: Option<f64> = env_num("NGREACH_BENCH_REFERENCE_S");
    let threads = rayon::current_num_threads();
    let c = Cosmology::planck2018();
    println!(
        "boltzmann, l_max = {lmax}, precision 1, {threads} threads, T and E at every l, best \
         of {repeats}:"
    );
    let mut best: Option<Stages> = None;
    let mut solver = None;
    for r in 0..repeats {
        let (s, sv) = chain(&c, lmax, r + 1 == repeats);
        println!(
            "  run {}: thermal {:.2} s, modes {:.2} s, every-l T+E table {:.2} s, C_l {:.2} s; \
             total {:.2} s wall, {:.2} s CPU (modes {:.2}, table {:.2})",
            r + 1,
            s.thermal,
            s.modes,
            s.table,
            s.cl,
            s.total(),
            s.cpu,
            s.cpu_modes,
            s.cpu_table
        );
        if best.as_ref().is_none_or(|b| s.total() < b.total()) {
            best = Some(s);
        }
        if sv.is_some() {
            solver = sv;
        }
    }
    let best = best.expect("at least one run");
    let total = best.total();
    match reference {
        Some(r) if r > 0.0 => println!(
            "boltzmann, l_max = {lmax}: best {total:.2} s wall; reference {r:.2} s; ratio \
             {:.2} (target <= 2)",
            total / r
        ),
        _ => println!(
            "boltzmann, l_max = {lmax}: best {total:.2} s wall (set NGREACH_BENCH_REFERENCE_S \
             or run tests/reference/bench_camb.py for the ratio to a reference library)"
        ),
    }
    let solver = solver.expect("last run keeps its solver");
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
    let (rs, ratio) = match reference {
        Some(r) if r > 0.0 => (format!("{r:.4}"), format!("{:.4}", total / r)),
        _ => ("none".to_string(), "none".to_string()),
    };
    println!(
        "boltzmann-bench total_s={total:.4} cpu_s={:.4} reference_s={rs} ratio={ratio}",
        best.cpu
    );
}
