#!/usr/bin/env python3
"""Reference tables for the cosmology foundation of ngreach (src/cosmology/).

Run from the repository root with the reference virtual environment (see README.md here):

    .venv-ref/bin/python tests/reference/gen_cosmology.py

It writes, next to itself, whitespace-separated tables whose `#` header lines record this
script, the date, the library versions and the cosmological parameters:

- background_astropy.tsv  comoving distance and H(z), astropy FlatLambdaCDM and
                          Flatw0waCDM (w0 = -0.9, wa = 0.3)
- growth_colossus.tsv     D(z)/D(0) and f(z) from colossus, plus a scipy solution of the
                          growth ODE that ngreach integrates (a tight numerical check)
- eh98_colossus.tsv       Eisenstein & Hu (1998) T(k), with baryons and the no-wiggle form
- sigma8_camb.tsv         sigma_8(z = 0) from camb's linear matter power
- pk_camb.tsv             camb's linear P(k, z = 0), for the A_s normalization and shape

The Rust test tests/reference_cosmology.rs reads only these committed tables; nothing in CI
runs Python.

Cosmology: ngreach's default (src/cosmology/params.rs, CosmoParams::planck2018), i.e. the
Planck 2018 TT,TE,EE+lowE+lensing best fit (Planck Collaboration VI 2020, Table 2) with
massless neutrinos: H0 = 67.36, omega_b = 0.02237, omega_c = 0.1200, T_cmb = 2.7255 K,
N_eff = 3.046 (all massless), n_s = 0.9649, ln(1e10 A_s) = 3.044, pivot 0.05/Mpc,
tau = 0.0544, Y_He from ngreach's BBN rule (helium_bbn below).

Notes on colossus's growth factor with relativistic species (colossus 1.4.0,
cosmology.Cosmology.growthFactorUnnormalized, read from its source):
- With relspecies=True colossus includes photons and N_eff massless neutrinos in E(z), but
  its growth factor is assembled from two approximations:
  * z < 20: the Heath (1977) / Eisenstein & Hu (1999, Eq. 8) integral
    D = (5/2) Om0 E(z) Int_z^inf (1+z') dz' / E(z')^3, in which the radiation density is
    replaced by a constant Or0 (it "behaves like a cosmological constant"), so radiation
    does not act on the growth at low z; the integral is exact only for matter + Lambda.
  * z > 5: the matter + radiation solution of Gnedin, Kravtsov & Rudd (2011, Eq. 5),
    the Meszaros (1974) growing mode D = a + (2/3) a_eq plus a decaying-mode admixture
    that decays as (a/a_eq)^(-3/2), without dark energy.
  * 5 < z < 20: a linear interpolation in ln a between the two.
  D(z)/D(0) from growthFactor() is a spline of that function in ln(1+z); its first
  derivative (derivative=1) is the spline's derivative, so f inherits the blend's slope
  error in 5 < z < 20.
- ngreach (src/cosmology/growth.rs) integrates D'' + (2 + dlnH/dlna) D' = (3/2) Om(a) D in
  ln a with matter, radiation (smooth) and dark energy in H, from a = 1e-6 on the Meszaros
  growing mode. That is the same physics as colossus's high-z branch and, at low z, the
  Heath integral plus the small effect of radiation on the expansion. The two therefore
  agree only to the accuracy of colossus's approximations: measured 8e-4 in D(z)/D(0)
  and 9e-4 (spline derivative) to 1.1e-3 (finite difference) in f(z) for 0 <= z <= 10,
  largest at z ~ 3-5, where the constant-radiation low-z branch is worst and the blend
  begins.
  With relspecies=False colossus drops radiation entirely and the difference grows to
  2e-3 at z = 10, so relspecies=True is the right comparison.
- Because the colossus check can only be as tight as ~1e-3, the table also carries a
  scipy solve_ivp (DOP853, rtol 1e-12) solution of ngreach's own ODE and initial
  conditions, for the LCDM and the w0-wa cosmologies: an independent numerical check of
  ngreach's integrator at the 1e-7 level (not an independent check of the physics).
- f is f = dlnD/dlna = -(1+z) dlnD/dz. Two colossus columns: from the spline derivative
  growthFactor(z, derivative=1), and from a 4-point central difference in ln a of the
  un-interpolated growthFactorUnnormalized (step 1e-3, truncation error ~1e-10).
"""

