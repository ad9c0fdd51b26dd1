//! `ngreach background`: the background cosmology at a list of redshifts.

use serde_json::json;

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

/// Builds the background report.
///
/// # Errors
/// Invalid redshifts.
pub fn background_report(c: &Cosmology, source: &str, z: &[f64]) -> Result<Report> {
    validate_z(z)?;
    let bg = Background::new(c);
    let growth = Growth::new(c);
    let power = LinearPower::eisenstein_hu(c);
    let mut r = Report::new("background");
    r.notes = vec![
        "flat cosmology, massless neutrinos; distances and conformal time in Mpc; H in km/s/Mpc".into(),
        "growth = D(z)/D(0); growth_md = D(z) normalized to a in matter domination (the f_NL convention); growth_rate = dlnD/dlna".into(),
        "sigma8 from A_s with the Eisenstein-Hu (1998) transfer function, R = 8 Mpc/h".into(),
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
