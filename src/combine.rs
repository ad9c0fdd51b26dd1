//! The combiner: joint CMB + survey constraints on the shared f_NL parameters, the
//! crossover k_max, and the improvement of the joint constraint over the best single
//! probe.
//!
//! Both engines return Fisher matrices over the f_NL parameters only, each probe's
//! nuisances already marginalized (the survey's per bin; the CMB has none). The CMB and
//! the survey observe different modes, so their Fisher matrices add:
//! F_joint(l_max, k_max) = F_CMB(l_max) + F_survey(k_max). Errors are reported
//! conditional (other shapes fixed) and marginalized over the other shapes asked for.
//!
//! Crossover: for a survey probe and a shape, the k_max at which the survey's sigma falls
//! below the CMB's (T+E, at the experiment's l_max), always with both sigmas on the same
//! basis: the headline uses single-shape sigmas (other f_NL fixed, nuisances
//! marginalized), and the run also reports it on sigmas marginalized over the other
//! shapes (`crate::report::outputs::crossovers`). Found by
//! linear interpolation of ln sigma in ln k_max between the bracketing grid points. When
//! the survey is below the CMB already at the first grid point the crossover is reported
//! at that point with `below_grid = true`; when it never gets below, `kmax_h_mpc` is
//! `None` ("not reached below k = the largest grid value").
//!
//! tau_NL ([`tau_joint`]): the CMB's collapsed-trispectrum information has no cross term
//! with f_NL at a Gaussian fiducial, the survey's power-spectrum information does; the
//! joint (tau_NL, f_NL local) matrix is the sum (the CMB's f_NL local information from
//! its bispectrum), and sigma(tau_NL) is reported with f_NL local marginalized. Its
//! crossover uses the same [`crossover`] on the survey's marginalized sigma(tau_NL).

use serde::Serialize;

use crate::fisher::FisherMatrix;

/// A crossover result.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Crossover {
    /// Crossing point in h/Mpc, or None when not reached on the grid.
    pub kmax_h_mpc: Option<f64>,
    /// True when the survey already beats the CMB at the first k_max of the grid.
    pub below_grid: bool,
    /// The CMB sigma it is compared with.
    pub cmb_sigma: f64,
    /// Human-readable statement.
    pub note: String,
}

/// Finds where `sigma` (on the increasing grid `k`) first drops to or below `target`.
pub fn crossover(k: &[f64], sigma: &[f64], target: f64) -> Crossover {
    let n = k.len().min(sigma.len());
    let kmax = k.get(n.wrapping_sub(1)).copied().unwrap_or(f64::NAN);
    let none = |note: String| Crossover {
        kmax_h_mpc: None,
        below_grid: false,
        cmb_sigma: target,
        note,
    };
    if n == 0 || !target.is_finite() || target <= 0.0 {
        return none("no CMB constraint to compare with".into());
    }
    if sigma[0] <= target {
        return Crossover {
            kmax_h_mpc: Some(k[0]),
            below_grid: true,
            cmb_sigma: target,
            note: format!(
                "already below the CMB at k = {}",
                crate::report::format_sig(k[0], 3)
            ),
        };
    }
    for i in 1..n {
        if sigma[i] <= target {
            let (s0, s1) = (sigma[i - 1], sigma[i]);
            let kk = if s0.is_finite() && s1 > 0.0 {
                let t = (target.ln() - s0.ln()) / (s1.ln() - s0.ln());
                (k[i - 1].ln() + t * (k[i].ln() - k[i - 1].ln())).exp()
            } else {
                k[i]
            };
            return Crossover {
                kmax_h_mpc: Some(kk),
                below_grid: false,
                cmb_sigma: target,
                note: format!("k = {} h/Mpc", crate::report::format_sig(kk, 3)),
            };
        }
    }
    none(format!(
        "not reached below k = {} h/Mpc",
        crate::report::format_sig(kmax, 3)
    ))
}

/// Conditional and marginalized sigma of every parameter of a Fisher matrix
/// (`inf` where there is no information).
pub fn sigmas(f: &FisherMatrix) -> (Vec<f64>, Vec<f64>) {
    let cond = (0..f.len()).map(|i| f.sigma_conditional(i)).collect();
    (cond, f.sigma_marginal_or_inf())
}

