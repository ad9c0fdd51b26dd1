//! Integration of one Fourier mode through its phases (tight coupling, full hierarchy,
//! radiation streaming), writing the line-of-sight sources at the time nodes, and the
//! table of sources on the mode k grid with its cubic splines in k.

use rayon::prelude::*;

use super::dopri::{Dopri, Tolerances};
use super::equations::{Layout, Mode, Phase};
use super::grids::{Nodes, Plan};
use super::timeline::{ETA_MIN, Timeline};
use crate::error::{Error, Result};

/// What one mode integration returns.
#[derive(Debug, Clone)]
pub(crate) struct ModeResult {
    /// Sources at the first `n_nodes` nodes, node-major: [node * 4 + s].
    pub sources: Vec<f64>,
    /// Total matter density contrast today (synchronous gauge), per unit Phi.
    pub delta_m: f64,
    /// Accepted steps.
    pub steps: usize,
}

/// Per-worker scratch.
pub(crate) struct Workspace {
    ode: Dopri,
    y: Vec<f64>,
    dy: Vec<f64>,
}

impl Workspace {
    pub fn new(lay: Layout) -> Self {
        let n = lay.len(Phase::Full);
        Self {
            ode: Dopri::new(n),
            y: vec![0.0; n],
            dy: vec![0.0; n],
        }
    }
}

