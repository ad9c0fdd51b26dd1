//! The 3D survey Fisher engine: power spectrum with scale-dependent bias (multi-tracer),
//! tree-level galaxy bispectrum in redshift space, cumulative on a k_max grid.
//!
//! **Power spectrum** (per redshift bin, tracers a, b sharing the volume V):
//! C_ab(k, mu) = K_a K_b D_a D_b P_lin(k) + delta_ab A_a / nbar_a, with
//! K_a = b1_a + Delta b_a(k) + f mu^2 (Kaiser 1987), D_a = exp[-k^2 mu^2 (sigma_r^2 +
//! sigma_v^2) / 2] (redshift error sigma_r = c sigma_z (1+z) / H, velocity dispersion
//! sigma_v (1+z) / H), and Delta b_a = f_NL b_phi,a alpha(k),
//! alpha(k) = a_S (k / k_p)^Delta / M(k, z) for a shape with squeezed amplitude a_S and
//! index Delta (Dalal et al. 2008; Slosar et al. 2008; Schmidt & Kamionkowski 2010; the
//! amplitude is matched to the shape's squeezed limit at the primordial pivot k_p).
//! Fisher (Tegmark 1997; multi-tracer as in Seljak 2009, McDonald & Seljak 2009):
//! F_ij = V / (8 pi^2) Integral_{-1}^{1} d mu Integral k^2 dk Tr[C^-1 d_i C C^-1 d_j C],
//! the continuous-integral form (no discrete shells), from k_min to each k_max.
//!
//! **Bispectrum** (first tracer of each bin): B = [2 Z1(k1) Z1(k2) Z2(k1, k2) P1 P2 +
//! 2 perms] + Z1 Z1 Z1 M1 M2 M3 B_Phi + (A_P / nbar) Sum_i Z1(k_i)^2 P_i + A_B / nbar^2,
//! all times Prod_i D(k_i, mu_i), with the redshift-space kernels of Scoccimarro,
//! Couchman & Frieman 1999 (Z2 = b1 F2 + f mu^2 G2 + (f mu k / 2)[mu1/k1 Z1(k2) +
//! mu2/k2 Z1(k1)] + b2/2 + b_s2 S2) and Z1 = b1 + Delta b + f mu^2. Gaussian variance
//! Var B = s_123 (k_f^3 / V_123) Prod_i P_t(k_i, mu_i), V_123 = 8 pi^2 k1 k2 k3 dk^3,
//! P_t = Z1^2 D^2 P + A_P / nbar (Scoccimarro, Sefusatti & Zaldarriaga 2004; Sefusatti et
//! al. 2006). The orientation dependence is kept in full: the Fisher sum over triangle
//! bins averages d_i B d_j B / Prod P_t over the triangle's orientation (mu_1, phi)
//! (as in Gagrani & Samushia 2017). Kept at fiducial f_NL = 0: the primordial term and the
//! scale-dependent bias in Z1 (and in the shot-noise term); neglected: the second-order
//! non-Gaussian bias terms. The P-B cross-covariance is neglected (Gaussian level).
//!
//! Per bin the nuisances (b1 per tracer, P shot-noise amplitude per tracer, b2, b_s2 and
//! the B shot-noise amplitude of the bispectrum tracer) are marginalized (Schur
//! complement), with optional Gaussian priors; P+B shares b1 and A_P between the probes.
//! Bins are independent volumes and their f_NL Fisher matrices add.

use rayon::prelude::*;

use crate::cosmology::{LinearPower, Primordial};
use crate::fisher::FisherMatrix;
use crate::numerics::GaussLegendre;
use crate::shapes::Shape;
use crate::survey::spec::{RedshiftBin, Survey};

/// Most tracers per survey (the covariance algebra works on fixed-size arrays).
pub const MAX_TRACERS: usize = 4;

/// A primordial shape as the survey engine sees it: its bispectrum and the squeezed
/// limit that sets its scale-dependent bias.
#[derive(Debug, Clone)]
pub struct ShapeInput {
    /// Name for output.
    pub name: String,
    /// Squeezed amplitude a_S (local: 1); 0 when the shape has no leading squeezed term.
    pub squeezed_amplitude: f64,
    /// Power of k in the squeezed limit (local: 0), for the tilt in use.
    pub squeezed_index: f64,
    /// The shape (for B_Phi).
    pub shape: Shape,
    /// The primordial spectrum (for B_Phi).
    pub primordial: Primordial,
}

impl ShapeInput {
    /// From a shape: squeezed amplitude and index from [`Shape::squeezed_limit`], the
    /// index converted to a power of k for the primordial tilt.
    pub fn new(shape: Shape, primordial: Primordial) -> Self {
        let sq = shape.squeezed_limit();
        Self {
            name: shape.name(),
            squeezed_amplitude: sq.amplitude,
            squeezed_index: sq.k_index(primordial.n_s()),
            shape,
            primordial,
        }
    }

