//! Transfer-function tables: the common input of the CMB bispectrum engine, whatever
//! model made them (the finite-thickness shell or the line-of-sight Boltzmann solver).
//!
//! For a field X (temperature T or E polarization), Delta^X_l(k) is the transfer from the
//! primordial potential Phi(k) to a_lm: a^X_lm = 4 pi (-i)^l Integral d^3k / (2 pi)^3
//! Phi(k) Delta^X_l(k) Y*_lm(k^). Then C^XY_l = (2/pi) Integral k^2 dk P_Phi(k)
//! Delta^X_l(k) Delta^Y_l(k) (dimensionless, Delta T / T). The table stores Delta at every
//! l from 0 to l_max (rows with l < 2 are zero) on a k grid with quadrature weights, k in
//! 1/Mpc, laid out k-major so that the l loop is contiguous.

use crate::cosmology::Primordial;

/// A CMB field.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize)]
pub enum Field {
    /// Temperature.
    T,
    /// E-mode polarization.
    E,
}

/// Delta^X_l(k) for l = 0..=lmax on a k grid.
#[derive(Debug, Clone)]
pub struct TransferTable {
    k: Vec<f64>,
    wk: Vec<f64>,
    lmax: usize,
    /// Per field, k-major: data[f][ik * (lmax + 1) + l].
    data: Vec<Vec<f64>>,
    fields: Vec<Field>,
    label: String,
    k_truncated: bool,
}

impl TransferTable {
    /// Marks the table as ending at a k where the transfer functions are not yet
    /// negligible (a Boltzmann table cut for the C_l it serves): the bispectrum engine
    /// then tapers the top of the k range in its radial integrals.
    pub fn mark_k_truncated(mut self) -> Self {
        self.k_truncated = true;
        self
    }

    /// See [`Self::mark_k_truncated`].
    pub fn k_truncated(&self) -> bool {
        self.k_truncated
    }

    /// Assembles a table. `data[f]` must hold `k.len() * (lmax + 1)` values, k-major.
    pub fn new(
        label: &str,
        k: Vec<f64>,
        wk: Vec<f64>,
        lmax: usize,
        fields: Vec<Field>,
        data: Vec<Vec<f64>>,
    ) -> Self {
        assert_eq!(k.len(), wk.len());
        assert_eq!(fields.len(), data.len());
        for d in &data {
            assert_eq!(d.len(), k.len() * (lmax + 1));
        }
        Self {
            k,
            wk,
            lmax,
            data,
            fields,
            label: label.to_string(),
            k_truncated: false,
        }
    }

    /// Model name.
    pub fn label(&self) -> &str {
        &self.label
    }
    /// k nodes, 1/Mpc.
    pub fn k(&self) -> &[f64] {
        &self.k
    }
    /// Quadrature weights for Integral dk.
    pub fn weights(&self) -> &[f64] {
        &self.wk
    }
    /// Highest l.
    pub fn lmax(&self) -> usize {
        self.lmax
    }
    /// Fields present.
    pub fn fields(&self) -> &[Field] {
        &self.fields
    }
    /// Index of a field.
    pub fn field_index(&self, f: Field) -> Option<usize> {
        self.fields.iter().position(|&x| x == f)
    }
    /// Delta^X_l at all l for k node `ik` (slice of length lmax + 1).
    pub fn row(&self, field: usize, ik: usize) -> &[f64] {
        let n = self.lmax + 1;
        &self.data[field][ik * n..(ik + 1) * n]
    }
    /// Delta^X_l(k_ik).
    pub fn get(&self, field: usize, l: usize, ik: usize) -> f64 {
        self.data[field][ik * (self.lmax + 1) + l]
    }

    /// C^XY_l for l = 0..=lmax (dimensionless).
    pub fn cl(&self, prim: &Primordial, fx: usize, fy: usize) -> Vec<f64> {
        let n = self.lmax + 1;
        let mut c = vec![0.0; n];
        for (ik, (&k, &w)) in self.k.iter().zip(&self.wk).enumerate() {
            let a = 2.0 / std::f64::consts::PI * w * k * k * prim.p_phi(k);
            let (rx, ry) = (self.row(fx, ik), self.row(fy, ik));
            for l in 0..n {
                c[l] += a * rx[l] * ry[l];
            }
        }
        c
    }
}

/// Radial quadrature for the bispectrum's line-of-sight integral
/// Integral r^2 dr: nodes r_i (Mpc) and weights w_i that include r^2.
#[derive(Debug, Clone, PartialEq)]
pub struct RadialGrid {
    /// Nodes, Mpc.
    pub r: Vec<f64>,
    /// Weights including r^2, Mpc^3.
    pub w: Vec<f64>,
}

impl RadialGrid {
    /// Gauss-Legendre panels: `n_panels` panels of `nodes` points each on [lo, hi].
    pub fn panels(lo: f64, hi: f64, n_panels: usize, nodes: usize) -> Self {
        let gl = crate::numerics::GaussLegendre::new(nodes);
        let mut r = Vec::new();
        let mut w = Vec::new();
        let d = (hi - lo) / n_panels as f64;
        for p in 0..n_panels {
            let (x, ww) = gl.mapped(lo + p as f64 * d, lo + (p + 1) as f64 * d);
            for (xi, wi) in x.into_iter().zip(ww) {
                r.push(xi);
                w.push(wi * xi * xi);
            }
        }
        Self { r, w }
    }

    /// Concatenates grids over disjoint ranges.
    pub fn join(mut self, other: RadialGrid) -> Self {
        self.r.extend(other.r);
        self.w.extend(other.w);
        self
    }

    /// Number of nodes.
    pub fn len(&self) -> usize {
        self.r.len()
    }

    /// True when empty.
    pub fn is_empty(&self) -> bool {
        self.r.is_empty()
    }
}
