//! CMB experiments: white noise per channel with a Gaussian beam, sky fraction and
//! multipole ranges, from an `[experiment]` TOML table.
//!
//! Noise (Knox 1995, PRD 52, 4307): per channel N_l = (Delta_T)^2
//! exp[l (l + 1) theta_FWHM^2 / (8 ln 2)], Delta_T in microkelvin-radian (input in
//! microkelvin-arcmin), channels combined by inverse variance, 1/N_l = Sum_c 1/N_l^c.
//! Polarization noise defaults to sqrt(2) times the temperature noise of the channel.
//! Internally spectra are dimensionless (Delta T / T): N_l is divided by T_CMB^2.

use serde::Deserialize;
use toml::Spanned;

use crate::constants::ARCMIN;
use crate::error::{Error, Location, Result};
use crate::input::{Source, parse_toml};

/// One frequency channel.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Channel {
    /// Label (e.g. the band).
    pub label: String,
    /// Temperature white noise, microkelvin-arcmin.
    pub noise_t_uk_arcmin: f64,
    /// Polarization white noise, microkelvin-arcmin.
    pub noise_p_uk_arcmin: f64,
    /// Beam FWHM, arcmin.
    pub fwhm_arcmin: f64,
}

/// A validated CMB experiment.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Experiment {
    /// Label.
    pub name: String,
    /// Sky fraction.
    pub f_sky: f64,
    /// Lowest multipole used.
    pub l_min: usize,
    /// Highest temperature multipole.
    pub lmax_t: usize,
    /// Highest polarization multipole.
    pub lmax_e: usize,
    /// Channels (empty: cosmic-variance limited).
    pub channels: Vec<Channel>,
}

impl Experiment {
    /// The ideal, noise-free, full-sky experiment to `lmax`.
    pub fn ideal(lmax: usize) -> Self {
        Self {
            name: "ideal (cosmic-variance limited)".into(),
            f_sky: 1.0,
            l_min: 2,
            lmax_t: lmax,
            lmax_e: lmax,
            channels: Vec::new(),
        }
    }

    /// Highest multipole of either field.
    pub fn lmax(&self) -> usize {
        self.lmax_t.max(self.lmax_e)
    }

    /// Noise power N_l (dimensionless, Delta T / T) for temperature (`pol = false`) or
    /// E polarization (`pol = true`); 0 for a noise-free experiment.
    pub fn noise(&self, l: usize, pol: bool, t_cmb_k: f64) -> f64 {
        if self.channels.is_empty() {
            return 0.0;
        }
        let t_uk = t_cmb_k * 1e6;
        let lf = l as f64;
        let mut inv = 0.0;
        for c in &self.channels {
            let d = if pol {
                c.noise_p_uk_arcmin
            } else {
                c.noise_t_uk_arcmin
            } * ARCMIN
                / t_uk;
            if d == 0.0 {
                return 0.0;
            }
            let th = c.fwhm_arcmin * ARCMIN;
            let arg = lf * (lf + 1.0) * th * th / (8.0 * std::f64::consts::LN_2);
            // Beyond exp(700) the channel carries no information.
            if arg < 700.0 {
                inv += 1.0 / (d * d * arg.exp());
            }
        }
        if inv > 0.0 { 1.0 / inv } else { f64::INFINITY }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct ChannelTable {
    label: Option<String>,
    noise_t_uk_arcmin: Spanned<f64>,
    noise_p_uk_arcmin: Option<Spanned<f64>>,
    fwhm_arcmin: Spanned<f64>,
}

/// The `[experiment]` table.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ExperimentTable {
    name: Option<String>,
    f_sky: Spanned<f64>,
    l_min: Option<Spanned<i64>>,
    lmax_t: Spanned<i64>,
    lmax_e: Option<Spanned<i64>>,
    #[serde(default)]
    channel: Vec<ChannelTable>,
}

/// A file with an `[experiment]` table.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ExperimentFile {
    /// The experiment.
    pub experiment: ExperimentTable,
}

