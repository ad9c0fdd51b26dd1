//! Fisher assembly of the 3D survey forecast: per redshift bin the power spectrum
//! ([`crate::survey::power`]) and the tree-level galaxy bispectrum
//! ([`crate::survey::kernels`], summed with [`crate::survey::triangles`]) under the
//! covariance model of the survey ([`crate::survey::covariance`]), cumulative on a k_max
//! grid; nuisances marginalized per bin; bins add.
//!
//! Per bin the nuisances (b1 per tracer, P shot-noise amplitude A_P per tracer, b2, b_s2
//! and the two B shot-noise amplitudes of the bispectrum tracer, of the 1/nbar^2 term and
//! of the P_i/nbar term) are marginalized (Schur complement), with optional Gaussian
//! priors; P+B shares b1 and A_P between the probes. The P_i/nbar term of B has its own
//! amplitude (a separate stochastic correlator in the bias expansion; Desjacques, Jeong
//! & Schmidt 2018), so P's shot noise does not calibrate it.
//! With the realistic covariance the theoretical-error mode amplitudes are marginalized
//! first (Woodbury), P and B each with their own modes, and P+B adds the first-order P-B
//! cross-covariance term. The bispectrum uses the first tracer of each bin; its
//! orientation dependence is kept in full (average over (mu_1, phi), as in Gagrani &
//! Samushia 2017). Bins are independent volumes and their f_NL Fisher matrices add.

use rayon::prelude::*;

use crate::cosmology::LinearPower;
use crate::fisher::FisherMatrix;
use crate::survey::bispectrum::BispectrumBin;
use crate::survey::covariance::{CovarianceModel, ErrorModes, Pieces, TheoryError};
use crate::survey::kernels::{BispectrumModel, BispectrumTracer, TermSwitches};
use crate::survey::layout::Layout;
pub use crate::survey::linalg::MAX_TRACERS;
use crate::survey::power::{PowerBin, PowerTracer};
pub use crate::survey::response::{ShapeInput, SigmaTable, TracerResponse, delta_b};
use crate::survey::spec::{RedshiftBin, Survey};
use crate::survey::triangles::{TriangleRule, triangle_rows};

/// Which probes to compute.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize)]
pub enum Probe {
    /// Power spectrum.
    P,
    /// Bispectrum.
    B,
    /// Both (shared nuisances).
    PB,
}

impl Probe {
    /// Output label: "P", "B" or "P+B".
    pub fn label(self) -> &'static str {
        match self {
            Probe::P => "P",
            Probe::B => "B",
            Probe::PB => "P+B",
        }
    }

    /// Parses "P", "B", "P+B".
    pub fn parse(s: &str) -> Option<Self> {
        match s.trim() {
            "P" | "p" => Some(Probe::P),
            "B" | "b" => Some(Probe::B),
            "P+B" | "p+b" | "PB" => Some(Probe::PB),
            _ => None,
        }
    }
}

/// Numerical settings of the survey engine.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct SurveySettings {
    /// Gauss-Legendre nodes per k panel (power spectrum).
    pub k_nodes: usize,
    /// k panels per decade (power spectrum).
    pub panels_per_decade: usize,
    /// mu nodes on [0, 1] (power spectrum).
    pub mu_nodes: usize,
    /// Triangle bin width in units of the bin's fundamental mode k_f.
    pub dk_over_kf: f64,
    /// Orientation nodes in mu_1 on [0, 1] (bispectrum).
    pub orient_mu: usize,
    /// Orientation nodes in phi on [0, 2 pi) (bispectrum).
    pub orient_phi: usize,
    /// The triangle quadrature (exact first bins plus continuum; `exact_bins: None` is
    /// the exact triangle sum).
    pub triangles: TriangleRule,
    /// Terms of the bispectrum model.
    pub terms: TermSwitches,
    /// Run the outer loops in parallel.
    pub parallel: bool,
    /// Progress: one unit per finished redshift bin.
    #[serde(skip)]
    pub progress: crate::progress::Progress,
}

impl Default for SurveySettings {
    fn default() -> Self {
        Self {
            k_nodes: 4,
            panels_per_decade: 60,
            mu_nodes: 12,
            dk_over_kf: 1.0,
            orient_mu: 6,
            orient_phi: 8,
            triangles: TriangleRule::default(),
            terms: TermSwitches::default(),
            parallel: true,
            progress: crate::progress::Progress::silent(),
        }
    }
}

