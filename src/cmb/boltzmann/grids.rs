//! Sampling: the numerical settings that follow from the precision knob, the
//! conformal-time nodes of the line-of-sight integral (which are also the output times of
//! the mode integrations, so that no interpolation in time is needed), and the k grids.

use crate::cmb::ThermalHistory;
use crate::numerics::GaussLegendre;

/// Every numerical choice of a solve, derived from `precision` and `lmax`.
#[derive(Debug, Clone)]
pub(crate) struct Plan {
    /// Relative and absolute tolerance of the mode integration.
    pub rtol: f64,
    /// Absolute tolerance (the state is normalized to unit primordial Phi).
    pub atol: f64,
    /// Tight coupling ends when max(k, aH) / kappa' exceeds this.
    pub eps_tca: f64,
    /// Radiation streaming starts when k eta exceeds this (after recombination).
    pub k_eta_rsa: f64,
    /// Highest multipoles: neutrinos, photon temperature, photon polarization.
    pub l_nu: usize,
    /// Photon temperature.
    pub l_g: usize,
    /// Photon polarization.
    pub l_p: usize,
    /// Panel length (Mpc) and Gauss-Legendre order around recombination.
    pub panel_rec: f64,
    /// Panel length just after recombination (early ISW), Mpc.
    pub panel_early: f64,
    /// Panel length at late times (late ISW, reionization), Mpc.
    pub panel_late: f64,
    /// Nodes per panel.
    pub n_gl: usize,
    /// The early-ISW nodes are used up to this k (1/Mpc), tapered to zero over 25%.
    pub k_cut_early: f64,
    /// The late nodes are used up to this k.
    pub k_cut_late: f64,
    /// k spacing of the mode integrations: Delta k = min(dlnk k, max(dk_low, slope (k - k_mid)), dk_high).
    pub ode_dlnk: f64,
    /// Fine spacing where reionization sources oscillate in k.
    pub ode_dk_low: f64,
    /// Spacing at high k (acoustic oscillations of the sources).
    pub ode_dk_high: f64,
    /// Spacing of the projection k grid (and of the transfer table).
    pub fine_dk: f64,
    /// Log spacing of the projection grid at low k.
    pub fine_dlnk: f64,
    /// Largest k of the projection, 1/Mpc.
    pub k_max: f64,
    /// Smallest k, 1/Mpc.
    pub k_min: f64,
    /// Largest multipole step of the sampled-l path.
    pub l_step_max: usize,
    /// Node spacing in x of the sampled-l Bessel tables.
    pub bessel_h: f64,
}

impl Plan {
    /// The plan for a precision level (1 default, 2 refined, ...) and l_max.
    pub fn new(precision: u32, lmax: usize, eta0: f64, chi_star: f64) -> Self {
        let p = precision.max(1) as f64;
        let lm = lmax as f64;
        Self::base(p, precision, lm, eta0, chi_star)
    }

    fn base(p: f64, precision: u32, lm: f64, eta0: f64, chi_star: f64) -> Self {
        Self {
            rtol: 1e-5 / p.powi(2),
            atol: 1e-9 / p.powi(2),
            eps_tca: 0.02 / p,
            k_eta_rsa: 45.0 * p,
            // Shorter hierarchies move C_l^EE at l ~ 2400 by 0.1% (measured).
            l_nu: 12 + 8 * precision as usize,
            l_g: 10 + 8 * precision as usize,
            l_p: 8 + 8 * precision as usize,
            panel_rec: 10.0 / p,
            panel_early: 45.0 / p,
            panel_late: 120.0 / p,
            n_gl: 6,
            k_cut_early: 0.06 * p,
            k_cut_late: 0.02 * p,
            ode_dlnk: 0.12 / p,
            ode_dk_low: 1.5e-4 / p,
            ode_dk_high: 0.0025 / p,
            fine_dk: 1.0e-4 / p,
            fine_dlnk: 0.04 / p,
            // The k integral of C_l has a tail beyond k = l / chi_*: 2% of C_1000 comes from
            // k chi_* > 2 l and 1% of C_2500 from k chi_* > 1.5 l (measured).
            k_max: ((2.1 + 0.4 * (p - 1.0)) * lm + 600.0 * p) / chi_star,
            k_min: 0.3 / eta0,
            l_step_max: (25.0 / p) as usize,
            bessel_h: 0.5,
        }
    }
}

