//! The CMB bispectrum Fisher information by l-configuration: the single-shape Fisher
//! information F_ii of one field set as a sum over multipole triplets,
//! F_ii = (f_sky / 6) Sum_{l1 l2 l3} G^2_{l1 l2 l3} Sum b^i_{XYZ} C^-1_{XX'} C^-1_{YY'}
//! C^-1_{ZZ'} b^i_{X'Y'Z'} (Komatsu & Spergel 2001; T+E as in Yadav, Komatsu & Wandelt
//! 2007), with the plan's reduced bispectra and inverse covariances, kept per triplet so
//! that it can be split by configuration class. The covariance of the CMB bispectrum is
//! diagonal in the triplets (Gaussian, full sky with f_sky), so each triplet's share of
//! F_ii is well defined.
//!
//! The fast engine ([`crate::cmb::bispectrum`]) sums every triplet at once through a
//! factorization; here the sum runs over cells of consecutive multipoles ([`LGrid`]):
//! F_ii ~= Sum_cells W_cell Q_i(node), with W_cell = Sum_{triplets in the cell triple}
//! G^2_{l1 l2 l3} summed exactly (closed-form 3j symbols, every permutation of the
//! unrestricted sum) and Q_i = Sum b C^-1 C^-1 C^-1 b at the cells' central multipoles.
//! The geometric weight carries the parity rule and the triangle condition exactly, which
//! matters in squeezed cells where the smallest side is shorter than a cell; only the
//! bispectrum and covariance are sampled, and they vary on the scale of the acoustic
//! peaks. With one multipole per cell the sum is exact. The grid's error is measured
//! against the engine (see the tests and the `total_vs_engine` column of the outputs).

use rayon::prelude::*;

use crate::cmb::bispectrum::{BispectrumPlan, FieldSet};
use crate::cmb::transfer::{Field, RadialGrid};
use crate::special::wigner::Wigner000;
use crate::triangle_class::{ClassBudget, PlaneDensity, triangle_class_budget};

/// A multipole grid for the triplet sum: consecutive cells of multipoles.
#[derive(Debug, Clone, PartialEq)]
pub struct LGrid {
    /// Cell edges: cell c holds the multipoles edges[c] <= l < edges[c + 1].
    pub edges: Vec<usize>,
}

impl LGrid {
    /// Every multipole from `l_min` (at least 2) to `lmax` its own cell: the exact sum.
    pub fn exact(l_min: usize, lmax: usize) -> Self {
        Self {
            edges: (l_min.max(2)..=lmax + 1).collect(),
        }
    }

    /// Cells from `l_min` (at least 2) to `lmax`: width 1 up to `l_fine`, then each cell
    /// 10% wider than the previous one, at most `max_width`; a cell never straddles a
    /// multipole in `ends` (a field's own l_max: a cell ends there).
    pub fn binned(
        l_min: usize,
        lmax: usize,
        l_fine: usize,
        max_width: usize,
        ends: &[usize],
    ) -> Self {
        let mut edges = vec![l_min.max(2)];
        let mut a = edges[0];
        let mut w = 1usize;
        while a <= lmax {
            if a >= l_fine {
                w = ((w as f64 * 1.1).ceil() as usize).min(max_width.max(1));
            }
            let mut top = (a + w - 1).min(lmax);
            if let Some(&e) = ends.iter().filter(|&&e| e >= a && e < top).min() {
                top = e;
            }
            a = top + 1;
            edges.push(a);
        }
        Self { edges }
    }

    /// Number of cells.
    pub fn len(&self) -> usize {
        self.edges.len().saturating_sub(1)
    }

    /// True without cells.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The central multipole of cell c (the lower one of two).
    pub fn node(&self, c: usize) -> usize {
        (self.edges[c] + self.edges[c + 1] - 1) / 2
    }

    /// The multipoles of cell c.
    pub fn width(&self, c: usize) -> usize {
        self.edges[c + 1] - self.edges[c]
    }
}