/// The f_NL Fisher matrices of one bin, per k_max, after nuisance marginalization.
#[derive(Debug, Clone, serde::Serialize)]
pub struct BinResult {
    /// The bin.
    pub bin: RedshiftBin,
    /// k_min used, 1/Mpc.
    pub kmin_mpc: f64,
    /// Fundamental mode, 1/Mpc.
    pub kf_mpc: f64,
    /// For each requested k_max: the k_max actually used in this bin (1/Mpc).
    pub kmax_used_mpc: Vec<f64>,
    /// The nonlinear scale of the bin (sigma rule at the survey's sigma_nl), 1/Mpc.
    pub k_nonlinear_mpc: f64,
    /// Per tracer: the non-Gaussian bias response (b_phi, b_phi-delta, R_L, k_S).
    pub responses: Vec<TracerResponse>,
    /// Per k_max, per probe (P, B, P+B): f_NL Fisher (nuisances marginalized).
    pub fisher: Vec<[FisherMatrix; 3]>,
}

/// The whole forecast.
#[derive(Debug, Clone, serde::Serialize)]
pub struct SurveyForecast {
    /// Requested k_max grid, 1/Mpc.
    pub kmax_mpc: Vec<f64>,
    /// Shape names (Fisher parameter order, as `fnl_<name>`).
    pub shapes: Vec<String>,
    /// The covariance model used.
    pub covariance: CovarianceModel,
    /// Per bin.
    pub bins: Vec<BinResult>,
    /// Summed over bins, per k_max and probe.
    pub total: Vec<[FisherMatrix; 3]>,
    /// Warnings (bins whose k_max passes the nonlinear scale).
    pub warnings: Vec<String>,
}

/// Runs the survey Fisher engine.
pub fn survey_fisher(
    survey: &Survey,
    power: &LinearPower,
    bg: &crate::cosmology::Background,
    shapes: &[ShapeInput],
    kmax_grid_mpc: &[f64],
    settings: &SurveySettings,
) -> SurveyForecast {
    let shape_names: Vec<String> = shapes.iter().map(|s| s.name.clone()).collect();
    let table = SigmaTable::new(power);
    let run_bin = |ib: usize| {
        bin_fisher(
            &table,
            survey,
            ib,
            power,
            bg,
            shapes,
            &shape_names,
            kmax_grid_mpc,
            settings,
        )
    };
    let bins: Vec<BinResult> = if settings.parallel {
        (0..survey.bins.len())
            .into_par_iter()
            .map(run_bin)
            .inspect(|_| settings.progress.inc(1))
            .collect()
    } else {
        (0..survey.bins.len())
            .map(run_bin)
            .inspect(|_| settings.progress.inc(1))
            .collect()
    };
    let fnl_owned: Vec<String> = shape_names.iter().map(|s| format!("fnl_{s}")).collect();
    let fnl_names: Vec<&str> = fnl_owned.iter().map(|s| s.as_str()).collect();
    let zero = FisherMatrix::zeros(&fnl_names);
    let total = (0..kmax_grid_mpc.len())
        .map(|ik| {
            let mut acc = [zero.clone(), zero.clone(), zero.clone()];
            for b in &bins {
                for (a, f) in acc.iter_mut().zip(&b.fisher[ik]) {
                    *a = a.combine(f);
                }
            }
            acc
        })
        .collect();
    let h = bg.cosmology().h();
    let mut warnings = Vec::new();
    for b in &bins {
        if let Some(&k) = b.kmax_used_mpc.last()
            && k > b.k_nonlinear_mpc * (1.0 + 1e-9)
        {
            warnings.push(format!(
                "{}: bin z = {:.2}-{:.2} uses k_max = {:.3} h/Mpc beyond its nonlinear scale {:.3} h/Mpc (sigma_nl = {})",
                survey.name,
                b.bin.z_min,
                b.bin.z_max,
                k / h,
                b.k_nonlinear_mpc / h,
                survey.sigma_nl
            ));
        }
    }
    SurveyForecast {
        kmax_mpc: kmax_grid_mpc.to_vec(),
        shapes: shape_names,
        covariance: survey.covariance,
        bins,
        total,
        warnings,
    }
}

/// The redshift-space model of a bin at z: the growth rate f (0 in real space) and the
/// squared damping length sigma_r^2 + sigma_v^2 in Mpc^2 (redshift error c sigma_z (1+z)/H
/// and velocity dispersion sigma_v (1+z)/H). Shared by the engine, the tau_NL power
/// spectra and the per-triangle budget.
pub(crate) fn redshift_space(
    survey: &Survey,
    power: &LinearPower,
    bg: &crate::cosmology::Background,
    z: f64,
) -> (f64, f64) {
    let f = if survey.real_space {
        0.0
    } else {
        power.growth().rate(z)
    };
    let hz = bg.hubble_km_s_mpc(z);
    let sig_r = crate::constants::C_KM_S * survey.redshift_error * (1.0 + z) / hz;
    let sig_v = survey.velocity_dispersion_km_s * (1.0 + z) / hz;
    (f, sig_r * sig_r + sig_v * sig_v)
}

