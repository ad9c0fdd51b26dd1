//! The mu sums of the fast engine: blocks of multipoles, the low/high-l split, the
//! cumulative l_max grid (see [`super::cmb_fisher_with_plan`]).

use rayon::prelude::*;

use super::compress::{LBlock, compress_block};
use super::kernel::{
    Leg, Scratch, canonical_triple, cinv_entry, group_update, legendre_all, make_groups,
    s_update_flops,
};
use super::{ACTIVE_TOL, BispectrumPlan, CmbForecast, EngineOptions, EngineStats};
use crate::fisher::FisherMatrix;
use crate::numerics::GaussLegendre;

/// The engine with explicit options.
pub fn cmb_fisher_with_options(
    plan: &BispectrumPlan,
    lmax_grid: &[usize],
    parallel: bool,
    opts: &EngineOptions,
) -> CmbForecast {
    let tol = opts.tol;
    let lmax = plan.lmax;
    let grid: Vec<usize> = lmax_grid.iter().map(|&l| l.min(lmax)).collect();
    let n_mu = (3 * lmax).div_ceil(2) + 1;
    let ns = plan.terms.len();
    let nfs = plan.field_sets.len();
    let nm = grid.len();
    let ne = plan.exponents.len();
    let n_r = plan.n_r;
    let nf = plan.fields.len();
    // Blocks of l: (lo, hi] per grid point; l < 2 never enters (Cinv = 0 there).
    let mut edges = vec![1usize];
    edges.extend(&grid);
    let pairs: Vec<(usize, usize)> = (0..ne).flat_map(|a| (a..ne).map(move |b| (a, b))).collect();
    let pair_index = |a: usize, b: usize| -> Leg {
        let (lo, hi, tr) = if a <= b { (a, b, false) } else { (b, a, true) };
        (pairs.iter().position(|&p| p == (lo, hi)).unwrap_or(0), tr)
    };
    // S_aa is symmetric (M is): its legs never need the transpose.
    let symmetric: Vec<bool> = pairs.iter().map(|&(a, b)| a == b).collect();
    // Term pairs per shape pair (i <= j): (c_t c_u, [(pair, transposed); 3]).
    // Every shape's term list is closed under permutations of the legs (all permutations
    // are written out) with permutation-invariant coefficients, and the unrestricted l
    // sum is invariant under permuting the legs of both terms at once. So the sum over
    // t runs over one representative per permutation orbit, weighted by the orbit size.
    let reps: Vec<Vec<(f64, [usize; 3])>> = plan
        .terms
        .iter()
        .map(|ts| {
            let mut seen: Vec<([usize; 3], usize, f64, [usize; 3])> = Vec::new();
            for &(c, e) in ts {
                let mut key = e;
                key.sort_unstable();
                match seen.iter_mut().find(|x| x.0 == key) {
                    Some(x) => x.1 += 1,
                    None => seen.push((key, 1, c, e)),
                }
            }
            seen.into_iter()
                .map(|(_, n, c, e)| (c * n as f64, e))
                .collect()
        })
        .collect();
    // Shape pairs (i <= j), and the distinct triple products with their coefficient per
    // shape pair. Sum_{r r'} w w S_x S_y S_z is invariant under permuting the three legs
    // and under transposing all three at once, so each triple is stored in a canonical
    // order and shared by every shape pair that needs it.
    let shape_pairs: Vec<(usize, usize)> =
        (0..ns).flat_map(|i| (i..ns).map(move |j| (i, j))).collect();
    let n_sp = shape_pairs.len();
    let mut triples: Vec<([Leg; 3], Vec<f64>)> = Vec::new();
    for (sp, &(i, j)) in shape_pairs.iter().enumerate() {
        for &(ct, et) in &reps[i] {
            for &(cu, eu) in &plan.terms[j] {
                let legs = [
                    pair_index(et[0], eu[0]),
                    pair_index(et[1], eu[1]),
                    pair_index(et[2], eu[2]),
                ];
                let key = canonical_triple(legs, &symmetric);
                let idx = match triples.iter().position(|t| t.0 == key) {
                    Some(k) => k,
                    None => {
                        triples.push((key, vec![0.0; n_sp]));
                        triples.len() - 1
                    }
                };
                triples[idx].1[sp] += ct * cu;
            }
        }
    }
    // Active radial range per l: the nodes where some radial function exceeds
    // ACTIVE_TOL of its largest value at that l (at high l the functions are confined
    // to the last-scattering shell; far nodes only matter at low l).
    let t_compress = std::time::Instant::now();
    let active: Vec<(usize, usize)> = (0..=lmax)
        .map(|l| {
            let v: Vec<f64> = (0..n_r)
                .map(|ir| {
                    plan.x
                        .iter()
                        .flat_map(|xe| xe.iter().map(move |xf| xf[l * n_r + ir].abs()))
                        .fold(0.0, f64::max)
                })
                .collect();
            let peak = v.iter().copied().fold(0.0, f64::max);
            if peak == 0.0 {
                return (0, 0);
            }
            let lo = v.iter().position(|&x| x >= ACTIVE_TOL * peak).unwrap_or(0);
            let hi = v
                .iter()
                .rposition(|&x| x >= ACTIVE_TOL * peak)
                .map_or(0, |i| i + 1);
            (lo, hi)
        })
        .collect();
    // The blocks and their compressed bases.
    let mut spans: Vec<(usize, usize, usize, bool)> = Vec::new();
    for (m, wnd) in edges.windows(2).enumerate() {
        let (lo, hi) = (wnd[0] + 1, wnd[1]);
        if hi < lo {
            spans.push((lo, lo - 1, m, true));
            continue;
        }
        let mut l0 = lo;
        while l0 <= hi {
            let rest = hi - l0 + 1;
            let nblk = rest.div_ceil(opts.block.max(1));
            let size = rest.div_ceil(nblk);
            let l1 = (l0 + size - 1).min(hi);
            spans.push((l0, l1, m, l1 == hi));
            l0 = l1 + 1;
        }
    }
    // Per field set, the fields in use over [l0, l1].
    let active_fields = |l0: usize, l1: usize| -> Vec<(usize, usize)> {
        (0..nfs)
            .map(|fs| {
                let (mut lo, mut hi) = (nf, 0);
                for ci in &plan.cinv[fs][l0..=l1] {
                    for f in 0..nf {
                        if cinv_entry(ci, plan.fields[f], plan.fields[f]) != 0.0 {
                            lo = lo.min(f);
                            hi = hi.max(f + 1);
                        }
                    }
                }
                if hi > lo { (lo, hi) } else { (0, 0) }
            })
            .collect()
    };
    let build = |&(l0, l1, seg, last): &(usize, usize, usize, bool)| -> LBlock {
        let empty = |l1: usize| LBlock {
            l0,
            l1,
            seg,
            last,
            r0: 0,
            w: 0,
            q: 0,
            qoff: vec![0; nf + 1],
            active_fields: vec![(0, 0); nfs],
            u: vec![Vec::new(); nf],
            v: vec![Vec::new(); ne],
        };
        if l1 < l0 {
            return empty(l0);
        }
        let (r0, r1) = (l0..=l1).fold((n_r, 0), |(a, b), l| {
            (a.min(active[l].0), b.max(active[l].1))
        });
        if r1 <= r0 {
            return empty(l1);
        }
        let (qoff, u, v) = compress_block(plan, l0, l1, r0, r1, tol);
        LBlock {
            l0,
            l1,
            seg,
            last,
            r0,
            w: r1 - r0,
            q: qoff[nf],
            qoff,
            active_fields: active_fields(l0, l1),
            u,
            v,
        }
    };
    let blocks: Vec<LBlock> = if parallel {
        spans.par_iter().map(build).collect()
    } else {
        spans.iter().map(build).collect()
    };
    let max_q = blocks.iter().map(|b| b.q).max().unwrap_or(0);
    if std::env::var_os("NGREACH_DEBUG_ACTIVE").is_some() {
        for b in &blocks {
            eprintln!(
                "block l {}..={}: radial {}..{} rank {} (per field {:?})",
                b.l0,
                b.l1,
                b.r0,
                b.r0 + b.w,
                b.q,
                b.qoff.windows(2).map(|x| x[1] - x[0]).collect::<Vec<_>>()
            );
        }
    }
    let w_r = &plan.radial_w;
    let n_tr = triples.len();
    let n_pairs = pairs.len();
    // Split into a low-l and a high-l part (exact; see `choose_split`): pass 1 runs the
    // blocks up to the split on the full radial range with a small mu rule, pass 2 all
    // blocks on the core radial range with the full rule.
    let split = if opts.split {
        choose_split(&blocks, &grid, n_r, n_pairs, n_tr, lmax)
    } else {
        None
    };
    let mut passes: Vec<Pass> = Vec::new();
    match split {
        Some((s, core)) => {
            let l_s = blocks[s].l1;
            passes.push(Pass {
                n_mu: (3 * l_s).div_ceil(2) + 1,
                blocks: 0..s + 1,
                outputs: 0..s + 1,
                clip: (0, n_r),
                outside: Some(core),
            });
            passes.push(Pass {
                n_mu,
                blocks: 0..blocks.len(),
                outputs: s + 1..blocks.len(),
                clip: core,
                outside: None,
            });
        }
        None => passes.push(Pass {
            n_mu,
            blocks: 0..blocks.len(),
            outputs: 0..blocks.len(),
            clip: (0, n_r),
            outside: None,
        }),
    }
    // acc[(fs, slot, triple)], slot nm = the outside-core part of the low blocks.
    let n_slot = nm + 1;
    let mut total = vec![0.0; nfs * n_slot * n_tr];
    let mut gemm_flops = 0.0;
    let mut triple_flops = 0.0;
    // The legs of every triple, and the S matrices that some triple uses transposed.
    let legs: Vec<[Leg; 3]> = triples.iter().map(|t| t.0).collect();
    let needs_t: Vec<bool> = (0..n_pairs)
        .map(|p| legs.iter().flatten().any(|&(q, t)| q == p && t))
        .collect();
    let max_nb = blocks
        .iter()
        .map(|b| b.l1 + 1 - b.l0.min(b.l1 + 1))
        .max()
        .unwrap_or(0);
    let time_compress_s = t_compress.elapsed().as_secs_f64();
    let t_sums = std::time::Instant::now();
    for pass in &passes {
        let (c0, c1) = pass.clip;
        let outputs = |bi: usize| blocks[bi].last && pass.outputs.contains(&bi);
        // Groups of consecutive blocks between outputs: each updates the S matrices with
        // one product of inner dimension K (all its blocks' ranks) per exponent pair.
        let groups = make_groups(&blocks, pass, nfs, &outputs);
        let max_k = groups
            .iter()
            .flat_map(|g| g.k.iter().copied())
            .max()
            .unwrap_or(0);
        let max_wg = groups.iter().map(|g| g.a1 - g.a0).max().unwrap_or(0);
        // One mu node: adds its contributions to acc[(fs, slot, triple)].
        let per_mu = |(mu, wmu): (f64, f64), acc: &mut [f64], sc: &mut Scratch| {
            legendre_all(lmax, mu, &mut sc.pl);
            for fs in 0..nfs {
                sc.clear((c0, c1));
                for g in &groups {
                    group_update(plan, &blocks, g, fs, &pairs, sc);
                    let blk = &blocks[g.b1 - 1];
                    if outputs(g.b1 - 1) {
                        let base = (fs * n_slot + blk.seg) * n_tr;
                        sc.complete((c0, c1));
                        sc.triples(&legs, w_r, (c0, c1), wmu, &mut acc[base..base + n_tr]);
                    }
                    if g.b1 == pass.blocks.end
                        && let Some((k0, k1)) = pass.outside
                    {
                        let base = (fs * n_slot + nm) * n_tr;
                        sc.complete((0, n_r));
                        let out = &mut acc[base..base + n_tr];
                        sc.triples(&legs, w_r, (0, n_r), wmu, out);
                        sc.triples(&legs, w_r, (k0, k1), -wmu, out);
                    }
                }
            }
        };
        let mk_scratch = || {
            Scratch::new(
                lmax,
                (max_q, max_nb),
                (max_k, max_wg),
                ne,
                n_r,
                &needs_t,
                &symmetric,
            )
        };
        let gl = GaussLegendre::new(pass.n_mu);
        let nodes: Vec<(f64, f64)> = gl
            .nodes
            .iter()
            .copied()
            .zip(gl.weights.iter().copied())
            .collect();
        // Fixed chunks of mu nodes, summed in order: the result does not depend on the
        // number of threads, and the serial path gives the same bits. The scratch is
        // allocated once per thread.
        let chunk_sum = |sc: &mut Scratch, chunk: &[(f64, f64)]| {
            let mut acc = vec![0.0; nfs * n_slot * n_tr];
            for &node in chunk {
                per_mu(node, &mut acc, sc);
            }
            acc
        };
        let parts: Vec<Vec<f64>> = if parallel {
            nodes
                .par_chunks(8)
                .map_init(mk_scratch, chunk_sum)
                .collect()
        } else {
            let mut sc = mk_scratch();
            nodes.chunks(8).map(|c| chunk_sum(&mut sc, c)).collect()
        };
        for p in &parts {
            total.iter_mut().zip(p).for_each(|(x, y)| *x += y);
        }
        // Operation counts.
        for fs in 0..nfs {
            for g in &groups {
                gemm_flops += pass.n_mu as f64 * s_update_flops(g.a1 - g.a0, g.k[fs], &pairs);
                for b in &blocks[g.b0..g.b1] {
                    let w = (b.r0 + b.w).min(c1).saturating_sub(b.r0.max(c0)) as f64;
                    let nq = b.rows(b.active_fields[fs]).len() as f64;
                    let nb = (b.l1 + 1).saturating_sub(b.l0) as f64;
                    gemm_flops += pass.n_mu as f64 * 2.0 * (ne as f64 * nq * nq * w + nb * nq * nq);
                }
                if outputs(g.b1 - 1) {
                    triple_flops +=
                        pass.n_mu as f64 * n_tr as f64 * 4.0 * ((c1 - c0) * (c1 - c0)) as f64;
                }
            }
            if pass.outside.is_some() {
                triple_flops += pass.n_mu as f64 * n_tr as f64 * 8.0 * (n_r * n_r) as f64;
            }
        }
    }
    let norm = plan.f_sky / (48.0 * std::f64::consts::PI);
    let names: Vec<String> = plan
        .shape_names
        .iter()
        .map(|s| format!("fnl_{s}"))
        .collect();
    // Segments output in pass 2 get the outside-core part of the low blocks.
    let seg_in_pass2: Vec<bool> = (0..nm)
        .map(|m| {
            split.is_some()
                && blocks.iter().enumerate().any(|(bi, b)| {
                    b.last && b.seg == m && passes[passes.len() - 1].outputs.contains(&bi)
                })
        })
        .collect();
    let fisher = (0..nfs)
        .map(|fs| {
            (0..nm)
                .map(|m| {
                    let mut data = vec![0.0; ns * ns];
                    for (sp, &(i, j)) in shape_pairs.iter().enumerate() {
                        let v: f64 = triples
                            .iter()
                            .enumerate()
                            .map(|(k, t)| {
                                let mut x = total[(fs * n_slot + m) * n_tr + k];
                                if seg_in_pass2[m] {
                                    x += total[(fs * n_slot + nm) * n_tr + k];
                                }
                                t.1[sp] * x
                            })
                            .sum::<f64>()
                            * norm;
                        data[i * ns + j] = v;
                        data[j * ns + i] = v;
                    }
                    FisherMatrix::from_rows(names.clone(), data)
                })
                .collect()
        })
        .collect();
    let n_blk = blocks.iter().filter(|b| b.q > 0).count().max(1) as f64;
    let stats = EngineStats {
        mu_nodes: n_mu,
        blocks: blocks.len(),
        mean_rank: blocks.iter().map(|b| b.q as f64).sum::<f64>() / n_blk,
        max_rank: max_q,
        mean_width: blocks.iter().map(|b| b.w as f64).sum::<f64>() / n_blk,
        triples: n_tr,
        split_lmax: split.map(|(s, _)| blocks[s].l1),
        core_width: split.map(|(_, (c0, c1))| c1 - c0),
        gemm_flops,
        triple_flops,
        compression_tol: opts.tol,
        time_compress_s,
        time_mu_sums_s: t_sums.elapsed().as_secs_f64(),
    };
    CmbForecast {
        lmax: grid,
        field_sets: plan.field_sets.clone(),
        shapes: plan.shape_names.clone(),
        fisher,
        stats,
    }
}

