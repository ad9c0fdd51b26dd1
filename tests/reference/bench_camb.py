#!/usr/bin/env python3
"""Times camb and ngreach's Boltzmann solver side by side, for the speed ratio.

    /work/venv-ref/bin/python tests/reference/bench_camb.py [--rounds N] [--threads T]

Job: unlensed scalar C_l^TT, EE, TE to l_max = 3000 for ngreach's default cosmology
(massless neutrinos, recombination settings as in gen_boltzmann.py), camb at its default
accuracy (AccuracyBoost = 1), no matter power, with T OpenMP threads (default 2, the
machine the Rust benchmark targets); ngreach: `cargo bench --bench boltzmann` (thermal
history, mode integrations, T and E transfer functions at every l, C_l) on its rayon pool.

The two run alternately for N rounds (default 3), so that both see the same machine load.
The best wall time (and the least process CPU time, all threads) of each is quoted; on a
loaded machine the CPU ratio is the steadier figure. The Rust bench of the last round is
given camb's best time (NGREACH_BENCH_REFERENCE_S) so that it prints the ratio itself. Run
from the repository root; needs cargo. Nothing here is used by `cargo test`.
"""

import argparse
import os
import platform
import re
import subprocess
import sys
import time

import camb

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from gen_boltzmann import make_params  # noqa: E402

LMAX = 3000


def time_camb():
    pars = make_params()
    pars.set_for_lmax(LMAX, lens_potential_accuracy=0)
    pars.set_accuracy(AccuracyBoost=1.0, lSampleBoost=1.0, lAccuracyBoost=1.0)
    pars.WantTransfer = False
    pars.DoLensing = False
    t = time.perf_counter()
    c = time.process_time()
    res = camb.get_results(pars)
    res.get_unlensed_scalar_cls(CMB_unit=None, raw_cl=True, lmax=LMAX)
    return time.perf_counter() - t, time.process_time() - c


def bench_binary():
    out = subprocess.run(
        ["cargo", "bench", "--bench", "boltzmann", "--locked", "--no-run",
         "--message-format", "json"],
        check=True, capture_output=True, text=True).stdout
    for line in out.splitlines():
        m = re.search(r'"executable":"([^"]+)"', line)
        if m and "boltzmann" in m.group(1):
            return m.group(1)
    raise SystemExit("could not find the boltzmann bench executable")


def time_rust(exe, threads, reference=None):
    env = dict(os.environ, NGREACH_BENCH_REPEATS="1", RAYON_NUM_THREADS=str(threads))
    if reference is not None:
        env["NGREACH_BENCH_REFERENCE_S"] = f"{reference:.4f}"
    out = subprocess.run([exe], check=True, capture_output=True, text=True, env=env).stdout
    m = re.search(r"boltzmann-bench total_s=([0-9.]+) cpu_s=([0-9.]+)", out)
    return float(m.group(1)), float(m.group(2)), out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--threads", type=int, default=2)
    a = ap.parse_args()
    camb.config.ThreadNum = a.threads
    exe = bench_binary()
    cambs, ours, camb_cpu, our_cpu = [], [], [], []
    load0 = os.getloadavg()[0]
    for r in range(a.rounds):
        w, c = time_camb()
        cambs.append(w)
        camb_cpu.append(c)
        last = r + 1 == a.rounds
        t, tc, out = time_rust(exe, a.threads, min(cambs) if last else None)
        ours.append(t)
        our_cpu.append(tc)
        print(f"round {r + 1}: camb {w:.2f} s wall ({c:.2f} s CPU), ngreach {t:.2f} s wall "
              f"({tc:.2f} s CPU)", flush=True)
    print(out, end="")
    load1 = os.getloadavg()[0]
    print(f"camb {camb.__version__} (AccuracyBoost 1, {a.threads} threads) vs ngreach "
          f"(cargo bench --bench boltzmann, {a.threads} threads), l_max = {LMAX}, "
          f"{platform.processor() or platform.machine()}, load average {load0:.1f} -> "
          f"{load1:.1f}: best of {a.rounds}: camb {min(cambs):.2f} s wall "
          f"({min(camb_cpu):.2f} s CPU), ngreach {min(ours):.2f} s wall "
          f"({min(our_cpu):.2f} s CPU); ratio {min(ours) / min(cambs):.2f} wall, "
          f"{min(our_cpu) / min(camb_cpu):.2f} CPU")


if __name__ == "__main__":
    main()
