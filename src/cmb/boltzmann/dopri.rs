//! Dormand-Prince 5(4) with its fourth-order continuous extension, for the perturbation
//! equations (Dormand & Prince 1980, J. Comput. Appl. Math. 6, 19; dense output and step
//! control as in Hairer, Norsett & Wanner, *Solving ODEs I*, 2nd ed., Sec. II.4-II.6).
//!
//! The buffers are allocated once per worker and reused for every mode and every phase
//! (tight coupling, full hierarchy, radiation streaming), so the integration itself does
//! not allocate. An explicit method is stable for |h lambda| below about 3.3 on the
//! negative real axis; the step controller finds that limit by itself where the equations
//! are stiff, which only happens between the end of tight coupling and recombination
//! (see the module docs of `boltzmann` for why the switch keeps this short).

/// Butcher nodes.
const C: [f64; 7] = [0.0, 0.2, 0.3, 0.8, 8.0 / 9.0, 1.0, 1.0];
/// Butcher matrix (row s uses stages 0..s).
const A: [[f64; 6]; 7] = [
    [0.0; 6],
    [0.2, 0.0, 0.0, 0.0, 0.0, 0.0],
    [3.0 / 40.0, 9.0 / 40.0, 0.0, 0.0, 0.0, 0.0],
    [44.0 / 45.0, -56.0 / 15.0, 32.0 / 9.0, 0.0, 0.0, 0.0],
    [
        19372.0 / 6561.0,
        -25360.0 / 2187.0,
        64448.0 / 6561.0,
        -212.0 / 729.0,
        0.0,
        0.0,
    ],
    [
        9017.0 / 3168.0,
        -355.0 / 33.0,
        46732.0 / 5247.0,
        49.0 / 176.0,
        -5103.0 / 18656.0,
        0.0,
    ],
    [
        35.0 / 384.0,
        0.0,
        500.0 / 1113.0,
        125.0 / 192.0,
        -2187.0 / 6784.0,
        11.0 / 84.0,
    ],
];
/// Fifth minus fourth order weights (error estimate).
const E: [f64; 7] = [
    71.0 / 57600.0,
    0.0,
    -71.0 / 16695.0,
    71.0 / 1920.0,
    -17253.0 / 339200.0,
    22.0 / 525.0,
    -1.0 / 40.0,
];
/// Dense-output coefficients (Hairer, Norsett & Wanner, Sec. II.6, dopri5).
const D: [f64; 7] = [
    -12715105075.0 / 11282082432.0,
    0.0,
    87487479700.0 / 32700410799.0,
    -10690763975.0 / 1880347072.0,
    701980252875.0 / 199316789632.0,
    -1453857185.0 / 822651844.0,
    69997945.0 / 29380423.0,
];

/// Tolerances and limits of one integration.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Tolerances {
    /// Relative tolerance.
    pub rtol: f64,
    /// Absolute tolerance.
    pub atol: f64,
    /// Largest number of attempted steps.
    pub max_steps: usize,
}

/// Reusable Dormand-Prince workspace for systems of up to `cap` equations.
#[derive(Debug, Clone)]
pub(crate) struct Dopri {
    k: [Vec<f64>; 7],
    ytmp: Vec<f64>,
    ynew: Vec<f64>,
    yout: Vec<f64>,
    /// Step size of the last accepted step (the next call may start from it).
    pub last_h: f64,
    /// Accepted steps summed over calls.
    pub steps: usize,
    /// Right-hand-side evaluations summed over calls.
    pub evals: usize,
}

impl Dopri {
    /// Workspace for at most `cap` equations.
    pub fn new(cap: usize) -> Self {
        let v = || vec![0.0; cap];
        Self {
            k: [v(), v(), v(), v(), v(), v(), v()],
            ytmp: v(),
            ynew: v(),
            yout: v(),
            last_h: 0.0,
            steps: 0,
            evals: 0,
        }
    }

