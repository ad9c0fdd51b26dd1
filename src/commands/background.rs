//! `ngreach background`: the background cosmology at a list of redshifts.

use serde_json::json;

use crate::cmb::ThermalHistory;
use crate::cosmology::{Background, Cosmology, Growth, LinearPower};
use crate::error::{Error, Location, Result};
use crate::report::{Report, num};

/// Default redshift grid.
pub const DEFAULT_Z: [f64; 13] = [
    0.0, 0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 5.0, 10.0, 100.0, 1000.0, 1100.0,
];

/// Checks a redshift list.
///
/// # Errors
/// [`Error::OutOfRange`] naming `--z`.
pub fn validate_z(z: &[f64]) -> Result<()> {
    for &v in z {
        if !(v.is_finite() && (0.0..=1.0e6).contains(&v)) {
            return Err(Error::out_of_range(
                Location::Flag("--z".into()),
                "z",
                v,
                "0 <= z <= 1e6",
            ));
        }
    }
    if z.is_empty() {
        return Err(Error::BadField {
            at: Location::Flag("--z".into()),
            field: "z".into(),
            message: "give at least one redshift".into(),
        });
    }
    Ok(())
}

/// Builds the background report, with the last-scattering numbers of the thermal history
/// as top-level summary values.
///
/// # Errors
/// Invalid redshifts; a `reionization_optical_depth` no reionization redshift reproduces; a failure of the
/// recombination integration.
pub fn background_report(c: &Cosmology, source: &str, z: &[f64]) -> Result<Report> {
    validate_z(z)?;
    let bg = Background::new(c);
    let growth = Growth::new(c);
    let power = LinearPower::eisenstein_hu(c);
    let thermal = ThermalHistory::new(c, &bg)?;
    let th = thermal.summary();
    let mut r = Report::new("background");
    r.notes = vec![
        "flat cosmology, massless neutrinos; distances and conformal time in Mpc; H in km/s/Mpc".into(),
        "growth = D(z)/D(0); growth_md = D(z) normalized to a in matter domination (the f_NL convention); growth_rate = dlnD/dlna".into(),
        "sigma8 from A_s with the Eisenstein-Hu (1998) transfer function, R = 8 Mpc/h".into(),
        "thermal history: Seager-Sasselov-Scott three-level hydrogen with fudge 1.125 and the Rubino-Martin, Chluba, Fendt & Wandelt (2010) multilevel correction, three-level helium; tanh reionization (width 0.5 in z) at z_reio, fixed by reionization_optical_depth".into(),
        "z_star: recombination optical depth 1; z_drag: drag depth 1; r_star_mpc, r_drag_mpc: comoving sound horizons; theta_star_100 = 100 r_star / D_M(z_star); k_damping_mpc: diffusion damping wavenumber at z_star (1/Mpc); shell_width_mpc: FWHM of the visibility in conformal distance".into(),
    ];
    r.inputs = json!({
        "cosmology": super::cosmology_json(c, source),
        "z": z,
        "transfer": "eisenstein-hu",
    });
    r.summary.push(("sigma8".into(), num(power.sigma8(0.0))));
    r.summary
        .push(("conformal_age_mpc".into(), num(bg.conformal_age())));
    r.summary
        .push(("growth_md_today".into(), num(growth.d_md_today())));
    for (key, value) in [
        ("z_star", th.z_star),
        ("r_star_mpc", th.r_star_mpc),
        ("theta_star_100", th.theta_star_100),
        ("z_drag", th.z_drag),
        ("r_drag_mpc", th.r_drag_mpc),
        ("k_damping_mpc", th.k_damping_mpc),
        ("shell_width_mpc", th.visibility_fwhm_mpc),
        ("z_reio", th.z_reio),
    ] {
        r.summary.push((key.into(), num(value)));
    }
    r.columns = [
        "z",
        "hubble_km_s_mpc",
        "comoving_distance_mpc",
        "angular_diameter_distance_mpc",
        "conformal_time_mpc",
        "growth",
        "growth_md",
        "growth_rate",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    for &zz in z {
        r.rows.push(vec![
            num(zz),
            num(bg.hubble_km_s_mpc(zz)),
            num(bg.comoving_distance(zz)),
            num(bg.angular_diameter_distance(zz)),
            num(bg.conformal_time(zz)),
            num(growth.d_norm0(zz)),
            num(growth.d_md(zz)),
            num(growth.rate(zz)),
        ]);
    }
    Ok(r)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn summary_carries_thermal_keys() {
        let c = Cosmology::planck2018();
        let r = background_report(&c, "test", &[0.0, 1.0]).unwrap();
        let keys: Vec<&str> = r.summary.iter().map(|(k, _)| k.as_str()).collect();
        for k in [
            "sigma8",
            "conformal_age_mpc",
            "growth_md_today",
            "z_star",
            "r_star_mpc",
            "theta_star_100",
            "z_drag",
            "r_drag_mpc",
            "k_damping_mpc",
            "shell_width_mpc",
            "z_reio",
        ] {
            assert!(keys.contains(&k), "missing {k} in {keys:?}");
        }
        let get = |k: &str| {
            r.summary
                .iter()
                .find(|(n, _)| n == k)
                .unwrap()
                .1
                .as_f64()
                .unwrap()
        };
        // Same numbers as the library (checked against camb in src/cmb/thermal.rs).
        let th = ThermalHistory::new(&c, &Background::new(&c)).unwrap();
        assert_eq!(get("z_star"), th.summary().z_star);
        assert_eq!(get("shell_width_mpc"), th.summary().visibility_fwhm_mpc);
        assert!(get("z_star") > get("z_drag"));
    }
}
