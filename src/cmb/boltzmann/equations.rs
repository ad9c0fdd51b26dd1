//! The linear scalar perturbation equations of one Fourier mode in synchronous gauge
//! (Ma & Bertschinger 1995, ApJ 455, 7, astro-ph/9506072, "MB95"), with tight coupling at
//! early times and radiation streaming at late times. The equations are written out in
//! the module docs of `boltzmann`; this file keeps the MB95 variable names:
//! h, eta (metric), delta_c, delta_b, theta_b, photon F_l (delta_g = F_0,
//! theta_g = 3 k F_1 / 4, sigma_g = F_2 / 2) and G_l, neutrino F_l.

use super::timeline::{BackgroundAt, Timeline};

/// Which approximation a mode is integrated in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Phase {
    /// First-order tight coupling: photons as a fluid with the baryons, no photon
    /// multipoles l >= 2 in the state.
    Tight,
    /// Full photon temperature and polarization hierarchies.
    Full,
    /// Radiation streaming: photons and neutrinos replaced by their non-oscillating
    /// particular solution; only the metric and the matter are integrated.
    Streaming,
}

/// Index map of the state vector. The phases use prefixes of one layout:
/// Streaming the first 4 entries, Tight the metric, matter, photon fluid and neutrinos,
/// Full everything.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Layout {
    /// Highest neutrino multipole.
    pub l_nu: usize,
    /// Highest photon temperature multipole.
    pub l_g: usize,
    /// Highest photon polarization multipole.
    pub l_p: usize,
}

pub(crate) const ETA: usize = 0;
pub(crate) const DC: usize = 1;
pub(crate) const DB: usize = 2;
pub(crate) const TB: usize = 3;
pub(crate) const DG: usize = 4;
pub(crate) const TG: usize = 5;
pub(crate) const DN: usize = 6;
pub(crate) const TN: usize = 7;

impl Layout {
    /// Neutrino F_l, 2 <= l <= l_nu.
    #[inline]
    pub fn nu(&self, l: usize) -> usize {
        6 + l
    }
    /// Photon F_l, 2 <= l <= l_g.
    #[inline]
    pub fn fg(&self, l: usize) -> usize {
        6 + self.l_nu + l - 1
    }
    /// Photon G_l, 0 <= l <= l_p.
    #[inline]
    pub fn gp(&self, l: usize) -> usize {
        6 + self.l_nu + self.l_g + l
    }
    /// Length of the state in a phase.
    pub fn len(&self, phase: Phase) -> usize {
        match phase {
            Phase::Streaming => 4,
            Phase::Tight => 7 + self.l_nu,
            Phase::Full => 7 + self.l_nu + self.l_g + self.l_p,
        }
    }
}

/// Metric quantities derived from a state.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Metric {
    /// h'.
    pub hp: f64,
    /// eta'.
    pub etap: f64,
    /// Photon density contrast (evolved, or the streaming solution).
    pub dg: f64,
    /// Photon velocity divergence.
    pub tg: f64,
    /// Photon shear sigma_g.
    pub sg: f64,
    /// Neutrino shear.
    pub sn: f64,
    /// Polarization source Pi = F_2 + G_0 + G_2.
    pub pi: f64,
}

/// One Fourier mode.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Mode<'a> {
    /// Wavenumber, 1/Mpc.
    pub k: f64,
    k2: f64,
    tl: &'a Timeline,
    /// The state layout.
    pub lay: Layout,
}

/// The four line-of-sight sources at one time (see the module docs of `boltzmann`):
/// [S0 (multiplies j_l), S1 (j_l'), S2 ((j_l + 3 j_l'')/2), SE (E-mode, multiplies
/// sqrt((l+2)!/(l-2)!) j_l / x^2)].
pub(crate) type Sources = [f64; 4];

