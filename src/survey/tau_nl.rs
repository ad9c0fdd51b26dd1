//! tau_NL from the power spectra of one or more tracers: the stochastic scale-dependent
//! bias.
//!
//! With the modulation field a(x) of the collapsed trispectrum (Phi_s -> Phi_s (1 + a),
//! P_a = (25/9) tau_NL P_Phi, tau_NL = (6 f_NL / 5)^2 for a single local source; see
//! [`crate::cmb::collapsed`]) the peak-background split gives each tracer
//! delta_a = K_a delta_m + (b_phi,a / 2) a, b_phi,a = 2 delta_c (b1_a - p_a)
//! (Smith & LoVerde 2011; Baumann, Ferraro, Green & Smith 2013; Ferraro & Smith 2015).
//! With P_{a delta} = 2 f_NL P_m / M(k, z) the cross term is the usual scale-dependent
//! bias, and the auto term adds
//!
//!   C_ab ⊃ (25/36) tau_NL b_phi,a b_phi,b D_a D_b P_lin(k) / M(k, z)^2,
//!
//! which is not of the form (b_a + Delta b_a)(b_b + Delta b_b): for tau_NL > (6 f_NL/5)^2
//! the large-scale halo fields are not perfectly correlated (stochastic bias). K_a =
//! b1_a + f mu^2 (Kaiser), D_a = exp(-k^2 mu^2 (sigma_r^2 + sigma_v^2)/2), shot noise
//! A_a / nbar_a: the same bins, noise, redshift-space model and k_max rule as the f_NL
//! engine ([`crate::survey::fisher`]).
//!
//! Fisher (Gaussian covariance; Tegmark 1997, multi-tracer as in Seljak 2009): per bin
//! F_ij = V / (8 pi^2) Integral_{-1}^{1} d mu Integral_{k_min}^{k_max} k^2 dk
//! Tr[C^-1 d_i C C^-1 d_j C] over (tau_NL, f_NL local, b1 and A per tracer) at the
//! Gaussian fiducial (tau_NL = f_NL = 0); nuisances marginalized per bin with the survey's
//! switches and priors. **Cross term**: unlike the CMB (bispectrum and trispectrum are
//! uncorrelated at a Gaussian fiducial), the power spectrum carries both f_NL and tau_NL,
//! so F(tau_NL, f_NL) != 0 here; we report sigma(tau_NL) with f_NL fixed
//! (`sigma_conditional`) and marginalized over local f_NL (`sigma_marginal`).
//!
//! Covariance: Gaussian only for now ([`TauCovariance`]); a realistic covariance of the
//! survey engine would enter as another variant.

use rayon::prelude::*;

use crate::cosmology::LinearPower;
use crate::fisher::FisherMatrix;
use crate::numerics::GaussLegendre;
use crate::survey::fisher::{MAX_TRACERS, SurveySettings};
use crate::survey::spec::Survey;

/// P_a / (tau_NL P_Phi) = 25/9 and the tracer response b_phi / 2: (25/9) / 4.
const STOCHASTIC_FACTOR: f64 = 25.0 / 36.0;

/// The covariance model of the tau_NL power-spectrum Fisher.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub enum TauCovariance {
    /// Gaussian (disconnected) covariance of the tracers' power spectra.
    Gaussian,
}

impl TauCovariance {
    /// Output label.
    pub fn label(self) -> &'static str {
        match self {
            TauCovariance::Gaussian => "gaussian",
        }
    }
}

/// The (tau_NL, f_NL local) Fisher matrix of one bin or of the survey, per k_max.
#[derive(Debug, Clone, serde::Serialize)]
pub struct TauSurveyForecast {
    /// Requested k_max grid, 1/Mpc.
    pub kmax_mpc: Vec<f64>,
    /// Per bin, per k_max: Fisher over ["tau_nl", "fnl_local"], nuisances marginalized.
    pub bins: Vec<Vec<FisherMatrix>>,
    /// Summed over bins, per k_max.
    pub total: Vec<FisherMatrix>,
    /// Covariance model.
    pub covariance: TauCovariance,
}

