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
