//! Cost guards: the work of a request is estimated before it is done, and a request that
//! would exceed sane limits is refused with the estimate and the way to proceed
//! (`--allow-large`), instead of running for hours. Also the cap on worker threads.
//!
//! The estimates count what the engines loop over: survey bispectrum triangles (the
//! survey engine's cost grows as (k_max / k_f)^3 per redshift bin), grid points of a
//! batch plan, entries of a list. The limits are set so that a request inside them runs
//! in about a minute or less on a two-core machine.

use crate::cosmology::LinearPower;
use crate::error::{Error, Location, Result};
use crate::survey::Survey;

/// Survey bispectrum triangles (summed over redshift bins) allowed without
/// `--allow-large`: measured about 3e5 triangles per second on two cores (one tracer,
/// three shapes), so the limit is about a minute.
pub const MAX_SURVEY_TRIANGLES: f64 = 2.0e7;

/// Grid points of a batch plan allowed without `--allow-large`.
pub const MAX_PLAN_POINTS: usize = 1000;

/// Entries of one input list (a k_max or l_max grid, a plan's values, `--z`) allowed
/// without `--allow-large`.
pub const MAX_LIST_LEN: usize = 1000;

/// Worker threads per core allowed; more are capped (with a warning).
pub const THREADS_PER_CORE: usize = 4;

/// What the caller allows.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Limits {
    /// `--allow-large`: run requests above the limits.
    pub allow_large: bool,
}

impl Limits {
    /// Refuses `estimate` above `limit` unless large requests are allowed.
    ///
    /// # Errors
    /// [`Error::TooLarge`] with the estimate, the limit and `hint`.
    pub fn guard(
        &self,
        at: Location,
        what: &str,
        estimate: f64,
        limit: f64,
        unit: &str,
        hint: &str,
    ) -> Result<()> {
        if self.allow_large || estimate <= limit {
            return Ok(());
        }
        Err(Error::TooLarge {
            at,
            what: what.into(),
            estimate: format!(
                "{} {unit}, above the limit of {} {unit}",
                sig(estimate),
                sig(limit)
            ),
            hint: format!("{hint}, or pass --allow-large to run it anyway"),
        })
    }

    /// Refuses a list longer than [`MAX_LIST_LEN`].
    ///
    /// # Errors
    /// [`Error::TooLarge`] naming the list.
    pub fn list(&self, at: Location, field: &str, len: usize) -> Result<()> {
        self.guard(
            at,
            &format!("list `{field}` has {len} entries"),
            len as f64,
            MAX_LIST_LEN as f64,
            "entries",
            "give fewer values",
        )
    }
}

fn sig(x: f64) -> String {
    if x.abs() < 1e6 {
        format!("{}", x.round())
    } else {
        format!("{x:.2e}")
    }
}

/// The k_max of each redshift bin (1/Mpc) that the engine will use for a requested k_max
/// (1/Mpc), by the survey's k_max rule with the linear power `power` (callers pass the
/// Eisenstein-Hu power, whose k_nonlinear is within a few percent of any other model's).
pub fn bin_kmax_mpc(survey: &Survey, requested_mpc: f64, power: &LinearPower) -> Vec<f64> {
    survey
        .bins
        .iter()
        .map(|b| survey.kmax_for_bin(requested_mpc, b, power))
        .collect()
}

/// The k_min (1/Mpc) of each redshift bin: the `kmin_h_mpc` override, else the bin's
/// fundamental mode 2 pi / V^(1/3).
pub fn bin_kmin_mpc(survey: &Survey) -> Vec<f64> {
    survey
        .bins
        .iter()
        .map(|b| {
            survey
                .kmin_mpc
                .unwrap_or(2.0 * std::f64::consts::PI / b.volume_mpc3.cbrt())
        })
        .collect()
}