import datetime
import importlib.metadata as md
import os
import sys

import numpy as np
from scipy.integrate import solve_ivp

HERE = os.path.dirname(os.path.abspath(__file__))
SCRIPT = "tests/reference/gen_cosmology.py"

# ngreach's default cosmology (src/cosmology/params.rs, CosmoParams::planck2018).
H0 = 67.36
H = H0 / 100.0
OMEGA_B = 0.02237  # Omega_b h^2
OMEGA_C = 0.1200  # Omega_c h^2
T_CMB = 2.7255  # K
N_EFF = 3.046  # all massless
N_S = 0.9649
LN10_AS = 3.044
A_S = float(np.exp(LN10_AS)) * 1e-10
K_PIVOT = 0.05  # 1/Mpc
TAU = 0.0544
OM0 = (OMEGA_B + OMEGA_C) / H**2
OB0 = OMEGA_B / H**2
# The second (CPL) dark-energy model for the background check.
W0, WA = -0.9, 0.3


def helium_bbn(omega_b, n_eff):
    """ngreach's helium rule, the same formula as helium_bbn in src/cosmology/params.rs:
    Y = 0.2454 + 0.0016 [(eta_10 - 6.13) + 100 (S - 1)], eta_10 = 273.9 omega_b,
    S = sqrt(1 + 7 (N_eff - 3.046) / 43)."""
    eta10 = 273.9 * omega_b
    s = np.sqrt(max(1.0 + 7.0 * (n_eff - 3.046) / 43.0, 0.0))
    return 0.2454 + 0.0016 * ((eta10 - 6.13) + 100.0 * (s - 1.0))


Y_HE = float(helium_bbn(OMEGA_B, N_EFF))


def versions():
    names = ["camb", "astropy", "colossus", "numpy", "scipy"]
    return ", ".join(f"{n} {md.version(n)}" for n in names)


def header(title, columns, extra=()):
    lines = [
        f"# {title}",
        f"# generated by {SCRIPT} on {datetime.date.today().isoformat()}",
        f"# libraries: {versions()}; python {sys.version.split()[0]}",
        f"# param h {H!r}",
        f"# param omega_b {OMEGA_B!r}",
        f"# param omega_c {OMEGA_C!r}",
        f"# param T_cmb_k {T_CMB!r}",
        f"# param N_eff {N_EFF!r}",
    ]
    lines += [f"# {e}" for e in extra]
    lines.append("# columns: " + " ".join(columns))
    return "\n".join(lines) + "\n"


def write(name, text):
    path = os.path.join(HERE, name)
    with open(path, "w") as f:
        f.write(text)
    print(f"wrote {path}")


def fmt_rows(rows):
    return "".join(" ".join(f"{v:.12e}" for v in r) + "\n" for r in rows)


