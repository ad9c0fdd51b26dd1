//! Gauss-Legendre quadrature.
//!
//! Nodes are the roots of P_n found by Newton's method from Tricomi's asymptotic initial
//! guess, weights 2 / [(1 - x^2) P_n'(x)^2] (Abramowitz & Stegun 25.4.29). For n up to a
//! few thousand this is exact to rounding; the cost is O(n^2) once per plan.

/// Nodes and weights on [-1, 1], in increasing order of the node.
#[derive(Debug, Clone)]
pub struct GaussLegendre {
    /// Nodes x_i in (-1, 1), increasing.
    pub nodes: Vec<f64>,
    /// Weights w_i, summing to 2.
    pub weights: Vec<f64>,
}

impl GaussLegendre {
    /// The n-point rule (n >= 1).
    pub fn new(n: usize) -> Self {
        let n = n.max(1);
        let mut nodes = vec![0.0; n];
        let mut weights = vec![0.0; n];
        let nf = n as f64;
        let m = n.div_ceil(2);
        for i in 0..m {
            // Tricomi initial guess for the i-th largest root.
            let theta = std::f64::consts::PI * (4.0 * i as f64 + 3.0) / (4.0 * nf + 2.0);
            let mut x = (1.0 - (1.0 - 1.0 / nf) / (8.0 * nf * nf)) * theta.cos();
            let mut dp = 1.0;
            for _ in 0..100 {
                let (p, d) = legendre_and_derivative(n, x);
                dp = d;
                let dx = p / d;
                x -= dx;
                if dx.abs() < 1e-16 {
                    break;
                }
            }
            let (_, d) = legendre_and_derivative(n, x);
            dp = if d.is_finite() { d } else { dp };
            let w = 2.0 / ((1.0 - x * x) * dp * dp);
            nodes[n - 1 - i] = x;
            nodes[i] = -x;
            weights[n - 1 - i] = w;
            weights[i] = w;
        }
        Self { nodes, weights }
    }

    /// Number of nodes.
    pub fn len(&self) -> usize {
        self.nodes.len()
    }

    /// Always false (a rule has at least one node).
    pub fn is_empty(&self) -> bool {
        self.nodes.is_empty()
    }

    /// Integrates `f` over [a, b].
    pub fn integrate(&self, a: f64, b: f64, mut f: impl FnMut(f64) -> f64) -> f64 {
        let half = 0.5 * (b - a);
        let mid = 0.5 * (a + b);
        let mut s = 0.0;
        for (x, w) in self.nodes.iter().zip(&self.weights) {
            s += w * f(mid + half * x);
        }
        s * half
    }

    /// Nodes and weights mapped to [a, b].
    pub fn mapped(&self, a: f64, b: f64) -> (Vec<f64>, Vec<f64>) {
        let half = 0.5 * (b - a);
        let mid = 0.5 * (a + b);
        (
            self.nodes.iter().map(|x| mid + half * x).collect(),
            self.weights.iter().map(|w| w * half).collect(),
        )
    }
}

/// P_n(x) and P_n'(x) by the three-term recurrence.
fn legendre_and_derivative(n: usize, x: f64) -> (f64, f64) {
    let mut p0 = 1.0;
    let mut p1 = x;
    if n == 0 {
        return (1.0, 0.0);
    }
    for k in 2..=n {
        let kf = k as f64;
        let p2 = ((2.0 * kf - 1.0) * x * p1 - (kf - 1.0) * p0) / kf;
        p0 = p1;
        p1 = p2;
    }
    let nf = n as f64;
    let d = nf * (x * p1 - p0) / (x * x - 1.0);
    (p1, d)
}

/// Composite Gauss-Legendre: `rule` on each panel between consecutive `edges`.
pub fn integrate_gl_panels(
    rule: &GaussLegendre,
    edges: &[f64],
    mut f: impl FnMut(f64) -> f64,
) -> f64 {
    edges
        .windows(2)
        .map(|w| rule.integrate(w[0], w[1], &mut f))
        .sum()
}

/// `n` points logarithmically spaced from `lo` to `hi` inclusive.
pub fn log_grid(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    if n < 2 {
        return vec![lo];
    }
    let (l0, l1) = (lo.ln(), hi.ln());
    (0..n)
        .map(|i| (l0 + (l1 - l0) * i as f64 / (n - 1) as f64).exp())
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn integrates_polynomials_exactly() {
        for n in [1, 2, 5, 17, 64, 301, 2000] {
            let g = GaussLegendre::new(n);
            let sw: f64 = g.weights.iter().sum();
            assert!((sw - 2.0).abs() < 1e-12, "n={n} sum={sw}");
            // x^(2n-2) integrates to 2/(2n-1) exactly.
            let p = 2 * n - 2;
            let v = g.integrate(-1.0, 1.0, |x| x.powi(p as i32));
            let exact = 2.0 / (p as f64 + 1.0);
            assert!((v / exact - 1.0).abs() < 1e-11, "n={n} v={v} exact={exact}");
            assert!(g.nodes.windows(2).all(|w| w[0] < w[1]));
        }
    }

    #[test]
    fn maps_intervals() {
        let g = GaussLegendre::new(20);
        let v = g.integrate(0.0, std::f64::consts::PI, f64::sin);
        assert!((v - 2.0).abs() < 1e-14);
    }
}