/// Conformal time at which tight coupling ends for wavenumber k: the first time at which
/// max(k, aH) tau_c reaches eps (bisection in ln eta; the ratio grows monotonically until
/// reionization), and no later than `latest`.
fn tight_coupling_end(tl: &Timeline, k: f64, eps: f64, earliest: f64, latest: f64) -> f64 {
    let f = |eta: f64| {
        let b = tl.at(eta);
        k.max(b.hub) / b.kappa - eps
    };
    if f(latest) < 0.0 {
        return latest;
    }
    if f(earliest) >= 0.0 {
        return earliest;
    }
    let (mut lo, mut hi) = (earliest.ln(), latest.ln());
    for _ in 0..60 {
        let mid = 0.5 * (lo + hi);
        if f(mid.exp()) < 0.0 {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    lo.exp()
}

/// Integrates one mode from deep in radiation domination to today.
#[allow(clippy::too_many_arguments)] // internal: the mode's inputs
#[inline(always)]
pub(crate) fn solve_mode(
    k: f64,
    tl: &Timeline,
    nodes: &Nodes,
    n_nodes: usize,
    plan: &Plan,
    lay: Layout,
    f_b: f64,
    ws: &mut Workspace,
) -> Result<ModeResult> {
    let mut sources = vec![0.0; 4 * n_nodes];
    let t_out = &nodes.eta[..n_nodes];
    let (delta_m, steps) = integrate_mode(
        k,
        tl,
        nodes,
        t_out,
        plan,
        lay,
        f_b,
        ws,
        |mode, phase, i, t, y, dy| {
            let s = mode.sources(phase, t, y, dy, nodes.g[i], nodes.emt[i]);
            sources[4 * i..4 * i + 4].copy_from_slice(&s);
        },
    )?;
    Ok(ModeResult {
        sources,
        delta_m,
        steps,
    })
}

/// Integrates one mode from deep in radiation domination to today through its phases,
/// calling `record(mode, phase, i, eta, y, scratch)` at every output time `t_out[i]`
/// (increasing); returns the matter density contrast today and the accepted steps.
#[allow(clippy::too_many_arguments)] // internal: the mode's inputs
#[inline(always)]
pub(crate) fn integrate_mode<R>(
    k: f64,
    tl: &Timeline,
    nodes: &Nodes,
    t_out: &[f64],
    plan: &Plan,
    lay: Layout,
    f_b: f64,
    ws: &mut Workspace,
    mut record: R,
) -> Result<(f64, usize)>
where
    R: FnMut(&Mode, Phase, usize, f64, &[f64], &mut [f64]),
{
    let mode = Mode::new(k, tl, lay);
    let eta0 = tl.eta0();
    let tol = Tolerances {
        rtol: plan.rtol,
        atol: plan.atol,
        max_steps: 5_000_000,
    };
    let eta_ini = (0.01 / k).clamp(2.0 * ETA_MIN, 0.1);
    let first_node = nodes.eta.first().copied().unwrap_or(eta0);
    let eta_tca = tight_coupling_end(tl, k, plan.eps_tca, eta_ini, first_node.max(eta_ini));
    let eta_rsa = (plan.k_eta_rsa / k).max(nodes.eta_rec_end).min(eta0);
    let Workspace { ode, y, dy } = ws;
    ode.steps = 0;
    let fail = |m: String| Error::Numerical {
        stage: "boltzmann mode integration",
        message: format!("k = {k} 1/Mpc: {m}"),
    };

    let mut run = |phase: Phase,
                   t0: f64,
                   t1: f64,
                   h0: f64,
                   y: &mut [f64],
                   dy: &mut [f64],
                   ode: &mut Dopri|
     -> Result<()> {
        let n = lay.len(phase);
        let start = t_out.partition_point(|&x| x <= t0);
        let mut next = start;
        let ys = &mut y[..n];
        let dys = &mut dy[..n];
        ode.integrate(
            |t, yy, d| mode.rhs(phase, t, yy, d),
            t0,
            t1,
            ys,
            h0,
            tol,
            t_out,
            |t, yy| {
                record(&mode, phase, next, t, yy, dys);
                next += 1;
            },
        )
        .map_err(fail)
    };

    // Tight coupling.
    let nt = lay.len(Phase::Tight);
    mode.initial(eta_ini, &mut y[..nt]);
    run(Phase::Tight, eta_ini, eta_tca, 0.05 * eta_ini, y, dy, ode)?;
    // Full hierarchies.
    mode.leave_tight(eta_tca, y);
    let b = tl.at(eta_tca);
    let h_full = 0.5 / ((1.0 + b.r) * b.kappa + k);
    run(Phase::Full, eta_tca, eta_rsa, h_full, y, dy, ode)?;
    // Radiation streaming.
    if eta_rsa < eta0 {
        let h = ode.last_h.max(1e-3 * eta_rsa);
        run(Phase::Streaming, eta_rsa, eta0, h, y, dy, ode)?;
    }
    Ok((mode.delta_matter(y, f_b), ode.steps))
}

/// Sources on the mode k grid, with natural cubic splines in k per node and source.
#[derive(Debug, Clone)]
pub(crate) struct SourceTable {
    /// Mode wavenumbers, increasing.
    pub k: Vec<f64>,
    /// Number of valid modes (a prefix of `k`) per node.
    pub valid: Vec<usize>,
    /// Values [(node * 4 + s) * nk + ik].
    pub val: Vec<f64>,
    /// Spline second derivatives, same layout.
    pub m2: Vec<f64>,
    /// delta_m today per mode.
    pub delta_m: Vec<f64>,
    /// Total accepted steps of all modes.
    pub steps: usize,
}

/// [`solve_mode`] compiled with AVX2 (wider vectors for the stage sums and the hierarchy;
/// no fused multiply-adds, so the same bits as the baseline build).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[allow(clippy::too_many_arguments)] // solve_mode's arguments
#[allow(unsafe_code)] // audited: only called after detecting AVX2
unsafe fn solve_mode_avx2(
    k: f64,
    tl: &Timeline,
    nodes: &Nodes,
    n_nodes: usize,
    plan: &Plan,
    lay: Layout,
    f_b: f64,
    ws: &mut Workspace,
) -> Result<ModeResult> {
    solve_mode(k, tl, nodes, n_nodes, plan, lay, f_b, ws)
}

/// Solves all modes in parallel (or serially) and tabulates their sources.
#[allow(clippy::too_many_arguments)] // internal: the solve's inputs
pub(crate) fn solve_modes(
    ks: &[f64],
    tl: &Timeline,
    nodes: &Nodes,
    plan: &Plan,
    lay: Layout,
    f_b: f64,
    with_sources: bool,
    parallel: bool,
) -> Result<SourceTable> {
    let nk = ks.len();
    #[allow(unsafe_code)] // audited: the AVX2 copy is called after detecting AVX2
    let job = |ws: &mut Workspace, k: f64| {
        let n = if with_sources {
            nodes.needed(k, plan, 2.0 * plan.ode_dk_high)
        } else {
            0
        };
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU supports AVX2 (checked just above), the only
                // requirement of calling a function compiled with it.
                return unsafe { solve_mode_avx2(k, tl, nodes, n, plan, lay, f_b, ws) };
            }
        }
        solve_mode(k, tl, nodes, n, plan, lay, f_b, ws)
    };
    // Largest k first: they cost most, which balances the parallel queue.
    let order: Vec<usize> = (0..nk).rev().collect();
    let results: Vec<(usize, Result<ModeResult>)> = if parallel {
        order
            .par_iter()
            .with_max_len(1)
            .map_init(|| Workspace::new(lay), |ws, &i| (i, job(ws, ks[i])))
            .collect()
    } else {
        let mut ws = Workspace::new(lay);
        order.iter().map(|&i| (i, job(&mut ws, ks[i]))).collect()
    };
    let nn = nodes.len();
    let mut val = vec![0.0; nn * 4 * nk];
    let mut delta_m = vec![0.0; nk];
    let mut valid = vec![0usize; nn];
    let mut steps = 0;
    for (i, r) in results {
        let r = r?;
        steps += r.steps;
        delta_m[i] = r.delta_m;
        let n = r.sources.len() / 4;
        for node in 0..n {
            for s in 0..4 {
                val[(node * 4 + s) * nk + i] = r.sources[node * 4 + s];
            }
            valid[node] = valid[node].max(i + 1);
        }
    }
    let mut m2 = vec![0.0; val.len()];
    if with_sources {
        // One tridiagonal factorization per distinct valid length.
        let mut lengths: Vec<usize> = valid.clone();
        lengths.sort_unstable();
        lengths.dedup();
        let facs: Vec<(usize, SplineFactor)> = lengths
            .iter()
            .filter(|&&len| len >= 3)
            .map(|&len| (len, SplineFactor::new(&ks[..len])))
            .collect();
        let per_node = |(node, m): (usize, &mut [f64])| {
            let len = valid[node];
            if let Some((_, fac)) = facs.iter().find(|f| f.0 == len) {
                for s in 0..4 {
                    let off = (node * 4 + s) * nk;
                    fac.solve(&val[off..off + len], &mut m[s * nk..s * nk + len]);
                }
            }
        };
        if parallel {
            m2.par_chunks_mut(4 * nk)
                .enumerate()
                .with_min_len(16)
                .for_each(per_node);
        } else {
            m2.chunks_mut(4 * nk).enumerate().for_each(per_node);
        }
    }
    Ok(SourceTable {
        k: ks.to_vec(),
        valid,
        val,
        m2,
        delta_m,
        steps,
    })
}