impl<'a> Mode<'a> {
    /// A mode of wavenumber `k` on the tables `tl`.
    pub fn new(k: f64, tl: &'a Timeline, lay: Layout) -> Self {
        Self {
            k,
            k2: k * k,
            tl,
            lay,
        }
    }

    /// Adiabatic growing-mode initial conditions deep in radiation domination (MB95
    /// Eq. 96, leading order in k eta), in the Tight-phase layout, normalized to unit
    /// primordial potential Phi = (3/5) zeta: MB95's constant C is -(5/6) Phi (the metric
    /// eta tends to 2C = -zeta outside the horizon; see the module docs for the sign).
    pub fn initial(&self, eta: f64, y: &mut [f64]) {
        let c = -5.0 / 6.0;
        let rn = self.tl.r_nu();
        let kt = self.k * eta;
        let kt2 = kt * kt;
        y.fill(0.0);
        let dgam = -2.0 / 3.0 * c * kt2;
        y[ETA] = 2.0 * c - (5.0 + 4.0 * rn) / (6.0 * (15.0 + 4.0 * rn)) * c * kt2;
        y[DC] = 0.75 * dgam;
        y[DB] = 0.75 * dgam;
        y[DG] = dgam;
        y[DN] = dgam;
        let th = -c * kt2 * kt * self.k / 18.0;
        y[TB] = th;
        y[TG] = th;
        y[TN] = -(23.0 + 4.0 * rn) / (18.0 * (15.0 + 4.0 * rn)) * c * kt2 * kt * self.k;
        // sigma_nu = 4 C (k eta)^2 / (3 (15 + 4 R_nu)), F_2 = 2 sigma.
        y[self.lay.nu(2)] = 8.0 * c * kt2 / (3.0 * (15.0 + 4.0 * rn));
    }

    /// Metric from the Einstein constraint equations (MB95 Eq. 21a, 21b).
    #[inline(always)]
    fn metric(&self, phase: Phase, b: &BackgroundAt, eta_m: f64, y: &[f64]) -> Metric {
        let k2 = self.k2;
        let lay = self.lay;
        match phase {
            Phase::Streaming => {
                // Non-oscillating solution of free-streaming radiation (leading order in
                // aH/k, no scattering): theta_r = -h'/2, delta_r = 4 (aH h'/k^2 - eta),
                // shear and higher multipoles zero; h' and delta_r solved together with
                // Eq. 21a.
                let m = b.rho_c * y[DC] + b.rho_b * y[DB];
                let rr = b.rho_g + b.rho_n;
                let hp = (2.0 * k2 * eta_m + 3.0 * m - 12.0 * rr * eta_m)
                    / (b.hub * (1.0 - 12.0 * rr / k2));
                let dr = 4.0 * (b.hub * hp / k2 - eta_m);
                let tr = -0.5 * hp;
                let etap = 1.5 / k2 * (b.rho_b * y[TB] + 4.0 / 3.0 * rr * tr);
                Metric {
                    hp,
                    etap,
                    dg: dr,
                    tg: tr,
                    sg: 0.0,
                    sn: 0.0,
                    pi: 0.0,
                }
            }
            Phase::Tight | Phase::Full => {
                let sum_rd = b.rho_c * y[DC] + b.rho_b * y[DB] + b.rho_g * y[DG] + b.rho_n * y[DN];
                let hp = (2.0 * k2 * eta_m + 3.0 * sum_rd) / b.hub;
                let etap =
                    1.5 / k2 * (b.rho_b * y[TB] + 4.0 / 3.0 * (b.rho_g * y[TG] + b.rho_n * y[TN]));
                let sn = 0.5 * y[lay.nu(2)];
                let (sg, pi) = if phase == Phase::Full {
                    let f2 = y[lay.fg(2)];
                    (0.5 * f2, f2 + y[lay.gp(0)] + y[lay.gp(2)])
                } else {
                    // Tight coupling: sigma_g = (16/45) tau_c (theta_g + k^2 alpha), and the
                    // polarization follows with Pi = (5/2) F_2 = 5 sigma_g.
                    let sg = 16.0 / 45.0 / b.kappa * (y[TG] + 0.5 * (hp + 6.0 * etap));
                    (sg, 5.0 * sg)
                };
                Metric {
                    hp,
                    etap,
                    dg: y[DG],
                    tg: y[TG],
                    sg,
                    sn,
                    pi,
                }
            }
        }
    }

