"""Reference thermal history for ngreach's default cosmology, from camb.

Run with the reference environment (never needed by the Rust tests):

    /work/venv-ref/bin/python tests/reference/gen_thermal.py

Writes tests/reference/thermal_camb.tsv with camb's derived parameters (zstar, rstar,
thetastar, zdrag, rdrag, kd, the reionization redshift), the peak and full width at half
maximum of camb's visibility function, and x_e(z), T_b(z) on a redshift grid.

Two camb configurations are written:

- `default`: camb's DEFAULT recombination (RECFAST with its modern hydrogen corrections:
  fudge 1.125 with the double-Gaussian correction of the Lyman-alpha escape factor, and
  the HeI corrections with camb's default parameters, including its fitted HeI rate
  correction). Only the reionization model is matched to ngreach's (as are the massless
  neutrinos and the helium fraction): tanh of width 0.5 in z, helium's second
  reionization at z = 3.5 of width 0.5 (camb's default width is 0.4), included below
  z = 7.5. These are the rows the tests check against.
- `published`: camb's `recfast_approx_model="planck"` set, i.e. the published constants
  of Rubino-Martin, Chluba, Fendt & Wandelt (2010) (fudge 1.125, Gaussians
  (-0.14, 7.28, 0.18), (0.079, 6.73, 0.33)) with the HeI continuum-opacity exponent 0.86
  of Wong, Moss & Scott (2008) and no extra HeI rate fit: the same physics as ngreach's
  thermal history, so its rows isolate numerical differences (second check).
"""

import math
import os
import platform
import sys

import numpy as np
import scipy
import camb
from camb import model

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "thermal_camb.tsv")

# ngreach's default cosmology (src/cosmology/params.rs, CosmoParams::planck2018).
OMBH2 = 0.02237
OMCH2 = 0.1200
H0 = 67.36
NNU = 3.046
TCMB = 2.7255
TAU = 0.0544
AS = math.exp(3.044) * 1e-10
NS = 0.9649


def helium_bbn(omega_b, n_eff):
    """Same rule as ngreach's helium_bbn (src/cosmology/params.rs)."""
    eta10 = 273.9 * omega_b
    s = math.sqrt(max(1.0 + 7.0 * (n_eff - 3.046) / 43.0, 0.0))
    return 0.2454 + 0.0016 * ((eta10 - 6.13) + 100.0 * (s - 1.0))


YHE = helium_bbn(OMBH2, NNU)


def make_params(label):
    pars = camb.CAMBparams()
    pars.set_cosmology(
        H0=H0,
        ombh2=OMBH2,
        omch2=OMCH2,
        mnu=0.0,
        nnu=NNU,
        num_massive_neutrinos=0,
        TCMB=TCMB,
        tau=TAU,
        YHe=YHE,
    )
    pars.InitPower.set_params(As=AS, ns=NS)
    pars.WantTransfer = False
    pars.WantCls = False
    pars.Reion.delta_redshift = 0.5
    pars.Reion.helium_redshift = 3.5
    pars.Reion.helium_delta_redshift = 0.5
    pars.Reion.helium_redshiftstart = 3.5 + 8 * 0.5
    if label == "published":
        pars.Recomb.set_params(recfast_approx_model="planck")
    return pars


def visibility_peak_and_fwhm(res):
    """Peak redshift and FWHM (in conformal distance, Mpc) of camb's visibility."""
    eta_lo = res.conformal_time(1400.0)
    eta_hi = res.conformal_time(800.0)
    eta = np.arange(eta_lo, eta_hi, 0.02)
    g = res.get_background_time_evolution(eta, ["visibility"], format="array")[:, 0]
    i = int(np.argmax(g))
    # parabolic refinement of the peak
    y0, y1, y2 = g[i - 1], g[i], g[i + 1]
    shift = 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)
    d = eta[1] - eta[0]
    eta_pk = eta[i] + shift * d
    g_pk = y1 - 0.25 * (y0 - y2) * shift
    half = 0.5 * g_pk

    def crossing(j0, step):
        j = j0
        while g[j] > half:
            j += step
        # linear interpolation between j-step and j
        a, b = g[j - step], g[j]
        t = (a - half) / (a - b)
        return eta[j - step] + t * (eta[j] - eta[j - step])

    left = crossing(i, -1)
    right = crossing(i, +1)
    z_pk = float(res.redshift_at_conformal_time(eta_pk))
    return z_pk, right - left