/// LU factors of the natural cubic spline system on one grid.
struct SplineFactor {
    x: Vec<f64>,
    c: Vec<f64>,
    denom: Vec<f64>,
}

impl SplineFactor {
    fn new(x: &[f64]) -> Self {
        let n = x.len();
        let mut c = vec![0.0; n];
        let mut denom = vec![1.0; n];
        for i in 1..n - 1 {
            let h0 = x[i] - x[i - 1];
            let h1 = x[i + 1] - x[i];
            let a = h0 / 6.0;
            let b = (h0 + h1) / 3.0;
            let d = b - a * c[i - 1];
            denom[i] = d;
            c[i] = h1 / 6.0 / d;
        }
        Self {
            x: x.to_vec(),
            c,
            denom,
        }
    }

    fn solve(&self, y: &[f64], m: &mut [f64]) {
        let n = y.len();
        let x = &self.x;
        let mut d = vec![0.0; n];
        for i in 1..n - 1 {
            let h0 = x[i] - x[i - 1];
            let h1 = x[i + 1] - x[i];
            let r = (y[i + 1] - y[i]) / h1 - (y[i] - y[i - 1]) / h0;
            d[i] = (r - h0 / 6.0 * d[i - 1]) / self.denom[i];
        }
        m[0] = 0.0;
        m[n - 1] = 0.0;
        for i in (1..n - 1).rev() {
            m[i] = d[i] - self.c[i] * m[i + 1];
        }
    }
}

impl SourceTable {
    /// Interval index and weights of k for the spline evaluation.
    #[inline]
    pub fn locate(&self, k: f64) -> (usize, f64, f64, f64) {
        let n = self.k.len();
        let j = self.k.partition_point(|&x| x <= k).clamp(1, n - 1) - 1;
        let h = self.k[j + 1] - self.k[j];
        let a = (self.k[j + 1] - k) / h;
        let b = 1.0 - a;
        (j, a, b, h)
    }

    /// Fills `out[node * 4 + s]` with the four sources at k for the first `n` nodes.
    pub fn eval_into(&self, k: f64, n: usize, out: &mut [f64]) {
        let (j, a, b, h) = self.locate(k);
        let nk = self.k.len();
        debug_assert!(
            self.valid[..n].iter().all(|&v| v >= j + 2),
            "k = {k} beyond a node's modes"
        );
        let ca = (a * a * a - a) * h * h / 6.0;
        let cb = (b * b * b - b) * h * h / 6.0;
        for node in 0..n {
            for s in 0..4 {
                let off = (node * 4 + s) * nk;
                out[node * 4 + s] = a * self.val[off + j]
                    + b * self.val[off + j + 1]
                    + ca * self.m2[off + j]
                    + cb * self.m2[off + j + 1];
            }
        }
    }
}