/// The non-Gaussian bias response of one tracer in one bin, with the survey's response
/// model (full shape or the squeezed form cut at k_S). Shared by the engine and the
/// per-triangle information budget so that both use the same response.
pub(crate) fn tracer_response(
    survey: &Survey,
    table: &SigmaTable,
    power: &LinearPower,
    shapes: &[ShapeInput],
    b: &crate::survey::spec::TracerBin,
    z: f64,
) -> TracerResponse {
    let r = TracerResponse::new(table, power, shapes, b.b1, b.b2, b.b_phi, z);
    match survey.response {
        crate::survey::ResponseModel::FullShape => r.with_full_shape(table, power, shapes, b.b1, z),
        crate::survey::ResponseModel::SqueezedCut => r,
    }
}

#[allow(clippy::too_many_arguments)] // one bin of the engine needs all of these
fn bin_fisher(
    table: &SigmaTable<'_>,
    survey: &Survey,
    ib: usize,
    power: &LinearPower,
    bg: &crate::cosmology::Background,
    shapes: &[ShapeInput],
    shape_names: &[String],
    kmax_grid: &[f64],
    st: &SurveySettings,
) -> BinResult {
    let bin = survey.bins[ib];
    let z = bin.z_eff;
    let kf = 2.0 * std::f64::consts::PI / bin.volume_mpc3.cbrt();
    let kmin = survey.kmin_mpc.unwrap_or(kf);
    let kmax_used: Vec<f64> = kmax_grid
        .iter()
        .map(|&k| survey.kmax_for_bin(k, &bin, power).max(kmin))
        .collect();
    let k_nl = table.k_nonlinear(z, survey.sigma_nl);
    let (f, damp2) = redshift_space(survey, power, bg, z);
    let responses: Vec<TracerResponse> = survey
        .tracers
        .iter()
        .map(|t| tracer_response(survey, table, power, shapes, &t.bins[ib], z))
        .collect();
    let ptracers: Vec<PowerTracer> = survey
        .tracers
        .iter()
        .map(|t| PowerTracer {
            b1: t.bins[ib].b1,
            inv_n: 1.0 / t.bins[ib].nbar_mpc3,
        })
        .collect();
    let lay = Layout {
        n_shapes: shapes.len(),
        n_tracers: ptracers.len(),
    };
    let tracer_names: Vec<String> = survey.tracers.iter().map(|t| t.name.clone()).collect();
    let names = lay.names(shape_names, &tracer_names);
    let kmax_top = kmax_used.iter().cloned().fold(kmin, f64::max);
    let realistic = survey.covariance == CovarianceModel::Realistic;
    let te = TheoryError::default_for(bg.cosmology().h());
    let modes = ErrorModes::new(kmin, kmax_top, te.coherence_mpc);
    let pbin = PowerBin {
        z,
        f,
        damp2,
        volume: bin.volume_mpc3,
        kmin,
        tracers: &ptracers,
        responses: &responses,
        lay,
        shapes,
        power,
        theory: realistic.then_some((&te, &modes)),
        nodes: (st.k_nodes, st.panels_per_decade, st.mu_nodes),
        parallel: st.parallel,
    };
    let p_slots = pbin.slots(&kmax_used, kmax_top);
    let t0 = survey.tracers[0].bins[ib];
    let btracer = BispectrumTracer {
        b1: t0.b1,
        b2: t0.b2,
        bs2: t0.bs2,
        bphi: responses[0].b_phi,
        bphi_delta: responses[0].b_phi_delta,
        inv_n: 1.0 / t0.nbar_mpc3,
    };
    let dk = st.dk_over_kf * kf;
    let bctx = BispectrumBin {
        z,
        model: BispectrumModel {
            f,
            damp2,
            terms: st.terms,
        },
        tracer: btracer,
        response: &responses[0],
        lay,
        shapes,
        power,
        theory: realistic.then_some((&te, &modes)),
        orient: (st.orient_mu, st.orient_phi),
        cells: {
            let cdk = dk.max((kmax_top - kmin) / 400.0);
            (
                kmin,
                cdk,
                ((kmax_top - kmin) / cdk).ceil().max(1.0) as usize + 1,
                bin.volume_mpc3,
            )
        },
        parallel: st.parallel,
    };
    let rows = triangle_rows(
        &st.triangles,
        kmin,
        dk,
        kmax_top,
        &kmax_used,
        bin.volume_mpc3,
    );
    let b_cum = bctx.cumulative(&rows, &kmax_used, modes.weight);
    let fnl_names: Vec<&str> = names[..lay.n_shapes].iter().map(|s| s.as_str()).collect();
    let n = lay.n();
    let mut p_cum = Pieces::zeros(n, p_slots.first().map_or(0, |p| p.r));
    let fisher = (0..kmax_grid.len())
        .map(|ik| {
            p_cum.add(&p_slots[ik]);
            let fp = p_cum.fisher(modes.weight, realistic);
            let [fb_alone, fb_white] = b_cum[ik].clone();
            // With the P-B cross-covariance, P+B = P + the whitened bispectrum.
            let both: Vec<f64> = fp.iter().zip(&fb_white).map(|(a, b)| a + b).collect();
            let mk = |m: Vec<f64>, probe: Probe| {
                let fm = FisherMatrix::from_rows(names.clone(), m);
                marginalize_bin(&fm, &lay, survey, probe, &fnl_names)
            };
            [
                mk(fp, Probe::P),
                mk(fb_alone, Probe::B),
                mk(both, Probe::PB),
            ]
        })
        .collect();
    BinResult {
        bin,
        kmin_mpc: kmin,
        kf_mpc: kf,
        kmax_used_mpc: kmax_used,
        k_nonlinear_mpc: k_nl,
        responses,
        fisher,
    }
}

