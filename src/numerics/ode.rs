//! Adaptive Runge-Kutta (Dormand-Prince 5(4)) for smooth, non-stiff systems.
//!
//! Dormand & Prince 1980, J. Comput. Appl. Math. 6, 19; step control as in Hairer,
//! Norsett & Wanner, *Solving ODEs I*, Sec. II.4.

/// Integrates dy/dt = f(t, y) from `t0` to `t1`, calling `out(t, y)` at every `t_out`
/// (increasing, within [t0, t1]). Returns the number of accepted steps.
///
/// # Errors
/// A message when the step size underflows (the system is stiff or singular).
#[allow(clippy::too_many_arguments)] // the classic solver signature: f, span, y0, outputs, tolerances, sink
pub fn dopri5<F, O>(
    mut f: F,
    t0: f64,
    t1: f64,
    y0: &[f64],
    t_out: &[f64],
    rtol: f64,
    atol: f64,
    mut out: O,
) -> Result<usize, String>
where
    F: FnMut(f64, &[f64], &mut [f64]),
    O: FnMut(f64, &[f64]),
{
    const C: [f64; 7] = [0.0, 0.2, 0.3, 0.8, 8.0 / 9.0, 1.0, 1.0];
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
    const E: [f64; 7] = [
        71.0 / 57600.0,
        0.0,
        -71.0 / 16695.0,
        71.0 / 1920.0,
        -17253.0 / 339200.0,
        22.0 / 525.0,
        -1.0 / 40.0,
    ];
    let n = y0.len();
    let mut y = y0.to_vec();
    let mut k = vec![vec![0.0; n]; 7];
    let mut ytmp = vec![0.0; n];
    let mut ynew = vec![0.0; n];
    let mut yout = vec![0.0; n];
    let mut t = t0;
    let mut h = (t1 - t0) * 1e-3;
    let mut next_out = 0;
    let mut steps = 0;
    while next_out < t_out.len() && t_out[next_out] <= t0 {
        out(t_out[next_out], &y);
        next_out += 1;
    }
    f(t, &y, &mut k[0]);
    while t < t1 {
        if t + h > t1 {
            h = t1 - t;
        }
        for s in 1..7 {
            for i in 0..n {
                let mut acc = y[i];
                for (j, kj) in k.iter().enumerate().take(s) {
                    acc += h * A[s][j] * kj[i];
                }
                ytmp[i] = acc;
            }
            f(t + C[s] * h, &ytmp, &mut k[s]);
        }
        // 5th-order solution is ytmp after stage 7 (FSAL); error estimate.
        let mut err: f64 = 0.0;
        for i in 0..n {
            ynew[i] = ytmp[i];
            let mut e = 0.0;
            for (s, ks) in k.iter().enumerate() {
                e += E[s] * ks[i];
            }
            let sc = atol + rtol * y[i].abs().max(ynew[i].abs());
            err = err.max((h * e / sc).abs());
        }
        if err <= 1.0 {
            // Dense output by the 4th-order Hermite interpolant between t and t + h.
            while next_out < t_out.len() && t_out[next_out] <= t + h {
                let th = (t_out[next_out] - t) / h;
                for i in 0..n {
                    let (f0, f1) = (k[0][i], k[6][i]);
                    let (a, b) = (y[i], ynew[i]);
                    let h00 = 2.0 * th.powi(3) - 3.0 * th * th + 1.0;
                    let h10 = th.powi(3) - 2.0 * th * th + th;
                    let h01 = -2.0 * th.powi(3) + 3.0 * th * th;
                    let h11 = th.powi(3) - th * th;
                    yout[i] = h00 * a + h10 * h * f0 + h01 * b + h11 * h * f1;
                }
                out(t_out[next_out], &yout);
                next_out += 1;
            }
            t += h;
            y.copy_from_slice(&ynew);
            k.swap(0, 6);
            steps += 1;
        }
        let fac = if err == 0.0 {
            5.0
        } else {
            (0.9 * err.powf(-0.2)).clamp(0.2, 5.0)
        };
        h *= fac;
        if h.abs() < 1e-14 * t.abs().max(1.0) {
            return Err(format!("step size underflow at t = {t}"));
        }
    }
    Ok(steps)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn harmonic_oscillator() {
        let ts: Vec<f64> = (0..=10).map(|i| i as f64).collect();
        let mut got = Vec::new();
        dopri5(
            |_, y, d| {
                d[0] = y[1];
                d[1] = -y[0];
            },
            0.0,
            10.0,
            &[0.0, 1.0],
            &ts,
            1e-10,
            1e-12,
            |t, y| got.push((t, y[0])),
        )
        .unwrap();
        assert_eq!(got.len(), 11);
        for (t, y) in got {
            assert!((y - t.sin()).abs() < 1e-7, "t={t}");
        }
    }
}