# ---------------------------------------------------------------------------------------
# Background: astropy
# ---------------------------------------------------------------------------------------
def background():
    import astropy.units as u
    from astropy.cosmology import FlatLambdaCDM, Flatw0waCDM

    common = dict(
        H0=H0, Om0=OM0, Ob0=OB0, Tcmb0=T_CMB * u.K, Neff=N_EFF, m_nu=0.0 * u.eV
    )
    lcdm = FlatLambdaCDM(**common)
    cpl = Flatw0waCDM(w0=W0, wa=WA, **common)
    zs = np.sort(np.concatenate([np.geomspace(0.1, 1100.0, 24), [1089.9]]))
    rows = []
    for z in zs:
        rows.append(
            [
                z,
                lcdm.comoving_distance(z).to_value(u.Mpc),
                lcdm.H(z).to_value(u.km / u.s / u.Mpc),
                cpl.comoving_distance(z).to_value(u.Mpc),
                cpl.H(z).to_value(u.km / u.s / u.Mpc),
            ]
        )
    extra = [
        "astropy.cosmology FlatLambdaCDM and Flatw0waCDM, m_nu = 0 (massless), Ob0 given;",
        "Ode0 = 1 - Om0 - Ogamma0 - Onu0 (flat), Onu0 = 0.22710731766 N_eff Ogamma0",
        f"Om0 = {OM0!r}, Ob0 = {OB0!r}, Ogamma0 = {float(lcdm.Ogamma0)!r}, Onu0 = {float(lcdm.Onu0)!r}",
        f"param w0_cpl {W0!r}",
        f"param wa_cpl {WA!r}",
        "chi = comoving_distance (scipy quad inside astropy), H = H(z)",
    ]
    cols = [
        "z",
        "chi_lcdm_mpc",
        "H_lcdm_km_s_mpc",
        "chi_w0wa_mpc",
        "H_w0wa_km_s_mpc",
    ]
    write(
        "background_astropy.tsv",
        header("comoving distance and H(z) from astropy", cols, extra)
        + fmt_rows(rows),
    )


# ---------------------------------------------------------------------------------------
# Growth: colossus, plus a scipy solution of ngreach's ODE
# ---------------------------------------------------------------------------------------
def ngreach_ode(zs, om, orad, w0, wa):
    """Solves ngreach's growth ODE (src/cosmology/growth.rs) with scipy: returns
    D(z)/D(0) and f(z) = dlnD/dlna. Flat, CPL dark energy, radiation smooth."""
    ode = 1.0 - om - orad

    def de(a):
        return a ** (-3.0 * (1.0 + w0 + wa)) * np.exp(-3.0 * wa * (1.0 - a))

    def e2(a):
        return orad / a**4 + om / a**3 + ode * de(a)

    def dlnh(a):
        w = w0 + wa * (1.0 - a)
        return 0.5 * (-4 * orad / a**4 - 3 * om / a**3 - 3 * (1 + w) * ode * de(a)) / e2(a)

    def rhs(x, y):
        a = np.exp(x)
        return [y[1], -(2.0 + dlnh(a)) * y[1] + 1.5 * om / a**3 / e2(a) * y[0]]

    a_eq = orad / om
    a0 = 1e-6
    xs = -np.log1p(np.asarray(zs))
    order = np.argsort(xs)
    t_eval = np.append(xs[order], 0.0)
    t_eval = np.unique(t_eval)
    sol = solve_ivp(
        rhs,
        (np.log(a0), 0.0),
        [a0 + 2.0 / 3.0 * a_eq, a0],
        t_eval=t_eval,
        method="DOP853",
        rtol=1e-12,
        atol=1e-16,
    )
    assert sol.status == 0, sol.message
    d_today = sol.y[0][-1]
    d = np.interp(xs, sol.t, sol.y[0])  # xs are nodes of t_eval: exact look-up
    dp = np.interp(xs, sol.t, sol.y[1])
    return d / d_today, dp / d