    /// Right-hand side dy/d eta in a phase (the state has `lay.len(phase)` entries).
    #[inline(always)]
    pub fn rhs(&self, phase: Phase, eta: f64, y: &[f64], dy: &mut [f64]) {
        let b = self.tl.at(eta);
        self.rhs_with(phase, &b, eta, y, dy);
    }

    #[inline(always)]
    fn rhs_with(&self, phase: Phase, b: &BackgroundAt, eta: f64, y: &[f64], dy: &mut [f64]) {
        let k = self.k;
        let k2 = self.k2;
        let lay = self.lay;
        let m = self.metric(phase, b, y[ETA], y);
        let hp = m.hp;
        dy[ETA] = m.etap;
        dy[DC] = -0.5 * hp;
        dy[DB] = -y[TB] - 0.5 * hp;
        let kap = b.kappa;
        match phase {
            Phase::Streaming => {
                dy[TB] = -b.hub * y[TB] + b.cs2 * k2 * y[DB] + b.r * kap * (m.tg - y[TB]);
                return;
            }
            Phase::Tight => {
                // First-order tight coupling (MB95 Sec. 5 with a general opacity history):
                // with the slip s = theta_b - theta_g = tau_c N / (1 + R),
                // N = -aH theta_b + c_s^2 k^2 delta_b - k^2 delta_g / 4,
                // s' = [-kappa''/kappa' + aH (R - 1)/(1 + R)] s
                //      + tau_c / (1 + R) [-(aH)' theta_b - aH k^2 delta_g / 4
                //                         + k^2 (c_s^2 delta_b)' - k^2 delta_g' / 4].
                let r = b.r;
                let tau_c = 1.0 / kap;
                let ddg = -4.0 / 3.0 * y[TG] - 2.0 / 3.0 * hp;
                let n = -b.hub * y[TB] + b.cs2 * k2 * y[DB] - 0.25 * k2 * y[DG];
                let s = tau_c * n / (1.0 + r);
                let sp = (-b.dln_kappa + b.hub * (r - 1.0) / (1.0 + r)) * s
                    + tau_c / (1.0 + r)
                        * (-b.dhub * y[TB] - 0.25 * b.hub * k2 * y[DG]
                            + k2 * (b.cs2 * dy[DB] + b.dcs2 * y[DB])
                            - 0.25 * k2 * ddg);
                let src = 0.25 * y[DG] - m.sg;
                let dtb = (-b.hub * y[TB] + b.cs2 * k2 * y[DB] + r * k2 * src + r * sp) / (1.0 + r);
                dy[TB] = dtb;
                dy[DG] = ddg;
                dy[TG] = -(dtb + b.hub * y[TB] - b.cs2 * k2 * y[DB]) / r + k2 * src;
            }
            Phase::Full => {
                dy[TB] = -b.hub * y[TB] + b.cs2 * k2 * y[DB] + b.r * kap * (y[TG] - y[TB]);
                dy[DG] = -4.0 / 3.0 * y[TG] - 2.0 / 3.0 * hp;
                dy[TG] = k2 * (0.25 * y[DG] - m.sg) + kap * (y[TB] - y[TG]);
                // Photon temperature hierarchy (MB95 Eq. 63) with the truncation of Eq. 51.
                let lg = lay.l_g;
                let f = |l: usize| y[lay.fg(l)];
                dy[lay.fg(2)] =
                    8.0 / 15.0 * y[TG] - 0.6 * k * f(3) + 4.0 / 15.0 * hp + 1.6 * m.etap
                        - 0.9 * kap * f(2)
                        + 0.1 * kap * (y[lay.gp(0)] + y[lay.gp(2)]);
                for l in 3..lg {
                    let lf = l as f64;
                    dy[lay.fg(l)] =
                        k / (2.0 * lf + 1.0) * (lf * f(l - 1) - (lf + 1.0) * f(l + 1)) - kap * f(l);
                }
                dy[lay.fg(lg)] = k * f(lg - 1) - ((lg + 1) as f64 / eta + kap) * f(lg);
                // Polarization hierarchy (MB95 Eq. 63).
                let lp = lay.l_p;
                let g = |l: usize| y[lay.gp(l)];
                let pi = m.pi;
                dy[lay.gp(0)] = -k * g(1) + kap * (0.5 * pi - g(0));
                for l in 1..lp {
                    let lf = l as f64;
                    let mut d =
                        k / (2.0 * lf + 1.0) * (lf * g(l - 1) - (lf + 1.0) * g(l + 1)) - kap * g(l);
                    if l == 2 {
                        d += 0.1 * kap * pi;
                    }
                    dy[lay.gp(l)] = d;
                }
                dy[lay.gp(lp)] = k * g(lp - 1) - ((lp + 1) as f64 / eta + kap) * g(lp);
            }
        }
        // Massless neutrinos (MB95 Eq. 49, truncation Eq. 51).
        dy[DN] = -4.0 / 3.0 * y[TN] - 2.0 / 3.0 * hp;
        dy[TN] = k2 * (0.25 * y[DN] - m.sn);
        let ln = lay.l_nu;
        let f = |l: usize| y[lay.nu(l)];
        dy[lay.nu(2)] = 8.0 / 15.0 * y[TN] - 0.6 * k * f(3) + 4.0 / 15.0 * hp + 1.6 * m.etap;
        for l in 3..ln {
            let lf = l as f64;
            dy[lay.nu(l)] = k / (2.0 * lf + 1.0) * (lf * f(l - 1) - (lf + 1.0) * f(l + 1));
        }
        dy[lay.nu(ln)] = k * f(ln - 1) - (ln + 1) as f64 / eta * f(ln);
    }

