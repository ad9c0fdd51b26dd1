#!/usr/bin/env python3
"""Times camb and ngreach's Boltzmann solver side by side, for the speed ratio.

    /work/venv-ref/bin/python tests/reference/bench_camb.py [--rounds N] [--threads T]

Job: unlensed scalar C_l^TT, EE, TE to l_max = 3000 for ngreach's default cosmology
(massless neutrinos, recombination settings as in gen_boltzmann.py), camb at its default
accuracy (AccuracyBoost = 1), no matter power, with T OpenMP threads (default 2, the
machine the Rust benchmark targets); ngreach: `cargo bench --bench boltzmann` (thermal
history, mode integrations, T and E transfer functions at every l, C_l) on its rayon pool.

The two run alternately for N rounds (default 3), so that both see the same machine load;
the best wall time of each is quoted, and the Rust bench of the last round is given camb's
best time (NGREACH_BENCH_REFERENCE_S) so that it prints the ratio itself. Run from the
repository root; needs cargo. Nothing here is used by `cargo test`.
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
    res = camb.get_results(pars)
    res.get_unlensed_scalar_cls(CMB_unit=None, raw_cl=True, lmax=LMAX)
    return time.perf_counter() - t


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
    m = re.search(r"boltzmann-bench total_s=([0-9.]+)", out)
    return float(m.group(1)), out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--threads", type=int, default=2)
    a = ap.parse_args()
    camb.config.ThreadNum = a.threads
    exe = bench_binary()
    cambs, ours = [], []
    load0 = os.getloadavg()[0]
    for r in range(a.rounds):
        cambs.append(time_camb())
        last = r + 1 == a.rounds
        t, out = time_rust(exe, a.threads, min(cambs) if last else None)
        ours.append(t)
        print(f"round {r + 1}: camb {cambs[-1]:.2f} s, ngreach {t:.2f} s", flush=True)
    print(out, end="")
    load1 = os.getloadavg()[0]
    print(f"camb {camb.__version__} (AccuracyBoost 1, {a.threads} threads) vs ngreach "
          f"(cargo bench --bench boltzmann, {a.threads} threads), l_max = {LMAX}, "
          f"{platform.processor() or platform.machine()}, load average {load0:.1f} -> "
          f"{load1:.1f}: best of {a.rounds}: camb {min(cambs):.2f} s, ngreach "
          f"{min(ours):.2f} s, ratio {min(ours) / min(cambs):.2f}")


if __name__ == "__main__":
    main()
