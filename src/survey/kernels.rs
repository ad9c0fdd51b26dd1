//! The tree-level galaxy bispectrum of one tracer in redshift space, with every term
//! linear in f_NL, and its derivatives with respect to the parameters of a bin.
//!
//! B = Prod_i D_i { [2 Z1(k1) Z1(k2) Z2(k1, k2) P1 P2 + 2 perms] + Z1 Z1 Z1 M1 M2 M3 B_Phi }
//! plus the shot noise (A_P / nbar) Sum_i Z1(k_i)^2 D_i^2 P_i plus A_B / nbar^2, with
//! D_i = exp(-k_i^2 mu_i^2 sigma^2 / 2) the line-of-sight damping of each field (the
//! P_i / nbar shot-noise term is the power of the one field at k_i, damped by D_i^2; the
//! 1/nbar^2 term is undamped), and the redshift-space kernels (Scoccimarro, Couchman &
//! Frieman 1999; non-Gaussian terms as in Tellarini et al. 2016):
//!
//! Z1(k) = b1 + f_NL b_phi alpha(k) + f mu^2, alpha(k) = a_S (k/k_S)^Delta / M(k)
//! (see [`crate::survey::response`]);
//!
//! Z2(k1, k2) = b1 F2 + f mu^2 G2 + (f mu k / 2)[mu1/k1 Z1(k2) + mu2/k2 Z1(k1)] + b2/2
//! + b_s2 S2 + f_NL (b_phi_delta / 2)[alpha(k1) + alpha(k2)]
//! + f_NL (b_phi / 2) mu_12 [(k2/k1) alpha(k2) + (k1/k2) alpha(k1)].
//!
//! The last two terms of Z2 are the second-order non-Gaussian bias (the b_phi-delta term)
//! and the shift of the Lagrangian b_phi phi term, -b_phi Psi . grad phi (Giannantonio &
//! Porciani 2010; Baldauf, Seljak & Senatore 2011; Tellarini et al. 2016). Every Z1
//! inside Z2, including the one of the velocity term, carries Delta b.
//!
//! S2 = mu_12^2 - 1/3 (the b_s2 convention of [`crate::survey::bias`]). Kept at fiducial
//! f_NL = 0: the derivatives are exact there.

#![allow(clippy::needless_range_loop)] // index loops over sides and parameters

use crate::survey::layout::Layout;

/// Switches for the terms of the model (all on by default; the switches exist to measure
/// what each term does, and for the brute-force checks).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub struct TermSwitches {
    /// Delta b inside Z1 of Z2's velocity term (redshift space).
    pub rsd_velocity_bias: bool,
    /// The b_phi-delta term of Z2.
    pub bias_phi_delta: bool,
    /// The shift term of Z2.
    pub shift: bool,
    /// The P_i / nbar shot-noise term damped by D_i^2 and the 1/nbar^2 term undamped
    /// (off: both multiplied by Prod_i D_i).
    pub shot_damping: bool,
}

impl Default for TermSwitches {
    fn default() -> Self {
        Self {
            rsd_velocity_bias: true,
            bias_phi_delta: true,
            shift: true,
            shot_damping: true,
        }
    }
}

/// A triangle k1 + k2 + k3 = 0 with the cosines between its sides.
#[derive(Debug, Clone, Copy)]
pub struct Triangle {
    /// Side lengths, 1/Mpc.
    pub k: [f64; 3],
    /// cos(k1, k2), cos(k2, k3), cos(k1, k3) (angles between the vectors).
    pub cos: [f64; 3],
}

impl Triangle {
    /// A triangle from its sides.
    pub fn new(k1: f64, k2: f64, k3: f64) -> Self {
        let c12 = ((k3 * k3 - k1 * k1 - k2 * k2) / (2.0 * k1 * k2)).clamp(-1.0, 1.0);
        let c23 = ((k1 * k1 - k2 * k2 - k3 * k3) / (2.0 * k2 * k3)).clamp(-1.0, 1.0);
        let c13 = ((k2 * k2 - k1 * k1 - k3 * k3) / (2.0 * k1 * k3)).clamp(-1.0, 1.0);
        Self {
            k: [k1, k2, k3],
            cos: [c12, c23, c13],
        }
    }

