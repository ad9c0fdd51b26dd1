//! The k and radial quadratures of the shell model (see the module docs of
//! [`super`]).

use serde::Serialize;

use super::{CHI_HALF_WIDTH_SIGMAS, ShellModel};
use crate::cmb::transfer::RadialGrid;
use crate::error::{Error, Location, Result};
use crate::numerics::GaussLegendre;

/// Which criterion set k_max.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum KCutoff {
    /// Given explicitly.
    Override,
    /// A multiple of k_D (damping on).
    Damping,
    /// The thickness of the shell.
    Thickness,
    /// A multiple of l_max / chi_* (or the floor): the truncated, unconverged case.
    Multipole,
}

/// How to build the k grid (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct KGridSpec {
    /// Gauss-Legendre nodes per panel of width pi / (chi_* + 6 sigma_chi) (2..=32).
    pub nodes_per_panel: usize,
    /// With damping, k_max <= this times k_D.
    pub damping_cut: f64,
    /// k_max <= sqrt((nu_max/chi_*)^2 + (this / sigma_chi)^2) for sigma_chi > 0.
    pub thickness_cut: f64,
    /// Without damping, k_max <= max(this (l_max + 1/2) / chi_*, `undamped_floor_mpc`).
    pub undamped_factor: f64,
    /// See `undamped_factor`, 1/Mpc.
    pub undamped_floor_mpc: f64,
    /// Explicit k_max in 1/Mpc (overrides all the above).
    pub k_max_mpc: Option<f64>,
}

impl Default for KGridSpec {
    fn default() -> Self {
        Self {
            nodes_per_panel: 5,
            damping_cut: 5.0,
            thickness_cut: 6.0,
            undamped_factor: 2.0,
            undamped_floor_mpc: 0.4,
            k_max_mpc: None,
        }
    }
}

/// A k quadrature: nodes and weights for Integral_0^k_max dk.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct KGrid {
    /// Nodes, 1/Mpc, increasing.
    pub k: Vec<f64>,
    /// Weights, 1/Mpc.
    pub w: Vec<f64>,
    /// Upper end, 1/Mpc.
    pub k_max: f64,
    /// What set k_max.
    pub cutoff: KCutoff,
}

impl KGrid {
    /// Number of nodes.
    pub fn len(&self) -> usize {
        self.k.len()
    }
    /// True when empty (never, for a built grid).
    pub fn is_empty(&self) -> bool {
        self.k.is_empty()
    }
}

/// How to build the radial quadrature of the bispectrum's Integral r^2 dr
/// ([`ShellModel::radial_grid`]).
///
/// The p = 0 radial function X^0_l(r) = (2/pi) Integral k^2 dk Delta_l(k) j_l(k r) is the
/// shell seen through the damping and the k cut-off: for T roughly a Gaussian of width
/// w = sqrt(sigma_chi^2 + s_D^2 + 1/k_max^2) about chi_*, with s_D = sqrt(2)/k_D
/// (exp(-k^2/k_D^2) is a Gaussian smoothing of that width; 0 without damping) and 1/k_max
/// the width of the truncated delta function sin(k_max u)/(pi u), u = r - chi_*, that zero
/// thickness without damping leaves. For E the factor sin(k r_s)/k turns it into a
/// box-car from chi_* - r_s to chi_* + r_s with edges of width w. The functions with
/// p > 0 are broad, ~chi_*/l. The grid has
/// - a core chi_* +- (r_s + `core_widths` w) of Gauss-Legendre panels of width
///   `core_panel` min(w, pi/k_max), `nodes_per_panel` nodes each;
/// - outer panels from the core out to chi_* (1 -+ `outer_fraction`), each
///   `outer_growth` times wider than the one before, for the broad p > 0 functions of
///   low l;
/// - for a truncated delta (the transfer amplitude at k_max, D(k_max)
///   exp(-(sigma_chi k_max)^2 / 2), above 1e-3: no damping and a thin shell) no outer
///   panels (their coarse nodes would alias its 1/u tail) and a core half-width
///   L = r_s + max(`core_widths` w, `truncated_phase` / k_max) rounded up to
///   k_max L = (n + 1/2) pi, where the sine integral's leading tail cos(k_max L)/(k_max L)
///   vanishes.
///
/// The defaults are the measured choice of the module docs.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct RadialGridSpec {
    /// The core reaches r_s + this times w on either side of chi_*.
    pub core_widths: f64,
    /// Core panel width in units of min(w, pi/k_max).
    pub core_panel: f64,
    /// Gauss-Legendre nodes per panel (1..=32).
    pub nodes_per_panel: usize,
    /// The outer region reaches chi_* (1 -+ this), in [0, 0.9]; 0 for none.
    pub outer_fraction: f64,
    /// Width ratio of successive outer panels (> 1).
    pub outer_growth: f64,
    /// Truncated delta only: the core half-width is L = r_s + max(`core_widths` w,
    /// this / k_max), rounded up to k_max L = (n + 1/2) pi; the sine-integral tail left
    /// out is then O(1/(k_max L)^2).
    pub truncated_phase: f64,
}