    /// B_Phi(k1, k2, k3) for f_NL = 1, Mpc^6, k in 1/Mpc.
    pub fn bispectrum(&self, k1: f64, k2: f64, k3: f64) -> f64 {
        self.shape.bispectrum_phi(&self.primordial, k1, k2, k3)
    }
}

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
    /// Per bin.
    pub bins: Vec<BinResult>,
    /// Summed over bins, per k_max and probe.
    pub total: Vec<[FisherMatrix; 3]>,
}

/// The fiducial quantities of one bin and one tracer that the integrands need.
#[derive(Clone, Copy)]
struct TracerFid {
    b1: f64,
    b2: f64,
    bs2: f64,
    bphi: f64,
    inv_n: f64,
}

/// Parameter layout of one bin.
struct Layout {
    n_shapes: usize,
    n_tracers: usize,
}

impl Layout {
    fn n(&self) -> usize {
        self.n_shapes + 2 * self.n_tracers + 3
    }
    fn b1(&self, t: usize) -> usize {
        self.n_shapes + 2 * t
    }
    fn pshot(&self, t: usize) -> usize {
        self.n_shapes + 2 * t + 1
    }
    fn b2(&self) -> usize {
        self.n_shapes + 2 * self.n_tracers
    }
    fn bs2(&self) -> usize {
        self.b2() + 1
    }
    fn bshot(&self) -> usize {
        self.b2() + 2
    }
    fn names(&self, shapes: &[String], tracer_names: &[String]) -> Vec<String> {
        let mut v: Vec<String> = shapes.iter().map(|s| format!("fnl_{s}")).collect();
        for t in tracer_names {
            v.push(format!("b1[{t}]"));
            v.push(format!("pshot[{t}]"));
        }
        v.push("b2".into());
        v.push("bs2".into());
        v.push("bshot".into());
        v
    }
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
    let run_bin = |ib: usize| {
        bin_fisher(
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
    SurveyForecast {
        kmax_mpc: kmax_grid_mpc.to_vec(),
        shapes: shape_names,
        bins,
        total,
    }
}

#[allow(clippy::too_many_arguments)] // one bin of the engine needs all of these
fn bin_fisher(
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
    let f = if survey.real_space {
        0.0
    } else {
        power.growth().rate(z)
    };
    let hz = bg.hubble_km_s_mpc(z);
    let sig_r = crate::constants::C_KM_S * survey.redshift_error * (1.0 + z) / hz;
    let sig_v = survey.velocity_dispersion_km_s * (1.0 + z) / hz;
    let damp2 = sig_r * sig_r + sig_v * sig_v;
    let tracers: Vec<TracerFid> = survey
        .tracers
        .iter()
        .map(|t| {
            let b = t.bins[ib];
            TracerFid {
                b1: b.b1,
                b2: b.b2,
                bs2: b.bs2,
                bphi: b.b_phi,
                inv_n: 1.0 / b.nbar_mpc3,
            }
        })
        .collect();
    let lay = Layout {
        n_shapes: shapes.len(),
        n_tracers: tracers.len(),
    };
    let tracer_names: Vec<String> = survey.tracers.iter().map(|t| t.name.clone()).collect();
    let names = lay.names(shape_names, &tracer_names);
    let kp = power.primordial().k_pivot();
    // alpha_s(k) = a_S (k/k_p)^Delta / M(k, z): zero for shapes without a squeezed term
    // at the order that matters (Delta >= 2, e.g. equilateral).
    let alpha = |s: &ShapeInput, k: f64| -> f64 {
        if s.squeezed_amplitude == 0.0 || s.squeezed_index >= 2.0 - 1e-9 {
            0.0
        } else {
            s.squeezed_amplitude * (k / kp).powf(s.squeezed_index) / power.m_factor(k, z)
        }
    };
    let ctx = BinCtx {
        z,
        f,
        damp2,
        volume: bin.volume_mpc3,
        kf,
        kmin,
        tracers: &tracers,
        lay: &lay,
        shapes,
        power,
        alpha: &alpha,
        st,
    };
    let kmax_top = kmax_used.iter().cloned().fold(kmin, f64::max);
    let p_cum = ctx.power_spectrum_cumulative(&kmax_used, kmax_top);
    let b_cum = ctx.bispectrum_cumulative(&kmax_used, kmax_top);
    let fnl_names: Vec<&str> = names[..lay.n_shapes].iter().map(|s| s.as_str()).collect();
    let fisher = (0..kmax_grid.len())
        .map(|ik| {
            let fp = FisherMatrix::from_rows(names.clone(), p_cum[ik].clone());
            let fb = FisherMatrix::from_rows(names.clone(), b_cum[ik].clone());
            let both = FisherMatrix::from_rows(
                names.clone(),
                p_cum[ik]
                    .iter()
                    .zip(&b_cum[ik])
                    .map(|(a, b)| a + b)
                    .collect(),
            );
            let mk = |m: &FisherMatrix, probe: Probe| {
                marginalize_bin(m, &lay, survey, probe, &fnl_names)
            };
            [mk(&fp, Probe::P), mk(&fb, Probe::B), mk(&both, Probe::PB)]
        })
        .collect();
    BinResult {
        bin,
        kmin_mpc: kmin,
        kf_mpc: kf,
        kmax_used_mpc: kmax_used,
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
        ] {
            if on {
                free.push(idx);
                if let Some(s) = prior {
                    priors.push((idx, s));
                }
            }
        }
    }
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

struct BinCtx<'a> {
    z: f64,
    f: f64,
    damp2: f64,
    volume: f64,
    kf: f64,
    kmin: f64,
    tracers: &'a [TracerFid],
    lay: &'a Layout,
    shapes: &'a [ShapeInput],
    power: &'a LinearPower,
    alpha: &'a (dyn Fn(&ShapeInput, f64) -> f64 + Sync),
    st: &'a SurveySettings,
}

impl BinCtx<'_> {
    /// Cumulative power-spectrum Fisher (full layout, row-major) at each k_max.
    fn power_spectrum_cumulative(&self, kmax_used: &[f64], kmax_top: f64) -> Vec<Vec<f64>> {
        let n = self.lay.n();
        let nt = self.tracers.len();
        let decades = (kmax_top / self.kmin).log10().max(1e-6);
        let n_panels = ((decades * self.st.panels_per_decade as f64).ceil() as usize).max(4);
        let mut edges: Vec<f64> = crate::numerics::log_grid(self.kmin, kmax_top, n_panels + 1);
        for &k in kmax_used {
            if k > self.kmin && k < kmax_top {
                edges.push(k);
            }
        }
        edges.sort_by(f64::total_cmp);
        edges.dedup_by(|a, b| (*a - *b).abs() <= 1e-12 * b.abs());
        let glk = GaussLegendre::new(self.st.k_nodes);
        let glm = GaussLegendre::new(self.st.mu_nodes);
        let (mu_x, mu_w) = glm.mapped(0.0, 1.0);
        let panel = |ip: usize| -> Vec<f64> {
            let mut acc = vec![0.0; n * n];
            let (ks, kw) = glk.mapped(edges[ip], edges[ip + 1]);
            // Scratch, allocated once per panel.
            let mut dc = vec![[0.0f64; MAX_TRACERS * MAX_TRACERS]; n];
            let mut mats = vec![[0.0f64; MAX_TRACERS * MAX_TRACERS]; n];
            let mut active: Vec<usize> = Vec::with_capacity(n);
            let mut alphas = vec![0.0; self.shapes.len()];
            for (&k, &wk) in ks.iter().zip(&kw) {
                let plin = self.power.p_mpc(k, self.z);
                for (a, s) in alphas.iter_mut().zip(self.shapes) {
                    *a = (self.alpha)(s, k);
                }
                for (&mu, &wm) in mu_x.iter().zip(&mu_w) {
                    let mu2 = mu * mu;
                    let d = (-k * k * mu2 * self.damp2 * 0.5).exp();
                    let mut kk = [0.0f64; MAX_TRACERS];
                    for (x, t) in kk.iter_mut().zip(self.tracers) {
                        *x = t.b1 + self.f * mu2;
                    }
                    // Covariance and its inverse.
                    let mut c = [0.0f64; MAX_TRACERS * MAX_TRACERS];
                    for a in 0..nt {
                        for b in 0..nt {
                            c[a * nt + b] = kk[a] * kk[b] * d * d * plin
                                + if a == b { self.tracers[a].inv_n } else { 0.0 };
                        }
                    }
                    let ci = invert_small(&c, nt);
                    for m in dc.iter_mut() {
                        m.iter_mut().for_each(|x| *x = 0.0);
                    }
                    for (s, &al) in alphas.iter().enumerate() {
                        for a in 0..nt {
                            for b in 0..nt {
                                dc[s][a * nt + b] = (self.tracers[a].bphi * al * kk[b]
                                    + kk[a] * self.tracers[b].bphi * al)
                                    * d
                                    * d
                                    * plin;
                            }
                        }
                    }
                    for t in 0..nt {
                        let ib = self.lay.b1(t);
                        for a in 0..nt {
                            for b in 0..nt {
                                let da = if a == t { kk[b] } else { 0.0 }
                                    + if b == t { kk[a] } else { 0.0 };
                                dc[ib][a * nt + b] = da * d * d * plin;
                            }
                        }
                        dc[self.lay.pshot(t)][t * nt + t] = self.tracers[t].inv_n;
                    }
                    // M_i = C^-1 dC_i; F_ij += Tr(M_i M_j).
                    active.clear();
                    active.extend((0..n).filter(|&i| dc[i].iter().any(|&x| x != 0.0)));
                    for (ai, &i) in active.iter().enumerate() {
                        mats[ai] = matmul_small(&ci, &dc[i], nt);
                    }
                    let w = wk * wm * 2.0 * self.volume * k * k
                        / (8.0 * std::f64::consts::PI * std::f64::consts::PI);
                    for (ai, &i) in active.iter().enumerate() {
                        for (aj, &j) in active.iter().enumerate().skip(ai) {
                            let tr = trace_prod(&mats[ai], &mats[aj], nt);
                            acc[i * n + j] += w * tr;
                            if i != j {
                                acc[j * n + i] += w * tr;
                            }
                        }
                    }
                }
            }
            acc
        };
        let per_panel: Vec<Vec<f64>> = if self.st.parallel {
            (0..edges.len() - 1).into_par_iter().map(panel).collect()
        } else {
            (0..edges.len() - 1).map(panel).collect()
        };
        kmax_used
            .iter()
            .map(|&km| {
                let mut s = vec![0.0; n * n];
                for (ip, p) in per_panel.iter().enumerate() {
                    if edges[ip + 1] <= km * (1.0 + 1e-12) {
                        s.iter_mut().zip(p).for_each(|(a, b)| *a += b);
                    }
                }
                s
            })
            .collect()
    }

