//! Physical constants (CODATA 2018 exact or recommended values) and unit conversions.

/// Speed of light in km/s (exact).
pub const C_KM_S: f64 = 299_792.458;
/// Speed of light in m/s (exact).
pub const C_M_S: f64 = 299_792_458.0;
/// Newton's constant in m^3 kg^-1 s^-2 (CODATA 2018).
pub const G_NEWTON: f64 = 6.674_30e-11;
/// One megaparsec in metres (IAU 2015: 1 pc = 648000/pi au, 1 au exact).
pub const MPC_M: f64 = 3.085_677_581_491_367e22;
/// Stefan-Boltzmann constant in W m^-2 K^-4 (CODATA 2018, exact from h, k, c).
pub const SIGMA_SB: f64 = 5.670_374_419e-8;
/// Boltzmann constant in J/K (exact).
pub const K_BOLTZMANN: f64 = 1.380_649e-23;
/// Planck constant in J s (exact).
pub const H_PLANCK: f64 = 6.626_070_15e-34;
/// Electron mass in kg (CODATA 2018).
pub const M_ELECTRON: f64 = 9.109_383_701_5e-31;
/// Proton mass in kg (CODATA 2018).
pub const M_PROTON: f64 = 1.672_621_923_69e-27;
/// Hydrogen atom mass in kg (1.007825 u; CODATA 2018 atomic mass unit).
pub const M_HYDROGEN: f64 = 1.007_825_032 * 1.660_539_066_60e-27;
/// Thomson cross-section in m^2 (CODATA 2018).
pub const SIGMA_THOMSON: f64 = 6.652_458_732_1e-29;
/// Ratio of helium-4 to hydrogen atomic mass (4.002602 u / 1.007825 u).
pub const HE_TO_H_MASS: f64 = 4.002_602 / 1.007_825_032;
/// Neutrino to photon energy density per effective species: (7/8)(4/11)^(4/3).
pub const NEUTRINO_PER_SPECIES: f64 = 0.227_107_317_660_239_4;
/// Spherical collapse threshold delta_c used in the scale-dependent bias.
pub const DELTA_C: f64 = 1.686; // spherical collapse in EdS, 3 (12 pi)^(2/3) / 20 (Gunn & Gott 1972)
/// Seconds per year (Julian).
pub const YEAR_S: f64 = 365.25 * 86_400.0;
/// Arcminute in radians.
pub const ARCMIN: f64 = std::f64::consts::PI / (180.0 * 60.0);
/// Square degrees on the full sky.
pub const FULL_SKY_DEG2: f64 = 129_600.0 / std::f64::consts::PI;

/// Critical density today divided by h^2, in kg m^-3: 3 (100 km/s/Mpc)^2 / (8 pi G).
pub fn critical_density_over_h2() -> f64 {
    let h100 = 1.0e5 / MPC_M; // 100 km/s/Mpc in 1/s
    3.0 * h100 * h100 / (8.0 * std::f64::consts::PI * G_NEWTON)
}

/// Photon physical density omega_gamma = Omega_gamma h^2 for a CMB temperature in kelvin.
pub fn omega_gamma(t_cmb_k: f64) -> f64 {
    let a_rad = 4.0 * SIGMA_SB / C_M_S; // J m^-3 K^-4
    a_rad * t_cmb_k.powi(4) / (C_M_S * C_M_S) / critical_density_over_h2()
}

/// Hubble distance c/H0 in Mpc for a given h.
pub fn hubble_distance_mpc(h: f64) -> f64 {
    C_KM_S / (100.0 * h)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn photon_density_matches_textbook() {
        // omega_gamma = 2.47e-5 for T = 2.7255 K (e.g. Dodelson & Schmidt 2020, common practice).
        let w = omega_gamma(2.7255);
        assert!((w / 2.4729e-5 - 1.0).abs() < 5e-4, "{w}");
        // rho_crit/h^2 = 1.87834e-26 kg m^-3 (PDG).
        assert!((critical_density_over_h2() / 1.878_34e-26 - 1.0).abs() < 1e-4);
    }

    #[test]
    fn full_sky_area() {
        assert!((FULL_SKY_DEG2 - 41_252.96).abs() < 0.01);
    }
}