impl TauSurveyForecast {
    /// (sigma(tau_NL) with f_NL fixed, sigma(tau_NL) marginalized over f_NL local) at
    /// k_max index `ik`.
    pub fn sigmas(&self, ik: usize) -> (f64, f64) {
        sigma_pair(&self.total[ik])
    }
}

/// (conditional, marginal over f_NL) sigma(tau_NL) of a (tau_nl, fnl_local) matrix.
pub fn sigma_pair(f: &FisherMatrix) -> (f64, f64) {
    let ftt = f.get(0, 0);
    let cond = if ftt > 0.0 {
        1.0 / ftt.sqrt()
    } else {
        f64::INFINITY
    };
    let (fff, ftf) = (f.get(1, 1), f.get(0, 1));
    let schur = if fff > 0.0 {
        ftt - ftf * ftf / fff
    } else {
        ftt
    };
    let marg = if schur > 0.0 {
        1.0 / schur.sqrt()
    } else {
        f64::INFINITY
    };
    (cond, marg)
}

/// Names of the two parameters.
pub const PARAMETERS: [&str; 2] = ["tau_nl", "fnl_local"];

/// Runs the tau_NL power-spectrum Fisher of a survey on a k_max grid (1/Mpc).
pub fn survey_tau_fisher(
    survey: &Survey,
    power: &LinearPower,
    bg: &crate::cosmology::Background,
    kmax_grid_mpc: &[f64],
    settings: &SurveySettings,
    covariance: TauCovariance,
) -> TauSurveyForecast {
    let run_bin = |ib: usize| bin_tau_fisher(survey, ib, power, bg, kmax_grid_mpc, settings);
    let bins: Vec<Vec<FisherMatrix>> = if settings.parallel {
        (0..survey.bins.len())
            .into_par_iter()
            .map(run_bin)
            .collect()
    } else {
        (0..survey.bins.len()).map(run_bin).collect()
    };
    let total = (0..kmax_grid_mpc.len())
        .map(|ik| {
            bins.iter()
                .fold(FisherMatrix::zeros(&PARAMETERS), |acc, b| {
                    acc.combine(&b[ik])
                })
        })
        .collect();
    TauSurveyForecast {
        kmax_mpc: kmax_grid_mpc.to_vec(),
        bins,
        total,
        covariance,
    }
}

/// The per-bin quantities the integrand needs.
struct BinModel<'a> {
    z: f64,
    f: f64,
    damp2: f64,
    b1: Vec<f64>,
    bphi: Vec<f64>,
    inv_n: Vec<f64>,
    power: &'a LinearPower,
}

impl BinModel<'_> {
    fn n_params(&self) -> usize {
        2 + 2 * self.b1.len()
    }

    /// Adds w Tr[C^-1 dC_i C^-1 dC_j] at (k, mu) to `acc` (n x n).
    fn add(&self, k: f64, mu: f64, w: f64, acc: &mut [f64]) {
        let nt = self.b1.len();
        let n = self.n_params();
        let plin = self.power.p_mpc(k, self.z);
        let alpha = 1.0 / self.power.m_factor(k, self.z);
        let mu2 = mu * mu;
        let d2 = (-k * k * mu2 * self.damp2).exp();
        let kk: Vec<f64> = self.b1.iter().map(|b| b + self.f * mu2).collect();
        let mut c = vec![0.0; nt * nt];
        for a in 0..nt {
            for b in 0..nt {
                c[a * nt + b] =
                    kk[a] * kk[b] * d2 * plin + if a == b { self.inv_n[a] } else { 0.0 };
            }
        }
        let ci = invert(&c, nt);
        let mut dc = vec![vec![0.0; nt * nt]; n];
        for a in 0..nt {
            for b in 0..nt {
                dc[0][a * nt + b] =
                    STOCHASTIC_FACTOR * self.bphi[a] * self.bphi[b] * alpha * alpha * d2 * plin;
                dc[1][a * nt + b] =
                    (self.bphi[a] * kk[b] + kk[a] * self.bphi[b]) * alpha * d2 * plin;
            }
        }
        for t in 0..nt {
            for a in 0..nt {
                for b in 0..nt {
                    let da = if a == t { kk[b] } else { 0.0 } + if b == t { kk[a] } else { 0.0 };
                    dc[2 + 2 * t][a * nt + b] = da * d2 * plin;
                }
            }
            dc[3 + 2 * t][t * nt + t] = self.inv_n[t];
        }
        let m: Vec<Vec<f64>> = dc.iter().map(|d| matmul(&ci, d, nt)).collect();
        for i in 0..n {
            for j in i..n {
                let mut tr = 0.0;
                for a in 0..nt {
                    for b in 0..nt {
                        tr += m[i][a * nt + b] * m[j][b * nt + a];
                    }
                }
                acc[i * n + j] += w * tr;
                if i != j {
                    acc[j * n + i] += w * tr;
                }
            }
        }
    }
}