/// Estimated number of bispectrum triangle bins the survey engine visits up to the
/// largest requested k_max (1/Mpc) with triangle bins `dk_over_kf` fundamental modes
/// wide: per redshift bin, the closed triangles k1 >= k2 >= k3 among the n =
/// (k_max - k_min) / dk shells, counted exactly (O(n^2)) up to n = 4000 and as n^3 / 12
/// above (where any request is far beyond the limit).
pub fn survey_triangles(
    survey: &Survey,
    kmax_top_mpc: f64,
    power: &LinearPower,
    dk_over_kf: f64,
) -> f64 {
    let kmax = bin_kmax_mpc(survey, kmax_top_mpc, power);
    let kmin = bin_kmin_mpc(survey);
    survey
        .bins
        .iter()
        .zip(kmax.iter().zip(&kmin))
        .map(|(b, (&hi, &lo))| {
            let kf = 2.0 * std::f64::consts::PI / b.volume_mpc3.cbrt();
            let dk = dk_over_kf * kf;
            let n = ((hi - lo) / dk).max(0.0);
            if !n.is_finite() || n > 4000.0 {
                return n * n * n / 12.0;
            }
            let n = n.floor() as i64;
            let offset = lo / dk + 0.5;
            let mut count = 0.0;
            for i in 0..n {
                for j in 0..=i {
                    // k3 = k_min + (l + 1/2) dk >= k1 - k2 = (i - j) dk.
                    let l_lo = ((i - j) as f64 - offset).ceil().max(0.0) as i64;
                    count += (j + 1 - l_lo).max(0) as f64;
                }
            }
            count
        })
        .sum()
}

/// Refuses a survey forecast whose triangle count exceeds [`MAX_SURVEY_TRIANGLES`].
///
/// # Errors
/// [`Error::TooLarge`] at `at` with the estimate.
pub fn check_survey_cost(
    survey: &Survey,
    kmax_top_mpc: f64,
    power: &LinearPower,
    dk_over_kf: f64,
    at: Location,
    limits: &Limits,
) -> Result<()> {
    let n = survey_triangles(survey, kmax_top_mpc, power, dk_over_kf);
    limits.guard(
        at,
        &format!(
            "survey `{}` up to k_max = {} /Mpc: bispectrum triangles (about 3e5 per second on two cores)",
            survey.name,
            sig3(kmax_top_mpc),
        ),
        n,
        MAX_SURVEY_TRIANGLES,
        "triangles",
        "lower k_max or the volume (the count grows as (k_max / k_f)^3 per bin, k_f = 2 pi / V^(1/3))",
    )
}

fn sig3(x: f64) -> String {
    format!("{x:.3}")
}

/// Checks that every k_max of a grid (1/Mpc) leaves Fourier modes in some redshift bin
/// (above the bin's k_min). Returns warnings for k_max values that leave some bins
/// without modes.
///
/// # Errors
/// [`Error::BadField`] at `at` (field `field`) for a k_max that leaves no modes in any
/// bin.
pub fn check_kmax_modes(
    survey: &Survey,
    kmax_grid_mpc: &[f64],
    power: &LinearPower,
    h: f64,
    at: &Location,
    field: &str,
) -> Result<Vec<String>> {
    let kmin = bin_kmin_mpc(survey);
    let mut warnings = Vec::new();
    for &k in kmax_grid_mpc {
        let hi = bin_kmax_mpc(survey, k, power);
        let empty: Vec<usize> = (0..kmin.len()).filter(|&i| hi[i] <= kmin[i]).collect();
        if empty.len() == kmin.len() {
            let lo = kmin.iter().copied().fold(f64::INFINITY, f64::min);
            return Err(Error::BadField {
                at: at.clone(),
                field: field.into(),
                message: format!(
                    "k_max = {} h/Mpc leaves no Fourier modes in any redshift bin of survey `{}`{}: \
                     the k_max of each bin must exceed k_min = {} h/Mpc (kmin_h_mpc, else the \
                     fundamental mode 2 pi / V^(1/3) of the bin)",
                    sig3(k / h),
                    survey.name,
                    rule_note(survey),
                    sig3(lo / h)
                ),
            });
        }
        if !empty.is_empty() {
            warnings.push(format!(
                "survey `{}`: k_max = {} h/Mpc is below k_min in {} of {} redshift bins (bins {:?} add nothing at this k_max)",
                survey.name,
                sig3(k / h),
                empty.len(),
                kmin.len(),
                empty
            ));
        }
    }
    Ok(warnings)
}

