#!/usr/bin/env python3
"""Times camb for the same job as benches/boltzmann.rs, to quote a speed ratio.

    /work/.venv-ref/bin/python tests/reference/bench_camb.py [threads]

Unlensed scalar C_l^TT, EE, TE to l_max = 3000 for ngreach's default cosmology (massless
neutrinos, recombination settings as in gen_boltzmann.py), camb's default accuracy
(AccuracyBoost = 1), no matter power, with the given number of OpenMP threads (default 2,
the machine the Rust benchmark targets). Prints the best of three wall times. The Rust
benchmark does not depend on this script.
"""

import sys
import time

import camb

sys.path.insert(0, __file__.rsplit("/", 1)[0])
from gen_boltzmann import make_params  # noqa: E402

LMAX = 3000


def main():
    threads = int(sys.argv[1]) if len(sys.argv) > 1 else 2
    camb.config.ThreadNum = threads
    best = float("inf")
    for _ in range(3):
        pars = make_params()
        pars.set_for_lmax(LMAX, lens_potential_accuracy=0)
        pars.set_accuracy(AccuracyBoost=1.0, lSampleBoost=1.0, lAccuracyBoost=1.0)
        pars.WantTransfer = False
        pars.DoLensing = False
        t = time.perf_counter()
        res = camb.get_results(pars)
        res.get_unlensed_scalar_cls(CMB_unit=None, raw_cl=True, lmax=LMAX)
        best = min(best, time.perf_counter() - t)
    print(f"camb {camb.__version__}, {threads} threads, unlensed scalar C_l to l_max = {LMAX}, "
          f"AccuracyBoost 1: best of 3 = {best:.2f} s wall")


if __name__ == "__main__":
    main()