/// The exact geometric weights W[i][j][k] (i <= j <= k, dense n^3, row-major) of the
/// cell triples of `grid` up to `lmax`: the sum of G^2_{l1 l2 l3} =
/// (2l1+1)(2l2+1)(2l3+1)/(4 pi) (l1 l2 l3; 0 0 0)^2 over every ordered triplet of the
/// unrestricted sum whose sorted multipoles fall in cells (i, j, k).
/// Each entry holds [W, Sum G^2 l1, Sum G^2 l2, Sum G^2 l3] (sorted multipoles), so that
/// [`centroid`] gives the G^2-weighted centre of the cell triple.
pub fn geometric_weights(grid: &LGrid, lmax: usize, parallel: bool) -> Vec<[f64; 4]> {
    let n = grid.len();
    let lo = grid.edges.first().copied().unwrap_or(2);
    let top = lmax.min(grid.edges.last().map_or(0, |&e| e.saturating_sub(1)));
    let mut cell_of = vec![usize::MAX; top + 1];
    for c in 0..n {
        let hi = grid.edges[c + 1].min(top + 1);
        if grid.edges[c] < hi {
            cell_of[grid.edges[c]..hi].fill(c);
        }
    }
    let w3j = Wigner000::new(top as u32);
    let four_pi = 4.0 * std::f64::consts::PI;
    // One task per cell of the smallest multipole: it writes only the block W[c1][..][..],
    // summing its l1 in order, so the result does not depend on the thread count.
    let block = |c1: usize| -> Vec<[f64; 4]> {
        let mut w = vec![[0.0; 4]; n * n];
        for l1 in grid.edges[c1].max(lo)..grid.edges[c1 + 1].min(top + 1) {
            for l2 in l1..=top {
                let c2 = cell_of[l2];
                let a12 = ((2 * l1 + 1) * (2 * l2 + 1)) as f64 / four_pi;
                // l3 from l2 with l1 + l2 + l3 even, up to the triangle limit.
                let end = (l1 + l2).min(top);
                let mut l3 = l2 + (l1 % 2);
                while l3 <= end {
                    let g2 =
                        a12 * (2 * l3 + 1) as f64 * w3j.squared(l1 as u32, l2 as u32, l3 as u32);
                    let mult = if l1 == l2 && l2 == l3 {
                        1.0
                    } else if l1 == l2 || l2 == l3 {
                        3.0
                    } else {
                        6.0
                    };
                    let e = &mut w[c2 * n + cell_of[l3]];
                    let m = mult * g2;
                    e[0] += m;
                    e[1] += m * l1 as f64;
                    e[2] += m * l2 as f64;
                    e[3] += m * l3 as f64;
                    l3 += 2;
                }
            }
        }
        w
    };
    if top < lo {
        return vec![[0.0; 4]; n * n * n];
    }
    let blocks: Vec<Vec<[f64; 4]>> = if parallel {
        (0..n).into_par_iter().map(block).collect()
    } else {
        (0..n).map(block).collect()
    };
    blocks.into_iter().flatten().collect()
}

/// The G^2-weighted centre of a cell triple (nearest multipoles), from its entry of
/// [`geometric_weights`]; `None` for an empty triple.
pub fn centroid(w: &[f64; 4]) -> Option<[usize; 3]> {
    (w[0] > 0.0).then(|| [1, 2, 3].map(|q| (w[q] / w[0]).round() as usize))
}

/// The information of one cell triple.
#[derive(Debug, Clone, PartialEq)]
pub struct TripletInfo {
    /// Central multipoles l1 <= l2 <= l3 of the cells.
    pub l: [usize; 3],
    /// Per shape: the cell triple's part of the single-shape Fisher information F_ii
    /// (every permutation and every multipole of the cells included).
    pub info: Vec<f64>,
}

/// Inverse-covariance entry of a field pair from the plan's [TT, TE, EE].
fn cinv_of(c: &[f64; 3], a: Field, b: Field) -> f64 {
    match (a, b) {
        (Field::T, Field::T) => c[0],
        (Field::E, Field::E) => c[2],
        _ => c[1],
    }
}

