//! A small L-stable Rosenbrock integrator for stiff systems of fixed size.
//!
//! The scheme is the modified Rosenbrock triple of Shampine & Reichelt (1997, SIAM J. Sci.
//! Comput. 18, 1, "The MATLAB ODE suite", Sec. 2.1): with d = 1/(2 + sqrt 2),
//! e32 = 6 + sqrt 2, W = I - h d J and T = df/dt,
//!
//! ```text
//! k1 = W^-1 (f(t, y) + h d T)
//! k2 = W^-1 (f(t + h/2, y + h k1/2) - k1) + k1
//! y1 = y + h k2                                     (second order, L-stable)
//! k3 = W^-1 [f(t + h, y1) - e32 (k2 - f1) - 2 (k1 - f0) + h d T]
//! err = h (k1 - 2 k2 + k3) / 6                      (third-order error estimate)
//! ```
//!
//! The Jacobian and T are forward differences. Everything lives in fixed-size arrays, so
//! a step allocates nothing. The integrator stops exactly at requested times ([`Rosenbrock23::advance_to`]). Used
//! by [`super::thermal`] for the recombination equations,
//! whose relaxation rate towards Saha equilibrium exceeds the expansion rate by many orders
//! of magnitude at early times.

// Dense N x N linear algebra reads best with explicit indices.
#![allow(clippy::needless_range_loop)]

/// Tolerances and step limits.
#[derive(Debug, Clone, Copy)]
pub(crate) struct StiffOptions<const N: usize> {
    /// Relative tolerance.
    pub rtol: f64,
    /// Absolute tolerance per component.
    pub atol: [f64; N],
    /// First trial step.
    pub h_init: f64,
    /// Largest step.
    pub h_max: f64,
    /// Most steps (accepted and rejected) before giving up.
    pub max_steps: usize,
}

/// LU decomposition with partial pivoting of a small dense matrix, in place.
/// Returns `None` for a singular matrix.
fn lu_factor<const N: usize>(m: &mut [[f64; N]; N]) -> Option<[usize; N]> {
    let mut piv = [0usize; N];
    for (k, p) in piv.iter_mut().enumerate() {
        let mut best = k;
        for i in k + 1..N {
            if m[i][k].abs() > m[best][k].abs() {
                best = i;
            }
        }
        if m[best][k] == 0.0 || !m[best][k].is_finite() {
            return None;
        }
        *p = best;
        m.swap(k, best);
        for i in k + 1..N {
            let f = m[i][k] / m[k][k];
            m[i][k] = f;
            for j in k + 1..N {
                m[i][j] -= f * m[k][j];
            }
        }
    }
    Some(piv)
}

/// Solves with the factors of [`lu_factor`].
fn lu_solve<const N: usize>(m: &[[f64; N]; N], piv: &[usize; N], b: [f64; N]) -> [f64; N] {
    // The factorization swapped whole rows, so apply every interchange first.
    let mut x = b;
    for (k, &p) in piv.iter().enumerate() {
        x.swap(k, p);
    }
    for k in 0..N {
        for i in k + 1..N {
            x[i] -= m[i][k] * x[k];
        }
    }
    for k in (0..N).rev() {
        let mut s = x[k];
        for j in k + 1..N {
            s -= m[k][j] * x[j];
        }
        x[k] = s / m[k][k];
    }
    x
}

/// A Rosenbrock integrator that carries its state between calls, so that it can be
/// stopped exactly at a list of output times (no interpolation between steps, whose
/// end-point derivatives are unreliable for the stiff components).
#[derive(Debug, Clone)]
pub(crate) struct Rosenbrock23<const N: usize> {
    t: f64,
    y: [f64; N],
    f0: [f64; N],
    h: f64,
    opt: StiffOptions<N>,
    tries: usize,
    accepted: usize,
}

impl<const N: usize> Rosenbrock23<N> {
    /// Starts at (t0, y0).
    pub fn new<F>(f: &mut F, t0: f64, y0: [f64; N], opt: StiffOptions<N>) -> Self
    where
        F: FnMut(f64, &[f64; N]) -> [f64; N],
    {
        let f0 = f(t0, &y0);
        Self {
            t: t0,
            y: y0,
            f0,
            h: opt.h_init.min(opt.h_max),
            opt,
            tries: 0,
            accepted: 0,
        }
    }