    /// Line-of-sight cosines of the three sides for orientation (mu1, phi): mu1 is the
    /// cosine of k1, phi the azimuth of k2 about k1 (Scoccimarro, Couchman & Frieman 1999).
    pub fn mus(&self, mu1: f64, phi: f64) -> [f64; 3] {
        let c = self.cos[0];
        let s = (1.0 - c * c).max(0.0).sqrt();
        let mu2 = mu1 * c - (1.0 - mu1 * mu1).max(0.0).sqrt() * s * phi.cos();
        let mu3 = -(self.k[0] * mu1 + self.k[1] * mu2) / self.k[2];
        [mu1, mu2, mu3]
    }
}

/// The fiducial quantities of the bispectrum tracer in one bin.
#[derive(Debug, Clone, Copy)]
pub struct BispectrumTracer {
    /// Linear bias.
    pub b1: f64,
    /// Second-order bias.
    pub b2: f64,
    /// Tidal bias.
    pub bs2: f64,
    /// b_phi.
    pub bphi: f64,
    /// b_phi-delta.
    pub bphi_delta: f64,
    /// 1 / nbar, Mpc^3.
    pub inv_n: f64,
}

/// Per-triangle inputs that do not depend on the orientation.
pub struct TriangleTerms<'a> {
    /// The triangle.
    pub tri: Triangle,
    /// P_lin at the sides.
    pub p: [f64; 3],
    /// M(k, z) at the sides.
    pub m: [f64; 3],
    /// B_Phi per shape (f_NL = 1).
    pub bprim: &'a [f64],
    /// alpha per shape and side.
    pub alpha: &'a [[f64; 3]],
}

/// What one orientation returns besides the gradient.
#[derive(Debug, Clone, Copy)]
pub struct OrientationValues {
    /// Gaussian variance factor Prod_i [Z1_i^2 D_i^2 P_i + 1/nbar].
    pub var: f64,
    /// The fiducial galaxy bispectrum including shot noise (for the P-B cross-covariance).
    pub b_fid: f64,
    /// The fiducial gravitational part (the theory-error envelope is relative to it).
    pub b_grav: f64,
}

/// The model: growth rate, damping and switches.
#[derive(Debug, Clone, Copy)]
pub struct BispectrumModel {
    /// Growth rate f (0 in real space).
    pub f: f64,
    /// sigma^2 of the line-of-sight damping, Mpc^2.
    pub damp2: f64,
    /// Terms.
    pub terms: TermSwitches,
}

/// Pairs (i, j) with the third side l opposite, in the order of [`Triangle::cos`].
const PAIRS: [(usize, usize, usize); 3] = [(0, 1, 2), (1, 2, 0), (0, 2, 1)];