    /// Full-hierarchy state at the end of tight coupling, from the Tight-phase state
    /// (the tight-coupling values of the photon multipoles: F_2 = 2 sigma_g,
    /// G_0 = 5 F_2 / 4, G_2 = F_2 / 4, F_3, G_1, G_3 to first order in k tau_c).
    pub fn leave_tight(&self, eta: f64, y: &mut [f64]) {
        let b = self.tl.at(eta);
        let m = self.metric(Phase::Tight, &b, y[ETA], y);
        let lay = self.lay;
        let tau_c = 1.0 / b.kappa;
        y[lay.len(Phase::Tight)..lay.len(Phase::Full)].fill(0.0);
        let f2 = 2.0 * m.sg;
        y[lay.fg(2)] = f2;
        y[lay.fg(3)] = 3.0 / 7.0 * self.k * tau_c * f2;
        let g0 = 1.25 * f2;
        let g2 = 0.25 * f2;
        y[lay.gp(0)] = g0;
        y[lay.gp(2)] = g2;
        y[lay.gp(1)] = self.k / 3.0 * tau_c * (g0 - 2.0 * g2);
        y[lay.gp(3)] = 3.0 / 7.0 * self.k * tau_c * g2;
    }

    /// Line-of-sight sources at `eta` (see the module docs of `boltzmann`), given the
    /// visibility `g` and e^-tau at that time. `dy` is scratch of the phase's length.
    #[inline(always)]
    pub fn sources(
        &self,
        phase: Phase,
        eta: f64,
        y: &[f64],
        dy: &mut [f64],
        g: f64,
        emt: f64,
    ) -> Sources {
        let b = self.tl.at(eta);
        self.rhs_with(phase, &b, eta, y, dy);
        let m = self.metric(phase, &b, y[ETA], y);
        let k2 = self.k2;
        let lay = self.lay;
        let alpha = (m.hp + 6.0 * m.etap) / (2.0 * k2);
        // MB95 Eq. 21d: alpha' = eta - 2 aH alpha - (9 / 2k^2) sum (rho + P) sigma.
        let shear = b.rho_g * m.sg + b.rho_n * m.sn;
        let dalpha = y[ETA] - 2.0 * b.hub * alpha - 6.0 / k2 * shear;
        let (dsg, dsn) = match phase {
            Phase::Full => (0.5 * dy[lay.fg(2)], 0.5 * dy[lay.nu(2)]),
            Phase::Tight => (0.0, 0.5 * dy[lay.nu(2)]),
            Phase::Streaming => (0.0, 0.0),
        };
        let dshear = b.rho_g * (dsg - 2.0 * b.hub * m.sg) + b.rho_n * (dsn - 2.0 * b.hub * m.sn);
        let ddalpha = m.etap - 2.0 * b.dhub * alpha - 2.0 * b.hub * dalpha - 6.0 / k2 * dshear;
        // Newtonian-gauge combinations: Theta_0 + psi = delta_g/4 + alpha',
        // phi' + psi' = eta' + alpha'', theta_b(Newtonian) = theta_b + k^2 alpha.
        let s0 = g * (0.25 * m.dg + dalpha) + emt * (m.etap + ddalpha);
        let s1 = g * (y[TB] + k2 * alpha) / self.k;
        let s2 = g * m.pi / 8.0;
        let se = 3.0 / 16.0 * g * m.pi;
        [s0, s1, s2, se]
    }

