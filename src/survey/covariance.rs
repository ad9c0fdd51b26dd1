//! Covariance models of the survey probes.
//!
//! `gaussian`: the Gaussian (disconnected) covariance of P and B, P and B independent
//! (the idealized model; Scoccimarro, Sefusatti & Zaldarriaga 2004).
//!
//! `realistic` (the default): the Gaussian covariance plus (a) and (b).
//!
//! (a) A theoretical-error covariance for P and for B (Baldauf, Mirbabayi, Simonovic &
//! Zaldarriaga 2016): C_e(x, x') = E(x) E(x') rho(k, k'), the envelope E of the neglected
//! next-order (one-loop) terms, correlated over a coherence length Delta k:
//! rho = exp[-(k - k')^2 / (2 Delta k^2)]. Envelopes (from memory, for tree-level models,
//! D normalized to 1 today, k_E = 0.31 h/Mpc, Delta k = 0.1 h/Mpc):
//! E_P(k, mu) = D(z)^2 (k / k_E)^1.8 P_g(k, mu) on every tracer pair, and
//! E_B(t) = 3 D(z)^2 (k_t / k_E)^1.8 |B_g,tree(t)|, k_t = (k1 + k2 + k3) / 3. P is
//! correlated in k, B in k_t and over the triangle shape through bilinear hats on
//! (k3/k1, k2/k1), 5 x 3 nodes (a correlation length of a quarter of the shape range; a
//! choice of this engine).
//!
//! (b) The leading P-B cross-covariance Cov[P(k), B_123] = 2 P(k) B_123 / N_k
//! (delta_k,k1 + 2 perms) (Sefusatti et al. 2006). It is what a bispectrum estimate
//! B^ = B [1 + Sum_i eps(k_i)] + eta has when eps(k) = delta P_0^(k) / P_0(k) is the
//! fluctuation of the measured shell-averaged power P_0 = <P_t(k, mu)>_mu of the
//! bispectrum tracer at its sides. For P+B the whitened bispectrum
//! B~ = B^ - B_fid Sum_i eps^(k_i) (a fixed linear map of the data, so no information is
//! lost or gained) has no covariance with P^; its derivatives are
//! d B - B_fid Sum_i d ln P_0(k_i), and P+B = F_P + F_B~. For B alone the eps are
//! nuisances with their Gaussian prior, marginalized jointly over k cells (see
//! [`crate::survey::bispectrum`]). The P theoretical-error modes are not propagated into
//! B~.
//!
//! **Low rank.** rho is written as a sum over nodes kappa_a spaced Delta k / 2:
//! rho(k, k') = w Sum_a u_a(k) u_a(k'), u_a = exp[-(k - kappa_a)^2 / Delta k^2],
//! w = h / (Delta k sqrt(pi / 2)) (the convolution of two Gaussians). Then
//! C = C_G + U W U^T and, by the Woodbury identity,
//! F = D^T C^-1 D = F_G - A^T (W^-1 + U^T C_G^-1 U)^-1 A, A = U^T C_G^-1 D:
//! the engine accumulates F_G, A and S = U^T C_G^-1 U as continuum integrals and never
//! forms a matrix over modes or triangles. This equals marginalizing over one amplitude
//! per node with a Gaussian prior of variance w.

use serde::{Deserialize, Serialize};

/// Which covariance the survey Fisher uses.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize, clap::ValueEnum)]
#[serde(rename_all = "lowercase")]
pub enum CovarianceModel {
    /// Gaussian covariance, P and B independent (the idealized model).
    Gaussian,
    /// Gaussian plus the theoretical error and the P-B cross-covariance (the default).
    #[default]
    Realistic,
}

impl CovarianceModel {
    /// Output label.
    pub fn label(self) -> &'static str {
        match self {
            CovarianceModel::Gaussian => "gaussian",
            CovarianceModel::Realistic => "realistic",
        }
    }

    /// A one-line description for output notes.
    pub fn describe(self) -> &'static str {
        match self {
            CovarianceModel::Gaussian => {
                "covariance: gaussian (Gaussian P and B covariance, P-B cross-covariance neglected, no theoretical error)"
            }
            CovarianceModel::Realistic => {
                "covariance: realistic (Gaussian + theoretical error of the tree-level models, Baldauf et al. 2016, coherence 0.1 h/Mpc, + leading P-B cross-covariance at first order)"
            }
        }
    }
}