def growth():
    from colossus.cosmology import cosmology as cc

    params = dict(
        flat=True,
        H0=H0,
        Om0=OM0,
        Ob0=OB0,
        sigma8=0.81,  # required by colossus; irrelevant for the growth factor
        ns=N_S,
        relspecies=True,
        Tcmb0=T_CMB,
        Neff=N_EFF,
    )
    cosmo = cc.setCosmology("ngreach_default", params=params, persistence="")
    zs = np.concatenate([np.linspace(0.0, 2.0, 21)[:-1], np.linspace(2.0, 10.0, 17)])
    g0 = cosmo.growthFactorUnnormalized(0.0)
    d_exact = cosmo.growthFactorUnnormalized(zs) / g0
    d_spline = np.array([cosmo.growthFactor(float(z)) for z in zs])
    f_spline = -(1.0 + zs) * cosmo.growthFactor(zs, derivative=1) / d_spline

    def ln_d(x):  # x = ln a
        return np.log(cosmo.growthFactorUnnormalized(np.exp(-x) - 1.0))

    x = -np.log1p(zs)
    eps = 1e-3
    f_fd = (8.0 * (ln_d(x + eps) - ln_d(x - eps)) - (ln_d(x + 2 * eps) - ln_d(x - 2 * eps))) / (
        12.0 * eps
    )

    # Omega_r for the ODE from astropy (CODATA constants, as ngreach's constants.rs);
    # colossus's Or0 uses a rounded photon-density coefficient and is 3e-5 lower.
    import astropy.units as u
    from astropy.cosmology import FlatLambdaCDM

    ap = FlatLambdaCDM(H0=H0, Om0=OM0, Ob0=OB0, Tcmb0=T_CMB * u.K, Neff=N_EFF, m_nu=0.0 * u.eV)
    orad = float(ap.Ogamma0 + ap.Onu0)
    d_ode, f_ode = ngreach_ode(zs, OM0, orad, -1.0, 0.0)
    d_ode_cpl, f_ode_cpl = ngreach_ode(zs, OM0, orad, W0, WA)

    rows = np.column_stack(
        [zs, d_exact, f_spline, f_fd, d_spline, d_ode, f_ode, d_ode_cpl, f_ode_cpl]
    )
    extra = [
        "colossus.cosmology.setCosmology(flat=True, H0, Om0, Ob0, relspecies=True, Tcmb0, Neff),",
        "de_model lambda; persistence off. See the script's docstring for what colossus does",
        "for the growth factor with relativistic species and how that compares with ngreach.",
        f"colossus Or0 = {float(cosmo.Or0)!r}, Ode0 = {float(cosmo.Ode0)!r}",
        "D_colossus = growthFactorUnnormalized(z) / growthFactorUnnormalized(0) (no spline)",
        "f_colossus_spline = -(1+z) growthFactor(z, derivative=1) / growthFactor(z)",
        "f_colossus_fd = dlnD/dlna of growthFactorUnnormalized, 4-point central difference",
        "D_colossus_spline = growthFactor(z) (the interpolated public function)",
        "D_ode, f_ode: scipy solve_ivp DOP853 rtol 1e-12 of ngreach's growth ODE and initial",
        "  conditions (not colossus): D'' + (2 + dlnH/dlna) D' = 1.5 Om(a) D, D(1e-6) = a + 2/3 a_eq,",
        f"  D' = a, with Omega_r = astropy Ogamma0 + Onu0 = {orad!r}; *_w0wa: w0 = -0.9, wa = 0.3",
        f"param w0_cpl {W0!r}",
        f"param wa_cpl {WA!r}",
    ]
    cols = [
        "z",
        "D_colossus",
        "f_colossus_spline",
        "f_colossus_fd",
        "D_colossus_spline",
        "D_ode",
        "f_ode",
        "D_ode_w0wa",
        "f_ode_w0wa",
    ]
    write(
        "growth_colossus.tsv",
        header("linear growth D(z)/D(0) and f(z)", cols, extra) + fmt_rows(rows),
    )


