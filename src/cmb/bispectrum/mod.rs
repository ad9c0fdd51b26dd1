//! The CMB bispectrum Fisher engine: T, E and T+E, any separable primordial shape, the
//! cumulative Fisher matrix on a whole l_max grid in one pass.
//!
//! For shapes B_Phi = Sum_t c_t P(k1)^p1 P(k2)^p2 P(k3)^p3 (all permutations written out,
//! [`crate::shapes::Separable`]) the reduced bispectrum is
//! b^XYZ_{l1 l2 l3} = Sum_t c_t Integral r^2 dr X^{p1,X}_{l1}(r) X^{p2,Y}_{l2}(r)
//! X^{p3,Z}_{l3}(r), with X^{p,X}_l(r) = (2/pi) Integral k^2 dk P_Phi(k)^p Delta^X_l(k)
//! j_l(k r) (Komatsu & Spergel 2001, PRD 63, 063002, for local; the same line-of-sight
//! form for every separable template). The Fisher matrix (Komatsu & Spergel 2001; T+E as
//! in Babich & Zaldarriaga 2004, Yadav, Komatsu & Wandelt 2007) is
//! F_ij = (f_sky / 6) Sum_{l1 l2 l3} G^2_{l1 l2 l3} Sum b^i_{XYZ} C^-1_{XX'} C^-1_{YY'}
//! C^-1_{ZZ'} b^j_{X'Y'Z'}, G^2 = (2l1+1)(2l2+1)(2l3+1)/(4 pi) (l1 l2 l3; 0 0 0)^2, the
//! unrestricted sum over all l's (equal to the restricted sum with 1/Delta_{l1l2l3}).
//!
//! Fast path (exact; Smith & Zaldarriaga 2006, astro-ph/0612571): with
//! (l1 l2 l3; 0 0 0)^2 = (1/2) Integral_{-1}^{1} P_l1 P_l2 P_l3 d mu, the sum factorizes:
//! F_ij = (f_sky / 48 pi) Integral d mu Integral r^2 dr Integral r'^2 dr'
//! Sum_{t in i, u in j} c_t c_u Prod_{a=1..3} S_{p_ta p_ua}(r, r', mu), with
//! S_ab(r, r', mu) = Sum_l (2l+1) P_l(mu) Sum_XY X^{a,X}_l(r) C^-1_{l,XY} X^{b,Y}_l(r').
//! Gauss-Legendre in mu with ceil(3 l_max / 2) + 1 nodes integrates the degree-3 l_max
//! polynomial exactly, and S is a matrix product over l for each mu (blocked, via
//! matrixmultiply's dgemm). Accumulating S over l in blocks that end at the l_max grid
//! values gives the whole cumulative grid in one pass. Cost: N_mu x N_pairs x N_r^2 x
//! (fields x l_max) multiply-adds.
//!
//! Layout: `plan` (radial functions and inverse covariances), `radial_cache` (the
//! radial functions on disk, shared between experiments and runs), `compress` (the
//! per-block low-rank bases), `engine` (the mu sums over blocks and the l_max grid),
//! `kernel` (the per-mu block update and triple products), `simd` (run-time selection of
//! vector instructions for the hot loops), `oracle` (the brute-force triple sum).

mod compress;
mod engine;
mod kernel;
mod oracle;
mod plan;
mod radial_cache;
mod simd;
#[cfg(test)]
pub(crate) mod tests;

pub use engine::cmb_fisher_with_options;
pub use kernel::legendre_all;
pub use oracle::brute_force_fisher;
pub use plan::{BispectrumPlan, PlanTimes};

use crate::cmb::experiment::Experiment;
use crate::cmb::lensing::LensedSpectra;
use crate::cmb::transfer::{RadialGrid, TransferTable};
use crate::cosmology::Primordial;
use crate::fisher::FisherMatrix;
use crate::shapes::Shape;

