//! Galaxy bias relations used as defaults.
//!
//! - b2(b1) = 0.412 - 2.143 b1 + 0.929 b1^2 + 0.008 b1^3, for delta_g containing
//!   (b2/2) delta^2 (Lazeyras, Wagner, Baldauf & Schmidt 2016, JCAP 02, 018, Eq. 5.2;
//!   coefficients from memory).
//! - Tidal bias from local-Lagrangian biasing, b_s2 = -(2/7)(b1 - 1), in the convention
//!   where the second-order kernel contains b_s2 S2(k1, k2), S2 = mu_12^2 - 1/3 (equivalent
//!   to b_G2 = -(2/7)(b1 - 1) with G2 = mu_12^2 - 1 up to a shift of b2; Baldauf et al.
//!   2012, Chan, Scoccimarro & Sheth 2012).
//! - Non-Gaussian bias response b_phi = 2 delta_c (b1 - p), delta_c = 1.686, p = 1 for a
//!   universal mass function (Dalal et al. 2008; Slosar et al. 2008).

use crate::constants::DELTA_C;

/// b2 from b1 (Lazeyras et al. 2016 fit).
pub fn b2_lazeyras(b1: f64) -> f64 {
    0.412 - 2.143 * b1 + 0.929 * b1 * b1 + 0.008 * b1 * b1 * b1
}

/// b_s2 from b1 (local Lagrangian, Z2 convention b_s2 S2).
pub fn bs2_local_lagrangian(b1: f64) -> f64 {
    -2.0 / 7.0 * (b1 - 1.0)
}

/// b_phi = 2 delta_c (b1 - p).
pub fn b_phi(b1: f64, p: f64) -> f64 {
    2.0 * DELTA_C * (b1 - p)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relations() {
        // b2 crosses zero near b1 ~ 1.4 for the Lazeyras fit... check sign changes.
        assert!(b2_lazeyras(1.0) < 0.0 && b2_lazeyras(3.0) > 0.0);
        assert_eq!(bs2_local_lagrangian(1.0), 0.0);
        assert!((b_phi(2.0, 1.0) - 3.372).abs() < 1e-12);
    }
}