    /// Cumulative bispectrum Fisher (full layout) at each k_max.
    fn bispectrum_cumulative(&self, kmax_used: &[f64], kmax_top: f64) -> Vec<Vec<f64>> {
        let n = self.lay.n();
        let dk = self.st.dk_over_kf * self.kf;
        let nk = ((kmax_top - self.kmin) / dk).floor().max(0.0) as usize;
        let kc = |i: usize| self.kmin + (i as f64 + 0.5) * dk;
        let glm = GaussLegendre::new(self.st.orient_mu);
        let (mu_x, mu_w) = glm.mapped(0.0, 1.0);
        let nphi = self.st.orient_phi;
        let t0 = self.tracers[0];
        let per_i = |i: usize| -> Vec<f64> {
            let mut acc = vec![0.0; n * n];
            let mut g = vec![0.0; n];
            let k1 = kc(i);
            for j in 0..=i {
                let k2 = kc(j);
                for l in 0..=j {
                    let k3 = kc(l);
                    if k1 > k2 + k3 {
                        continue;
                    }
                    let s123 = if i == j && j == l {
                        6.0
                    } else if i == j || j == l {
                        2.0
                    } else {
                        1.0
                    };
                    let tri = Triangle::new(k1, k2, k3);
                    let p = [
                        self.power.p_mpc(k1, self.z),
                        self.power.p_mpc(k2, self.z),
                        self.power.p_mpc(k3, self.z),
                    ];
                    let m = [
                        self.power.m_factor(k1, self.z),
                        self.power.m_factor(k2, self.z),
                        self.power.m_factor(k3, self.z),
                    ];
                    let bphi_prim: Vec<f64> = self
                        .shapes
                        .iter()
                        .map(|s| s.bispectrum(k1, k2, k3))
                        .collect();
                    let al: Vec<[f64; 3]> = self
                        .shapes
                        .iter()
                        .map(|s| {
                            [
                                (self.alpha)(s, k1),
                                (self.alpha)(s, k2),
                                (self.alpha)(s, k3),
                            ]
                        })
                        .collect();
                    // Number of triangles over s_123: V_123 / (s k_f^3) = V k1 k2 k3 dk^3 / (pi s).
                    let count =
                        self.volume * k1 * k2 * k3 * dk * dk * dk / (std::f64::consts::PI * s123);
                    let mut fsum = vec![0.0; n * n];
                    for (&mu1, &wm) in mu_x.iter().zip(&mu_w) {
                        for ip in 0..nphi {
                            let phi = 2.0 * std::f64::consts::PI * (ip as f64 + 0.5) / nphi as f64;
                            let mus = tri.mus(mu1, phi);
                            let gv = self.bispectrum_gradient(
                                &tri, &mus, &p, &m, &bphi_prim, &al, t0, &mut g,
                            );
                            let w = wm / nphi as f64 / gv;
                            for a in 0..n {
                                if g[a] == 0.0 {
                                    continue;
                                }
                                for b in a..n {
                                    fsum[a * n + b] += w * g[a] * g[b];
                                }
                            }
                        }
                    }
                    for a in 0..n {
                        for b in a..n {
                            let v = fsum[a * n + b] * count;
                            acc[a * n + b] += v;
                            if a != b {
                                acc[b * n + a] += v;
                            }
                        }
                    }
                }
            }
            acc
        };
        let per: Vec<Vec<f64>> = if self.st.parallel {
            (0..nk).into_par_iter().map(per_i).collect()
        } else {
            (0..nk).map(per_i).collect()
        };
        kmax_used
            .iter()
            .map(|&km| {
                let mut s = vec![0.0; n * n];
                for (i, v) in per.iter().enumerate() {
                    if kc(i) + 0.5 * dk <= km * (1.0 + 1e-12) {
                        s.iter_mut().zip(v).for_each(|(a, b)| *a += b);
                    }
                }
                s
            })
            .collect()
    }