/// Which fields enter a Fisher matrix.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize)]
pub enum FieldSet {
    /// Temperature only.
    T,
    /// E polarization only.
    E,
    /// Both, with the 2x2 covariance per l.
    TE,
}

impl FieldSet {
    /// Output label: "T", "E", "T+E".
    pub fn label(self) -> &'static str {
        match self {
            FieldSet::T => "T",
            FieldSet::E => "E",
            FieldSet::TE => "T+E",
        }
    }

    /// Parses "T", "E", "T+E".
    pub fn parse(s: &str) -> Option<Self> {
        match s.trim() {
            "T" | "t" => Some(FieldSet::T),
            "E" | "e" => Some(FieldSet::E),
            "T+E" | "t+e" | "TE" => Some(FieldSet::TE),
            _ => None,
        }
    }
}

/// Everything the engine needs.
pub struct CmbFisherInput<'a> {
    /// Transfer functions Delta^X_l(k).
    pub transfer: &'a TransferTable,
    /// The primordial spectrum.
    pub primordial: Primordial,
    /// Shapes (Fisher parameters, in order).
    pub shapes: &'a [Shape],
    /// Noise, beam, sky fraction, multipole ranges.
    pub experiment: &'a Experiment,
    /// CMB temperature in K (to make the noise dimensionless).
    pub t_cmb_k: f64,
    /// The l_max grid (increasing; each <= the transfer table's l_max).
    pub lmax_grid: &'a [usize],
    /// Field sets to compute.
    pub field_sets: &'a [FieldSet],
    /// Radial quadrature.
    pub radial: &'a RadialGrid,
    /// Run the outer loops in parallel.
    pub parallel: bool,
    /// Signal spectra of the covariance (e.g. lensed); `None`: the unlensed C_l of the
    /// transfer table.
    pub signal_cl: Option<&'a LensedSpectra>,
}

/// Result: one Fisher matrix per (field set, l_max).
#[derive(Debug, Clone, serde::Serialize)]
pub struct CmbForecast {
    /// The l_max grid.
    pub lmax: Vec<usize>,
    /// Field sets, in the order of `fisher`.
    pub field_sets: Vec<FieldSet>,
    /// Shape names.
    pub shapes: Vec<String>,
    /// fisher[field_set][lmax index], parameters `fnl_<shape>`.
    pub fisher: Vec<Vec<FisherMatrix>>,
    /// What the engine did (sizes, operation counts).
    #[serde(skip)]
    pub stats: EngineStats,
}

/// Largest number of multipoles in one compressed block. Measured with the per-field bases
/// at l_max = 3000 (mu sums of T, E and T+E, three shapes, full transfer, l_max grid every
/// 500, quiet 2-core machine): 8.3 s with 128, 8.6 s with 192, 7.3 s with 256, 7.5 s with
/// 320 or 384 (with a grid every 500 these give the same 250-multipole blocks as 256),
/// 7.3 s with 512. Larger blocks need fewer basis functions in all (Sum of ranks 278 at
/// 256 against 389 at 128) but each block's M and M V products grow with its rank squared.
const BLOCK: usize = 256;

/// Default accuracy of the block-compressed radial functions: every multipole's radial
/// functions (all exponents and fields, each normalized over its block) are reproduced
/// to this relative accuracy (see [`cmb_fisher_with_plan`]).
/// Measured on the full transfer at l_max = 3000 (T+E, three shapes): 1e-5 moves
/// sigma(f_NL) by < 1e-6 relative against 1e-6, with half the rank.
pub const DEFAULT_COMPRESSION_TOL: f64 = 1e-5;

/// Radial nodes where every radial function at a given l is below this fraction of its
/// peak at that l are left out of that l's products: it makes the high-l blocks work on
/// the last-scattering shell only. Measured on the full transfer at l_max = 3000 (T+E,
/// local, equilateral, orthogonal): 1e-4 moves sigma(f_NL) by < 1e-6 relative against
/// 1e-5 (1e-3 would move it by 6e-5), far below the radial quadrature error.
const ACTIVE_TOL: f64 = 1e-4;