impl ExperimentTable {
    /// Validates the table.
    ///
    /// # Errors
    /// Located range errors.
    pub fn resolve(&self, src: &Source) -> Result<Experiment> {
        let f_sky = *self.f_sky.get_ref();
        check_f_sky(f_sky, src.at(&self.f_sky), "f_sky")?;
        let int = |v: &Spanned<i64>, field: &str, lo: i64, hi: i64| -> Result<usize> {
            let x = *v.get_ref();
            if x < lo || x > hi {
                Err(Error::out_of_range(
                    src.at(v),
                    field,
                    x as f64,
                    &format!("{lo} <= {field} <= {hi}"),
                ))
            } else {
                Ok(x as usize)
            }
        };
        let l_min = match &self.l_min {
            Some(v) => int(v, "l_min", 2, 100)?,
            None => 2,
        };
        let lmax_t = int(&self.lmax_t, "lmax_t", 10, 5000)?;
        let lmax_e = match &self.lmax_e {
            Some(v) => int(v, "lmax_e", 10, 5000)?,
            None => lmax_t,
        };
        if l_min >= lmax_t.min(lmax_e) {
            return Err(Error::Conflict {
                at: src.at(&self.lmax_t),
                message: format!("l_min = {l_min} must be below lmax_t and lmax_e"),
            });
        }
        let mut channels = Vec::new();
        for c in &self.channel {
            let nt = *c.noise_t_uk_arcmin.get_ref();
            if !(nt.is_finite() && (0.0..=MAX_NOISE_UK_ARCMIN).contains(&nt)) {
                return Err(Error::out_of_range(
                    src.at(&c.noise_t_uk_arcmin),
                    "noise_t_uk_arcmin",
                    nt,
                    "0 <= noise <= 1e6 microkelvin-arcmin",
                ));
            }
            let np = match &c.noise_p_uk_arcmin {
                Some(v) => {
                    let x = *v.get_ref();
                    if !(x.is_finite() && (0.0..=MAX_NOISE_UK_ARCMIN).contains(&x)) {
                        return Err(Error::out_of_range(
                            src.at(v),
                            "noise_p_uk_arcmin",
                            x,
                            "0 <= noise <= 1e6 microkelvin-arcmin",
                        ));
                    }
                    x
                }
                None => std::f64::consts::SQRT_2 * nt,
            };
            let fw = *c.fwhm_arcmin.get_ref();
            if !(fw.is_finite() && (0.0..=600.0).contains(&fw)) {
                return Err(Error::out_of_range(
                    src.at(&c.fwhm_arcmin),
                    "fwhm_arcmin",
                    fw,
                    "0 <= fwhm_arcmin <= 600",
                ));
            }
            let label = c
                .label
                .clone()
                .unwrap_or_else(|| format!("channel {}", channels.len() + 1));
            if channels.iter().any(|o: &Channel| o.label == label) {
                return Err(Error::BadField {
                    at: src.at(&c.fwhm_arcmin),
                    field: "channel.label".into(),
                    message: format!("two channels are labelled `{label}`; label each once"),
                });
            }
            channels.push(Channel {
                label,
                noise_t_uk_arcmin: nt,
                noise_p_uk_arcmin: np,
                fwhm_arcmin: fw,
            });
        }
        Ok(Experiment {
            name: self
                .name
                .clone()
                .unwrap_or_else(|| src.path().display().to_string()),
            f_sky,
            l_min,
            lmax_t,
            lmax_e,
            channels,
        })
    }
}

/// The largest white-noise level accepted, microkelvin-arcmin (far above any channel
/// that carries information).
pub const MAX_NOISE_UK_ARCMIN: f64 = 1e6;

/// The smallest sky fraction accepted (0.1 deg^2).
pub const MIN_F_SKY: f64 = 2.5e-6;

/// Checks a sky fraction (`MIN_F_SKY <= f_sky <= 1`).
///
/// # Errors
/// [`Error::OutOfRange`] at `at` naming `field`.
pub fn check_f_sky(f_sky: f64, at: crate::error::Location, field: &str) -> Result<()> {
    if (MIN_F_SKY..=1.0).contains(&f_sky) {
        Ok(())
    } else {
        Err(Error::out_of_range(
            at,
            field,
            f_sky,
            "2.5e-6 <= f_sky <= 1 (0.1 deg^2 to the full sky)",
        ))
    }
}

/// Reads an experiment file.
///
/// # Errors
/// Input errors naming file and line.
pub fn load_experiment(path: &std::path::Path) -> Result<Experiment> {
    let src = Source::read(path)?;
    let f: ExperimentFile = parse_toml(&src)?;
    f.experiment.resolve(&src)
}

/// Validates a requested l_max list against an experiment.
///
/// # Errors
/// Values outside [l_min + 1, 5000].
pub fn validate_lmax(list: &[usize], l_min: usize) -> Result<()> {
    for &l in list {
        if l <= l_min || l > 5000 {
            return Err(Error::out_of_range(
                Location::Flag("--lmax".into()),
                "lmax",
                l as f64,
                &format!("{} <= lmax <= 5000", l_min + 1),
            ));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn knox_noise_and_inverse_variance() {
        let c = Channel {
            label: "a".into(),
            noise_t_uk_arcmin: 10.0,
            noise_p_uk_arcmin: 10.0 * std::f64::consts::SQRT_2,
            fwhm_arcmin: 5.0,
        };
        let one = Experiment {
            name: "x".into(),
            f_sky: 1.0,
            l_min: 2,
            lmax_t: 100,
            lmax_e: 100,
            channels: vec![c.clone()],
        };
        let two = Experiment {
            channels: vec![c.clone(), c],
            ..one.clone()
        };
        let t = 2.7255;
        assert!((one.noise(100, false, t) / two.noise(100, false, t) - 2.0).abs() < 1e-12);
        assert!((one.noise(100, true, t) / one.noise(100, false, t) - 2.0).abs() < 1e-12);
        // At l = 0 the beam is 1: N = (10 uK arcmin / T)^2.
        let n0 = one.noise(0, false, t);
        assert!((n0 - (10.0 * ARCMIN / (t * 1e6)).powi(2)).abs() < 1e-30);
        // Beam: exp(l(l+1) theta^2 / 8 ln 2).
        let th = 5.0 * ARCMIN;
        let ratio = one.noise(1000, false, t) / n0;
        assert!(
            (ratio.ln() - 1000.0 * 1001.0 * th * th / (8.0 * std::f64::consts::LN_2)).abs() < 1e-9
        );
        assert_eq!(Experiment::ideal(100).noise(50, true, t), 0.0);
    }
}