/// The theoretical-error envelope and its coherence (internal units, 1/Mpc).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct TheoryError {
    /// k_E in 1/Mpc.
    pub k_e_mpc: f64,
    /// Power of k/k_E.
    pub index: f64,
    /// Amplitude of the P envelope relative to P_g.
    pub amp_p: f64,
    /// Amplitude of the B envelope relative to |B_g,tree|.
    pub amp_b: f64,
    /// Coherence length Delta k, 1/Mpc.
    pub coherence_mpc: f64,
}

impl TheoryError {
    /// The defaults of Baldauf et al. 2016 (from memory) for a Hubble parameter h.
    pub fn default_for(h: f64) -> Self {
        Self {
            k_e_mpc: 0.31 * h,
            index: 1.8,
            amp_p: 1.0,
            amp_b: 3.0,
            coherence_mpc: 0.1 * h,
        }
    }

    /// Relative envelope E / signal at wavenumber k (1/Mpc) for growth D (1 today).
    pub fn relative(&self, k: f64, d_norm0: f64) -> f64 {
        d_norm0 * d_norm0 * (k / self.k_e_mpc).powf(self.index)
    }
}

/// The node basis of the correlation rho.
#[derive(Debug, Clone)]
pub struct ErrorModes {
    nodes: Vec<f64>,
    width: f64,
    /// The prior variance w of every node amplitude.
    pub weight: f64,
}

/// Hat nodes on the triangle-shape coordinates x = k3 / k1 (5 nodes on [0, 1]) and
/// y = k2 / k1 (3 nodes on [1/2, 1]): bilinear hats, 15 shape modes.
const X_NODES: usize = 5;
const Y_NODES: usize = 3;

/// Number of shape modes of the bispectrum theoretical error.
pub const SHAPE_MODES: usize = X_NODES * Y_NODES;

impl ErrorModes {
    /// Nodes covering [k_lo - 3 Delta k, k_hi + 3 Delta k], spaced Delta k / 2.
    pub fn new(k_lo: f64, k_hi: f64, coherence: f64) -> Self {
        let h = 0.5 * coherence;
        let start = k_lo - 3.0 * coherence;
        let n = (((k_hi + 3.0 * coherence) - start) / h).ceil() as usize + 1;
        Self {
            nodes: (0..n).map(|i| start + i as f64 * h).collect(),
            width: coherence,
            weight: h / (coherence * (0.5 * std::f64::consts::PI).sqrt()),
        }
    }

    /// Number of nodes.
    pub fn len(&self) -> usize {
        self.nodes.len()
    }

    /// True without nodes.
    pub fn is_empty(&self) -> bool {
        self.nodes.is_empty()
    }

    /// Calls `f(a, u_a(k))` for the nodes where u_a(k) > 1e-12.
    pub fn for_each(&self, k: f64, mut f: impl FnMut(usize, f64)) {
        let reach = 5.3 * self.width;
        let h = self.nodes.get(1).map_or(1.0, |x| x - self.nodes[0]);
        let lo = ((k - reach - self.nodes[0]) / h).floor().max(0.0) as usize;
        let hi = (((k + reach - self.nodes[0]) / h).ceil().max(0.0) as usize).min(self.len());
        for a in lo..hi {
            let x = (k - self.nodes[a]) / self.width;
            f(a, (-x * x).exp());
        }
    }

    /// The correlation implied by the basis, w Sum_a u_a(k) u_a(k').
    pub fn rho(&self, k: f64, kp: f64) -> f64 {
        let mut s = 0.0;
        self.for_each(k, |a, u| {
            let x = (kp - self.nodes[a]) / self.width;
            s += u * (-x * x).exp();
        });
        self.weight * s
    }
}

/// Linear hats on `n` nodes over [lo, 1]: the two (node, weight) pairs at t.
fn hats_1d(t: f64, lo: f64, n: usize) -> [(usize, f64); 2] {
    let u = ((t - lo) / (1.0 - lo)).clamp(0.0, 1.0) * (n - 1) as f64;
    let i = (u.floor() as usize).min(n - 2);
    let f = u - i as f64;
    [(i, 1.0 - f), (i + 1, f)]
}

/// The bilinear shape hats of a triangle k1 >= k2 >= k3: (mode, value), four pairs that
/// sum to one.
pub fn shape_hats(k1: f64, k2: f64, k3: f64) -> [(usize, f64); 4] {
    let hx = hats_1d(k3 / k1, 0.0, X_NODES);
    let hy = hats_1d(k2 / k1, 0.5, Y_NODES);
    let mut out = [(0, 0.0); 4];
    for (a, &(ix, wx)) in hx.iter().enumerate() {
        for (b, &(iy, wy)) in hy.iter().enumerate() {
            out[2 * a + b] = (ix * Y_NODES + iy, wx * wy);
        }
    }
    out
}