    /// The Weyl potential Psi_W = (phi + psi) / 2 of the conformal Newtonian gauge
    /// (MB95 Eq. 18: phi = eta - aH alpha, psi = alpha' + aH alpha, so
    /// phi + psi = eta + alpha') and its conformal-time derivative (eta' + alpha'') / 2,
    /// per unit primordial Phi; negative in potential wells (psi is the Newtonian potential).
    pub fn weyl(&self, phase: Phase, eta: f64, y: &[f64], dy: &mut [f64]) -> (f64, f64) {
        let b = self.tl.at(eta);
        self.rhs_with(phase, &b, eta, y, dy);
        let m = self.metric(phase, &b, y[ETA], y);
        let k2 = self.k2;
        let lay = self.lay;
        let alpha = (m.hp + 6.0 * m.etap) / (2.0 * k2);
        let shear = b.rho_g * m.sg + b.rho_n * m.sn;
        let dalpha = y[ETA] - 2.0 * b.hub * alpha - 6.0 / k2 * shear;
        let (dsg, dsn) = match phase {
            Phase::Full => (0.5 * dy[lay.fg(2)], 0.5 * dy[lay.nu(2)]),
            Phase::Tight => (0.0, 0.5 * dy[lay.nu(2)]),
            Phase::Streaming => (0.0, 0.0),
        };
        let dshear = b.rho_g * (dsg - 2.0 * b.hub * m.sg) + b.rho_n * (dsn - 2.0 * b.hub * m.sn);
        let ddalpha = m.etap - 2.0 * b.dhub * alpha - 2.0 * b.hub * dalpha - 6.0 / k2 * dshear;
        (0.5 * (y[ETA] + dalpha), 0.5 * (m.etap + ddalpha))
    }

    /// Total matter (CDM + baryon) density contrast of a state (synchronous gauge, which
    /// is comoving with the CDM).
    pub fn delta_matter(&self, y: &[f64], f_b: f64) -> f64 {
        (1.0 - f_b) * y[DC] + f_b * y[DB]
    }
}
