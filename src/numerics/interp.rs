//! Interpolation tables.

/// Natural cubic spline on a strictly increasing, not necessarily uniform, grid.
#[derive(Debug, Clone)]
pub struct CubicSpline {
    x: Vec<f64>,
    y: Vec<f64>,
    m: Vec<f64>,
}

impl CubicSpline {
    /// Builds the spline (natural boundary conditions). `x` must increase strictly and
    /// hold at least two points.
    pub fn new(x: Vec<f64>, y: Vec<f64>) -> Self {
        let n = x.len();
        assert!(
            n >= 2 && y.len() == n,
            "spline needs matching x, y with n >= 2"
        );
        let mut m = vec![0.0; n];
        if n > 2 {
            // Tridiagonal solve for second derivatives.
            let mut c = vec![0.0; n];
            let mut d = vec![0.0; n];
            for i in 1..n - 1 {
                let h0 = x[i] - x[i - 1];
                let h1 = x[i + 1] - x[i];
                let a = h0 / 6.0;
                let b = (h0 + h1) / 3.0;
                let cc = h1 / 6.0;
                let r = (y[i + 1] - y[i]) / h1 - (y[i] - y[i - 1]) / h0;
                let denom = b - a * c[i - 1];
                c[i] = cc / denom;
                d[i] = (r - a * d[i - 1]) / denom;
            }
            for i in (1..n - 1).rev() {
                m[i] = d[i] - c[i] * m[i + 1];
            }
        }
        Self { x, y, m }
    }

    /// The grid.
    pub fn xs(&self) -> &[f64] {
        &self.x
    }

    fn interval(&self, xv: f64) -> usize {
        let n = self.x.len();
        match self.x.binary_search_by(|p| p.total_cmp(&xv)) {
            Ok(i) => i.min(n - 2),
            Err(i) => i.clamp(1, n - 1) - 1,
        }
    }

    /// Value at `xv` (linear extrapolation of the end cubic beyond the grid).
    pub fn eval(&self, xv: f64) -> f64 {
        let i = self.interval(xv);
        let h = self.x[i + 1] - self.x[i];
        let a = (self.x[i + 1] - xv) / h;
        let b = (xv - self.x[i]) / h;
        a * self.y[i]
            + b * self.y[i + 1]
            + ((a * a * a - a) * self.m[i] + (b * b * b - b) * self.m[i + 1]) * h * h / 6.0
    }

    /// First derivative at `xv`.
    pub fn deriv(&self, xv: f64) -> f64 {
        let i = self.interval(xv);
        let h = self.x[i + 1] - self.x[i];
        let a = (self.x[i + 1] - xv) / h;
        let b = (xv - self.x[i]) / h;
        (self.y[i + 1] - self.y[i]) / h
            + ((1.0 - 3.0 * a * a) * self.m[i] + (3.0 * b * b - 1.0) * self.m[i + 1]) * h / 6.0
    }
}

/// Cubic Hermite interpolation on a uniform grid with known derivatives: O(h^4) accurate,
/// O(1) look-up.
#[derive(Debug, Clone)]
pub struct UniformHermite {
    x0: f64,
    dx: f64,
    y: Vec<f64>,
    dy: Vec<f64>,
}

impl UniformHermite {
    /// Table of values `y` and derivatives `dy` at x0 + i dx.
    pub fn new(x0: f64, dx: f64, y: Vec<f64>, dy: Vec<f64>) -> Self {
        assert!(y.len() >= 2 && dy.len() == y.len() && dx > 0.0);
        Self { x0, dx, y, dy }
    }

    /// First grid point.
    pub fn x_min(&self) -> f64 {
        self.x0
    }

    /// Last grid point.
    pub fn x_max(&self) -> f64 {
        self.x0 + self.dx * (self.y.len() - 1) as f64
    }

    /// Value at x (clamped to the table's range).
    pub fn eval(&self, x: f64) -> f64 {
        let (i, t) = self.locate(x);
        let (y0, y1) = (self.y[i], self.y[i + 1]);
        let (d0, d1) = (self.dy[i] * self.dx, self.dy[i + 1] * self.dx);
        let t2 = t * t;
        let t3 = t2 * t;
        (2.0 * t3 - 3.0 * t2 + 1.0) * y0
            + (t3 - 2.0 * t2 + t) * d0
            + (-2.0 * t3 + 3.0 * t2) * y1
            + (t3 - t2) * d1
    }

    /// Derivative at x (clamped).
    pub fn deriv(&self, x: f64) -> f64 {
        let (i, t) = self.locate(x);
        let (y0, y1) = (self.y[i], self.y[i + 1]);
        let (d0, d1) = (self.dy[i] * self.dx, self.dy[i + 1] * self.dx);
        let t2 = t * t;
        ((6.0 * t2 - 6.0 * t) * y0
            + (3.0 * t2 - 4.0 * t + 1.0) * d0
            + (-6.0 * t2 + 6.0 * t) * y1
            + (3.0 * t2 - 2.0 * t) * d1)
            / self.dx
    }

    fn locate(&self, x: f64) -> (usize, f64) {
        let n = self.y.len();
        let s = ((x - self.x0) / self.dx).clamp(0.0, (n - 1) as f64);
        let i = (s.floor() as usize).min(n - 2);
        (i, s - i as f64)
    }
}