fn matmul(a: &[f64], b: &[f64], n: usize) -> Vec<f64> {
    let mut c = vec![0.0; n * n];
    for i in 0..n {
        for k in 0..n {
            let aik = a[i * n + k];
            for j in 0..n {
                c[i * n + j] += aik * b[k * n + j];
            }
        }
    }
    c
}

/// Gauss-Jordan inverse of a small symmetric positive-definite matrix.
fn invert(a: &[f64], n: usize) -> Vec<f64> {
    let mut m = a.to_vec();
    let mut inv: Vec<f64> = (0..n * n)
        .map(|i| if i % (n + 1) == 0 { 1.0 } else { 0.0 })
        .collect();
    for col in 0..n {
        let p = (col..n)
            .max_by(|&x, &y| m[x * n + col].abs().total_cmp(&m[y * n + col].abs()))
            .unwrap_or(col);
        for j in 0..n {
            m.swap(col * n + j, p * n + j);
            inv.swap(col * n + j, p * n + j);
        }
        let d = m[col * n + col];
        for j in 0..n {
            m[col * n + j] /= d;
            inv[col * n + j] /= d;
        }
        for r in 0..n {
            if r != col {
                let f = m[r * n + col];
                for j in 0..n {
                    m[r * n + j] -= f * m[col * n + j];
                    inv[r * n + j] -= f * inv[col * n + j];
                }
            }
        }
    }
    inv
}