/// The cost and sanity checks of a resolved scenario that need the whole scenario:
/// grid lengths, survey triangle counts, and k_max values that leave no modes. Returns
/// warnings (k_max values that leave some redshift bins empty).
///
/// # Errors
/// [`Error::TooLarge`] or [`Error::BadField`], at the scenario file (field
/// `kmax_h_mpc` or `lmax`).
pub fn check_scenario(sc: &crate::scenario::Scenario, limits: &Limits) -> Result<Vec<String>> {
    let at = Location::WholeFile(sc.source.clone().into());
    limits.list(at.clone(), "lmax", sc.lmax.len())?;
    limits.list(at.clone(), "kmax_h_mpc", sc.kmax_h_mpc.len())?;
    let c = &sc.cosmology;
    let power = LinearPower::eisenstein_hu(c);
    let h = c.h();
    let kmax_mpc: Vec<f64> = sc.kmax_h_mpc.iter().map(|k| k * h).collect();
    let top = kmax_mpc.iter().copied().fold(0.0, f64::max);
    let dk = crate::survey::fisher::SurveySettings::default().dk_over_kf;
    let mut warnings = Vec::new();
    for e in &sc.experiments {
        let below: Vec<usize> = sc.lmax.iter().copied().filter(|&l| l <= e.l_min).collect();
        if below.len() == sc.lmax.len() {
            return Err(Error::BadField {
                at: at.clone(),
                field: "lmax".into(),
                message: format!(
                    "every l_max {:?} is at or below l_min = {} of experiment `{}`: it would add no multipoles",
                    sc.lmax, e.l_min, e.name
                ),
            });
        }
        if !below.is_empty() {
            warnings.push(format!(
                "experiment `{}`: l_max {below:?} at or below its l_min = {} (no multipoles there: those rows are empty)",
                e.name, e.l_min
            ));
        }
    }
    for s in &sc.surveys {
        warnings.extend(check_kmax_modes(
            s,
            &kmax_mpc,
            &power,
            h,
            &at,
            "kmax_h_mpc",
        )?);
        check_survey_cost(s, top, &power, dk, at.clone(), limits)?;
    }
    Ok(warnings)
}

fn rule_note(survey: &Survey) -> String {
    match survey.kmax_rule {
        crate::survey::spec::KmaxRule::Fixed => String::new(),
        crate::survey::spec::KmaxRule::Growth => " (after its `growth` k_max rule)".into(),
        crate::survey::spec::KmaxRule::Sigma => format!(
            " (after its `sigma` k_max rule with sigma_nl = {}: raise sigma_nl)",
            survey.sigma_nl
        ),
    }
}

/// The number of worker threads to use for `--threads N`: at least 1, at most
/// [`THREADS_PER_CORE`] per available core. Returns the count and a warning when capped.
///
/// # Errors
/// [`Error::OutOfRange`] at `--threads` for 0.
pub fn thread_count(n: usize) -> Result<(usize, Option<String>)> {
    if n == 0 {
        return Err(Error::out_of_range(
            Location::Flag("--threads".into()),
            "threads",
            0.0,
            "threads >= 1",
        ));
    }
    let cores = std::thread::available_parallelism().map_or(1, |c| c.get());
    let cap = THREADS_PER_CORE * cores;
    if n > cap {
        return Ok((
            cap,
            Some(format!(
                "--threads {n} capped at {cap} ({THREADS_PER_CORE} per available core, {cores} cores)"
            )),
        ));
    }
    Ok((n, None))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cosmology::{Background, Cosmology};

    #[test]
    fn triangle_estimate_matches_brute_force_count() {
        // Brute force: the engine's loop bounds, counted.
        let c = Cosmology::planck2018();
        let s = Survey::quick(0.05, 1.0, 1e-3, 2.0, false, c.h()).unwrap();
        let g = LinearPower::eisenstein_hu(&c);
        let _ = Background::new(&c);
        let kmax = 0.3 * c.h();
        let est = survey_triangles(&s, kmax, &g, 1.0);
        let b = s.bins[0];
        let kf = 2.0 * std::f64::consts::PI / b.volume_mpc3.cbrt();
        let nk = ((kmax - kf) / kf).floor() as usize;
        let kc = |i: usize| kf + (i as f64 + 0.5) * kf;
        let mut count = 0usize;
        for i in 0..nk {
            for j in 0..=i {
                for l in 0..=j {
                    if kc(i) <= kc(j) + kc(l) {
                        count += 1;
                    }
                }
            }
        }
        assert_eq!(est, count as f64, "estimate {est} vs count {count}");
    }

    #[test]
    fn guard_refuses_and_allows() {
        let l = Limits::default();
        assert!(l.guard(Location::Builtin, "x", 2.0, 1.0, "u", "h").is_err());
        assert!(l.guard(Location::Builtin, "x", 1.0, 1.0, "u", "h").is_ok());
        let big = Limits { allow_large: true };
        assert!(
            big.guard(Location::Builtin, "x", 2.0, 1.0, "u", "h")
                .is_ok()
        );
        let e = l.list(Location::Flag("--z".into()), "z", 5000).unwrap_err();
        assert!(e.to_string().contains("--allow-large"), "{e}");
    }

    #[test]
    fn threads_are_capped() {
        assert!(thread_count(0).is_err());
        let (n, w) = thread_count(100_000).unwrap();
        assert!(n < 100_000 && w.is_some());
        assert_eq!(thread_count(1).unwrap(), (1, None));
    }
}