impl BispectrumModel {
    /// Fills `g` with d B / d theta (layout `lay`) at one orientation; returns the
    /// variance factor and fiducial values.
    pub fn gradient(
        &self,
        tt: &TriangleTerms<'_>,
        mus: &[f64; 3],
        t: &BispectrumTracer,
        lay: &Layout,
        g: &mut [f64],
    ) -> OrientationValues {
        let f = self.f;
        let ks = tt.tri.k;
        let p = &tt.p;
        let mut z1 = [0.0; 3];
        let mut d2 = [0.0; 3];
        for i in 0..3 {
            z1[i] = t.b1 + f * mus[i] * mus[i];
            d2[i] = (-ks[i] * ks[i] * mus[i] * mus[i] * self.damp2).exp();
        }
        let dd = (d2[0] * d2[1] * d2[2]).sqrt();
        g.iter_mut().for_each(|x| *x = 0.0);
        let mut dz2_db1 = [0.0; 3];
        let mut z2 = [0.0; 3];
        let mut s2 = [0.0; 3];
        let mut muk = [0.0; 3];
        for (pi, &(i, j, l)) in PAIRS.iter().enumerate() {
            let c = tt.tri.cos[pi];
            let (ki, kj, kl) = (ks[i], ks[j], ks[l]);
            let f2 = 5.0 / 7.0 + 0.5 * c * (ki / kj + kj / ki) + 2.0 / 7.0 * c * c;
            let g2 = 3.0 / 7.0 + 0.5 * c * (ki / kj + kj / ki) + 4.0 / 7.0 * c * c;
            // k_ij = k_i + k_j = -k_l: mu k = -mu_l k_l.
            muk[pi] = -mus[l] * kl;
            let mu_ij = -mus[l];
            let rsd = 0.5 * f * muk[pi] * (mus[i] / ki * z1[j] + mus[j] / kj * z1[i]);
            s2[pi] = c * c - 1.0 / 3.0;
            z2[pi] = t.b1 * f2 + f * mu_ij * mu_ij * g2 + rsd + 0.5 * t.b2 + t.bs2 * s2[pi];
            dz2_db1[pi] = f2 + 0.5 * f * muk[pi] * (mus[i] / ki + mus[j] / kj);
        }
        let (mut db1, mut db2, mut dbs2, mut b_grav) = (0.0, 0.0, 0.0, 0.0);
        for (pi, &(i, j, _)) in PAIRS.iter().enumerate() {
            let pp = 2.0 * p[i] * p[j];
            db1 += pp * ((z1[i] + z1[j]) * z2[pi] + z1[i] * z1[j] * dz2_db1[pi]);
            db2 += pp * z1[i] * z1[j] * 0.5;
            dbs2 += pp * z1[i] * z1[j] * s2[pi];
            b_grav += pp * z1[i] * z1[j] * z2[pi];
        }
        b_grav *= dd;
        // Shot-noise weights: D_i^2 on the P_i / nbar term, none on 1/nbar^2 (or the old
        // Prod D_i on both).
        let (w_shot1, w_shot2): ([f64; 3], f64) = if self.terms.shot_damping {
            (d2, 1.0)
        } else {
            ([dd; 3], dd)
        };
        let shot_p: f64 = (0..3)
            .map(|i| z1[i] * z1[i] * p[i] * w_shot1[i])
            .sum::<f64>()
            * t.inv_n;
        let shot_b = t.inv_n * t.inv_n * w_shot2;
        g[lay.b1(0)] =
            db1 * dd + t.inv_n * (0..3).map(|i| 2.0 * z1[i] * p[i] * w_shot1[i]).sum::<f64>();
        g[lay.b2()] = db2 * dd;
        g[lay.bs2()] = dbs2 * dd;
        g[lay.bshot_p()] = shot_p;
        g[lay.bshot()] = shot_b;
        let pt: [f64; 3] = std::array::from_fn(|i| z1[i] * z1[i] * d2[i] * p[i] + t.inv_n);
        for s in 0..lay.n_shapes {
            let al = &tt.alpha[s];
            let m = &tt.m;
            let mut v = z1[0] * z1[1] * z1[2] * m[0] * m[1] * m[2] * tt.bprim[s];
            let db = [t.bphi * al[0], t.bphi * al[1], t.bphi * al[2]];
            for (pi, &(i, j, _)) in PAIRS.iter().enumerate() {
                let (ki, kj) = (ks[i], ks[j]);
                let mut dz2 = 0.0;
                if self.terms.rsd_velocity_bias {
                    dz2 += 0.5 * f * muk[pi] * (mus[i] / ki * db[j] + mus[j] / kj * db[i]);
                }
                if self.terms.bias_phi_delta {
                    dz2 += 0.5 * t.bphi_delta * (al[i] + al[j]);
                }
                if self.terms.shift {
                    dz2 += 0.5 * t.bphi * tt.tri.cos[pi] * (kj / ki * al[j] + ki / kj * al[i]);
                }
                v += 2.0
                    * p[i]
                    * p[j]
                    * ((db[i] * z1[j] + z1[i] * db[j]) * z2[pi] + z1[i] * z1[j] * dz2);
            }
            v *= dd;
            v += t.inv_n
                * (0..3)
                    .map(|i| 2.0 * z1[i] * db[i] * p[i] * w_shot1[i])
                    .sum::<f64>();
            g[s] = v;
        }
        OrientationValues {
            var: pt[0] * pt[1] * pt[2],
            b_fid: b_grav + shot_p + shot_b,
            b_grav,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Brute force: B written out as a function of (b1, f_NL, b2, ...) at one orientation,
    /// differentiated by central differences, against the analytic gradient (every term
    /// on, redshift space with damping). Shift and b_phi-delta terms appear through Z2.
    #[test]
    fn gradient_matches_finite_differences() {
        let tri = Triangle::new(0.12, 0.09, 0.05);
        let p = [900.0, 1500.0, 4000.0];
        let m = [30.0, 18.0, 6.0];
        let bprim = [3.0e-6];
        let alpha = [[0.01, 0.02, 0.09]];
        let tt = TriangleTerms {
            tri,
            p,
            m,
            bprim: &bprim,
            alpha: &alpha,
        };
        let model = BispectrumModel {
            f: 0.8,
            damp2: 25.0,
            terms: TermSwitches::default(),
        };
        let lay = Layout {
            n_shapes: 1,
            n_tracers: 1,
        };
        let mus = tri.mus(0.4, 1.1);
        let base = BispectrumTracer {
            b1: 1.8,
            b2: 0.3,
            bs2: -0.2,
            bphi: 2.7,
            bphi_delta: 1.9,
            inv_n: 300.0,
        };
        // Full B at parameters (fnl, b1, ap, b2, bs2, ab).
        let full = |th: &[f64; 6]| -> f64 {
            let (fnl, b1, ap, b2, bs2, ab) = (th[0], th[1], th[2], th[3], th[4], th[5]);
            let f = model.f;
            let ks = tri.k;
            let z1: [f64; 3] =
                std::array::from_fn(|i| b1 + fnl * base.bphi * alpha[0][i] + f * mus[i] * mus[i]);
            let d2: [f64; 3] =
                std::array::from_fn(|i| (-ks[i] * ks[i] * mus[i] * mus[i] * model.damp2).exp());
            let mut b = z1[0] * z1[1] * z1[2] * m[0] * m[1] * m[2] * bprim[0] * fnl;
            for (pi, &(i, j, l)) in PAIRS.iter().enumerate() {
                let c = tri.cos[pi];
                let (ki, kj) = (ks[i], ks[j]);
                let f2 = 5.0 / 7.0 + 0.5 * c * (ki / kj + kj / ki) + 2.0 / 7.0 * c * c;
                let g2 = 3.0 / 7.0 + 0.5 * c * (ki / kj + kj / ki) + 4.0 / 7.0 * c * c;
                let mu_ij = -mus[l];
                let muk = -mus[l] * ks[l];
                let z2 = b1 * f2
                    + f * mu_ij * mu_ij * g2
                    + 0.5 * f * muk * (mus[i] / ki * z1[j] + mus[j] / kj * z1[i])
                    + 0.5 * b2
                    + bs2 * (c * c - 1.0 / 3.0)
                    + fnl * 0.5 * base.bphi_delta * (alpha[0][i] + alpha[0][j])
                    + fnl * 0.5 * base.bphi * c * (kj / ki * alpha[0][j] + ki / kj * alpha[0][i]);
                b += 2.0 * z1[i] * z1[j] * z2 * p[i] * p[j];
            }
            b *= (d2[0] * d2[1] * d2[2]).sqrt();
            b += ap * base.inv_n * (0..3).map(|i| z1[i] * z1[i] * d2[i] * p[i]).sum::<f64>();
            b + ab * base.inv_n * base.inv_n
        };
        let th0 = [0.0, base.b1, 1.0, base.b2, base.bs2, 1.0];
        let idx = [
            0,
            lay.b1(0),
            lay.bshot_p(),
            lay.b2(),
            lay.bs2(),
            lay.bshot(),
        ];
        let mut g = vec![0.0; lay.n()];
        let ov = model.gradient(&tt, &mus, &base, &lay, &mut g);
        assert!((ov.b_fid / full(&th0) - 1.0).abs() < 1e-12);
        for (a, &ia) in idx.iter().enumerate() {
            let h = 1e-4 * th0[a].abs().max(1.0);
            let (mut up, mut dn) = (th0, th0);
            up[a] += h;
            dn[a] -= h;
            let fd = (full(&up) - full(&dn)) / (2.0 * h);
            assert!(
                (g[ia] - fd).abs() < 1e-7 * fd.abs().max(1e-3 * ov.b_fid.abs()),
                "param {a}: analytic {} fd {fd}",
                g[ia]
            );
        }
    }
}
