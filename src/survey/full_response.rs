//! The full-shape non-Gaussian bias response of a tracer: the scale-dependent bias from
//! the whole primordial bispectrum integrated against the tracer's smoothing window,
//! instead of its squeezed limit.
//!
//! The peak-background split with a general primordial bispectrum gives (Schmidt &
//! Kamionkowski 2010; Desjacques, Jeong & Schmidt 2011, leading term)
//! Delta b(k) = b_phi f_NL F_R(k) / M(k, z),
//! F_R(k) = [1 / (4 sigma_R^2 P_Phi(k))] Integral d^3q / (2 pi)^3 M_R(q) M_R(|k - q|)
//!          B_Phi(k, q, |k - q|),
//! with M_R(q) = M(q) W(q R_L) (top-hat of the tracer's Lagrangian radius) and
//! sigma_R^2 = Integral d^3q / (2 pi)^3 M_R(q)^2 P_Phi(q). The growth in M cancels, so
//! F_R is computed once per (shape, R_L) at z = 0 with M(q)^2 P_Phi(q) = P_m(q, 0). In
//! the squeezed limit k -> 0 it tends to a_S (k / k_S)^Delta, the response
//! [`crate::survey::response`] uses below k_S; at k ~ k_S and beyond it follows the shape
//! instead of growing like a power of k or being cut.
//!
//! Quadrature: with p = |k - q| the angular integral becomes
//! Integral d^3q = (2 pi / k) Integral q dq Integral_{|k - q|}^{k + q} p dp, which removes
//! the p^-1 behaviour of the integrand at q -> k (the local shape's P_Phi(p) M_R(p) p is
//! finite as p -> 0). q: Gauss-Legendre panels in ln q over [1e-5, 60 / R_L] Mpc^-1; p:
//! Gauss-Legendre in p. F_R is tabulated on a grid in ln k and interpolated linearly; below
//! the grid it follows the squeezed power law from the first node, above it is zero.

use rayon::prelude::*;

use crate::cosmology::LinearPower;
use crate::cosmology::Primordial;
use crate::cosmology::power::top_hat;
use crate::numerics::GaussLegendre;
use crate::shapes::Shape;

/// F_R(k) of one shape for one Lagrangian radius, tabulated in ln k (k in 1/Mpc).
#[derive(Debug, Clone, PartialEq)]
pub struct FullShapeTable {
    ln_k: Vec<f64>,
    f: Vec<f64>,
    /// Squeezed power of k used to extend the table below its first node.
    index: f64,
}

/// A primordial shape for the integral: the template, the primordial spectrum, and its
/// squeezed power of k (for extending the table below its range).
#[derive(Debug, Clone, Copy)]
pub struct PrimordialShape<'a> {
    /// The template.
    pub shape: &'a Shape,
    /// The primordial spectrum.
    pub primordial: &'a Primordial,
    /// Squeezed power of k.
    pub index: f64,
}

impl PrimordialShape<'_> {
    fn bispectrum(&self, k1: f64, k2: f64, k3: f64) -> f64 {
        self.shape.bispectrum_phi(self.primordial, k1, k2, k3)
    }
}

/// Range of the table in 1/Mpc.
const K_LO: f64 = 1e-4;
const K_HI: f64 = 3.0;
const N_K: usize = 64;

/// The integration rule: panels in ln q and nodes per panel, nodes in p.
#[derive(Debug, Clone, Copy)]
pub struct FullShapeRule {
    /// Panels in ln q over [1e-5, 60 / R] Mpc^-1.
    pub q_panels: usize,
    /// Gauss-Legendre nodes per q panel.
    pub q_nodes: usize,
    /// Gauss-Legendre nodes in p over [|k - q|, k + q].
    pub p_nodes: usize,
}

impl Default for FullShapeRule {
    fn default() -> Self {
        Self {
            q_panels: 120,
            q_nodes: 6,
            p_nodes: 16,
        }
    }
}