/// The reduced bispectra of every shape and field combination at the central multipoles
/// of every cell triple with a nonzero geometric weight: computed once per run and shared
/// by every experiment and field set (they differ only in the inverse covariances).
#[derive(Debug, Clone)]
pub struct CellBispectra {
    /// Central multipoles l1 <= l2 <= l3 of each cell triple.
    pub l: Vec<[usize; 3]>,
    /// Geometric weight of each cell triple ([`geometric_weights`]).
    pub weight: Vec<f64>,
    /// Field index of each leg, per combination (indices into the plan's fields).
    pub combos: Vec<[usize; 3]>,
    /// Number of shapes.
    pub n_shapes: usize,
    /// b[(t * n_shapes + s) * n_combos + c]: shape s, combination c, cell triple t (f_NL = 1).
    pub b: Vec<f64>,
}

/// The reduced bispectra b^{XYZ}_{l1 l2 l3} = Sum_t c_t Integral r^2 dr X X X (the
/// plan's radial functions on the radial grid `radial` the plan was built with) at the
/// G^2-weighted centre ([`centroid`]) of every cell triple of `grid` with a nonzero
/// weight.
pub fn cell_bispectra(
    plan: &BispectrumPlan,
    radial: &RadialGrid,
    grid: &LGrid,
    weights: &[[f64; 4]],
    parallel: bool,
) -> CellBispectra {
    let n = grid.len();
    let nf = plan.n_fields();
    let nr = plan.n_radial();
    let combos: Vec<[usize; 3]> = (0..nf)
        .flat_map(|a| (0..nf).flat_map(move |b| (0..nf).map(move |c| [a, b, c])))
        .collect();
    let ns = plan.terms().len();
    // Distinct exponent triples of all terms, and each term's index among them.
    let mut uniq: Vec<[usize; 3]> = Vec::new();
    let term_idx: Vec<Vec<(f64, usize)>> = plan
        .terms()
        .iter()
        .map(|ts| {
            ts.iter()
                .map(|&(c, e)| {
                    let u = uniq.iter().position(|&x| x == e).unwrap_or_else(|| {
                        uniq.push(e);
                        uniq.len() - 1
                    });
                    (c, u)
                })
                .collect()
        })
        .collect();
    let lmax = plan.lmax();
    let row = |i: usize| -> (Vec<[usize; 3]>, Vec<f64>, Vec<f64>) {
        let (mut ls, mut ws, mut bs) = (Vec::new(), Vec::new(), Vec::new());
        let mut bu = vec![0.0; uniq.len() * combos.len()];
        let mut xs = vec![0.0; 3 * nr];
        for j in i..n {
            for k in j..n {
                let wt = &weights[(i * n + j) * n + k];
                let Some(l) = centroid(wt) else { continue };
                if l.iter().any(|&x| x > lmax) {
                    continue;
                }
                for (u, e) in uniq.iter().enumerate() {
                    for (ic, c) in combos.iter().enumerate() {
                        for leg in 0..3 {
                            for ir in 0..nr {
                                xs[leg * nr + ir] =
                                    plan.radial_function(e[leg], c[leg], l[leg], ir);
                            }
                        }
                        let (x0, rest) = xs.split_at(nr);
                        let (x1, x2) = rest.split_at(nr);
                        bu[u * combos.len() + ic] = (0..nr)
                            .map(|ir| radial.w[ir] * x0[ir] * x1[ir] * x2[ir])
                            .sum();
                    }
                }
                ls.push(l);
                ws.push(wt[0]);
                for ts in &term_idx {
                    for ic in 0..combos.len() {
                        bs.push(ts.iter().map(|&(c, u)| c * bu[u * combos.len() + ic]).sum());
                    }
                }
            }
        }
        (ls, ws, bs)
    };
    let rows: Vec<_> = if parallel {
        (0..n).into_par_iter().map(row).collect()
    } else {
        (0..n).map(row).collect()
    };
    let mut out = CellBispectra {
        l: Vec::new(),
        weight: Vec::new(),
        combos,
        n_shapes: ns,
        b: Vec::new(),
    };
    for (l, w, b) in rows {
        out.l.extend(l);
        out.weight.extend(w);
        out.b.extend(b);
    }
    out
}