    /// Fills `g` with d B / d theta at one orientation and returns Prod_i P_t(k_i, mu_i).
    #[allow(clippy::too_many_arguments)]
    fn bispectrum_gradient(
        &self,
        tri: &Triangle,
        mus: &[f64; 3],
        p: &[f64; 3],
        m: &[f64; 3],
        bprim: &[f64],
        al: &[[f64; 3]],
        t: TracerFid,
        g: &mut [f64],
    ) -> f64 {
        let lay = self.lay;
        let f = self.f;
        let ks = [tri.k1, tri.k2, tri.k3];
        let mut z1 = [0.0; 3];
        let mut d = [0.0; 3];
        for i in 0..3 {
            z1[i] = t.b1 + f * mus[i] * mus[i];
            d[i] = (-ks[i] * ks[i] * mus[i] * mus[i] * self.damp2 * 0.5).exp();
        }
        let dd = d[0] * d[1] * d[2];
        g.iter_mut().for_each(|x| *x = 0.0);
        // Pairs (i, j) with the third side opposite.
        const PAIRS: [(usize, usize, usize); 3] = [(0, 1, 2), (1, 2, 0), (0, 2, 1)];
        let mut dz2_db1 = [0.0; 3];
        let mut z2 = [0.0; 3];
        let mut s2 = [0.0; 3];
        for (pi, &(i, j, l)) in PAIRS.iter().enumerate() {
            let c = tri.cos[pi];
            let (ki, kj, kl) = (ks[i], ks[j], ks[l]);
            let f2 = 5.0 / 7.0 + 0.5 * c * (ki / kj + kj / ki) + 2.0 / 7.0 * c * c;
            let g2 = 3.0 / 7.0 + 0.5 * c * (ki / kj + kj / ki) + 4.0 / 7.0 * c * c;
            // k_ij = k_i + k_j = -k_l: mu k = -mu_l k_l.
            let muk = -mus[l] * kl;
            let mu_ij = -mus[l];
            let rsd = 0.5 * f * muk * (mus[i] / ki * z1[j] + mus[j] / kj * z1[i]);
            s2[pi] = c * c - 1.0 / 3.0;
            z2[pi] = t.b1 * f2 + f * mu_ij * mu_ij * g2 + rsd + 0.5 * t.b2 + t.bs2 * s2[pi];
            dz2_db1[pi] = f2 + 0.5 * f * muk * (mus[i] / ki + mus[j] / kj);
        }
        // b1
        let mut db1 = 0.0;
        let mut db2 = 0.0;
        let mut dbs2 = 0.0;
        for (pi, &(i, j, _)) in PAIRS.iter().enumerate() {
            let pp = 2.0 * p[i] * p[j];
            db1 += pp * ((z1[i] + z1[j]) * z2[pi] + z1[i] * z1[j] * dz2_db1[pi]);
            db2 += pp * z1[i] * z1[j] * 0.5;
            dbs2 += pp * z1[i] * z1[j] * s2[pi];
        }
        let shot_p: f64 = (0..3).map(|i| z1[i] * z1[i] * p[i]).sum::<f64>() * t.inv_n;
        db1 += t.inv_n * (0..3).map(|i| 2.0 * z1[i] * p[i]).sum::<f64>();
        g[lay.b1(0)] = db1 * dd;
        g[lay.b2()] = db2 * dd;
        g[lay.bs2()] = dbs2 * dd;
        g[lay.pshot(0)] = shot_p * dd;
        g[lay.bshot()] = t.inv_n * t.inv_n * dd;
        for s in 0..lay.n_shapes {
            let mut v = z1[0] * z1[1] * z1[2] * m[0] * m[1] * m[2] * bprim[s];
            let db = [t.bphi * al[s][0], t.bphi * al[s][1], t.bphi * al[s][2]];
            for (pi, &(i, j, _)) in PAIRS.iter().enumerate() {
                v += 2.0 * p[i] * p[j] * (db[i] * z1[j] + z1[i] * db[j]) * z2[pi];
            }
            v += t.inv_n * (0..3).map(|i| 2.0 * z1[i] * db[i] * p[i]).sum::<f64>();
            g[s] = v * dd;
        }
        let mut prod = 1.0;
        for i in 0..3 {
            prod *= z1[i] * z1[i] * d[i] * d[i] * p[i] + t.inv_n;
        }
        prod
    }
}