/// What the engine did: sizes and operation counts (for benchmarks and logs).
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct EngineStats {
    /// Gauss-Legendre nodes in mu.
    pub mu_nodes: usize,
    /// Multipole blocks.
    pub blocks: usize,
    /// Mean rank of the compressed blocks (summed over the fields' bases).
    pub mean_rank: f64,
    /// Largest rank (summed over the fields' bases).
    pub max_rank: usize,
    /// Mean width of the active radial ranges.
    pub mean_width: f64,
    /// Distinct triple products per l_max grid point (after symmetry reduction).
    pub triples: usize,
    /// Last multipole of the low-l part, when the low/high split is used.
    pub split_lmax: Option<usize>,
    /// Width of the core radial range of the high-l part.
    pub core_width: Option<usize>,
    /// Floating-point operations in the matrix products (dgemm), all mu nodes.
    pub gemm_flops: f64,
    /// Floating-point operations in the triple products, all mu nodes.
    pub triple_flops: f64,
    /// The compression tolerance used.
    pub compression_tol: f64,
    /// Wall time of the active radial ranges and the block compression, s.
    pub time_compress_s: f64,
    /// Wall time of the mu sums (block updates and triple products), s.
    pub time_mu_sums_s: f64,
}

/// Engine options.
#[derive(Debug, Clone, Copy)]
pub struct EngineOptions {
    /// Compression tolerance of the radial functions per block (0 = exact).
    pub tol: f64,
    /// Allow the low-l / high-l split (exact; off only to test it).
    pub split: bool,
    /// Largest number of multipoles in one compressed block.
    pub block: usize,
}

impl Default for EngineOptions {
    fn default() -> Self {
        Self {
            tol: DEFAULT_COMPRESSION_TOL,
            split: true,
            block: BLOCK,
        }
    }
}

/// Runs the fast engine.
pub fn cmb_fisher(inp: &CmbFisherInput<'_>) -> CmbForecast {
    let plan = BispectrumPlan::new(inp);
    cmb_fisher_with_plan(&plan, inp.lmax_grid, inp.parallel)
}

/// Runs the fast engine on a prepared plan.
///
/// Scheme: the l range is cut into blocks of at most [`BLOCK`] multipoles that end at the
/// l_max grid values. In each block each field's radial functions are compressed to a
/// basis of its own, of rank q_f (7-11 for 250 multipoles above l = 250 and 41 (T), 50 (E)
/// for l = 2..251, at the default tolerance; measured on the full transfer):
/// X^{e,f}_l(r) ~= Sum_q U^f_lq V^{e,f}_q(r) (`compress_block`). Then per mu node
/// S_ab += V_a^T M V_b with M_{fq,f'q'} = Sum_l (2l+1) P_l(mu) C^-1_{l,ff'} U^f_lq U^f'_lq',
/// so the matrix products have inner dimension Sum_f q_f instead of (fields x
/// multipoles); S_aa is symmetric and only its upper triangle is accumulated. A low/high-l split
/// (`choose_split`, exact) runs the low multipoles, whose radial functions spread over
/// the whole radial grid, with a mu rule of their own and the rest on the shell's radial
/// core only. With tolerance 0 the basis is complete and the engine is exact (it equals
/// the brute-force triple sum to rounding); the default tolerance and `ACTIVE_TOL`
/// change sigma(f_NL) by < 1e-5 relative for l_max >= 300 and ~1e-4 at l_max = 100, where
/// the shapes are nearly degenerate (measured; see tests/cmb_engine.rs).
pub fn cmb_fisher_with_plan(
    plan: &BispectrumPlan,
    lmax_grid: &[usize],
    parallel: bool,
) -> CmbForecast {
    cmb_fisher_with_options(plan, lmax_grid, parallel, &EngineOptions::default())
}