/// The quintic Hermite basis on [0, 1] at t: weights [h0, h1, h2, h5, h4, h3] of
/// (f0, h f0', h^2 f0'', f1, h f1', h^2 f1'') (value, first and second derivative at both
/// ends, derivatives scaled by the node spacing). Exact for quintic polynomials.
#[inline]
pub fn quintic_hermite_weights(t: f64) -> [f64; 6] {
    let t2 = t * t;
    let t3 = t2 * t;
    let h5 = t3 * (10.0 + t * (-15.0 + 6.0 * t));
    let h0 = 1.0 - h5;
    let h1 = t + t3 * (-6.0 + t * (8.0 - 3.0 * t));
    let h2 = 0.5 * t2 + t3 * (-1.5 + t * (1.5 - 0.5 * t));
    let h4 = t3 * (-4.0 + t * (7.0 - 3.0 * t));
    let h3 = t3 * (0.5 + t * (-1.0 + 0.5 * t));
    [h0, h1, h2, h5, h4, h3]
}

/// Fourth-order finite-difference derivatives of values on a uniform grid of spacing h
/// (central five-point stencil inside, one-sided five-point stencils at the two nodes of
/// each end; first-order differences when there are fewer than five values).
pub fn uniform_derivatives(v: &[f64], h: f64) -> Vec<f64> {
    let n = v.len();
    let mut d = vec![0.0; n];
    if n < 5 {
        for (i, di) in d.iter_mut().enumerate() {
            let (lo, hi) = (i.saturating_sub(1), (i + 1).min(n - 1));
            *di = (v[hi] - v[lo]) / ((hi - lo).max(1) as f64 * h);
        }
        return d;
    }
    let c = 1.0 / (12.0 * h);
    for i in 2..n - 2 {
        d[i] = (v[i - 2] - 8.0 * v[i - 1] + 8.0 * v[i + 1] - v[i + 2]) * c;
    }
    d[0] = (-25.0 * v[0] + 48.0 * v[1] - 36.0 * v[2] + 16.0 * v[3] - 3.0 * v[4]) * c;
    d[1] = (-3.0 * v[0] - 10.0 * v[1] + 18.0 * v[2] - 6.0 * v[3] + v[4]) * c;
    let m = n - 1;
    d[m] = (25.0 * v[m] - 48.0 * v[m - 1] + 36.0 * v[m - 2] - 16.0 * v[m - 3] + 3.0 * v[m - 4]) * c;
    d[m - 1] = (3.0 * v[m] + 10.0 * v[m - 1] - 18.0 * v[m - 2] + 6.0 * v[m - 3] - v[m - 4]) * c;
    d
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn spline_reproduces_smooth_function() {
        let x: Vec<f64> = (0..200).map(|i| i as f64 * 0.05).collect();
        let y: Vec<f64> = x.iter().map(|v| v.sin()).collect();
        let s = CubicSpline::new(x, y);
        for i in 0..500 {
            let v = 0.3 + i as f64 * 0.018;
            assert!((s.eval(v) - v.sin()).abs() < 2e-6, "{v}");
            assert!((s.deriv(v) - v.cos()).abs() < 2e-4, "{v}");
        }
    }

    /// The quintic basis reproduces a quintic; the derivative stencils are exact for a
    /// quartic.
    #[test]
    fn quintic_weights_and_derivatives_are_exact_on_polynomials() {
        let f = |x: f64| 1.0 - 2.0 * x + 0.5 * x.powi(3) + 0.3 * x.powi(5);
        let df = |x: f64| -2.0 + 1.5 * x * x + 1.5 * x.powi(4);
        let ddf = |x: f64| 3.0 * x + 6.0 * x.powi(3);
        let (a, h) = (0.4, 0.7);
        for t in [0.0, 0.3, 0.77, 1.0] {
            let w = quintic_hermite_weights(t);
            let ends = [
                f(a),
                h * df(a),
                h * h * ddf(a),
                f(a + h),
                h * df(a + h),
                h * h * ddf(a + h),
            ];
            let got: f64 = w.iter().zip(ends).map(|(w, e)| w * e).sum();
            assert!((got - f(a + t * h)).abs() < 1e-13, "{t}");
        }
        let q = |x: f64| x.powi(4) - x;
        let v: Vec<f64> = (0..9).map(|i| q(0.1 * i as f64)).collect();
        let d = uniform_derivatives(&v, 0.1);
        for (i, di) in d.iter().enumerate() {
            let x = 0.1 * i as f64;
            assert!((di - (4.0 * x.powi(3) - 1.0)).abs() < 1e-12, "{i}");
        }
    }

    #[test]
    fn hermite_is_fourth_order() {
        let err = |n: usize| {
            let dx = 1.0 / (n - 1) as f64;
            let y = (0..n).map(|i| (i as f64 * dx).exp()).collect();
            let t =
                UniformHermite::new(0.0, dx, y, (0..n).map(|i| (i as f64 * dx).exp()).collect());
            (0..997)
                .map(|i| {
                    let x = i as f64 / 997.0;
                    (t.eval(x) - x.exp()).abs()
                })
                .fold(0.0, f64::max)
        };
        let (e1, e2) = (err(11), err(21));
        assert!(e1 / e2 > 12.0, "ratio {}", e1 / e2);
        assert!(e2 < 1e-6);
    }
}