fn bin_tau_fisher(
    survey: &Survey,
    ib: usize,
    power: &LinearPower,
    bg: &crate::cosmology::Background,
    kmax_grid: &[f64],
    st: &SurveySettings,
) -> Vec<FisherMatrix> {
    let bin = survey.bins[ib];
    let z = bin.z_eff;
    let kf = 2.0 * std::f64::consts::PI / bin.volume_mpc3.cbrt();
    let kmin = survey.kmin_mpc.unwrap_or(kf);
    let kmax_used: Vec<f64> = kmax_grid
        .iter()
        .map(|&k| survey.kmax_for_bin(k, &bin, power).max(kmin))
        .collect();
    let (f, damp2) = crate::survey::fisher::redshift_space(survey, power, bg, z);
    let nt = survey.tracers.len().min(MAX_TRACERS);
    let model = BinModel {
        z,
        f,
        damp2,
        b1: survey.tracers[..nt].iter().map(|t| t.bins[ib].b1).collect(),
        bphi: survey.tracers[..nt]
            .iter()
            .map(|t| t.bins[ib].b_phi)
            .collect(),
        inv_n: survey.tracers[..nt]
            .iter()
            .map(|t| 1.0 / t.bins[ib].nbar_mpc3)
            .collect(),
        power,
    };
    let n = model.n_params();
    // Panels in ln k (the survey engine's density) with every k_max as an edge.
    let kmax_top = kmax_used.iter().copied().fold(kmin, f64::max);
    let decades = (kmax_top / kmin).log10().max(1e-6);
    let n_panels = ((decades * st.panels_per_decade as f64).ceil() as usize).max(4);
    let mut edges = crate::numerics::log_grid(kmin, kmax_top, n_panels + 1);
    for &k in &kmax_used {
        if k > kmin && k < kmax_top {
            edges.push(k);
        }
    }
    edges.sort_by(f64::total_cmp);
    edges.dedup_by(|a, b| (*a - *b).abs() <= 1e-12 * b.abs());
    let glk = GaussLegendre::new(st.k_nodes);
    let (mu_x, mu_w) = GaussLegendre::new(st.mu_nodes).mapped(0.0, 1.0);
    let panels: Vec<Vec<f64>> = (0..edges.len() - 1)
        .map(|ip| {
            let mut acc = vec![0.0; n * n];
            let (ks, kw) = glk.mapped(edges[ip], edges[ip + 1]);
            for (&k, &wk) in ks.iter().zip(&kw) {
                for (&mu, &wm) in mu_x.iter().zip(&mu_w) {
                    // mu on [0, 1] counted twice: Integral_{-1}^{1}.
                    let w = wk * wm * 2.0 * bin.volume_mpc3 * k * k
                        / (8.0 * std::f64::consts::PI * std::f64::consts::PI);
                    model.add(k, mu, w, &mut acc);
                }
            }
            acc
        })
        .collect();
    let mut names: Vec<String> = PARAMETERS.iter().map(|s| s.to_string()).collect();
    for t in &survey.tracers[..nt] {
        names.push(format!("b1[{}]", t.name));
        names.push(format!("pshot[{}]", t.name));
    }
    kmax_used
        .iter()
        .map(|&kmax| {
            let mut acc = vec![0.0; n * n];
            for (ip, p) in panels.iter().enumerate() {
                if edges[ip + 1] <= kmax * (1.0 + 1e-12) {
                    for (a, b) in acc.iter_mut().zip(p) {
                        *a += b;
                    }
                }
            }
            marginalize(FisherMatrix::from_rows(names.clone(), acc), survey, nt)
        })
        .collect()
}