/// The single-shape Fisher information F_ii of field set `fs` (index into the plan's
/// field sets; the plan carries the experiment's inverse covariances) per cell triple.
/// Cell triples without information are left out.
pub fn cell_information(cb: &CellBispectra, plan: &BispectrumPlan, fs: usize) -> Vec<TripletInfo> {
    let fields = plan.fields();
    let nc = cb.combos.len();
    let ns = cb.n_shapes;
    let pref = plan.f_sky() / 6.0;
    let mut out = Vec::new();
    for (t, (&l, &wg)) in cb.l.iter().zip(&cb.weight).enumerate() {
        let ci = l.map(|ll| plan.inverse_covariance(fs, ll));
        let used: Vec<bool> = cb
            .combos
            .iter()
            .map(|c| (0..3).all(|leg| cinv_of(&ci[leg], fields[c[leg]], fields[c[leg]]) != 0.0))
            .collect();
        if !used.iter().any(|&u| u) {
            continue;
        }
        let info: Vec<f64> = (0..ns)
            .map(|s| {
                let b = &cb.b[(t * ns + s) * nc..(t * ns + s + 1) * nc];
                let mut acc = 0.0;
                for (ic, a) in cb.combos.iter().enumerate() {
                    if !used[ic] || b[ic] == 0.0 {
                        continue;
                    }
                    for (id, d) in cb.combos.iter().enumerate() {
                        if !used[id] || b[id] == 0.0 {
                            continue;
                        }
                        let mut c = 1.0;
                        for leg in 0..3 {
                            c *= cinv_of(&ci[leg], fields[a[leg]], fields[d[leg]]);
                        }
                        acc += b[ic] * c * b[id];
                    }
                }
                pref * wg * acc
            })
            .collect();
        out.push(TripletInfo { l, info });
    }
    out
}

/// The largest l_max of the configuration budget in outputs: the sum over cell triples
/// grows as the cube of the number of cells, and the exact geometric weights as l_max^3.
pub const BUDGET_LMAX: usize = 2000;
/// Cells of one multipole below this l in outputs.
pub const BUDGET_L_FINE: usize = 30;
/// Widest cell in outputs.
pub const BUDGET_MAX_WIDTH: usize = 40;

/// The l_max of the budget for an l_max grid: the largest grid value at or below
/// [`BUDGET_LMAX`], else the smallest; with its index in the grid.
pub fn budget_lmax(grid: &[usize]) -> Option<(usize, usize)> {
    let below = grid
        .iter()
        .enumerate()
        .filter(|(_, l)| **l <= BUDGET_LMAX)
        .max_by_key(|(_, l)| **l);
    below
        .or_else(|| grid.iter().enumerate().min_by_key(|(_, l)| **l))
        .map(|(i, &l)| (l, i))
}

/// The output grid for experiments with these (l_min, l_max T, l_max E): cells end at
/// every experiment's own limits.
pub fn budget_grid(lmax: usize, limits: &[(usize, usize, usize)]) -> LGrid {
    let mut ends: Vec<usize> = Vec::new();
    for &(lmin, lt, le) in limits {
        ends.extend([lmin.saturating_sub(1), lt, le]);
    }
    LGrid::binned(2, lmax, BUDGET_L_FINE, BUDGET_MAX_WIDTH, &ends)
}

/// One row of a configuration budget: a field set and shape.
#[derive(Debug, Clone, serde::Serialize)]
pub struct ConfigBudgetRow {
    /// Field set.
    pub field_set: FieldSet,
    /// Shape name.
    pub shape: String,
    /// Shares of F_ii by class (and their total, the budget's F_ii).
    pub classes: ClassBudget,
    /// The engine's F_ii at the same l_max (for the check of the cell sum).
    pub engine_information: f64,
    /// Shares on the (l1/l3, l2/l3) plane.
    pub plane: PlaneDensity,
}

