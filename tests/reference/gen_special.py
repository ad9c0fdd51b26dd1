#!/usr/bin/env python3
"""Reference tables for `src/special` (spherical Bessel functions and Wigner 3j symbols).

Run from the repository root with the reference environment:

    /work/.venv-ref/bin/python tests/reference/gen_special.py

Writes
  tests/reference/special/sph_bessel_mpmath.tsv
  tests/reference/special/wigner000_mpmath.tsv

Spherical Bessel functions j_l(x) are evaluated at the exact binary value of each double x
with mpmath in one of two independent ways:

  * "besselj": j_l(x) = sqrt(pi/(2x)) J_{l+1/2}(x) with mpmath.besselj (hypergeometric
    0F1 series with mpmath's automatic extra precision), used for x < l + 1/2, where j_l has
    no zeros, so the error metric there is the plain relative error;
  * "finite": the terminating expansion of DLMF 10.49.1,
        j_n(x) = sin(x - n pi/2) P + cos(x - n pi/2) Q,
        y_n(x) = -cos(x - n pi/2) P + sin(x - n pi/2) Q,
        P = sum_k (-1)^k a_{2k}(n+1/2) / x^(2k+1),  Q = sum_k (-1)^k a_{2k+1}(n+1/2) / x^(2k+2),
        a_k(n+1/2) = (n+k)! / (2^k k! (n-k)!),
    summed in mpmath floating point at a working precision raised until two evaluations
    20 digits apart agree to 1e-25, used for x >= l + 1/2. It also gives the modulus
    M = sqrt(j^2 + y^2) = sqrt(P^2 + Q^2), the envelope of the oscillation.

Every row is computed twice (working precisions d and d + 20 decimal digits) and kept only
if both agree to 1e-25 relative; for a subset of rows both methods are run and must agree.

Wigner (l1 l2 l3; 0 0 0) values come from sympy.physics.wigner.wigner_3j (exact, Racah's
general formula) for l <= 400 and from the exact closed form with Python integers,
    (l1 l2 l3; 0 0 0)^2 = (2a)!(2b)!(2c)! (g!)^2 / [ (2g+1)! (a! b! c!)^2 ],
    2g = l1 + l2 + l3, a = g - l1, b = g - l2, c = g - l3, sign (-1)^g,
for larger l, rounded to 30 digits with mpmath. The two agree on the overlap (checked here).
"""

import math
import os
import random
import sys

import mpmath
from mpmath import mp, mpf
import numpy as np
from scipy.special import spherical_jn
import scipy
import sympy
from sympy.physics.wigner import wigner_3j

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "special")
AGREE = mpf("1e-25")


# ----------------------------------------------------------------------------------------
# Spherical Bessel functions
# ----------------------------------------------------------------------------------------

