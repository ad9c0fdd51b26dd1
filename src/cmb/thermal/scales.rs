//! Derived scales of a thermal history: z_*, z_drag (depth roots), the visibility peak
//! and width, the sound horizon and the diffusion damping wavenumber.

use crate::cosmology::Background;
use crate::error::{Error, Result};
use crate::numerics::UniformHermite;

use super::{N_CELLS, ThermalHistory, ThermalSummary, Z_TABLE_MAX};

impl ThermalHistory {
    pub(super) fn derive(&self, bg: &Background) -> Result<ThermalSummary> {
        let lna_star = self.solve_depth(&self.tau_rec, &self.tau_rec_nodes, 1.0, "z_star")?;
        let lna_drag = self.solve_depth(&self.tau_drag, &self.tau_drag_nodes, 1.0, "z_drag")?;
        let a_star = lna_star.exp();
        let z_star = 1.0 / a_star - 1.0;
        let a_drag = lna_drag.exp();
        let r_star = self.sound_horizon_a(a_star);
        let d_m = bg.comoving_distance(z_star);
        let theta = r_star / d_m;
        let (lna_pk, fwhm) = self.visibility_peak()?;
        Ok(ThermalSummary {
            z_star,
            r_star_mpc: r_star,
            d_m_star_mpc: d_m,
            theta_star: theta,
            theta_star_100: 100.0 * theta,
            z_drag: 1.0 / a_drag - 1.0,
            r_drag_mpc: self.sound_horizon_a(a_drag),
            k_damping_mpc: self.damping_wavenumber_a(a_star),
            z_visibility_peak: (-lna_pk).exp() - 1.0,
            chi_visibility_peak_mpc: self.eta0 - self.eta_lna.eval(lna_pk),
            visibility_fwhm_mpc: fwhm,
            z_reio: self.reio.z_re,
            tau_reio: self.reio.tau_reio,
        })
    }

    /// ln a where a decreasing depth table equals `target`.
    fn solve_depth(
        &self,
        table: &UniformHermite,
        nodes: &[f64],
        target: f64,
        what: &'static str,
    ) -> Result<f64> {
        // nodes decrease with the index (depth from today).
        let k = nodes.partition_point(|&v| v > target);
        if k == 0 || k >= nodes.len() {
            return Err(Error::Numerical {
                stage: "thermal history",
                message: format!("{what}: depth {target} not reached inside z < {Z_TABLE_MAX}"),
            });
        }
        let (mut lo, mut hi) = (self.node(k - 1), self.node(k));
        for _ in 0..100 {
            let mid = 0.5 * (lo + hi);
            if table.eval(mid) > target {
                lo = mid;
            } else {
                hi = mid;
            }
            if hi - lo < 1e-15 {
                break;
            }
        }
        Ok(0.5 * (lo + hi))
    }

    fn node(&self, i: usize) -> f64 {
        if i >= N_CELLS {
            0.0
        } else {
            self.lna0 + i as f64 * self.dlna
        }
    }

    /// Visibility as a function of ln a (inside the table).
    fn visibility_lna(&self, lna: f64) -> f64 {
        let a = lna.exp();
        self.phys.kappa0 * self.x_e_lna(lna) / (a * a) * (-self.tau.eval(lna)).exp()
    }