impl Default for RadialGridSpec {
    fn default() -> Self {
        Self {
            core_widths: 6.0,
            core_panel: 3.0,
            nodes_per_panel: 6,
            outer_fraction: 0.5,
            outer_growth: 1.5,
            truncated_phase: 20.0 * std::f64::consts::PI,
        }
    }
}

/// Gauss-Legendre rules on [-6, 6] sigma with the Gaussian in the weights.
pub(super) struct ChiPlan {
    /// (number of nodes, nodes u in units of sigma, normalized weights).
    rules: Vec<(usize, Vec<f64>, Vec<f64>)>,
    sigma: f64,
    /// Multiplier on the node count (1 in production; tests refine with it).
    scale: f64,
}

impl ChiPlan {
    /// Nodes needed at k (see the module docs).
    pub(super) fn nodes_needed(&self, k: f64) -> usize {
        let theta = 6.0 * k * self.sigma;
        (self.scale * (0.5 * theta + 24.0 + 3.0 * theta.cbrt())).ceil() as usize
    }

    pub(super) fn new(sigma: f64, k_max: f64) -> Self {
        Self::with_scale(sigma, k_max, 1.0)
    }

    pub(super) fn with_scale(sigma: f64, k_max: f64, scale: f64) -> Self {
        if sigma == 0.0 {
            return Self {
                rules: vec![(1, vec![0.0], vec![1.0])],
                sigma,
                scale,
            };
        }
        let mut plan = Self {
            rules: Vec::new(),
            sigma,
            scale,
        };
        let top = plan.nodes_needed(k_max);
        let mut n = 24usize;
        loop {
            let gl = GaussLegendre::new(n);
            let u: Vec<f64> = gl.nodes.iter().map(|x| x * CHI_HALF_WIDTH_SIGMAS).collect();
            let mut w: Vec<f64> = gl
                .weights
                .iter()
                .zip(&u)
                .map(|(wi, ui)| wi * (-0.5 * ui * ui).exp())
                .collect();
            let s: f64 = w.iter().sum();
            for wi in &mut w {
                *wi /= s;
            }
            plan.rules.push((n, u, w));
            if n >= top {
                break;
            }
            // Ladder step of ~12%: at most that many extra nodes per k.
            n = (n + n / 8).max(n + 1);
        }
        plan
    }

    /// The smallest rule with at least the nodes needed at k.
    pub(super) fn rule(&self, k: f64) -> (&[f64], &[f64]) {
        let need = if self.sigma == 0.0 {
            1
        } else {
            self.nodes_needed(k)
        };
        let r = self
            .rules
            .iter()
            .find(|r| r.0 >= need)
            .unwrap_or_else(|| &self.rules[self.rules.len() - 1]);
        (&r.1, &r.2)
    }
}

/// Highest l with j_l(x) above ~1e-24 of its envelope (Airy decay past the turning point:
/// j_l ~ exp(-(2/3) t^(3/2)) with t = (nu - x) / (x/2)^(1/3); at nu - x = 16 x^(1/3),
/// t = 20 and the factor is e^-60).
pub(super) fn l_top(x: f64) -> usize {
    (x + 16.0 * x.cbrt() + 16.0).ceil() as usize
}

