//! The inner kernel of the every-l line-of-sight projection: for up to [`LANES`] time
//! nodes of one k at once, every j_l(x) for l = 0..=l_top by recurrence, fused with the
//! accumulation of the T and E rows, so that no table of j_l is ever written.
//!
//! Per lane (one node, x = k (eta_0 - eta)):
//! - j_0, j_1 exactly; then the upward recurrence j_{l+1} = (2l + 1)/x j_l - j_{l-1} up to
//!   l = floor(x) (stable below the turning point l ~ x);
//! - above floor(x) the ratios r_l = j_l / j_{l-1} by the downward recurrence
//!   r_l = x / (2l + 1 - x r_{l+1}), started at l_cut(x) + 16 from the leading-order
//!   ratio x / (2l + 3) (an error there shrinks by the square of j_l's decay, ~1e-12 by
//!   the turning point), and j_l = r_l j_{l-1}. This is the scheme of
//!   [`crate::special::sph_bessel_all_l`], run for all lanes side by side.
//!
//! The lanes accumulate into per-lane rows ([l][lane]), summed once per k, so the loop over
//! l carries no horizontal sum. On x86-64 CPUs with AVX2 and FMA the same code is compiled
//! a second time with those features and chosen at run time; elsewhere the portable copy
//! runs (same operations without fused multiply-adds).

#![allow(unsafe_code)] // audited: calling the AVX-512 or AVX2/FMA copy after detecting the features
#![allow(clippy::needless_range_loop)] // lane-indexed loops, written for the vectorizer

use crate::special::bessel::l_cut;

/// Nodes processed side by side.
pub(crate) const LANES: usize = 8;

/// Up to [`LANES`] nodes of one k: their x and the coefficients of j_l in the rows,
/// T_l += j_l (ca + l cb + l(l-1) cc) + j_{l+1} cd and E_l += j_l ce.
#[derive(Default)]
pub(crate) struct Lanes {
    /// Filled lanes.
    pub len: usize,
    x: [f64; LANES],
    /// ca, cb, cc, cd, ce per lane.
    c: [[f64; LANES]; 5],
}

impl Lanes {
    /// Adds a node (x > 0); true when the group is full.
    pub fn push(&mut self, x: f64, coef: [f64; 5]) -> bool {
        let g = self.len;
        self.x[g] = x;
        for (c, v) in self.c.iter_mut().zip(coef) {
            c[g] = v;
        }
        self.len += 1;
        self.len == LANES
    }

    /// Accumulates the group into the per-lane rows `acc_t`, `acc_e` (layout
    /// [l * LANES + lane], l = 0..=lmax; rows l < 2 untouched) and empties it. `rat` is
    /// scratch of at least 2 (lmax + 2) * LANES values.
    pub fn run(&mut self, lmax: usize, acc_t: &mut [f64], acc_e: &mut [f64], rat: &mut [f64]) {
        if self.len == 0 {
            return;
        }
        // Idle lanes repeat lane 0's argument with zero coefficients.
        for g in self.len..LANES {
            self.x[g] = self.x[0];
            for c in self.c.iter_mut() {
                c[g] = 0.0;
            }
        }
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx512f")
                && std::arch::is_x86_feature_detected!("fma")
            {
                // SAFETY: the CPU supports AVX-512F and FMA (checked just above), the
                // only requirement of calling a function compiled with those features.
                unsafe { run_avx512_fma(self, lmax, acc_t, acc_e, rat) };
                self.len = 0;
                return;
            }
            if std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
            {
                // SAFETY: the CPU supports AVX2 and FMA (checked just above), the only
                // requirement of calling a function compiled with those features.
                unsafe { run_avx2_fma(self, lmax, acc_t, acc_e, rat) };
                self.len = 0;
                return;
            }
        }
        run_lanes::<false>(self, lmax, acc_t, acc_e, rat);
        self.len = 0;
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn run_avx2_fma(
    lanes: &Lanes,
    lmax: usize,
    acc_t: &mut [f64],
    acc_e: &mut [f64],
    rat: &mut [f64],
) {
    run_lanes::<true>(lanes, lmax, acc_t, acc_e, rat);
}

/// The same kernel with 512-bit vectors: the eight lanes fill one register.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn run_avx512_fma(
    lanes: &Lanes,
    lmax: usize,
    acc_t: &mut [f64],
    acc_e: &mut [f64],
    rat: &mut [f64],
) {
    run_lanes::<true>(lanes, lmax, acc_t, acc_e, rat);
}