/// One pass over mu nodes.
pub(super) struct Pass {
    n_mu: usize,
    pub(super) blocks: std::ops::Range<usize>,
    /// Blocks whose segment end (an l_max grid point) this pass evaluates.
    outputs: std::ops::Range<usize>,
    /// Radial range the S matrices are accumulated and evaluated on.
    pub(super) clip: (usize, usize),
    /// After the last block: the triple products outside core x core (the core given).
    outside: Option<(usize, usize)>,
}

/// The low/high split (exact). Radial functions of high l live on a narrow core of the
/// radial grid (the last-scattering shell); those of low l spread over all of it (ISW,
/// reionization). With S = S_low + S_high and S_high zero outside core x core,
/// Sum_{r r'} S S S = Sum_{outside core^2} S_low S_low S_low + Sum_{core^2} S S S. The
/// first term is a polynomial of degree 3 l_split in mu, integrated exactly by a rule of
/// ceil(3 l_split / 2) + 1 nodes; only the second needs the full rule, and it works on
/// the core only. Returns the index of the last low block and the core, choosing the
/// split with the smallest operation count (None: no split pays).
fn choose_split(
    blocks: &[LBlock],
    grid: &[usize],
    n_r: usize,
    n_pairs: usize,
    n_tr: usize,
    lmax: usize,
) -> Option<(usize, (usize, usize))> {
    let n_mu = |l: usize| ((3 * l).div_ceil(2) + 1) as f64;
    let block_cost = |b: &LBlock, c0: usize, c1: usize| -> f64 {
        let w = (b.r0 + b.w).min(c1).saturating_sub(b.r0.max(c0)) as f64;
        let nq = b.q as f64;
        2.0 * n_pairs as f64 * w * w * nq
    };
    let triple_cost = |w: usize| (4 * n_tr * w * w) as f64;
    let outputs_after = |l: usize| grid.iter().filter(|&&g| g > l).count();
    let outputs_upto = |l: usize| grid.iter().filter(|&&g| g <= l).count();
    let none: f64 = n_mu(lmax)
        * (blocks.iter().map(|b| block_cost(b, 0, n_r)).sum::<f64>()
            + grid.len() as f64 * triple_cost(n_r));
    let mut best: Option<(f64, usize, (usize, usize))> = None;
    for s in 0..blocks.len().saturating_sub(1) {
        let rest = &blocks[s + 1..];
        let (c0, c1) = rest
            .iter()
            .filter(|b| b.w > 0)
            .fold((n_r, 0), |(a, z), b| (a.min(b.r0), z.max(b.r0 + b.w)));
        if c1 <= c0 || (c0 == 0 && c1 == n_r) {
            continue;
        }
        let l_s = blocks[s].l1;
        let pass1 = n_mu(l_s)
            * (blocks[..=s]
                .iter()
                .map(|b| block_cost(b, 0, n_r))
                .sum::<f64>()
                + outputs_upto(l_s) as f64 * triple_cost(n_r)
                + 2.0 * triple_cost(n_r));
        let pass2 = n_mu(lmax)
            * (blocks.iter().map(|b| block_cost(b, c0, c1)).sum::<f64>()
                + outputs_after(l_s) as f64 * triple_cost(c1 - c0));
        let cost = pass1 + pass2;
        if best.as_ref().is_none_or(|b| cost < b.0) {
            best = Some((cost, s, (c0, c1)));
        }
    }
    best.filter(|b| b.0 < 0.9 * none).map(|b| (b.1, b.2))
}