impl ShellModel {
    /// The k quadrature for `lmax` (see the module docs for the rule).
    ///
    /// # Errors
    /// [`Error::OutOfRange`] for lmax outside [2, 5000] or an invalid `spec`.
    pub fn k_grid(&self, lmax: usize, spec: &KGridSpec) -> Result<KGrid> {
        Self::check_lmax(lmax)?;
        let bad = |f: &str, v: f64, a: &str| Err(Error::out_of_range(Location::Builtin, f, v, a));
        if !(2..=32).contains(&spec.nodes_per_panel) {
            return bad("nodes_per_panel", spec.nodes_per_panel as f64, "2..=32");
        }
        for (f, v) in [
            ("damping_cut", spec.damping_cut),
            ("thickness_cut", spec.thickness_cut),
            ("undamped_factor", spec.undamped_factor),
            ("undamped_floor_mpc", spec.undamped_floor_mpc),
        ] {
            if !(v.is_finite() && v > 0.0) {
                return bad(f, v, "> 0");
            }
        }
        let chi = self.p.chi_star_mpc;
        let sigma = self.p.sigma_chi_mpc;
        let k_l = (lmax as f64 + 0.5) / chi;
        let k_thick = if sigma > 0.0 {
            (k_l * k_l + (spec.thickness_cut / sigma).powi(2)).sqrt()
        } else {
            f64::INFINITY
        };
        let (k_max, cutoff) = if let Some(k) = spec.k_max_mpc {
            if !(k.is_finite() && k > 0.0) {
                return bad("k_max_mpc", k, "> 0");
            }
            (k, KCutoff::Override)
        } else if let Some(kd) = self.p.k_damping_mpc {
            let kd_cut = spec.damping_cut * kd;
            if kd_cut <= k_thick {
                (kd_cut, KCutoff::Damping)
            } else {
                (k_thick, KCutoff::Thickness)
            }
        } else {
            let k_m = (spec.undamped_factor * k_l).max(spec.undamped_floor_mpc);
            if k_m <= k_thick {
                (k_m, KCutoff::Multipole)
            } else {
                (k_thick, KCutoff::Thickness)
            }
        };
        let width = std::f64::consts::PI / (chi + CHI_HALF_WIDTH_SIGMAS * sigma);
        let n_panels = (k_max / width).ceil().max(1.0) as usize;
        let h = k_max / n_panels as f64;
        let gl = GaussLegendre::new(spec.nodes_per_panel);
        let mut k = Vec::with_capacity(n_panels * gl.len());
        let mut w = Vec::with_capacity(n_panels * gl.len());
        for p in 0..n_panels {
            let lo = p as f64 * h;
            for (x, wi) in gl.nodes.iter().zip(&gl.weights) {
                k.push(lo + 0.5 * h * (1.0 + x));
                w.push(0.5 * h * wi);
            }
        }
        Ok(KGrid {
            k,
            w,
            k_max,
            cutoff,
        })
    }

    /// The kernel width w = sqrt(sigma_chi^2 + 2/k_D^2 + 1/k_max^2) in Mpc (see
    /// [`RadialGridSpec`]).
    pub fn kernel_width_mpc(&self, k_max: f64) -> f64 {
        let sd2 = self.p.k_damping_mpc.map_or(0.0, |kd| 2.0 / (kd * kd));
        (self.p.sigma_chi_mpc.powi(2) + sd2 + 1.0 / (k_max * k_max)).sqrt()
    }