/// A triangle k1 + k2 + k3 = 0 with the cosines between its sides.
struct Triangle {
    k1: f64,
    k2: f64,
    k3: f64,
    /// cos(k1, k2), cos(k2, k3), cos(k1, k3) (angles between the vectors).
    cos: [f64; 3],
}

impl Triangle {
    fn new(k1: f64, k2: f64, k3: f64) -> Self {
        let c12 = ((k3 * k3 - k1 * k1 - k2 * k2) / (2.0 * k1 * k2)).clamp(-1.0, 1.0);
        let c23 = ((k1 * k1 - k2 * k2 - k3 * k3) / (2.0 * k2 * k3)).clamp(-1.0, 1.0);
        let c13 = ((k2 * k2 - k1 * k1 - k3 * k3) / (2.0 * k1 * k3)).clamp(-1.0, 1.0);
        Self {
            k1,
            k2,
            k3,
            cos: [c12, c23, c13],
        }
    }

    /// Line-of-sight cosines of the three sides for orientation (mu1, phi): mu1 is the
    /// cosine of k1, phi the azimuth of k2 about k1 (Scoccimarro, Couchman & Frieman 1999).
    fn mus(&self, mu1: f64, phi: f64) -> [f64; 3] {
        let c = self.cos[0];
        let s = (1.0 - c * c).max(0.0).sqrt();
        let mu2 = mu1 * c - (1.0 - mu1 * mu1).max(0.0).sqrt() * s * phi.cos();
        let mu3 = -(self.k1 * mu1 + self.k2 * mu2) / self.k3;
        [mu1, mu2, mu3]
    }
}