/// Applies the survey's nuisance switches and priors and marginalizes to (tau, f_NL).
fn marginalize(m: FisherMatrix, survey: &Survey, nt: usize) -> FisherMatrix {
    let sw = &survey.nuisance;
    let pr = &survey.priors;
    let names = m.names().to_vec();
    let mut keep: Vec<&str> = PARAMETERS.to_vec();
    let mut priors: Vec<(String, f64)> = Vec::new();
    for t in 0..nt {
        if sw.b1 {
            keep.push(names[2 + 2 * t].as_str());
            if let Some(s) = pr.b1 {
                priors.push((names[2 + 2 * t].clone(), s));
            }
        }
        if sw.p_shot {
            keep.push(names[3 + 2 * t].as_str());
            if let Some(s) = pr.p_shot {
                priors.push((names[3 + 2 * t].clone(), s));
            }
        }
    }
    let Ok(mut sub) = m.select(&keep) else {
        return FisherMatrix::zeros(&PARAMETERS);
    };
    for (name, s) in priors {
        let _ = sub.add_prior(&name, s);
    }
    sub.marginalize_to(&PARAMETERS)
        .unwrap_or_else(|_| FisherMatrix::zeros(&PARAMETERS))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cosmology::{Background, Cosmology};
    use crate::survey::spec::Tracer;

    fn setup() -> (Cosmology, LinearPower, Background) {
        let c = Cosmology::planck2018();
        let p = LinearPower::eisenstein_hu(&c);
        let bg = Background::new(&c);
        (c, p, bg)
    }

    fn quick(c: &Cosmology, vol: f64, b1: f64) -> Survey {
        let mut s = Survey::quick(vol, 1.0, 1e-3, b1, true, c.h()).unwrap();
        s.kmin_mpc = Some(0.002);
        s
    }

    fn sigma(s: &Survey, p: &LinearPower, bg: &Background, kmax: f64) -> (f64, f64) {
        let st = SurveySettings {
            parallel: false,
            ..Default::default()
        };
        survey_tau_fisher(s, p, bg, &[kmax], &st, TauCovariance::Gaussian).sigmas(0)
    }

    /// The integrated Fisher against a brute-force sum over the Fourier modes of a
    /// periodic box (single tracer, real space, f_NL and nuisances fixed):
    /// F = (1/2) Sum_{k in box, k_min < |k| <= k_max} (dC_tau / C)^2, where the sum
    /// over all k vectors counts each independent mode pair (k, -k) once with weight 1.
    #[test]
    fn stochastic_term_against_mode_sum() {
        let (c, p, bg) = setup();
        let mut s = quick(&c, 2.0, 2.0);
        s.nuisance.b1 = false;
        s.nuisance.p_shot = false;
        let side = s.bins[0].volume_mpc3.cbrt();
        let kf = 2.0 * std::f64::consts::PI / side;
        let (kmin, kmax) = (10.0 * kf, 30.0 * kf);
        s.kmin_mpc = Some(kmin);
        let st = SurveySettings {
            parallel: false,
            ..Default::default()
        };
        let fc = survey_tau_fisher(&s, &p, &bg, &[kmax], &st, TauCovariance::Gaussian);
        let f_int = fc.total[0].get(0, 0);
        let t = &s.tracers[0].bins[0];
        let z = s.bins[0].z_eff;
        let mut f_sum = 0.0;
        let nmax = 31_i64;
        for i in -nmax..=nmax {
            for j in -nmax..=nmax {
                for l in -nmax..=nmax {
                    let k = kf * ((i * i + j * j + l * l) as f64).sqrt();
                    if k <= kmin || k > kmax {
                        continue;
                    }
                    let pl = p.p_mpc(k, z);
                    let al = 1.0 / p.m_factor(k, z);
                    let cc = t.b1 * t.b1 * pl + 1.0 / t.nbar_mpc3;
                    let dc = STOCHASTIC_FACTOR * t.b_phi * t.b_phi * al * al * pl;
                    f_sum += 0.5 * (dc / cc).powi(2);
                }
            }
        }
        let rel = f_int / f_sum - 1.0;
        println!("F(tau): integral {f_int:.4e}, mode sum {f_sum:.4e} ({rel:+.3})");
        // The discrete shells differ from the continuum near k_f (measured: 6% from
        // k_min = 3 k_f, where the steep integrand weights the lowest shells; 0.3% here).
        assert!(rel.abs() < 0.02, "{rel}");
    }

    /// Two tracers of different bias beat the better one alone; sigma ~ V^-1/2.
    #[test]
    fn multi_tracer_and_volume_scaling() {
        let (c, p, bg) = setup();
        let kmax = 0.1 * c.h();
        let a = quick(&c, 10.0, 1.5);
        let b = quick(&c, 10.0, 3.0);
        let mut both = a.clone();
        let mut tb: Tracer = b.tracers[0].clone();
        tb.name = "second".into();
        both.tracers.push(tb);
        let (sa, _) = sigma(&a, &p, &bg, kmax);
        let (sb, _) = sigma(&b, &p, &bg, kmax);
        let (sab, sab_m) = sigma(&both, &p, &bg, kmax);
        println!(
            "sigma(tau_NL): b=1.5 {sa:.4e}, b=3 {sb:.4e}, both {sab:.4e} (marginal over f_NL {sab_m:.4e})"
        );
        assert!(sab < sa.min(sb), "{sab} vs {sa} {sb}");
        assert!(sab_m >= sab);
        // Volume: x4 volume at fixed k range -> sigma / 2.
        let big = quick(&c, 40.0, 1.5);
        let (s4, _) = sigma(&big, &p, &bg, kmax);
        let ratio = sa / s4;
        println!("volume x4: sigma ratio {ratio:.4} (expected 2)");
        assert!((ratio / 2.0 - 1.0).abs() < 0.01, "{ratio}");
    }
}