/// sigma_R^2 = Integral d^3q / (2 pi)^3 P_m(q, 0) W^2(q R), R in Mpc.
fn sigma2(power: &LinearPower, r_mpc: f64, rule: &FullShapeRule) -> f64 {
    let gl = GaussLegendre::new(rule.q_nodes);
    let (lo, hi) = ((1e-5_f64).ln(), (60.0 / r_mpc).ln());
    let d = (hi - lo) / rule.q_panels as f64;
    let mut s = 0.0;
    for i in 0..rule.q_panels {
        let (xs, ws) = gl.mapped(lo + i as f64 * d, lo + (i + 1) as f64 * d);
        for (&lq, &w) in xs.iter().zip(&ws) {
            let q = lq.exp();
            let wt = top_hat(q * r_mpc);
            s += w * q * q * q * power.p_mpc(q, 0.0) * wt * wt;
        }
    }
    s / (2.0 * std::f64::consts::PI * std::f64::consts::PI)
}

/// M_R(q) = M(q, 0) W(q R).
fn m_r(power: &LinearPower, q: f64, r_mpc: f64) -> f64 {
    power.m_factor(q, 0.0) * top_hat(q * r_mpc)
}

/// F_R(k) by the (q, p) quadrature (k in 1/Mpc, R in Mpc), given sigma_R^2.
pub fn f_r(
    shape: &PrimordialShape<'_>,
    power: &LinearPower,
    r_mpc: f64,
    k: f64,
    sig2: f64,
    rule: &FullShapeRule,
) -> f64 {
    let glq = GaussLegendre::new(rule.q_nodes);
    let glp = GaussLegendre::new(rule.p_nodes);
    let (lo, hi) = ((1e-5_f64).ln(), (60.0 / r_mpc).ln());
    let d = (hi - lo) / rule.q_panels as f64;
    let mut s = 0.0;
    for i in 0..rule.q_panels {
        let (xs, ws) = glq.mapped(lo + i as f64 * d, lo + (i + 1) as f64 * d);
        for (&lq, &wq) in xs.iter().zip(&ws) {
            let q = lq.exp();
            let mq = m_r(power, q, r_mpc);
            if mq == 0.0 {
                continue;
            }
            let (ps, wps) = glp.mapped((k - q).abs(), k + q);
            let mut inner = 0.0;
            for (&p, &wp) in ps.iter().zip(&wps) {
                inner += wp * p * m_r(power, p, r_mpc) * shape.bispectrum(k, q, p);
            }
            // d ln q: q dq = q^2 d ln q.
            s += wq * q * q * mq * inner;
        }
    }
    // Integral d^3q / (2 pi)^3 = (1 / (4 pi^2 k)) Integral q dq Integral p dp.
    let integral = s / (4.0 * std::f64::consts::PI * std::f64::consts::PI * k);
    integral / (4.0 * sig2 * shape.primordial.p_phi(k))
}

impl FullShapeTable {
    /// Tabulates F_R(k) of `shape` for the Lagrangian radius `r_mpc`.
    pub fn new(shape: &PrimordialShape<'_>, power: &LinearPower, r_mpc: f64) -> Self {
        Self::with_rule(shape, power, r_mpc, &FullShapeRule::default())
    }

    /// As [`FullShapeTable::new`] with an explicit rule.
    pub fn with_rule(
        shape: &PrimordialShape<'_>,
        power: &LinearPower,
        r_mpc: f64,
        rule: &FullShapeRule,
    ) -> Self {
        let sig2 = sigma2(power, r_mpc, rule);
        let (a, b) = (K_LO.ln(), K_HI.ln());
        let ln_k: Vec<f64> = (0..N_K)
            .map(|i| a + (b - a) * i as f64 / (N_K - 1) as f64)
            .collect();
        let f = ln_k
            .par_iter()
            .map(|&lk| f_r(shape, power, r_mpc, lk.exp(), sig2, rule))
            .collect();
        Self {
            ln_k,
            f,
            index: shape.index,
        }
    }