# ---------------------------------------------------------------------------------------
# Eisenstein & Hu 1998: colossus
# ---------------------------------------------------------------------------------------
def eh98():
    from colossus.cosmology import power_spectrum as ps

    k_h = np.geomspace(1e-4, 10.0, 80)  # h/Mpc, as colossus takes it
    t_full = ps.modelEisenstein98(k_h, H, OM0, OB0, T_CMB)
    t_nw = ps.modelEisenstein98ZeroBaryon(k_h, H, OM0, OB0, T_CMB)
    extra = [
        "colossus.cosmology.power_spectrum.modelEisenstein98(k, h, Om0, Ob0, Tcmb0) and",
        "modelEisenstein98ZeroBaryon (EH98 Eqs. 26-31, the no-wiggle form)",
        f"Om0 = {OM0!r}, Ob0 = {OB0!r}",
        "k in h/Mpc (ngreach's EisensteinHu::transfer takes k in 1/Mpc: k_mpc = k_h * h)",
    ]
    write(
        "eh98_colossus.tsv",
        header("Eisenstein & Hu (1998) transfer functions", ["k_h_mpc", "T_eh98", "T_eh98_nowiggle"], extra)
        + fmt_rows(np.column_stack([k_h, t_full, t_nw])),
    )


# ---------------------------------------------------------------------------------------
# sigma_8: camb
# ---------------------------------------------------------------------------------------
def sigma8():
    import camb

    rows = []
    for boost in (1.0, 2.0):
        pars = camb.CAMBparams()
        pars.set_cosmology(
            H0=H0,
            ombh2=OMEGA_B,
            omch2=OMEGA_C,
            mnu=0.0,
            num_massive_neutrinos=0,
            nnu=N_EFF,
            YHe=Y_HE,
            TCMB=T_CMB,
            tau=TAU,
        )
        pars.InitPower.set_params(As=A_S, ns=N_S, pivot_scalar=K_PIVOT)
        pars.set_matter_power(redshifts=[0.0], kmax=50.0)
        pars.NonLinear = camb.model.NonLinear_none
        pars.set_accuracy(AccuracyBoost=boost)
        res = camb.get_results(pars)
        s8 = float(res.get_sigma8_0())
        rows.append([boost, 0.0, s8])
        assert pars.num_nu_massive == 0 and abs(pars.num_nu_massless - N_EFF) < 1e-12
    # The linear P(k) of the last (most accurate) run, for the normalization check.
    kh, _, pk = res.get_matter_power_spectrum(minkh=1e-4, maxkh=5.0, npoints=60)
    extra = [
        "camb.CAMBparams.set_cosmology(H0, ombh2, omch2, mnu=0, num_massive_neutrinos=0,",
        f"  nnu=N_eff, YHe, TCMB, tau); InitPower As = exp(3.044) 1e-10, ns, pivot 0.05/Mpc;",
        "  set_matter_power(redshifts=[0], kmax=50 /Mpc), NonLinear_none, get_sigma8_0()",
        f"param Y_He {Y_HE!r} (ngreach's helium_bbn rule, same formula as src/cosmology/params.rs)",
        f"param A_s {A_S!r}",
        f"param n_s {N_S!r}",
        f"param k_pivot_mpc {K_PIVOT!r}",
        f"param tau_reio {TAU!r}",
        "sigma_8: linear matter (CDM + baryons; no massive neutrinos), top-hat R = 8 Mpc/h",
        "one row per camb AccuracyBoost",
    ]
    write(
        "sigma8_camb.tsv",
        header("sigma_8 from camb linear matter power", ["accuracy_boost", "z", "sigma8"], extra)
        + fmt_rows(rows),
    )
    extra_pk = [
        "camb linear matter power of the AccuracyBoost 2 run above (same settings):",
        "  CAMBdata.get_matter_power_spectrum(minkh=1e-4, maxkh=5, npoints=60), z = 0",
        f"param Y_He {Y_HE!r}",
        f"param A_s {A_S!r}",
        f"param n_s {N_S!r}",
        f"param k_pivot_mpc {K_PIVOT!r}",
        f"param tau_reio {TAU!r}",
        "k in h/Mpc, P in (Mpc/h)^3",
    ]
    write(
        "pk_camb.tsv",
        header("linear matter power at z = 0 from camb", ["k_h_mpc", "P_h3_mpc3"], extra_pk)
        + fmt_rows(np.column_stack([kh, pk[0]])),
    )


if __name__ == "__main__":
    background()
    growth()
    eh98()
    sigma8()