def xe_grid():
    z = list(np.arange(0.0, 30.0, 0.5))
    z += list(np.arange(30.0, 400.0, 10.0))
    z += list(np.arange(400.0, 3000.0, 10.0))
    z += list(np.arange(3000.0, 8001.0, 100.0))
    return np.array(z)


def main():
    rows = []
    for label in ("default", "published"):
        pars = make_params(label)
        res = camb.get_background(pars)
        der = res.get_derived_params()
        for key in ("zstar", "rstar", "thetastar", "DAstar", "zdrag", "rdrag", "kd", "age"):
            rows.append((f"derived_{label}", key, repr(float(der[key]))))
        rows.append((f"derived_{label}", "zre", repr(float(pars.Reion.get_zre(pars)))))
        z_pk, fwhm = visibility_peak_and_fwhm(res)
        rows.append((f"derived_{label}", "vis_peak_z", repr(z_pk)))
        rows.append((f"derived_{label}", "vis_fwhm_mpc", repr(float(fwhm))))
        rows.append((f"derived_{label}", "chistar", repr(float(res.comoving_radial_distance(der["zstar"])))))
        z = xe_grid()
        ev = res.get_background_redshift_evolution(z, ["x_e", "T_b"], format="array")
        for zz, (xe, tb) in zip(z, ev):
            rows.append((f"xe_{label}", repr(float(zz)), repr(float(xe)), repr(float(tb))))

    with open(OUT, "w") as f:
        f.write("# Thermal-history reference for ngreach's default cosmology, generated by\n")
        f.write("# tests/reference/gen_thermal.py (see its docstring for the camb settings).\n")
        f.write(f"# camb {camb.__version__}, numpy {np.__version__}, scipy {scipy.__version__}, "
                f"python {platform.python_version()}\n")
        f.write(f"# H0={H0} ombh2={OMBH2} omch2={OMCH2} nnu={NNU} mnu=0 num_massive_neutrinos=0 "
                f"TCMB={TCMB} tau={TAU} YHe={YHE!r} As={AS!r} ns={NS}\n")
        for label in ("default", "published"):
            pp = make_params(label)
            r = pp.Recomb
            f.write(f"# {label}: RECFAST_fudge={r.RECFAST_fudge!r} RECFAST_fudge_He={r.RECFAST_fudge_He!r} "
                    f"RECFAST_Hswitch={r.RECFAST_Hswitch} RECFAST_He_rate_correction={r.RECFAST_He_rate_correction} "
                    f"AGauss1={r.AGauss1!r} AGauss2={r.AGauss2!r} zGauss1={r.zGauss1!r} zGauss2={r.zGauss2!r} "
                    f"wGauss1={r.wGauss1!r} wGauss2={r.wGauss2!r}\n")
        f.write("# both: tanh reionization delta_redshift=0.5; helium_redshift=3.5 "
                "helium_delta_redshift=0.5 helium_redshiftstart=7.5\n")
        f.write("# derived rows: kind, name, value (zstar, rstar [Mpc], thetastar [100 theta_*], DAstar [Gpc],\n")
        f.write("#   zdrag, rdrag [Mpc], kd [1/Mpc], age [Gyr], zre, vis_peak_z, vis_fwhm_mpc, chistar [Mpc])\n")
        f.write("# xe rows: kind, z, x_e (free electrons per hydrogen nucleus), T_b [K]\n")
        f.write("kind\tkey\tvalue\textra\n")
        for r in rows:
            f.write("\t".join(r) + ("\t\n" if len(r) == 3 else "\n"))
    print(f"wrote {OUT} ({len(rows)} rows)", file=sys.stderr)


if __name__ == "__main__":
    main()