    /// F_R(k), k in 1/Mpc.
    pub fn eval(&self, k: f64) -> f64 {
        let lk = k.ln();
        let (first, last) = (self.ln_k[0], self.ln_k[N_K - 1]);
        if lk <= first {
            return self.f[0] * (k / first.exp()).powf(self.index);
        }
        if lk >= last {
            return 0.0;
        }
        let h = self.ln_k[1] - self.ln_k[0];
        let u = (lk - first) / h;
        let i = (u.floor() as usize).min(N_K - 2);
        let t = u - i as f64;
        self.f[i] * (1.0 - t) + self.f[i + 1] * t
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cosmology::Cosmology;

    fn setup() -> (LinearPower, Primordial) {
        let c = Cosmology::planck2018();
        (LinearPower::eisenstein_hu(&c), Primordial::new(&c))
    }

    /// Brute force: the (q, p) quadrature against a plain (q, mu) product rule with many
    /// more nodes, at a k where the full shape departs from the squeezed limit.
    #[test]
    fn quadrature_matches_brute_force_in_q_and_mu() {
        let (power, prim) = setup();
        let r = 4.0;
        let rule = FullShapeRule::default();
        let sig2 = sigma2(&power, r, &rule);
        for shape in [Shape::Local, Shape::Orthogonal, Shape::Equilateral] {
            let s = PrimordialShape {
                shape: &shape,
                primordial: &prim,
                index: 0.0,
            };
            for k in [0.02, 0.2] {
                let fast = f_r(&s, &power, r, k, sig2, &rule);
                // (q, mu): Integral d^3q / (2 pi)^3 = (1 / 4 pi^2) Integral q^2 dq dmu.
                let glq = GaussLegendre::new(8);
                let glm = GaussLegendre::new(24);
                let (lo, hi) = ((1e-5_f64).ln(), (60.0 / r).ln());
                let (nq, nm) = (400, 64);
                let d = (hi - lo) / nq as f64;
                let mut acc = 0.0;
                for i in 0..nq {
                    let (xs, ws) = glq.mapped(lo + i as f64 * d, lo + (i + 1) as f64 * d);
                    for (&lq, &wq) in xs.iter().zip(&ws) {
                        let q = lq.exp();
                        let mq = m_r(&power, q, r);
                        let mut inner = 0.0;
                        // mu panels, denser near mu = 1 where |k - q| can vanish.
                        for j in 0..nm {
                            let t0 = j as f64 / nm as f64;
                            let t1 = (j + 1) as f64 / nm as f64;
                            // mu = 1 - 2 (1 - t)^3 clusters nodes at mu = 1.
                            let (ts, wts) = glm.mapped(t0, t1);
                            for (&t, &wt) in ts.iter().zip(&wts) {
                                let mu = 1.0 - 2.0 * (1.0 - t).powi(3);
                                let jac = 6.0 * (1.0 - t).powi(2);
                                let p = (k * k + q * q - 2.0 * k * q * mu).max(0.0).sqrt();
                                if p <= 0.0 {
                                    continue;
                                }
                                inner += wt * jac * m_r(&power, p, r) * s.bispectrum(k, q, p);
                            }
                        }
                        acc += wq * q * q * q * mq * inner;
                    }
                }
                let brute = acc
                    / (4.0 * std::f64::consts::PI * std::f64::consts::PI)
                    / (4.0 * sig2 * prim.p_phi(k));
                println!(
                    "{} k = {k}: (q, p) {fast:.6e}, (q, mu) {brute:.6e}",
                    shape.name()
                );
                assert!(
                    (fast - brute).abs() < 5e-3 * brute.abs().max(1e-6 * fast.abs().max(1e-30)),
                    "{} k = {k}: {fast} vs {brute}",
                    shape.name()
                );
            }
        }
    }
}