/// a b + c, fused when `F` (only used where the CPU has FMA).
#[inline(always)]
fn madd<const F: bool>(a: f64, b: f64, c: f64) -> f64 {
    if F { a.mul_add(b, c) } else { a * b + c }
}

#[inline(always)]
fn run_lanes<const F: bool>(
    lanes: &Lanes,
    lmax: usize,
    acc_t: &mut [f64],
    acc_e: &mut [f64],
    rat: &mut [f64],
) {
    let [ca, cb, cc, cd, ce] = lanes.c;
    let mut ix = [0.0; LANES];
    let mut jm = [0.0; LANES];
    let mut jc = [0.0; LANES];
    let mut up = [0usize; LANES];
    let mut top = 0usize;
    for g in 0..LANES {
        let x = lanes.x[g];
        let (s, co) = x.sin_cos();
        ix[g] = 1.0 / x;
        jm[g] = s / x;
        jc[g] = (s / x - co) / x;
        // Last l reached by the upward recurrence.
        up[g] = (x.floor() as usize).clamp(1, lmax + 1);
        top = top.max(l_cut(x));
    }
    let l_common = up.iter().copied().min().unwrap_or(1);
    // Rows l = 2..=acc_end are accumulated; they need j up to acc_end + 1.
    let acc_end = lmax.min(top.min(lmax + 1) - 1);
    if acc_end < 2 {
        return;
    }
    // Phase 1: every lane below its turning point, pure upward recurrence, l + 1 <= l_common.
    let mut l = 1;
    if l_common >= 2 {
        for g in 0..LANES {
            let jp = madd::<F>(3.0 * ix[g], jc[g], -jm[g]);
            jm[g] = jc[g];
            jc[g] = jp;
        }
        l = 2;
        let p1_end = (l_common - 1).min(acc_end);
        let rows_t = acc_t[2 * LANES..(p1_end + 1) * LANES].chunks_exact_mut(LANES);
        let rows_e = acc_e[2 * LANES..(p1_end + 1) * LANES].chunks_exact_mut(LANES);
        // The quadratic ca + l cb + l(l-1) cc by forward differences (additions, which
        // run beside the multiply-adds): p at l = 2, its difference d = cb + 2 l cc.
        let mut p = [0.0; LANES];
        let mut d = [0.0; LANES];
        let mut cc2 = [0.0; LANES];
        for g in 0..LANES {
            p[g] = ca[g] + 2.0 * cb[g] + 2.0 * cc[g];
            d[g] = cb[g] + 4.0 * cc[g];
            cc2[g] = 2.0 * cc[g];
        }
        for (at, ae) in rows_t.zip(rows_e) {
            let tl = (2 * l + 1) as f64;
            for g in 0..LANES {
                let j = jc[g];
                let jp = madd::<F>(tl * ix[g], j, -jm[g]);
                let poly = p[g];
                p[g] += d[g];
                d[g] += cc2[g];
                at[g] = madd::<F>(jp, cd[g], madd::<F>(j, poly, at[g]));
                ae[g] = madd::<F>(j, ce[g], ae[g]);
                jm[g] = j;
                jc[g] = jp;
            }
            l += 1;
        }
    }
    if l > acc_end {
        return;
    }
    // Phase 2: from l on, j_{l+1} = a_m j_l - b_m j_{l-1} (m = l + 1) with, per lane,
    // a_m = (2l + 1)/x, b_m = 1 below the turning point (m <= up) and a_m = r_m, b_m = 0
    // above it, where r_m = j_m / j_{m-1} comes from the downward recurrence started well
    // above every lane's l_cut. Stored for m = l_common + 1 ..= acc_end + 1 at
    // rat[2 (m - l_common - 1) LANES + g] (a) and the next LANES values (b).
    let m_lo = l_common + 1;
    let m_hi = acc_end + 1;
    let start = top + 16;
    let mut upf = [0.0; LANES];
    let mut r = [0.0; LANES];
    for g in 0..LANES {
        upf[g] = up[g] as f64;
        r[g] = lanes.x[g] / (2.0 * start as f64 + 3.0);
    }
    for m in (m_hi + 1..=start).rev() {
        let tm = (2 * m + 1) as f64;
        for g in 0..LANES {
            r[g] = lanes.x[g] / (tm - lanes.x[g] * r[g]);
        }
    }
    for m in (m_lo..=m_hi).rev() {
        let mf = m as f64;
        let tm = 2.0 * mf + 1.0;
        let o = 2 * (m - m_lo) * LANES;
        let (sa, sb) = rat[o..o + 2 * LANES].split_at_mut(LANES);
        for g in 0..LANES {
            r[g] = lanes.x[g] / (tm - lanes.x[g] * r[g]);
            let below = mf <= upf[g];
            sa[g] = if below { (tm - 2.0) * ix[g] } else { r[g] };
            sb[g] = if below { 1.0 } else { 0.0 };
        }
    }
    while l <= acc_end {
        let lf = l as f64;
        let ll1 = lf * (lf - 1.0);
        let o = 2 * (l + 1 - m_lo) * LANES;
        let (ra, rb) = rat[o..o + 2 * LANES].split_at(LANES);
        let mut jp = [0.0; LANES];
        for g in 0..LANES {
            jp[g] = madd::<F>(ra[g], jc[g], -(rb[g] * jm[g]));
        }
        if l >= 2 {
            let at = &mut acc_t[l * LANES..(l + 1) * LANES];
            let ae = &mut acc_e[l * LANES..(l + 1) * LANES];
            for g in 0..LANES {
                let j = jc[g];
                let poly = madd::<F>(ll1, cc[g], madd::<F>(lf, cb[g], ca[g]));
                at[g] = madd::<F>(jp[g], cd[g], madd::<F>(j, poly, at[g]));
                ae[g] = madd::<F>(j, ce[g], ae[g]);
            }
        }
        jm = jc;
        jc = jp;
        l += 1;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::special::sph_bessel_all_l;

    /// Oracle: the rows summed lane by lane from `sph_bessel_all_l`, for groups that mix
    /// nodes above and below l_max, beyond and within the turning point, and tiny x.
    #[test]
    fn matches_bessel_routine() {
        let lmax = 400;
        let cases: [&[f64]; 4] = [
            &[402.5, 517.0, 1999.3],
            &[380.2, 381.0, 383.7, 385.1, 386.9, 388.0, 390.5, 391.2],
            &[45.3, 47.9, 50.1, 52.2, 55.0],
            &[0.3, 1.7, 2.2, 9.5],
        ];
        for xs in cases {
            let mut acc_t = vec![0.0; (lmax + 1) * LANES];
            let mut acc_e = vec![0.0; (lmax + 1) * LANES];
            let mut rat = vec![0.0; 2 * (lmax + 2) * LANES];
            let mut lanes = Lanes::default();
            for (i, &x) in xs.iter().enumerate() {
                let w = (i + 1) as f64;
                lanes.push(x, [w, 0.1 * w, 0.001 * w, 0.5 * w, w]);
            }
            lanes.run(lmax, &mut acc_t, &mut acc_e, &mut rat);
            let mut jl = vec![0.0; lmax + 2];
            for l in 2..=lmax {
                let (mut want_t, mut want_e) = (0.0, 0.0);
                let mut scale = 0.0_f64;
                for (i, &x) in xs.iter().enumerate() {
                    let w = (i + 1) as f64;
                    sph_bessel_all_l(lmax as u32 + 1, x, &mut jl);
                    let lf = l as f64;
                    want_t += jl[l] * w * (1.0 + 0.1 * lf + 0.001 * lf * (lf - 1.0))
                        + 0.5 * w * jl[l + 1];
                    want_e += w * jl[l];
                    scale = scale.max(w * (1.0 + 0.1 * lf + 0.001 * lf * lf) / x.max(1.0));
                }
                let got_t: f64 = acc_t[l * LANES..(l + 1) * LANES].iter().sum();
                let got_e: f64 = acc_e[l * LANES..(l + 1) * LANES].iter().sum();
                // Truncation at l_cut leaves ~1e-6 of the largest |j_l|.
                assert!((got_t - want_t).abs() < 2e-6 * scale, "{xs:?} l={l}");
                assert!((got_e - want_e).abs() < 2e-6 * scale, "{xs:?} l={l}");
            }
            assert_eq!(acc_t[..2 * LANES].iter().sum::<f64>(), 0.0);
        }
    }
}