/// Accumulated pieces of a Fisher matrix under C = C_G + U W U^T: the Gaussian part F
/// (n x n), the projections A = U^T C_G^-1 D (r x n) and S = U^T C_G^-1 U (r x r).
#[derive(Debug, Clone)]
pub struct Pieces {
    /// Parameters.
    pub n: usize,
    /// Error modes.
    pub r: usize,
    /// Gaussian Fisher, row-major n x n.
    pub f: Vec<f64>,
    /// A, row-major r x n.
    pub a: Vec<f64>,
    /// S, row-major r x r.
    pub s: Vec<f64>,
}

impl Pieces {
    /// Zeros.
    pub fn zeros(n: usize, r: usize) -> Self {
        Self {
            n,
            r,
            f: vec![0.0; n * n],
            a: vec![0.0; r * n],
            s: vec![0.0; r * r],
        }
    }

    /// Adds another set (same sizes).
    pub fn add(&mut self, o: &Pieces) {
        for (v, w) in [
            (&mut self.f, &o.f),
            (&mut self.a, &o.a),
            (&mut self.s, &o.s),
        ] {
            v.iter_mut().zip(w).for_each(|(x, y)| *x += y);
        }
    }

    /// Adds the contribution of one data point with Gaussian-weighted gradient
    /// projections: `v[i]` = E C_G^-1 d_i summed at this point, `e` = E^2 C_G^-1,
    /// spread over the modes with values `u` (sparse list).
    pub fn add_modes(&mut self, u: &[(usize, f64)], v: &[f64], e: f64) {
        let n = self.n;
        for &(a, ua) in u {
            for (i, &vi) in v.iter().enumerate() {
                self.a[a * n + i] += ua * vi;
            }
            for &(b, ub) in u {
                self.s[a * self.r + b] += ua * ub * e;
            }
        }
    }

    /// The Fisher matrix with the theoretical error: F - A^T (W^-1 + S)^-1 A (Woodbury).
    /// Without the error (or modes), F.
    pub fn fisher(&self, prior_var: f64, with_error: bool) -> Vec<f64> {
        let n = self.n;
        let mut out = self.f.clone();
        if !with_error || self.r == 0 {
            return out;
        }
        let r = self.r;
        let mut m = self.s.clone();
        for a in 0..r {
            m[a * r + a] += 1.0 / prior_var;
        }
        let sol = cholesky_solve(&m, r, &self.a, n);
        // out -= A^T sol.
        for a in 0..r {
            for i in 0..n {
                let ai = self.a[a * n + i];
                if ai == 0.0 {
                    continue;
                }
                for j in 0..n {
                    out[i * n + j] -= ai * sol[a * n + j];
                }
            }
        }
        // Symmetrize the rounding.
        for i in 0..n {
            for j in 0..i {
                let v = 0.5 * (out[i * n + j] + out[j * n + i]);
                out[i * n + j] = v;
                out[j * n + i] = v;
            }
        }
        out
    }
}