/// The log slope d ln F_ii / d ln l_max of the conditional Fisher information on a grid
/// (centred differences inside, one-sided at the ends; NaN for a one-point grid).
pub fn log_slopes(lmax: &[f64], info: &[f64]) -> Vec<f64> {
    let n = lmax.len().min(info.len());
    (0..n)
        .map(|i| {
            if n < 2 {
                return f64::NAN;
            }
            let (a, b) = if i == 0 {
                (0, 1)
            } else if i == n - 1 {
                (n - 2, n - 1)
            } else {
                (i - 1, i + 1)
            };
            if info[a] > 0.0 && info[b] > 0.0 {
                (info[b].ln() - info[a].ln()) / (lmax[b].ln() - lmax[a].ln())
            } else {
                f64::NAN
            }
        })
        .collect()
}

/// Improvement factor: the best single-probe marginalized sigma over the joint one.
pub fn improvement(single: &[f64], joint: f64) -> f64 {
    let best = single.iter().copied().fold(f64::INFINITY, f64::min);
    if joint > 0.0 && joint.is_finite() {
        best / joint
    } else {
        f64::NAN
    }
}

/// Joint sigma(tau_NL), (f_NL fixed, marginalized over f_NL local), of a CMB
/// experiment and a survey. The CMB contributes F(tau, tau) = `cmb_tau` from the
/// collapsed trispectrum and F(f, f) = `cmb_fnl_local` from the bispectrum (local f_NL
/// after marginalizing the other shapes; 0 when local is not among them), with no cross
/// term at a Gaussian fiducial; the survey contributes its (tau_nl, fnl_local) power-
/// spectrum matrix `survey`, whose cross term is not zero. The matrices add (different
/// modes), then f_NL local is marginalized.
pub fn tau_joint(cmb_tau: f64, cmb_fnl_local: f64, survey: &FisherMatrix) -> (f64, f64) {
    let (tt, tf, ff) = (
        cmb_tau + survey.get(0, 0),
        survey.get(0, 1),
        cmb_fnl_local + survey.get(1, 1),
    );
    let inv = |x: f64| {
        if x > 0.0 {
            1.0 / x.sqrt()
        } else {
            f64::INFINITY
        }
    };
    let schur = if ff > 0.0 { tt - tf * tf / ff } else { tt };
    (inv(tt), inv(schur))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tau_joint_adds_and_marginalizes() {
        let s = FisherMatrix::from_rows(
            vec!["tau_nl".into(), "fnl_local".into()],
            vec![4.0, 1.0, 1.0, 1.0],
        );
        let (c, m) = tau_joint(5.0, 0.0, &s);
        assert!((c - 1.0 / 3.0).abs() < 1e-12);
        // Schur: 9 - 1/1 = 8.
        assert!((m - 1.0 / 8f64.sqrt()).abs() < 1e-12);
        // CMB information on f_NL shrinks the marginalization penalty: 9 - 1/4.
        let (_, m2) = tau_joint(5.0, 3.0, &s);
        assert!((m2 - 1.0 / 8.75f64.sqrt()).abs() < 1e-12 && m2 < m);
    }

    #[test]
    fn crossover_interpolates_in_log() {
        let k = [0.05, 0.1, 0.2];
        let s = [20.0, 10.0, 5.0];
        // sigma ~ 1/k: crosses 7.0711 at k = 0.1 * sqrt(2).
        let c = crossover(&k, &s, 10.0 / 2f64.sqrt());
        assert!((c.kmax_h_mpc.unwrap() - 0.1 * 2f64.sqrt()).abs() < 1e-12);
        assert!(!c.below_grid);
        let c = crossover(&k, &s, 1.0);
        assert!(c.kmax_h_mpc.is_none() && c.note.contains("not reached below k = 0.2"));
        let c = crossover(&k, &s, 30.0);
        assert!(c.below_grid && c.kmax_h_mpc == Some(0.05));
    }

    #[test]
    fn slopes_of_a_power_law() {
        let l = [100.0, 200.0, 400.0, 800.0];
        let f: Vec<f64> = l.iter().map(|x: &f64| x.powi(2)).collect();
        for s in log_slopes(&l, &f) {
            assert!((s - 2.0).abs() < 1e-12);
        }
    }

    #[test]
    fn joint_improves_on_both() {
        let a = FisherMatrix::from_rows(vec!["x".into(), "y".into()], vec![1.0, 0.5, 0.5, 1.0]);
        let b = FisherMatrix::from_rows(vec!["x".into(), "y".into()], vec![2.0, -0.5, -0.5, 0.3]);
        let j = a.combine(&b);
        let (sa, sb, sj) = (
            a.sigma_marginal().unwrap(),
            b.sigma_marginal().unwrap(),
            j.sigma_marginal().unwrap(),
        );
        assert!(sj[0] <= sa[0] && sj[0] <= sb[0]);
        assert!(improvement(&[sa[0], sb[0]], sj[0]) >= 1.0);
    }
}