/// The configuration budget of one experiment.
#[derive(Debug, Clone, serde::Serialize)]
pub struct ConfigBudget {
    /// l_max of the sum.
    pub lmax: usize,
    /// Cells of the multipole grid.
    pub cells: usize,
    /// Widest cell (multipoles).
    pub max_cell_width: usize,
    /// Per field set and shape.
    pub rows: Vec<ConfigBudgetRow>,
}

/// The budget of the experiment whose inverse covariances `plan` carries, from the shared
/// cell bispectra, with the engine's F_ii at the budget's l_max (`engine[fs][shape]`).
pub fn config_budget(
    plan: &BispectrumPlan,
    cb: &CellBispectra,
    grid: &LGrid,
    lmax: usize,
    shapes: &[String],
    engine: &[Vec<f64>],
) -> ConfigBudget {
    let mut rows = Vec::new();
    for (ifs, &fs) in plan.field_sets().iter().enumerate() {
        let info = cell_information(cb, plan, ifs);
        for (s, name) in shapes.iter().enumerate() {
            let contrib = || info.iter().map(move |t| (t.l.map(|x| x as f64), t.info[s]));
            rows.push(ConfigBudgetRow {
                field_set: fs,
                shape: name.clone(),
                classes: triangle_class_budget(contrib()),
                engine_information: engine
                    .get(ifs)
                    .and_then(|v| v.get(s))
                    .copied()
                    .unwrap_or(f64::NAN),
                plane: PlaneDensity::of(contrib()),
            });
        }
    }
    ConfigBudget {
        lmax,
        cells: grid.len(),
        max_cell_width: (0..grid.len()).map(|c| grid.width(c)).max().unwrap_or(0),
        rows,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cmb::bispectrum::tests::{toy_radial, toy_table};
    use crate::cmb::bispectrum::{
        CmbFisherInput, FieldSet, brute_force_fisher, cmb_fisher_with_plan,
    };
    use crate::cmb::experiment::{Channel, Experiment};
    use crate::cosmology::Primordial;
    use crate::shapes::Shape;

    pub(super) fn plan_for(lmax: usize, k_d: f64) -> (BispectrumPlan, RadialGrid) {
        let tr = toy_table(lmax, Some(k_d), true);
        let radial = toy_radial(600.0, 10);
        let mut exp = Experiment::ideal(lmax);
        exp.f_sky = 0.7;
        exp.channels.push(Channel {
            label: "x".into(),
            noise_t_uk_arcmin: 30.0,
            noise_p_uk_arcmin: 42.0,
            fwhm_arcmin: 30.0,
        });
        let shapes: Vec<Shape> = ["local", "equilateral", "orthogonal"]
            .iter()
            .map(|s| s.parse().unwrap())
            .collect();
        let plan = BispectrumPlan::new(&CmbFisherInput {
            transfer: &tr,
            primordial: Primordial::from_values(2.1e-9, 0.965, 0.05),
            shapes: &shapes,
            experiment: &exp,
            t_cmb_k: 2.7255,
            lmax_grid: &[lmax],
            field_sets: &[FieldSet::T, FieldSet::E, FieldSet::TE],
            radial: &radial,
            parallel: true,
            signal_cl: None,
        });
        (plan, radial)
    }

    /// Per field set, the cell information on `grid`.
    pub(super) fn infos(
        plan: &BispectrumPlan,
        radial: &RadialGrid,
        grid: &LGrid,
    ) -> Vec<Vec<TripletInfo>> {
        let w = geometric_weights(grid, plan.lmax(), true);
        let cb = cell_bispectra(plan, radial, grid, &w, true);
        (0..3).map(|fs| cell_information(&cb, plan, fs)).collect()
    }

    fn totals(t: &[TripletInfo], ns: usize) -> Vec<f64> {
        (0..ns).map(|s| t.iter().map(|x| x.info[s]).sum()).collect()
    }

    /// The exact grid reproduces the brute-force oracle (unrestricted sum with the exact
    /// 3j symbols) to rounding, for every field set and shape, at l_max = 40.
    #[test]
    fn exact_grid_equals_brute_force() {
        let lmax = 40;
        let (plan, radial) = plan_for(lmax, 0.004);
        let all = infos(&plan, &radial, &LGrid::exact(2, lmax));
        for (fs, t) in all.iter().enumerate() {
            let tot = totals(t, 3);
            let brute = brute_force_fisher(&plan, fs, lmax, true);
            for s in 0..3 {
                let want = brute[s * 3 + s];
                assert!(
                    (tot[s] - want).abs() <= 1e-10 * want,
                    "fs {fs} shape {s}: {} vs {want}",
                    tot[s]
                );
            }
        }
    }

    /// The binned grid against the engine at l_max = 400 (toy table with T and E, a thin
    /// shell whose bispectrum varies faster in l than the CMB's), cells of up to 24
    /// multipoles: the total stays within 5% of the engine's F_ii for every field set and
    /// shape (measured: 0.2% local, 0.1% equilateral, 4.0% orthogonal, whose terms cancel
    /// most; with cells of at most 8 multipoles 0.5%, 1.2%, 0.5%).
    #[test]
    fn binned_grid_total_matches_engine() {
        let lmax = 400;
        let (plan, radial) = plan_for(lmax, 0.03);
        let eng = cmb_fisher_with_plan(&plan, &[lmax], true);
        let grid = LGrid::binned(2, lmax, 30, 24, &[]);
        let all = infos(&plan, &radial, &grid);
        let mut worst: f64 = 0.0;
        for (fs, t) in all.iter().enumerate() {
            let tot = totals(t, 3);
            for (s, t) in tot.iter().enumerate() {
                let f = eng.fisher[fs][0].get(s, s);
                worst = worst.max((t / f - 1.0).abs());
            }
        }
        println!(
            "binned grid ({} nodes) vs engine at l_max {lmax}: worst {worst:.2e}",
            grid.len()
        );
        assert!(worst < 0.05, "{worst}");
    }

    #[test]
    fn binned_grid_covers_every_multipole_once() {
        let g = LGrid::binned(3, 1001, 50, 40, &[777]);
        assert_eq!(g.edges[0], 3);
        assert_eq!(*g.edges.last().unwrap(), 1002);
        for c in 0..g.len() {
            assert!(g.width(c) >= 1 && g.width(c) <= 40);
            assert!(g.edges[c] < 50 || g.edges[c] > 777 || g.edges[c + 1] <= 778);
            let n = g.node(c);
            assert!(n >= g.edges[c] && n < g.edges[c + 1]);
        }
        assert!(g.edges.contains(&778), "a cell ends at 777");
    }

    /// The geometric weights of any grid add up to the exact sum of G^2 over every
    /// triplet (checked against a direct triple loop at l_max = 30).
    #[test]
    fn geometric_weights_sum_to_the_direct_sum() {
        let lmax = 30;
        let w3j = Wigner000::new(lmax as u32);
        let mut direct = 0.0;
        for l1 in 2..=lmax {
            for l2 in 2..=lmax {
                for l3 in 2..=lmax {
                    direct += ((2 * l1 + 1) * (2 * l2 + 1) * (2 * l3 + 1)) as f64
                        / (4.0 * std::f64::consts::PI)
                        * w3j.squared(l1 as u32, l2 as u32, l3 as u32);
                }
            }
        }
        for g in [LGrid::exact(2, lmax), LGrid::binned(2, lmax, 5, 7, &[20])] {
            let sum: f64 = geometric_weights(&g, lmax, false)
                .iter()
                .map(|w| w[0])
                .sum();
            assert!((sum / direct - 1.0).abs() < 1e-12, "{sum} vs {direct}");
        }
    }
}