    /// ln a of the visibility peak and the FWHM in conformal distance.
    fn visibility_peak(&self) -> Result<(f64, f64)> {
        let (i_pk, _) = self
            .visibility
            .iter()
            .enumerate()
            .fold((0, f64::MIN), |b, (i, &g)| if g > b.1 { (i, g) } else { b });
        if i_pk == 0 || i_pk >= N_CELLS {
            return Err(Error::Numerical {
                stage: "thermal history",
                message: "the visibility peak lies at the edge of the table".into(),
            });
        }
        // Golden-section search on [node(i-1), node(i+1)].
        let gr = 0.5 * (5.0_f64.sqrt() - 1.0);
        let (mut a, mut b) = (self.node(i_pk - 1), self.node(i_pk + 1));
        let mut c = b - gr * (b - a);
        let mut d = a + gr * (b - a);
        let (mut fc, mut fd) = (self.visibility_lna(c), self.visibility_lna(d));
        for _ in 0..80 {
            if fc > fd {
                b = d;
                d = c;
                fd = fc;
                c = b - gr * (b - a);
                fc = self.visibility_lna(c);
            } else {
                a = c;
                c = d;
                fc = fd;
                d = a + gr * (b - a);
                fd = self.visibility_lna(d);
            }
        }
        let lna_pk = 0.5 * (a + b);
        let half = 0.5 * self.visibility_lna(lna_pk);
        let crossing = |step: isize| -> Result<f64> {
            let mut j = i_pk as isize;
            while j > 0 && (j as usize) < N_CELLS && self.visibility[j as usize] > half {
                j += step;
            }
            if j <= 0 || j as usize >= N_CELLS {
                return Err(Error::Numerical {
                    stage: "thermal history",
                    message: "visibility half maximum not found".into(),
                });
            }
            // Bracket between node j (below half) and node j - step (above).
            let (mut inside, mut outside) = (self.node((j - step) as usize), self.node(j as usize));
            for _ in 0..100 {
                let mid = 0.5 * (inside + outside);
                if self.visibility_lna(mid) > half {
                    inside = mid;
                } else {
                    outside = mid;
                }
            }
            Ok(0.5 * (inside + outside))
        };
        let lna_left = crossing(-1)?; // earlier (higher z)
        let lna_right = crossing(1)?;
        let fwhm = self.eta_lna.eval(lna_right) - self.eta_lna.eval(lna_left);
        Ok((lna_pk, fwhm))
    }

    /// Comoving sound horizon r_s = Integral_0^eta c_s d eta at redshift z, in Mpc.
    pub fn sound_horizon(&self, z: f64) -> f64 {
        self.sound_horizon_a(1.0 / (1.0 + z.max(0.0)))
    }

    fn sound_horizon_a(&self, a: f64) -> f64 {
        // [0, a1] in a (integrand finite at a = 0), then panels in ln a.
        let a1 = a.min(1e-5);
        let p = &self.phys;
        let early = self.gl16.integrate(0.0, a1, |x| {
            let r = p.r_coef * x;
            p.d_h / (p.cosmo.e2_of_a(x).sqrt() * x * x * (3.0 * (1.0 + r)).sqrt())
        });
        early + self.integrate_lna(a1.ln(), a.ln(), |l| p.sound_speed_deta(l.exp()))
    }

    /// Diffusion damping wavenumber k_D at redshift z (1/Mpc), from
    /// k_D^-2 = Integral_0^eta d eta / [6 (1 + R) n_e sigma_T a] [R^2/(1 + R) + 16/15].
    pub fn damping_wavenumber(&self, z: f64) -> f64 {
        self.damping_wavenumber_a(1.0 / (1.0 + z.max(0.0)))
    }

    fn damping_wavenumber_a(&self, a: f64) -> f64 {
        let p = &self.phys;
        let weight = |a: f64| {
            let r = p.r_coef * a;
            (r * r / (1.0 + r) + 16.0 / 15.0) / (6.0 * (1.0 + r))
        };
        // d eta / (d tau/d eta) = d_H da / (kappa0 x_e E): finite at a -> 0.
        let a_min = self.lna0.exp();
        let a1 = a.min(a_min);
        let early = self.gl16.integrate(0.0, a1, |x| {
            p.d_h * weight(x) / (p.kappa0 * p.saha(x).x_e * p.e_of_a(x))
        });
        let mut late = 0.0;
        let lna = a.ln();
        if lna > self.lna0 {
            // Cell by cell on the table grid.
            let last = (((lna - self.lna0) / self.dlna).ceil() as usize).min(N_CELLS);
            for i in 0..last {
                let lo = self.node(i);
                let hi = self.node(i + 1).min(lna);
                if hi <= lo {
                    break;
                }
                late += self.gl4.integrate(lo, hi, |l| {
                    let x = l.exp();
                    p.d_h * x * weight(x) / (p.kappa0 * self.x_e_lna(l) * p.e_of_a(x))
                });
            }
        }
        1.0 / (early + late).sqrt()
    }
}