/// Inverse of a small symmetric positive-definite n x n matrix (n <= MAX_TRACERS), by
/// Gauss-Jordan elimination on a fixed-size array.
fn invert_small(
    a: &[f64; MAX_TRACERS * MAX_TRACERS],
    n: usize,
) -> [f64; MAX_TRACERS * MAX_TRACERS] {
    let mut m = *a;
    let mut inv = [0.0; MAX_TRACERS * MAX_TRACERS];
    for i in 0..n {
        inv[i * n + i] = 1.0;
    }
    for col in 0..n {
        let piv = m[col * n + col];
        for j in 0..n {
            m[col * n + j] /= piv;
            inv[col * n + j] /= piv;
        }
        for r in 0..n {
            if r != col {
                let fct = m[r * n + col];
                for j in 0..n {
                    m[r * n + j] -= fct * m[col * n + j];
                    inv[r * n + j] -= fct * inv[col * n + j];
                }
            }
        }
    }
    inv
}

fn matmul_small(
    a: &[f64; MAX_TRACERS * MAX_TRACERS],
    b: &[f64; MAX_TRACERS * MAX_TRACERS],
    n: usize,
) -> [f64; MAX_TRACERS * MAX_TRACERS] {
    let mut c = [0.0; MAX_TRACERS * MAX_TRACERS];
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

fn trace_prod(
    a: &[f64; MAX_TRACERS * MAX_TRACERS],
    b: &[f64; MAX_TRACERS * MAX_TRACERS],
    n: usize,
) -> f64 {
    let mut t = 0.0;
    for i in 0..n {
        for k in 0..n {
            t += a[i * n + k] * b[k * n + i];
        }
    }
    t
}

/// Scale-dependent bias Delta b(k, z) for f_NL = 1 of a shape and a tracer's b_phi
/// (k in 1/Mpc): b_phi a_S (k / k_p)^Delta / M(k, z), zero for shapes without a leading
/// squeezed term.
pub fn delta_b(shape: &ShapeInput, b_phi: f64, k: f64, z: f64, power: &LinearPower) -> f64 {
    if shape.squeezed_amplitude == 0.0 || shape.squeezed_index >= 2.0 - 1e-9 {
        return 0.0;
    }
    let kp = power.primordial().k_pivot();
    b_phi * shape.squeezed_amplitude * (k / kp).powf(shape.squeezed_index) / power.m_factor(k, z)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cosmology::{Background, Cosmology, Primordial};
    use crate::survey::spec::NuisanceSwitches;

    struct Setup {
        bg: Background,
        power: LinearPower,
        prim: Primordial,
        h: f64,
    }

    fn setup() -> Setup {
        let c = Cosmology::planck2018();
        Setup {
            bg: Background::new(&c),
            power: LinearPower::eisenstein_hu(&c),
            prim: Primordial::new(&c),
            h: c.h(),
        }
    }

    fn local(prim: Primordial) -> ShapeInput {
        ShapeInput::new(Shape::Local, prim)
    }

    fn local_b(prim: Primordial) -> impl Fn(f64, f64, f64) -> f64 + Sync {
        move |k1, k2, k3| {
            let (p1, p2, p3) = (prim.p_phi(k1), prim.p_phi(k2), prim.p_phi(k3));
            2.0 * (p1 * p2 + p2 * p3 + p1 * p3)
        }
    }

    fn sigma(fc: &SurveyForecast, ik: usize, probe: usize) -> f64 {
        fc.total[ik][probe].sigma_conditional(0)
    }

    #[test]
    fn local_scale_dependent_bias_goes_as_k_minus_two() {
        let s = setup();
        let shape = local(s.prim);
        let (k1, k2) = (1e-4, 2e-4);
        let slope = (delta_b(&shape, 3.0, k2, 1.0, &s.power)
            / delta_b(&shape, 3.0, k1, 1.0, &s.power))
        .ln()
            / 2f64.ln();
        assert!((slope + 2.0).abs() < 0.01, "slope {slope}");
        // Amplitude: Delta b = 3 f_NL (b1 - 1) delta_c Omega_m H0^2 / (k^2 T D) (Dalal et al. 2008).
        let c = Cosmology::planck2018();
        let h0 = c.h0_over_c_mpc();
        let d = s.power.growth().d_md(1.0);
        let expect = 3.0 * 1.0 * 1.686 * c.omega_m() * h0 * h0 / (k1 * k1 * d);
        let got = delta_b(&shape, 2.0 * 1.686, k1, 1.0, &s.power);
        assert!((got / expect - 1.0).abs() < 1e-3, "{got} {expect}");
        let eq = ShapeInput {
            squeezed_index: 2.0,
            ..local(s.prim)
        };
        assert_eq!(delta_b(&eq, 3.0, k1, 1.0, &s.power), 0.0);
    }

    fn quick(nbar_h3: f64, b1: f64, real_space: bool) -> Survey {
        Survey::quick(10.0, 1.0, nbar_h3, b1, real_space, 0.6736).unwrap()
    }

    #[test]
    fn power_spectrum_saturates_at_cosmic_variance() {
        let s = setup();
        let shapes = [local(s.prim)];
        let st = SurveySettings::default();
        let sig = |nbar: f64| {
            let mut sv = quick(nbar, 2.0, true);
            sv.nuisance = NuisanceSwitches {
                b1: false,
                b2: false,
                bs2: false,
                p_shot: false,
                b_shot: false,
            };
            let fc = survey_fisher(&sv, &s.power, &s.bg, &shapes, &[0.1 * s.h], &st);
            sigma(&fc, 0, 0)
        };
        let (a, b2, c) = (sig(1e-4), sig(1e-1), sig(1e1));
        assert!(a > b2 * 1.05, "shot noise must cost information: {a} {b2}");
        assert!((b2 / c - 1.0).abs() < 0.01, "saturation: {b2} {c}");
    }

    #[test]
    fn two_tracers_cancel_cosmic_variance() {
        let s = setup();
        let shapes = [local(s.prim)];
        let st = SurveySettings::default();
        let mut one = quick(1e2, 2.0, true);
        one.nuisance = NuisanceSwitches {
            b1: false,
            b2: false,
            bs2: false,
            p_shot: false,
            b_shot: false,
        };
        let mut two = one.clone();
        let mut t2 = two.tracers[0].clone();
        t2.name = "second".into();
        t2.bins[0].b1 = 1.2;
        t2.bins[0].b_phi = crate::survey::bias::b_phi(1.2, 1.0);
        two.tracers.push(t2);
        let s1 = sigma(
            &survey_fisher(&one, &s.power, &s.bg, &shapes, &[0.1 * s.h], &st),
            0,
            0,
        );
        let s2 = sigma(
            &survey_fisher(&two, &s.power, &s.bg, &shapes, &[0.1 * s.h], &st),
            0,
            0,
        );
        println!(
            "one tracer sigma = {s1:.3}, two tracers sigma = {s2:.4}, ratio {:.1}",
            s1 / s2
        );
        assert!(s1 / s2 > 10.0, "cosmic-variance cancellation: {s1} vs {s2}");
    }

    /// Brute force: real space, no damping, no nuisances: F = Sum_T (dB/dfNL)^2 / Var B
    /// evaluated per triangle with B written out directly.
    #[test]
    fn bispectrum_matches_brute_force() {
        let s = setup();
        let b = local_b(s.prim);
        let shapes = [local(s.prim)];
        let mut sv = quick(3e-4, 2.0, true);
        sv.bins[0].volume_mpc3 = 1e9;
        sv.nuisance = NuisanceSwitches {
            b1: false,
            b2: false,
            bs2: false,
            p_shot: false,
            b_shot: false,
        };
        let kmax = 0.08;
        let fc = survey_fisher(
            &sv,
            &s.power,
            &s.bg,
            &shapes,
            &[kmax],
            &SurveySettings {
                parallel: false,
                ..SurveySettings::default()
            },
        );
        let f_fast = fc.total[0][1].get(0, 0);
        // Brute force.
        let t = sv.tracers[0].bins[0];
        let z = 1.0;
        let v = 1e9_f64;
        let kf = 2.0 * std::f64::consts::PI / v.cbrt();
        let n_inv = 1.0 / t.nbar_mpc3;
        let mut f_brute = 0.0;
        let nk = ((kmax - kf) / kf).floor() as usize;
        for i in 0..nk {
            for j in 0..=i {
                for l in 0..=j {
                    let k = [
                        kf + (i as f64 + 0.5) * kf,
                        kf + (j as f64 + 0.5) * kf,
                        kf + (l as f64 + 0.5) * kf,
                    ];
                    if k[0] > k[1] + k[2] || k[0] + 0.5 * kf > kmax {
                        continue;
                    }
                    let p: Vec<f64> = k.iter().map(|&q| s.power.p_mpc(q, z)).collect();
                    let m: Vec<f64> = k.iter().map(|&q| s.power.m_factor(q, z)).collect();
                    let db: Vec<f64> = k
                        .iter()
                        .map(|&q| t.b_phi / s.power.m_factor(q, z))
                        .collect();
                    // Real-space Z2 = b1 F2 + b2/2 + bs2 S2 for each pair.
                    let z2 = |a: usize, bb: usize| {
                        let (ka, kb) = (k[a], k[bb]);
                        let kc = k[3 - a - bb];
                        let c = (kc * kc - ka * ka - kb * kb) / (2.0 * ka * kb);
                        t.b1 * (5.0 / 7.0 + 0.5 * c * (ka / kb + kb / ka) + 2.0 / 7.0 * c * c)
                            + 0.5 * t.b2
                            + t.bs2 * (c * c - 1.0 / 3.0)
                    };
                    let mut d = t.b1.powi(3) * m[0] * m[1] * m[2] * b(k[0], k[1], k[2]);
                    for (a, bb) in [(0, 1), (1, 2), (0, 2)] {
                        d += 2.0 * p[a] * p[bb] * (db[a] * t.b1 + t.b1 * db[bb]) * z2(a, bb);
                    }
                    d += n_inv * (0..3).map(|q| 2.0 * t.b1 * db[q] * p[q]).sum::<f64>();
                    let s123 = if i == j && j == l {
                        6.0
                    } else if i == j || j == l {
                        2.0
                    } else {
                        1.0
                    };
                    let var = s123 * kf.powi(3)
                        / (8.0 * std::f64::consts::PI.powi(2) * k[0] * k[1] * k[2] * kf.powi(3))
                        * (0..3).map(|q| t.b1 * t.b1 * p[q] + n_inv).product::<f64>();
                    f_brute += d * d / var;
                }
            }
        }
        assert!(
            (f_fast / f_brute - 1.0).abs() < 1e-9,
            "fast {f_fast} brute {f_brute}"
        );
    }

    /// Exact count of triangles (q1, q2, q3 = -q1 - q2) on the integer lattice with each
    /// |q_i| in a shell of width dk (units of k_f), against the continuum
    /// V_123 / k_f^6 = 8 pi^2 k1 k2 k3 dk^3 behind Var B. Shell edges are kept off
    /// integer radii, where many lattice points sit (edges at r = 15 or 17 exactly would
    /// drop all of them and bias the count low by ~8%).
    #[test]
    fn discrete_triangle_count_matches_continuum() {
        let dk = 2.0;
        let shell = |q: [i64; 3], c: f64| {
            let r = ((q[0] * q[0] + q[1] * q[1] + q[2] * q[2]) as f64).sqrt();
            (r - c).abs() < 0.5 * dk
        };
        let r = 18i64;
        let mut pts: Vec<[i64; 3]> = Vec::new();
        for x in -r..=r {
            for y in -r..=r {
                for zz in -r..=r {
                    pts.push([x, y, zz]);
                }
            }
        }
        let (mut tot_count, mut tot_cont) = (0.0, 0.0);
        for (c1, c2, c3) in [
            (16.3, 14.3, 12.3),
            (16.3, 16.3, 16.3),
            (15.3, 12.3, 10.3),
            (14.3, 12.3, 8.3),
        ] {
            let s1: Vec<[i64; 3]> = pts.iter().copied().filter(|&q| shell(q, c1)).collect();
            let s2: Vec<[i64; 3]> = pts.iter().copied().filter(|&q| shell(q, c2)).collect();
            let mut count = 0u64;
            for a in &s1 {
                for b in &s2 {
                    let q3 = [-(a[0] + b[0]), -(a[1] + b[1]), -(a[2] + b[2])];
                    if shell(q3, c3) {
                        count += 1;
                    }
                }
            }
            let cont = 8.0 * std::f64::consts::PI.powi(2) * c1 * c2 * c3 * dk.powi(3);
            let ratio = count as f64 / cont;
            println!(
                "shells ({c1},{c2},{c3}) dk={dk}: count {count}, continuum {cont:.0}, ratio {ratio:.4}"
            );
            assert!((ratio - 1.0).abs() < 0.05, "ratio {ratio}");
            tot_count += count as f64;
            tot_cont += cont;
        }
        println!("all four: ratio {:.4}", tot_count / tot_cont);
        assert!((tot_count / tot_cont - 1.0).abs() < 0.02);
    }

    #[test]
    fn fisher_is_psd_and_marginal_exceeds_conditional() {
        let s = setup();
        let shapes = [
            local(s.prim),
            ShapeInput {
                name: "half".into(),
                squeezed_index: 0.5,
                ..local(s.prim)
            },
        ];
        let sv = Survey::quick(5.0, 0.8, 5e-4, 1.8, false, 0.6736).unwrap();
        let fc = survey_fisher(
            &sv,
            &s.power,
            &s.bg,
            &shapes,
            &[0.05, 0.1],
            &SurveySettings::default(),
        );
        for per_k in &fc.total {
            for f in per_k {
                assert!(f.is_symmetric_psd(1e-9));
                let m = f.sigma_marginal_or_inf();
                for (i, mi) in m.iter().enumerate() {
                    assert!(*mi >= f.sigma_conditional(i) * (1.0 - 1e-9));
                }
            }
        }
        // More k means more information.
        assert!(fc.total[1][2].get(0, 0) > fc.total[0][2].get(0, 0));
    }
}