def finite_sum(n, x, dps):
    """(j_n(x), M_n(x)) from DLMF 10.49.1 at `dps` decimal digits."""
    mp.dps = dps
    z = mpf(x)
    t = 1 / z
    p = mpf(0)
    q = mpf(0)
    for k in range(n + 1):
        s = -1 if (k // 2) % 2 else 1
        if k % 2 == 0:
            p += s * t
        else:
            q += s * t
        t = t * ((n + k + 1) * (n - k)) / (2 * (k + 1) * z)
    phi = z - n * mp.pi / 2
    j = mp.sin(phi) * p + mp.cos(phi) * q
    return j, mp.sqrt(p * p + q * q)


def log10_max_term(n, x):
    """log10 of the largest |a_k(n+1/2)| / x^(k+1) in DLMF 10.49.1 (float estimate)."""
    best = -math.log10(x)
    for k in range(n + 1):
        la = math.lgamma(n + k + 1) - k * math.log(2) - math.lgamma(k + 1) - math.lgamma(n - k + 1)
        v = (la - (k + 1) * math.log(x)) / math.log(10)
        best = max(best, v)
    return best


def j_finite(n, x):
    """Adaptive-precision finite sum; returns (j, M, dps)."""
    # Cancellation: the sum's largest term over the result (bounded below by M ~ 1/x away
    # from zeros; near zeros the doubling loop below adds digits).
    d = int(40 + max(0.0, log10_max_term(n, x) + math.log10(x)))
    while True:
        j1, m1 = finite_sum(n, x, d)
        j2, m2 = finite_sum(n, x, d + 20)
        mp.dps = d + 20
        if abs(j1 - j2) <= AGREE * abs(j2) and abs(m1 - m2) <= AGREE * m2:
            return j2, m2, d + 20
        d *= 2
        if d > 200000:
            raise RuntimeError(f"finite sum did not converge for l={n} x={x}")


def j_besselj(n, x, dps):
    mp.dps = dps
    z = mpf(x)
    return mp.sqrt(mp.pi / (2 * z)) * mp.besselj(n + mpf(1) / 2, z, maxprec=4000000)


def j_bessel_checked(n, x):
    """mpmath.besselj at 30 and 50 digits; returns (j, dps)."""
    a = j_besselj(n, x, 30)
    b = j_besselj(n, x, 50)
    mp.dps = 50
    if not abs(a - b) <= AGREE * abs(b):
        raise RuntimeError(f"besselj precisions disagree for l={n} x={x}: {a} {b}")
    return b, 50


def ln_j_estimate(l, x):
    """Leading Debye estimate of ln j_l(x) for x < l + 1/2 (only used to place points)."""
    nu = l + 0.5
    r = x / nu
    th = math.sqrt(1 - r * r)
    eta = nu * (th - math.acosh(1 / r))
    return 0.5 * math.log(math.pi / (2 * x)) + eta - 0.5 * math.log(2 * math.pi * nu * th)


def x_for_value(l, target):
    """x in (0, l+1/2) with ln_j_estimate(l, x) = ln(target), by bisection."""
    nu = l + 0.5
    lo, hi = 1e-300, nu * (1 - 1e-9)
    lt = math.log(target)
    for _ in range(200):
        mid = math.sqrt(lo * hi) if hi / lo > 4 else 0.5 * (lo + hi)
        if ln_j_estimate(l, mid) < lt:
            lo = mid
        else:
            hi = mid
    return lo


def rnd(x, digits=12):
    """Round x to `digits` significant digits (a simple, exactly printable double)."""
    return float(f"{x:.{digits}g}")


def bessel_points():
    pts = []  # (l, x, region)
    # 1. Small x, small and moderate l.
    for l in [0, 1, 2, 3, 5, 8, 13, 21]:
        for x in [1e-3, 3e-3, 0.01, 0.05, 0.2, 0.5, 0.9]:
            pts.append((l, x, "small_x"))
    # 2. x << l (deep evanescent), values from 1e-2 down to about 1e-30.
    for l in [5, 20, 50, 100, 300, 1000, 3000, 5000, 10000]:
        for v in [1e-2, 1e-5, 1e-10, 1e-15, 1e-20, 1e-25, 1e-30]:
            x = x_for_value(l, v)
            if x < 1e-3:
                continue
            pts.append((l, rnd(x), "evanescent"))
    # 3. Tiny values (below the 1e-30 spec threshold) and values that underflow a double.
    for l, x in [(10000, 1e-3), (10000, 1.0), (10000, 1000.0), (5000, 3000.0), (3000, 2000.0),
                 (1000, 500.0), (300, 50.0), (100, 1.0), (50, 0.5), (20, 1e-3)]:
        pts.append((l, x, "tiny"))
    for l in [1000, 10000]:
        for v in [1e-60, 1e-150, 1e-250, 1e-295]:
            pts.append((l, rnd(x_for_value(l, v)), "tiny"))
    # 4. Turning point x ~ l + 1/2: x = nu + t nu^(1/3).
    for l in [10, 50, 200, 1000, 2500, 5000, 7500, 10000]:
        nu = l + 0.5
        for t in [-30, -16, -10, -8, -6, -4, -3, -2, -1.5, -1, -0.5, -0.2, 0, 0.2, 0.5, 1, 1.5,
                  2.5, 3, 4, 6, 8, 10, 13, 16, 22, 30]:
            x = nu + t * nu ** (1 / 3)
            if x < 1e-3:
                continue
            pts.append((l, rnd(x), "turning"))
    # 5. Oscillatory x >> l, up to 2e5.
    for l in [0, 1, 2, 7, 30, 100, 400, 1000, 2000, 4000, 6000, 8000, 10000]:
        nu = l + 0.5
        for f in [1.05, 1.2, 1.6, 2.5, 5, 12, 40, 150, 600, 3000, 20000, 1e5, 4e5]:
            x = f * nu
            if x > 2e5:
                continue
            pts.append((l, rnd(x), "oscillatory"))
        pts.append((l, 2e5, "oscillatory"))
        pts.append((l, 199999.123456789, "oscillatory"))
    # 6. Random (seeded): l uniform in log(l+1), x log-uniform in [1e-3, 2e5].
    rng = random.Random(20240611)
    for _ in range(220):
        l = int(round(math.exp(rng.uniform(0, math.log(10001)))) - 1)
        x = rnd(math.exp(rng.uniform(math.log(1e-3), math.log(2e5))), 15)
        pts.append((max(0, min(l, 10000)), x, "random"))
    # 7. Points next to zeros of j_l (relative accuracy is not meaningful there; the tests
    #    use the envelope M). Zeros are bracketed with scipy.special.spherical_jn in double
    #    precision and refined by bisection on the mpmath finite sum.
    for l in [1, 10, 100, 1000]:
        xs = np.linspace(l + 0.5, l + 0.5 + 80.0 + 0.1 * l, 200001)
        v = spherical_jn(l, xs)
        idx = np.nonzero(np.sign(v[:-1]) != np.sign(v[1:]))[0]
        for m in [0, 2, 19]:
            if m >= len(idx):
                continue
            a, b = mpf(float(xs[idx[m]])), mpf(float(xs[idx[m] + 1]))
            fa = finite_sum(l, a, 60)[0]
            for _ in range(60):
                mid = (a + b) / 2
                fm = finite_sum(l, mid, 60)[0]
                if (fm > 0) == (fa > 0):
                    a, fa = mid, fm
                else:
                    b = mid
            z0 = float((a + b) / 2)
            for off in [0.0, 1e-9, 1e-6]:
                pts.append((l, float(z0 * (1 + off)), "near_zero"))
    # de-duplicate, keep order
    seen = set()
    out = []
    for p in pts:
        key = (p[0], p[1])
        if key not in seen:
            seen.add(key)
            out.append(p)
    return out


def write_bessel(path):
    rows = []
    pts = bessel_points()
    cross = 0
    for i, (l, x, region) in enumerate(pts):
        if x >= l + 0.5:
            j, m, dps = j_finite(l, x)
            method = "finite"
            # Cross-check with besselj where mpmath's series is affordable.
            if (l <= 2000 and x <= 5000) or (l <= 10 and x >= 1e4):
                try:
                    jb, _ = j_bessel_checked(l, x)
                    mp.dps = dps
                    scale = max(abs(j), m * mpf("1e-20"))
                    if abs(jb - j) > mpf("1e-24") * scale:
                        raise RuntimeError(f"methods disagree at l={l} x={x}: {j} vs {jb}")
                    cross += 1
                except (mpmath.libmp.NoConvergence, ValueError):
                    pass
        else:
            j, dps = j_bessel_checked(l, x)
            m = abs(j)
            method = "besselj"
        mp.dps = 30
        rows.append((l, x, mp.nstr(j, 22, min_fixed=1, max_fixed=0),
                     mp.nstr(m, 10, min_fixed=1, max_fixed=0), region, method, dps))
        if i % 50 == 0:
            print(f"bessel {i}/{len(pts)}", file=sys.stderr, flush=True)
    with open(path, "w") as f:
        f.write("# Spherical Bessel j_l(x) reference values for src/special/bessel.rs\n")
        f.write(f"# generated by tests/reference/gen_special.py with mpmath {mpmath.__version__}"
                f" (backend {mpmath.libmp.BACKEND}), scipy {scipy.__version__} (zero brackets only),"
                f" numpy {np.__version__}, Python {sys.version.split()[0]}\n")
        f.write("# x is the exact double written in shortest round-trip form; values are for that double.\n")
        f.write("# method besselj: sqrt(pi/(2x)) mpmath.besselj(l+1/2, x), evaluated at 30 and 50 digits, agreeing to 1e-25\n")
        f.write("# method finite: DLMF 10.49.1 terminating sum, working precision (dps column) raised until\n")
        f.write("#   evaluations at dps-20 and dps digits agree to 1e-25; envelope = sqrt(j^2 + y^2)\n")
        f.write("# for x < l + 1/2 (besselj rows) j_l has no zeros and envelope = |j_l|\n")
        f.write(f"# {cross} finite rows were also checked against besselj (agreement 1e-24 of max(|j|, 1e-20 envelope))\n")
        f.write("# columns: l\tx\tj_l(x)\tenvelope\tregion\tmethod\tdps\n")
        for r in rows:
            f.write(f"{r[0]}\t{r[1]!r}\t{r[2]}\t{r[3]}\t{r[4]}\t{r[5]}\t{r[6]}\n")
    print(f"wrote {len(rows)} rows to {path}", file=sys.stderr)


# ----------------------------------------------------------------------------------------
# Wigner 3j (l1 l2 l3; 0 0 0)
# ----------------------------------------------------------------------------------------

def w000_exact_sq(l1, l2, l3):
    """Exact (l1 l2 l3;000)^2 as (numerator, denominator) Python integers, and the sign."""
    s = l1 + l2 + l3
    if s % 2 or l3 > l1 + l2 or l3 < abs(l1 - l2):
        return 0, 1, 1
    g = s // 2
    a, b, c = g - l1, g - l2, g - l3
    f = math.factorial
    num = f(2 * a) * f(2 * b) * f(2 * c) * f(g) ** 2
    den = f(2 * g + 1) * (f(a) * f(b) * f(c)) ** 2
    return num, den, (-1) ** g


def w000_mp(l1, l2, l3, dps=40):
    num, den, sign = w000_exact_sq(l1, l2, l3)
    mp.dps = dps
    if num == 0:
        return mpf(0)
    return sign * mp.sqrt(mpf(num) / mpf(den))


def wigner_triples():
    trip = []
    rng = random.Random(777)
    # small, hand-picked (incl. zeros: odd sum, triangle violated)
    trip += [(0, 0, 0), (1, 1, 0), (1, 1, 1), (1, 1, 2), (2, 2, 2), (2, 3, 5), (3, 4, 8),
             (10, 20, 30), (10, 20, 31), (10, 20, 9), (50, 50, 100), (100, 100, 0),
             (2, 2, 4), (7, 8, 9), (200, 300, 400), (400, 400, 400), (400, 399, 1), (2, 100, 102)]
    for _ in range(140):
        l1 = rng.randint(0, 400)
        l2 = rng.randint(0, 400)
        lo, hi = abs(l1 - l2), l1 + l2
        l3 = rng.randint(lo, hi)
        if (l1 + l2 + l3) % 2 and rng.random() < 0.85:
            l3 = l3 + 1 if l3 < hi else l3 - 1
        trip.append((l1, l2, l3))
    big = [(1000, 1000, 1000), (1000, 1500, 2500), (1000, 1500, 500), (2000, 2000, 2),
           (3000, 3000, 3000), (5000, 5000, 5000), (4000, 2000, 2002), (2500, 2499, 1),
           (4999, 5000, 9999), (5000, 5000, 10000), (5000, 5000, 0), (3333, 4444, 5555),
           (1234, 2345, 3579), (4321, 4321, 8642), (4321, 4321, 8641), (4000, 100, 4200)]
    trip += big
    for _ in range(200):
        l1 = rng.randint(0, 5000)
        l2 = rng.randint(0, 5000)
        lo, hi = abs(l1 - l2), l1 + l2
        l3 = rng.randint(lo, hi)
        if (l1 + l2 + l3) % 2 and rng.random() < 0.9:
            l3 = l3 + 1 if l3 < hi else l3 - 1
        trip.append((l1, l2, l3))
    seen = set()
    out = []
    for t in trip:
        if t not in seen:
            seen.add(t)
            out.append(t)
    return out


def write_wigner(path):
    rows = []
    checked = 0
    for (l1, l2, l3) in wigner_triples():
        v = w000_mp(l1, l2, l3)
        if max(l1, l2, l3) <= 400:
            exact = wigner_3j(l1, l2, l3, 0, 0, 0)
            vs = mpmath.mpf(str(sympy.N(exact, 45))) if exact != 0 else mpf(0)
            mp.dps = 40
            if abs(vs - v) > mpf("1e-35") * max(abs(v), mpf("1e-300")):
                raise RuntimeError(f"sympy and closed form disagree at {(l1, l2, l3)}: {vs} {v}")
            checked += 1
            src = "sympy"
        else:
            src = "closed_form_int"
        mp.dps = 40
        rows.append((l1, l2, l3, mp.nstr(v, 25, min_fixed=1, max_fixed=0) if v != 0 else "0", src))
    with open(path, "w") as f:
        f.write("# Wigner 3j (l1 l2 l3; 0 0 0) reference values for src/special/wigner.rs\n")
        f.write(f"# generated by tests/reference/gen_special.py with mpmath {mpmath.__version__},"
                f" sympy {sympy.__version__}, Python {sys.version.split()[0]}; working precision 40 digits\n")
        f.write("# source sympy: sympy.physics.wigner.wigner_3j (exact), rounded to 25 digits\n")
        f.write("# source closed_form_int: exact integer factorials, sqrt at 40 digits, rounded to 25 digits\n")
        f.write(f"# {checked} sympy rows were also checked against the integer closed form (agreement 1e-35)\n")
        f.write("# columns: l1\tl2\tl3\tvalue\tsource\n")
        for r in rows:
            f.write(f"{r[0]}\t{r[1]}\t{r[2]}\t{r[3]}\t{r[4]}\n")
    print(f"wrote {len(rows)} rows to {path}", file=sys.stderr)


def main():
    os.makedirs(OUT, exist_ok=True)
    which = sys.argv[1:] or ["bessel", "wigner"]
    if "wigner" in which:
        write_wigner(os.path.join(OUT, "wigner000_mpmath.tsv"))
    if "bessel" in which:
        write_bessel(os.path.join(OUT, "sph_bessel_mpmath.tsv"))


if __name__ == "__main__":
    main()