    /// The current state.
    pub fn state(&self) -> &[f64; N] {
        &self.y
    }

    /// Accepted steps so far.
    #[cfg(test)]
    pub fn steps(&self) -> usize {
        self.accepted
    }

    /// Advances to exactly `t_end` (>= the current time) with adaptive steps, the last one
    /// shortened to land on `t_end`.
    ///
    /// # Errors
    /// A message when the step size underflows or the step budget runs out.
    pub fn advance_to<F>(&mut self, f: &mut F, t_end: f64) -> Result<(), String>
    where
        F: FnMut(f64, &[f64; N]) -> [f64; N],
    {
        let d = 1.0 / (2.0 + std::f64::consts::SQRT_2);
        let e32 = 6.0 + std::f64::consts::SQRT_2;
        let sqrt_eps = f64::EPSILON.sqrt();
        let opt = self.opt;
        while self.t < t_end {
            self.tries += 1;
            if self.tries > opt.max_steps {
                return Err(format!(
                    "more than {} steps (reached t = {})",
                    opt.max_steps, self.t
                ));
            }
            let (t, y, f0) = (self.t, self.y, self.f0);
            let mut h = self.h;
            let last = t + h >= t_end;
            if last {
                h = t_end - t;
            }
            // Jacobian and time derivative by forward differences.
            let mut jac = [[0.0; N]; N];
            for j in 0..N {
                let dy = sqrt_eps * y[j].abs().max(opt.atol[j] / opt.rtol);
                let mut yp = y;
                yp[j] += dy;
                let fp = f(t, &yp);
                for i in 0..N {
                    jac[i][j] = (fp[i] - f0[i]) / dy;
                }
            }
            let dt = sqrt_eps * t.abs().max(1.0);
            let ft = f(t + dt, &y);
            let mut tdot = [0.0; N];
            for i in 0..N {
                tdot[i] = (ft[i] - f0[i]) / dt;
            }
            let mut w = [[0.0; N]; N];
            for i in 0..N {
                for j in 0..N {
                    w[i][j] = -h * d * jac[i][j];
                }
                w[i][i] += 1.0;
            }
            let Some(piv) = lu_factor(&mut w) else {
                self.h = 0.25 * h;
                if self.h < 1e-14 * t.abs().max(1.0) {
                    return Err(format!("singular iteration matrix at t = {t}"));
                }
                continue;
            };
            let mut rhs = [0.0; N];
            for i in 0..N {
                rhs[i] = f0[i] + h * d * tdot[i];
            }
            let k1 = lu_solve(&w, &piv, rhs);
            let mut ymid = y;
            for i in 0..N {
                ymid[i] += 0.5 * h * k1[i];
            }
            let f1 = f(t + 0.5 * h, &ymid);
            for i in 0..N {
                rhs[i] = f1[i] - k1[i];
            }
            let mut k2 = lu_solve(&w, &piv, rhs);
            for i in 0..N {
                k2[i] += k1[i];
            }
            let mut ynew = y;
            for i in 0..N {
                ynew[i] += h * k2[i];
            }
            let t_new = if last { t_end } else { t + h };
            let f2 = f(t_new, &ynew);
            for i in 0..N {
                rhs[i] = f2[i] - e32 * (k2[i] - f1[i]) - 2.0 * (k1[i] - f0[i]) + h * d * tdot[i];
            }
            let k3 = lu_solve(&w, &piv, rhs);
            let mut err: f64 = 0.0;
            for i in 0..N {
                let e = h / 6.0 * (k1[i] - 2.0 * k2[i] + k3[i]);
                let sc = opt.atol[i] + opt.rtol * y[i].abs().max(ynew[i].abs());
                err = err.max((e / sc).abs());
            }
            if !err.is_finite() {
                err = 1e10;
            }
            let fac = if err == 0.0 {
                5.0
            } else {
                (0.8 * err.powf(-1.0 / 3.0)).clamp(0.2, 5.0)
            };
            if err <= 1.0 {
                self.t = t_new;
                self.y = ynew;
                self.f0 = f2;
                self.accepted += 1;
                // A step shortened to hit t_end says nothing about the next one.
                if !last {
                    self.h = (h * fac).min(opt.h_max);
                }
            } else {
                self.h = (h * fac).min(opt.h_max);
            }
            if self.h < 1e-14 * self.t.abs().max(1.0) {
                return Err(format!("step size underflow at t = {}", self.t));
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lu_solves_small_system() {
        let a = [[0.0, 2.0, 1.0], [1.0, 1.0, 0.0], [3.0, 0.0, 1.0]];
        let x = [1.0, -2.0, 0.5];
        let mut b = [0.0; 3];
        for i in 0..3 {
            for j in 0..3 {
                b[i] += a[i][j] * x[j];
            }
        }
        let mut m = a;
        let piv = lu_factor(&mut m).unwrap();
        let got = lu_solve(&m, &piv, b);
        for i in 0..3 {
            assert!((got[i] - x[i]).abs() < 1e-14, "{got:?}");
        }
        let mut s = [[1.0, 2.0], [2.0, 4.0]];
        assert!(lu_factor(&mut s).is_none());
    }

    /// A stiff linear problem with a known solution: y' = -L (y - cos t) - sin t, whose
    /// solution from y(0) = 1 is cos t for any L. With L = 1e8 an explicit method needs
    /// ~1e9 steps; the L-stable scheme needs about 1e4 at this tolerance (its error
    /// estimate is pessimistic for the stiff component: the true error is 1e-8).
    #[test]
    fn stiff_relaxation_to_slow_manifold() {
        let lam = 1e8;
        let opt = StiffOptions {
            rtol: 1e-7,
            atol: [1e-10, 1e-10],
            h_init: 1e-3,
            h_max: 0.1,
            max_steps: 100_000,
        };
        let mut worst: f64 = 0.0;
        let mut f = |t: f64, y: &[f64; 2]| {
            [
                -lam * (y[0] - t.cos()) - t.sin(),
                // A second, non-stiff and decoupled component: y2' = -y2.
                -y[1],
            ]
        };
        let mut ode = Rosenbrock23::new(&mut f, 0.0, [1.0, 1.0], opt);
        for k in 1..=50 {
            let t = 0.1 * k as f64;
            ode.advance_to(&mut f, t).unwrap();
            let y = ode.state();
            worst = worst.max((y[0] - t.cos()).abs());
            worst = worst.max((y[1] - (-t).exp()).abs() / (-t).exp());
        }
        let n = ode.steps();
        assert!(n < 20_000, "{n} steps");
        assert!(worst < 1e-5, "max error {worst}");
    }

    /// Robertson's chemical kinetics problem (Robertson 1966), the classic stiff test;
    /// the conservation law y1 + y2 + y3 = 1 must hold, and y1(40) = 0.7158 (reference
    /// value as tabulated in Hairer & Wanner, Solving ODEs II, Sec. IV.1; from memory to
    /// four digits).
    #[test]
    fn robertson_problem() {
        let opt = StiffOptions {
            rtol: 1e-8,
            atol: [1e-12, 1e-14, 1e-12],
            h_init: 1e-6,
            h_max: 10.0,
            max_steps: 200_000,
        };
        let mut f = |_: f64, y: &[f64; 3]| {
            let r1 = 0.04 * y[0];
            let r2 = 1e4 * y[1] * y[2];
            let r3 = 3e7 * y[1] * y[1];
            [-r1 + r2, r1 - r2 - r3, r3]
        };
        let mut ode = Rosenbrock23::new(&mut f, 0.0, [1.0, 0.0, 0.0], opt);
        ode.advance_to(&mut f, 40.0).unwrap();
        let y_end = *ode.state();
        assert!((y_end.iter().sum::<f64>() - 1.0).abs() < 1e-8);
        assert!((y_end[0] - 0.7158).abs() < 1e-4, "{y_end:?}");
    }
}