/// Solves M X = B for symmetric positive-definite M (r x r) and B (r x n) by Cholesky.
pub fn cholesky_solve(m: &[f64], r: usize, b: &[f64], n: usize) -> Vec<f64> {
    let mut l = vec![0.0; r * r];
    for i in 0..r {
        for j in 0..=i {
            let mut s = m[i * r + j];
            for k in 0..j {
                s -= l[i * r + k] * l[j * r + k];
            }
            if i == j {
                l[i * r + i] = s.max(1e-300).sqrt();
            } else {
                l[i * r + j] = s / l[j * r + j];
            }
        }
    }
    let mut x = b.to_vec();
    for c in 0..n {
        for i in 0..r {
            let mut s = x[i * n + c];
            for k in 0..i {
                s -= l[i * r + k] * x[k * n + c];
            }
            x[i * n + c] = s / l[i * r + i];
        }
        for i in (0..r).rev() {
            let mut s = x[i * n + c];
            for k in i + 1..r {
                s -= l[k * r + i] * x[k * n + c];
            }
            x[i * n + c] = s / l[i * r + i];
        }
    }
    x
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Solves a dense symmetric system by Gauss-Jordan (the oracle).
    fn dense_inverse(a: &[f64], n: usize) -> Vec<f64> {
        let mut m = a.to_vec();
        let mut inv = vec![0.0; n * n];
        for i in 0..n {
            inv[i * n + i] = 1.0;
        }
        for c in 0..n {
            let piv = m[c * n + c];
            for j in 0..n {
                m[c * n + j] /= piv;
                inv[c * n + j] /= piv;
            }
            for r in 0..n {
                if r != c {
                    let f = m[r * n + c];
                    for j in 0..n {
                        m[r * n + j] -= f * m[c * n + j];
                        inv[r * n + j] -= f * inv[c * n + j];
                    }
                }
            }
        }
        inv
    }

    /// A small binned P-like case: N bins, diagonal Gaussian covariance, 2 parameters,
    /// envelope E(k). Woodbury on the node basis equals the dense solve with
    /// C_G + E E^T rho_basis (exact identity), and the basis rho is within 2e-3 of the
    /// Gaussian kernel, so the dense solve with the exact kernel agrees to < 1%.
    #[test]
    fn woodbury_matches_dense_solve() {
        let nb = 60;
        let ks: Vec<f64> = (0..nb).map(|i| 0.01 + 0.005 * i as f64).collect();
        let coh = 0.05;
        let modes = ErrorModes::new(ks[0], ks[nb - 1], coh);
        for &k in &[0.02, 0.1, 0.2] {
            for &kp in &[0.02, 0.05, 0.11, 0.3] {
                let exact = (-(k - kp) * (k - kp) / (2.0 * coh * coh)).exp();
                assert!((modes.rho(k, kp) - exact).abs() < 2e-3, "{k} {kp}");
            }
        }
        let var: Vec<f64> = ks.iter().map(|k| 1e-2 * (1.0 + 10.0 * k)).collect();
        let d: Vec<[f64; 2]> = ks.iter().map(|k| [1.0 / k, k * k * 10.0]).collect();
        let env: Vec<f64> = ks.iter().map(|k| 0.3 * (k / 0.1).powf(1.8)).collect();
        let n = 2;
        let r = modes.len();
        let mut pieces = Pieces::zeros(n, r);
        for b in 0..nb {
            let ci = 1.0 / var[b];
            for i in 0..n {
                for j in 0..n {
                    pieces.f[i * n + j] += d[b][i] * ci * d[b][j];
                }
            }
            let mut u = Vec::new();
            modes.for_each(ks[b], |a, v| u.push((a, v)));
            let v: Vec<f64> = (0..n).map(|i| env[b] * ci * d[b][i]).collect();
            pieces.add_modes(&u, &v, env[b] * env[b] * ci);
        }
        let fast = pieces.fisher(modes.weight, true);
        for (label, rho) in [
            (
                "basis",
                Box::new(|a: f64, b: f64| modes.rho(a, b)) as Box<dyn Fn(f64, f64) -> f64>,
            ),
            (
                "exact",
                Box::new(move |a: f64, b: f64| (-(a - b) * (a - b) / (2.0 * coh * coh)).exp()),
            ),
        ] {
            let mut c = vec![0.0; nb * nb];
            for i in 0..nb {
                for j in 0..nb {
                    c[i * nb + j] = env[i] * env[j] * rho(ks[i], ks[j]);
                }
                c[i * nb + i] += var[i];
            }
            let ci = dense_inverse(&c, nb);
            let mut fd = vec![0.0; n * n];
            for p in 0..n {
                for q in 0..n {
                    for i in 0..nb {
                        for j in 0..nb {
                            fd[p * n + q] += d[i][p] * ci[i * nb + j] * d[j][q];
                        }
                    }
                }
            }
            let tol = if label == "basis" { 1e-8 } else { 1e-2 };
            for (x, y) in fast.iter().zip(&fd) {
                assert!((x / y - 1.0).abs() < tol, "{label}: woodbury {x} dense {y}");
            }
            // The theoretical error removes information.
            assert!(fd[0] < pieces.f[0] && fd[3] < pieces.f[3]);
        }
    }

    #[test]
    fn shape_hats_are_a_partition_of_unity() {
        for (k2, k3) in [(1.0, 1.0), (0.7, 0.3), (0.5, 0.5), (0.9, 0.05)] {
            let h = shape_hats(1.0, k2, k3);
            assert!((h.iter().map(|x| x.1).sum::<f64>() - 1.0).abs() < 1e-14);
            assert!(h.iter().all(|x| x.0 < SHAPE_MODES));
        }
    }
}