/// Line-of-sight nodes: composite Gauss-Legendre in conformal time, in three regions
/// (recombination, early ISW, late times) of increasing panel length.
#[derive(Debug, Clone)]
pub(crate) struct Nodes {
    /// Conformal times, increasing, Mpc.
    pub eta: Vec<f64>,
    /// Quadrature weights, Mpc.
    pub w: Vec<f64>,
    /// Visibility g at the nodes, 1/Mpc.
    pub g: Vec<f64>,
    /// e^-tau at the nodes.
    pub emt: Vec<f64>,
    /// Nodes [0, n_rec) cover recombination (used for every k).
    pub n_rec: usize,
    /// Nodes [n_rec, n_early) the early-ISW era (k <= k_cut_early).
    pub n_early: usize,
    /// End of the recombination region, Mpc.
    pub eta_rec_end: f64,
}

/// Appends Gauss-Legendre panels of length about `h` covering [lo, hi].
fn panels(lo: f64, hi: f64, h: f64, gl: &GaussLegendre, eta: &mut Vec<f64>, w: &mut Vec<f64>) {
    if hi <= lo {
        return;
    }
    let n = ((hi - lo) / h).ceil().max(1.0) as usize;
    let d = (hi - lo) / n as f64;
    for p in 0..n {
        let (x, ww) = gl.mapped(lo + p as f64 * d, lo + (p + 1) as f64 * d);
        eta.extend(x);
        w.extend(ww);
    }
}

impl Nodes {
    /// Builds the nodes from the visibility of the thermal history; `xe_ratio(z)`, if
    /// given, rescales the visibility as it rescales the opacity (see `Timeline::new`).
    pub fn new(
        th: &ThermalHistory,
        plan: &Plan,
        xe_ratio: Option<&dyn Fn(f64) -> f64>,
        bg: &crate::cosmology::Background,
    ) -> Self {
        let et = th.eta_table();
        let vis = th.visibility_table();
        let (ipk, gmax) =
            vis.iter().enumerate().fold(
                (0, 0.0),
                |(i0, g0), (i, &g)| if g > g0 { (i, g) } else { (i0, g0) },
            );
        // Start where the visibility is 1e-7 of its peak (e^-tau ~ 1e-9 there), and end
        // the recombination region where it has fallen to 3e-4 of the peak after it.
        let i_start = (0..ipk).rev().find(|&i| vis[i] < 1e-7 * gmax).unwrap_or(0);
        let i_end = (ipk..vis.len())
            .find(|&i| vis[i] < 3e-4 * gmax)
            .unwrap_or(vis.len() - 1);
        let eta_start = et[i_start];
        let eta_rec_end = et[i_end];
        let eta0 = th.conformal_age();
        let eta_early_end = (eta_rec_end + 2500.0).min(eta0);
        let gl = GaussLegendre::new(plan.n_gl);
        let mut eta = Vec::new();
        let mut w = Vec::new();
        // Recombination: panels of panel_rec where g > g_max / 10, 1.5 panel_rec where
        // g > g_max / 100 and 2.5 panel_rec in the tails (judged at the panel's start and
        // middle). The Bessel function oscillates with period 2 pi / k in eta; the tails
        // carry 2% of the visibility, so the coarser panels there cost little accuracy.
        let level = |e: f64| -> f64 {
            let g = th.visibility_eta(e) / gmax;
            if g > 0.1 {
                1.0
            } else if g > 0.01 {
                1.5
            } else {
                2.5
            }
        };
        let mut e = eta_start;
        while e < eta_rec_end {
            let long = 2.5 * plan.panel_rec;
            let f = level(e).min(level(e + 0.5 * long)).min(level(e + long));
            let hi = (e + f * plan.panel_rec).min(eta_rec_end);
            let hi = if eta_rec_end - hi < 0.3 * plan.panel_rec {
                eta_rec_end
            } else {
                hi
            };
            panels(e, hi, hi - e, &gl, &mut eta, &mut w);
            e = hi;
        }
        let n_rec = eta.len();
        panels(
            eta_rec_end,
            eta_early_end,
            plan.panel_early,
            &gl,
            &mut eta,
            &mut w,
        );
        let n_early = eta.len();
        panels(eta_early_end, eta0, plan.panel_late, &gl, &mut eta, &mut w);
        let g = eta
            .iter()
            .map(|&e| {
                let f = xe_ratio.map_or(1.0, |f| f(bg.z_of_comoving_distance(eta0 - e)));
                th.visibility_eta(e) * f
            })
            .collect();
        let emt = eta.iter().map(|&e| th.exp_minus_tau_eta(e)).collect();
        Self {
            eta,
            w,
            g,
            emt,
            n_rec,
            n_early,
            eta_rec_end,
        }
    }