/// Removes the nuisances a probe does not constrain or the user fixed, adds priors and
/// marginalizes to the f_NL block. Unconstrained f_NL directions come out as zero rows.
fn marginalize_bin(
    m: &FisherMatrix,
    lay: &Layout,
    survey: &Survey,
    probe: Probe,
    fnl: &[&str],
) -> FisherMatrix {
    let sw = &survey.nuisance;
    let pr = &survey.priors;
    let names = m.names().to_vec();
    let mut free: Vec<usize> = Vec::new();
    let mut priors: Vec<(usize, f64)> = Vec::new();
    for t in 0..lay.n_tracers {
        // b1 and A_P enter B only for tracer 0.
        let in_probe = probe != Probe::B || t == 0;
        if sw.b1 && in_probe {
            free.push(lay.b1(t));
            if let Some(s) = pr.b1 {
                priors.push((lay.b1(t), s));
            }
        }
        if sw.p_shot && in_probe {
            free.push(lay.pshot(t));
            if let Some(s) = pr.p_shot {
                priors.push((lay.pshot(t), s));
            }
        }
    }
    if probe != Probe::P {
        for (on, idx, prior) in [
            (sw.b2, lay.b2(), pr.b2),
            (sw.bs2, lay.bs2(), pr.bs2),
            (sw.b_shot, lay.bshot(), pr.b_shot),
            (sw.b_shot_p, lay.bshot_p(), pr.b_shot_p),
        ] {
            if on {
                free.push(idx);
                if let Some(s) = prior {
                    priors.push((idx, s));
                }
            }
        }
    }
    // A nuisance this probe carries no information on (e.g. A_P in B alone under the
    // Gaussian covariance, where only B's own P_i/nbar amplitude multiplies that term)
    // is decoupled: marginalizing it changes nothing, and keeping it would make the
    // block singular.
    free.retain(|&i| m.get(i, i) > 0.0);
    priors.retain(|(i, _)| free.contains(i));
    let ns = lay.n_shapes;
    // Shapes with no information in this probe would make the matrix singular: keep
    // them out of the inversion and report zero information for them.
    let informative: Vec<usize> = (0..ns).filter(|&i| m.get(i, i) > 0.0).collect();
    let mut keep: Vec<usize> = informative.clone();
    keep.extend(&free);
    let keep_names: Vec<&str> = keep.iter().map(|&i| names[i].as_str()).collect();
    let mut sub = m.select(&keep_names).expect("names are from the matrix");
    for (idx, s) in priors {
        let _ = sub.add_prior(&names[idx], s);
    }
    let mut out = FisherMatrix::zeros(fnl);
    if informative.is_empty() {
        return out;
    }
    let inf_names: Vec<&str> = informative.iter().map(|&i| names[i].as_str()).collect();
    // A singular block (f_NL fully degenerate with the nuisances) leaves no information.
    if let Ok(marg) = sub.marginalize_to(&inf_names) {
        for (a, &i) in informative.iter().enumerate() {
            for (b, &j) in informative.iter().enumerate() {
                if j >= i {
                    out.add_sym(i, j, marg.get(a, b));
                }
            }
        }
    }
    out
}

#[cfg(test)]
mod tests;