    /// Integrates dy/dt = f(t, y) for the first `y.len()` components from `t0` to `t1`,
    /// starting with step `h0`, overwriting `y` with the solution at `t1`. At every time of
    /// `t_out` (increasing) inside (t0, t1] it calls `out(t, y(t))` with the dense output.
    ///
    /// # Errors
    /// A message if the step size underflows or `max_steps` is exceeded.
    // The solver's natural arguments; index loops over stages and components mirror the
    // Butcher tableau.
    #[allow(clippy::too_many_arguments, clippy::needless_range_loop)]
    #[inline(always)]
    pub fn integrate<F, O>(
        &mut self,
        mut f: F,
        t0: f64,
        t1: f64,
        y: &mut [f64],
        h0: f64,
        tol: Tolerances,
        t_out: &[f64],
        mut out: O,
    ) -> Result<(), String>
    where
        F: FnMut(f64, &[f64], &mut [f64]),
        O: FnMut(f64, &[f64]),
    {
        let n = y.len();
        let mut t = t0;
        let mut h = h0.min(t1 - t0);
        let mut next = t_out.partition_point(|&x| x <= t0);
        f(t, y, &mut self.k[0][..n]);
        self.evals += 1;
        let mut attempts = 0;
        let mut err_old: f64 = 1e-4;
        while t < t1 {
            attempts += 1;
            if attempts > tol.max_steps {
                return Err(format!("more than {} steps before t = {t}", tol.max_steps));
            }
            let last = t + h >= t1;
            if last {
                h = t1 - t;
            }
            for s in 1..7 {
                for i in 0..n {
                    let mut acc = 0.0;
                    for j in 0..s {
                        acc += A[s][j] * self.k[j][i];
                    }
                    self.ytmp[i] = y[i] + h * acc;
                }
                f(t + C[s] * h, &self.ytmp[..n], &mut self.k[s][..n]);
            }
            self.evals += 6;
            let mut err: f64 = 0.0;
            for i in 0..n {
                let mut e = 0.0;
                for s in 0..7 {
                    e += E[s] * self.k[s][i];
                }
                let ynew = self.ytmp[i];
                self.ynew[i] = ynew;
                let sc = tol.atol + tol.rtol * y[i].abs().max(ynew.abs());
                let r = h * e / sc;
                err += r * r;
            }
            let err = (err / n as f64).sqrt();
            if err <= 1.0 {
                let t_new = if last { t1 } else { t + h };
                while next < t_out.len() && t_out[next] <= t_new {
                    let th = ((t_out[next] - t) / h).clamp(0.0, 1.0);
                    let th1 = 1.0 - th;
                    for i in 0..n {
                        let r2 = self.ynew[i] - y[i];
                        let r3 = h * self.k[0][i] - r2;
                        let r4 = r2 - h * self.k[6][i] - r3;
                        let mut r5 = 0.0;
                        for s in 0..7 {
                            r5 += D[s] * self.k[s][i];
                        }
                        r5 *= h;
                        self.yout[i] = y[i] + th * (r2 + th1 * (r3 + th * (r4 + th1 * r5)));
                    }
                    out(t_out[next], &self.yout[..n]);
                    next += 1;
                }
                y.copy_from_slice(&self.ynew[..n]);
                self.k.swap(0, 6);
                t = t_new;
                self.steps += 1;
                self.last_h = h;
                // PI step control (Hairer, Norsett & Wanner II.4, Eq. 4.13 with beta = 0.04).
                let fac =
                    (0.9 * err.max(1e-10).powf(-0.7 / 5.0) * err_old.powf(0.04)).clamp(0.2, 5.0);
                err_old = err.max(1e-4);
                h *= fac;
            } else {
                h *= (0.9 * err.powf(-0.2)).clamp(0.2, 1.0);
            }
            if h.is_nan() || h <= 1e-14 * t.abs().max(1e-300) {
                return Err(format!("step size underflow at t = {t}"));
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dense_output_is_accurate() {
        // y'' = -y with y(0) = 0, y'(0) = 1, outputs between steps.
        let mut d = Dopri::new(2);
        let mut y = [0.0, 1.0];
        let ts: Vec<f64> = (1..=1000).map(|i| i as f64 * 0.01).collect();
        let mut worst: f64 = 0.0;
        let tol = Tolerances {
            rtol: 1e-8,
            atol: 1e-11,
            max_steps: 100_000,
        };
        d.integrate(
            |_, y, dy| {
                dy[0] = y[1];
                dy[1] = -y[0];
            },
            0.0,
            10.0,
            &mut y,
            0.01,
            tol,
            &ts,
            |t, v| worst = worst.max((v[0] - t.sin()).abs()),
        )
        .unwrap();
        assert!(worst < 1e-7, "dense output error {worst}");
        assert!((y[0] - 10f64.sin()).abs() < 1e-7);
        // The steps are much longer than the output spacing, so the dense output matters.
        assert!(d.steps < 200, "{} steps", d.steps);
    }

    #[test]
    fn stiff_decay_stays_stable() {
        // y' = -1000 (y - cos t): explicit steps are stability limited but the solution
        // is right.
        let mut d = Dopri::new(1);
        let mut y = [1.0];
        let tol = Tolerances {
            rtol: 1e-6,
            atol: 1e-9,
            max_steps: 100_000,
        };
        d.integrate(
            |t, y, dy| dy[0] = -1000.0 * (y[0] - t.cos()),
            0.0,
            1.0,
            &mut y,
            1e-4,
            tol,
            &[],
            |_, _| {},
        )
        .unwrap();
        // Slow manifold: y ~ cos t + sin t / 1000.
        assert!(
            (y[0] - (1f64.cos() + 1f64.sin() / 1000.0)).abs() < 1e-5,
            "{}",
            y[0]
        );
    }
}