    /// Number of nodes.
    pub fn len(&self) -> usize {
        self.eta.len()
    }

    /// How many nodes the projection at wavenumber k uses (a prefix of the list), given
    /// the cut-offs of the early and late regions (with their tapers). The mode
    /// integrations add `margin` to k, so that the splines in k of every node's sources
    /// extend past the last k that uses them.
    pub fn needed(&self, k: f64, plan: &Plan, margin: f64) -> usize {
        let k = k - margin;
        if k <= 1.25 * plan.k_cut_late {
            self.len()
        } else if k <= 1.25 * plan.k_cut_early {
            self.n_early
        } else {
            self.n_rec
        }
    }
}

/// Weight of a region's contribution at k: 1 below the cut, a cosine taper to 0 at
/// 1.25 times the cut.
#[inline]
pub(crate) fn taper(k: f64, cut: f64) -> f64 {
    if k <= cut {
        1.0
    } else if k >= 1.25 * cut {
        0.0
    } else {
        0.5 * (1.0 + (std::f64::consts::PI * (k - cut) / (0.25 * cut)).cos())
    }
}

/// Wavenumbers of the mode integrations, increasing, covering [k_min, k_max].
pub(crate) fn ode_k_grid(plan: &Plan, k_min: f64, k_max: f64) -> Vec<f64> {
    let mut k = vec![k_min];
    let mut x = k_min;
    // The low-k spacing resolves the oscillation in k of the reionization sources
    // (period 2 pi / (eta_reio - eta_*) ~ 1.2e-3 / Mpc); it relaxes linearly from
    // k = 0.006 to the acoustic spacing.
    let step = |x: f64| {
        (plan.ode_dlnk * x)
            .min((0.2 * (x - 0.006)).max(plan.ode_dk_low))
            .min(plan.ode_dk_high)
    };
    while x < k_max {
        x += step(x);
        k.push(x);
    }
    k
}

/// The projection (fine) k grid and its trapezoid weights: logarithmic at low k, then
/// uniform with spacing `fine_dk`.
pub(crate) fn fine_k_grid(plan: &Plan) -> (Vec<f64>, Vec<f64>) {
    let mut k = vec![plan.k_min];
    let mut x = plan.k_min;
    while x < plan.k_max {
        x += (plan.fine_dlnk * x).min(plan.fine_dk);
        k.push(x.min(plan.k_max));
        if x >= plan.k_max {
            break;
        }
    }
    let n = k.len();
    let mut w = vec![0.0; n];
    for i in 0..n - 1 {
        let h = k[i + 1] - k[i];
        w[i] += 0.5 * h;
        w[i + 1] += 0.5 * h;
    }
    (k, w)
}

/// Multipoles of the sampled-l path: every l up to 20, then steps growing as l/10 up to
/// `l_step_max`, always ending on lmax.
pub(crate) fn sampled_ls(lmax: usize, l_step_max: usize) -> Vec<usize> {
    let mut ls = Vec::new();
    let mut l = 2;
    while l < lmax {
        ls.push(l);
        let step = if l < 20 {
            1
        } else {
            (l / 10).clamp(1, l_step_max.max(1))
        };
        // Shorter steps towards lmax, where the natural spline has its free end.
        let step = step.min(((lmax - l) / 3).max(1));
        l += step;
    }
    ls.push(lmax);
    ls
}