    /// A radial quadrature for the bispectrum's Integral r^2 dr that matches the k grid
    /// `grid` (see [`RadialGridSpec`]); nodes increasing, weights include r^2.
    ///
    /// # Errors
    /// [`Error::OutOfRange`] for an invalid `spec` or a grid without a positive k_max.
    pub fn radial_grid(&self, grid: &KGrid, spec: &RadialGridSpec) -> Result<RadialGrid> {
        let bad = |f: &str, v: f64, a: &str| Err(Error::out_of_range(Location::Builtin, f, v, a));
        if !(grid.k_max.is_finite() && grid.k_max > 0.0) {
            return bad("k_max", grid.k_max, "> 0");
        }
        if !(spec.core_widths.is_finite() && spec.core_widths > 0.0) {
            return bad("core_widths", spec.core_widths, "> 0");
        }
        if !(spec.core_panel.is_finite() && spec.core_panel > 0.0) {
            return bad("core_panel", spec.core_panel, "> 0");
        }
        if !(1..=32).contains(&spec.nodes_per_panel) {
            return bad("nodes_per_panel", spec.nodes_per_panel as f64, "1..=32");
        }
        if !(0.0..=0.9).contains(&spec.outer_fraction) {
            return bad("outer_fraction", spec.outer_fraction, "0 <= f <= 0.9");
        }
        if spec.outer_fraction > 0.0 && !(spec.outer_growth.is_finite() && spec.outer_growth > 1.0)
        {
            return bad("outer_growth", spec.outer_growth, "> 1");
        }
        if !(spec.truncated_phase.is_finite() && spec.truncated_phase >= 0.0) {
            return bad("truncated_phase", spec.truncated_phase, ">= 0");
        }
        let chi = self.p.chi_star_mpc;
        let w = self.kernel_width_mpc(grid.k_max);
        let h = spec.core_panel * w.min(std::f64::consts::PI / grid.k_max);
        // The E kernels sit at chi_* +- r_s (sin(k r_s) shifts j_l(k chi) by +- r_s).
        let mut half = self.p.sound_horizon_mpc + spec.core_widths * w;
        // Truncated delta (no damping, zero thickness): end the core where the sine
        // integral's tail, cos(k_max L) / (k_max L), vanishes, and add no outer panels
        // (their coarse nodes would alias the 1/u tail).
        let sk = self.p.sigma_chi_mpc * grid.k_max;
        let truncated = self.damping_factor(grid.k_max) * (-0.5 * sk * sk).exp() > 1e-3;
        if truncated {
            let pi = std::f64::consts::PI;
            let phase = grid.k_max * self.p.sound_horizon_mpc
                + (spec.core_widths * w * grid.k_max).max(spec.truncated_phase);
            half = ((phase / pi).floor() + 0.5) * pi / grid.k_max;
        }
        let outer_fraction = if truncated { 0.0 } else { spec.outer_fraction };
        let lo = (chi - half).max(0.05 * chi);
        let hi = chi + half;
        let n_core = ((hi - lo) / h).ceil().max(1.0) as usize;
        let hc = (hi - lo) / n_core as f64;
        // Panel edges: geometric below the core, uniform in it, geometric above.
        let outer = |start: f64, end: f64| -> Vec<f64> {
            // Edges from `start` towards `end` (exclusive of start).
            let mut edges = Vec::new();
            let dir = (end - start).signum();
            let mut width = hc;
            let mut e = start;
            while (end - e) * dir > 0.0 {
                width *= spec.outer_growth;
                e += dir * width;
                if (end - e) * dir < 0.5 * width {
                    e = end;
                }
                edges.push(e);
            }
            edges
        };
        let mut edges: Vec<f64> = Vec::new();
        if outer_fraction > 0.0 && chi * (1.0 - outer_fraction) < lo {
            let mut below = outer(lo, chi * (1.0 - outer_fraction));
            below.reverse();
            edges.extend(below);
        }
        edges.extend((0..=n_core).map(|i| lo + i as f64 * hc));
        if outer_fraction > 0.0 && chi * (1.0 + outer_fraction) > hi {
            edges.extend(outer(hi, chi * (1.0 + outer_fraction)));
        }
        let gl = GaussLegendre::new(spec.nodes_per_panel);
        let mut r = Vec::with_capacity(edges.len() * gl.len());
        let mut wr = Vec::with_capacity(edges.len() * gl.len());
        for e in edges.windows(2) {
            let half = 0.5 * (e[1] - e[0]);
            let mid = 0.5 * (e[1] + e[0]);
            for (x, wi) in gl.nodes.iter().zip(&gl.weights) {
                let ri = mid + half * x;
                r.push(ri);
                wr.push(half * wi * ri * ri);
            }
        }
        Ok(RadialGrid { r, w: wr })
    }
}
