//! Wigner 3j symbols with zero magnetic numbers, (l1 l2 l3; 0 0 0), and the Gaunt factor.
//!
//! ## Closed form
//! With L = l1 + l2 + l3 even, g = L/2 and the triangle condition |l1 - l2| <= l3 <= l1 + l2
//! (otherwise the symbol vanishes), Racah's formula for zero magnetic numbers
//! (DLMF 34.3.5; Edmonds 1957, Eq. 3.7.17, from memory) is
//!
//! (l1 l2 l3; 0 0 0) = (-1)^g sqrt[(L-2l1)! (L-2l2)! (L-2l3)! / (L+1)!] g! / [(g-l1)! (g-l2)! (g-l3)!].
//!
//! Writing a = g - l1, b = g - l2, c = g - l3 (so a + b + c = g) and
//! w(n) = (2n)! / (4^n (n!)^2) = prod_{k=1}^{n} (1 - 1/(2k)), the powers of 4 cancel and
//!
//! (l1 l2 l3; 0 0 0)^2 = w(a) w(b) w(c) / [(2g + 1) w(g)].
//!
//! This is the log-factorial formula with the logarithms removed: w(n) decreases slowly
//! from 1 to about 1/sqrt(pi n), so there is no overflow and no cancellation. (A formula
//! that adds ln n! values of size 3e5 for l ~ 10^4 loses about 1e-10 to rounding, which
//! is why it is not used.) w(n) is tabulated once by its product formula in double-double
//! arithmetic and rounded, so each entry is correct to half an ulp; a symbol then costs
//! five table reads, four multiplications, a division and a square root, and is accurate
//! to about 1e-15 relative for any l (the table grows as needed in [`Wigner000::new`]).
//!
//! ## Recursion in l3
//! For m1 = m2 = m3 = 0 the three-term recursion of Schulten & Gordon (1975, J. Math.
//! Phys. 16, 1961, Eq. 3) loses its middle term, leaving
//!
//! l3 A(l3+1) f(l3+1) + (l3+1) A(l3) f(l3-1) = 0,   A(l3) = l3 sqrt[(l3^2 - (l1-l2)^2)((l1+l2+1)^2 - l3^2)],
//!
//! i.e. f(l3+1) = -sqrt[X(l3) / X(l3+1)] f(l3-1) with X(j) = (j^2 - (l1-l2)^2)((l1+l2+1)^2 - j^2),
//! a pure product (no cancellation, stable in both directions). As in Schulten & Gordon
//! the start value is arbitrary and the result is normalised with
//! sum_{l3} (2 l3 + 1) f(l3)^2 = 1 (Edmonds 1957, Eq. 3.7.8, from memory) and the sign
//! (-1)^{max(l1,l2)} at l3 = |l1 - l2|; so [`wigner3j_000_fill_l3_recursive`] does not use
//! the closed form at all and serves as an independent check of it.
//!
//! ## Gaunt factor
//! I_{l1 l2 l3} = sqrt[(2l1+1)(2l2+1)(2l3+1)/(4 pi)] (l1 l2 l3; 0 0 0), the angular factor
//! of the reduced CMB bispectrum (Komatsu & Spergel 2001, Phys. Rev. D 63, 063002).

use std::f64::consts::PI;
use std::sync::OnceLock;

use super::{quick_two_sum, two_prod};

/// Largest l covered by the shared table behind the free functions; beyond it they
/// compute w(n) on the fly (O(n) per call, same accuracy).
pub const SHARED_TABLE_LMAX: u32 = 20_000;

/// Tabulated w(n) = (2n)!/(4^n (n!)^2) for the closed form of (l1 l2 l3; 0 0 0).
#[derive(Debug, Clone)]
pub struct Wigner000 {
    /// w[n] for n = 0..=3 lmax / 2 + 1.
    w: Vec<f64>,
    lmax: u32,
}

impl Wigner000 {
    /// Plans the table for all l1, l2, l3 <= `lmax` (3 lmax / 2 + 2 entries, built in
    /// O(lmax)). Larger l still work, with w(n) computed on the fly.
    pub fn new(lmax: u32) -> Self {
        let nmax = 3 * lmax as usize / 2 + 1;
        let mut w = Vec::with_capacity(nmax + 1);
        // w(n) = w(n-1) (2n-1)/(2n) in double-double.
        let (mut hi, mut lo) = (1.0_f64, 0.0_f64);
        w.push(1.0);
        for n in 1..=nmax {
            (hi, lo) = dd_mul_ratio(hi, lo, (2 * n - 1) as f64, (2 * n) as f64);
            w.push(hi + lo);
        }
        Self { w, lmax }
    }

    /// The l up to which the table covers all symbols.
    pub fn lmax(&self) -> u32 {
        self.lmax
    }

    /// w(n), from the table or, beyond it, by continuing the product.
    #[inline]
    fn w(&self, n: usize) -> f64 {
        match self.w.get(n) {
            Some(v) => *v,
            None => self.w_beyond(n),
        }
    }

    #[cold]
    fn w_beyond(&self, n: usize) -> f64 {
        let start = self.w.len() - 1;
        let (mut hi, mut lo) = (self.w[start], 0.0);
        for k in start + 1..=n {
            (hi, lo) = dd_mul_ratio(hi, lo, (2 * k - 1) as f64, (2 * k) as f64);
        }
        hi + lo
    }

    /// (l1 l2 l3; 0 0 0)^2 (zero unless l1 + l2 + l3 is even and the triangle holds).
    #[inline]
    pub fn squared(&self, l1: u32, l2: u32, l3: u32) -> f64 {
        match half_sum(l1, l2, l3) {
            None => 0.0,
            Some(g) => {
                // Sorted so that the rounding is the same for every permutation of the l's.
                let mut abc = [g - l1 as usize, g - l2 as usize, g - l3 as usize];
                abc.sort_unstable();
                let [a, b, c] = abc;
                self.w(a) * self.w(b) * self.w(c) / ((2 * g + 1) as f64 * self.w(g))
            }
        }
    }

    /// (l1 l2 l3; 0 0 0), with the sign (-1)^((l1+l2+l3)/2).
    #[inline]
    pub fn value(&self, l1: u32, l2: u32, l3: u32) -> f64 {
        match half_sum(l1, l2, l3) {
            None => 0.0,
            Some(g) => {
                let v = self.squared(l1, l2, l3).sqrt();
                if g % 2 == 1 { -v } else { v }
            }
        }
    }

    /// Gaunt factor sqrt[(2l1+1)(2l2+1)(2l3+1)/(4 pi)] (l1 l2 l3; 0 0 0).
    #[inline]
    pub fn gaunt(&self, l1: u32, l2: u32, l3: u32) -> f64 {
        let v = self.value(l1, l2, l3);
        if v == 0.0 {
            return 0.0;
        }
        let p = (2.0 * l1 as f64 + 1.0) * (2.0 * l2 as f64 + 1.0) * (2.0 * l3 as f64 + 1.0);
        v * (p / (4.0 * PI)).sqrt()
    }

    /// Fills `out[l3] = (l1 l2 l3; 0 0 0)` for every l3 < out.len() (zeros where the
    /// symbol vanishes), from the closed form: O(1) per entry, no allocation.
    pub fn fill_l3(&self, l1: u32, l2: u32, out: &mut [f64]) {
        for (l3, v) in out.iter_mut().enumerate() {
            *v = match u32::try_from(l3) {
                Ok(l3) => self.value(l1, l2, l3),
                Err(_) => 0.0,
            };
        }
    }
}

/// Multiplies the double-double (hi, lo) by num/den (both exact doubles).
#[inline]
fn dd_mul_ratio(hi: f64, lo: f64, num: f64, den: f64) -> (f64, f64) {
    // (hi + lo) * num
    let (p, e) = two_prod(hi, num);
    let (p, e) = quick_two_sum(p, e + lo * num);
    // / den: q1 = p/den, remainder exact via fma.
    let q1 = p / den;
    let (m, me) = two_prod(q1, den);
    let r = (p - m) - me + e;
    let q2 = r / den;
    quick_two_sum(q1, q2)
}

/// g = (l1+l2+l3)/2 if the sum is even and the triangle condition holds.
#[inline]
fn half_sum(l1: u32, l2: u32, l3: u32) -> Option<usize> {
    let (a, b, c) = (l1 as usize, l2 as usize, l3 as usize);
    let s = a + b + c;
    if s % 2 == 1 || c > a + b || c < a.abs_diff(b) {
        None
    } else {
        Some(s / 2)
    }
}

fn shared() -> &'static Wigner000 {
    static TABLE: OnceLock<Wigner000> = OnceLock::new();
    TABLE.get_or_init(|| Wigner000::new(SHARED_TABLE_LMAX))
}

/// (l1 l2 l3; 0 0 0) from the closed form (module docs), accurate to about 1e-15
/// relative. Zero unless l1 + l2 + l3 is even and |l1 - l2| <= l3 <= l1 + l2.
///
/// ```
/// use ngreach::special::wigner3j_000;
/// // (1 1 2; 0 0 0) = sqrt(2/15)
/// assert!((wigner3j_000(1, 1, 2) - (2.0_f64 / 15.0).sqrt()).abs() < 1e-16);
/// assert_eq!(wigner3j_000(1, 1, 1), 0.0);
/// ```
pub fn wigner3j_000(l1: u32, l2: u32, l3: u32) -> f64 {
    shared().value(l1, l2, l3)
}

/// (l1 l2 l3; 0 0 0)^2.
pub fn wigner3j_000_squared(l1: u32, l2: u32, l3: u32) -> f64 {
    shared().squared(l1, l2, l3)
}

/// Gaunt factor I_{l1 l2 l3} = sqrt[(2l1+1)(2l2+1)(2l3+1)/(4 pi)] (l1 l2 l3; 0 0 0).
pub fn gaunt_000(l1: u32, l2: u32, l3: u32) -> f64 {
    shared().gaunt(l1, l2, l3)
}

/// Fills `out[l3] = (l1 l2 l3; 0 0 0)` for every l3 < out.len() by the Schulten-Gordon
/// recursion (module docs), normalised by sum_{l3} (2 l3 + 1) f^2 = 1 over the whole
/// triangle (even when `out` is shorter). Independent of the closed form; O(l1 + l2), no
/// allocation.
pub fn wigner3j_000_fill_l3_recursive(l1: u32, l2: u32, out: &mut [f64]) {
    out.fill(0.0);
    let (a, b) = (l1 as u64, l2 as u64);
    let lmin = a.abs_diff(b);
    let lmax = a + b;
    // Pass 1: normalisation (compensated sum).
    let mut sum = 0.0_f64;
    let mut comp = 0.0_f64;
    sweep_000(lmin, lmax, |l3, f| {
        let term = (2 * l3 + 1) as f64 * f * f;
        let y = term - comp;
        let t = sum + y;
        comp = (t - sum) - y;
        sum = t;
    });
    let g_min = (a + b + lmin) / 2;
    let sign = if g_min % 2 == 1 { -1.0 } else { 1.0 };
    let scale = sign / sum.sqrt();
    // Pass 2: store.
    let n = out.len() as u64;
    sweep_000(lmin, lmax, |l3, f| {
        if l3 < n {
            out[l3 as usize] = scale * f;
        }
    });
}

/// Runs the unnormalised recursion f(lmin) = 1, f(l3 + 2) = -sqrt[X(l3+1)/X(l3+2)] f(l3)
/// over l3 = lmin, lmin + 2, ..., lmax, calling `visit(l3, f)`.
fn sweep_000(lmin: u64, lmax: u64, mut visit: impl FnMut(u64, f64)) {
    let d = lmin as f64;
    let s1 = lmax as f64 + 1.0;
    // X(j) = (j - d)(j + d)(s1 - j)(s1 + j): each factor an exact integer in f64.
    let x_of = |j: u64| {
        let j = j as f64;
        ((j - d) * (j + d)) * ((s1 - j) * (s1 + j))
    };
    let mut f = 1.0_f64;
    let mut l3 = lmin;
    loop {
        visit(l3, f);
        if l3 + 2 > lmax {
            break;
        }
        let ratio = x_of(l3 + 1) / x_of(l3 + 2);
        f = -f * ratio.sqrt();
        l3 += 2;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::numerics::GaussLegendre;

    #[test]
    fn known_values() {
        // (1 1 0;000) = -1/sqrt(3), (1 1 2;000) = sqrt(2/15), (2 2 2;000) = -sqrt(2/35)
        // (Edmonds 1957, Table 2, from memory; they follow from the closed form).
        let close = |a: f64, b: f64| (a - b).abs() <= 2e-16 * b.abs();
        assert!(close(wigner3j_000(1, 1, 0), -(1.0_f64 / 3.0).sqrt()));
        assert!(close(wigner3j_000(1, 1, 2), (2.0_f64 / 15.0).sqrt()));
        assert!(close(wigner3j_000(2, 2, 2), -(2.0_f64 / 35.0).sqrt()));
        assert_eq!(wigner3j_000(0, 0, 0), 1.0);
        // (l l 0; 000) = (-1)^l / sqrt(2l+1).
        for l in [3u32, 10, 1001, 9999] {
            let e = if l % 2 == 1 { -1.0 } else { 1.0 } / (2.0 * l as f64 + 1.0).sqrt();
            assert!((wigner3j_000(l, l, 0) / e - 1.0).abs() < 1e-15, "l={l}");
        }
        // Zeros: odd sum, triangle violated.
        assert_eq!(wigner3j_000(2, 3, 4), 0.0);
        assert_eq!(wigner3j_000(2, 3, 6), 0.0);
        assert_eq!(wigner3j_000(10, 2, 6), 0.0);
        assert_eq!(gaunt_000(2, 3, 4), 0.0);
    }

    #[test]
    fn symmetric_in_all_arguments() {
        for (a, b, c) in [(3u32, 5, 6), (100, 250, 300), (7000, 4000, 9000)] {
            let v = wigner3j_000(a, b, c);
            for (x, y, z) in [(b, a, c), (c, b, a), (a, c, b), (b, c, a), (c, a, b)] {
                assert_eq!(wigner3j_000(x, y, z), v);
            }
        }
    }

    #[test]
    fn orthogonality_sum() {
        // sum_{l3} (2 l3 + 1) (l1 l2 l3; 0 0 0)^2 = 1 (Edmonds 1957, Eq. 3.7.8, from memory).
        let mut worst: f64 = 0.0;
        for (l1, l2) in [
            (0u32, 0u32),
            (1, 1),
            (17, 4),
            (300, 301),
            (2500, 1200),
            (10000, 10000),
        ] {
            let lo = l1.abs_diff(l2);
            let s: f64 = (lo..=l1 + l2)
                .map(|l3| (2 * l3 + 1) as f64 * wigner3j_000_squared(l1, l2, l3))
                .sum();
            worst = worst.max((s - 1.0).abs());
            assert!((s - 1.0).abs() < 1e-12, "l1={l1} l2={l2}: {s}");
        }
        println!("orthogonality worst |sum - 1| = {worst:.2e}");
    }

    #[test]
    fn gaunt_integral_of_three_legendre_polynomials() {
        // (l1 l2 l3; 0 0 0)^2 = (1/2) int_{-1}^{1} P_l1 P_l2 P_l3 dmu (Edmonds 1957, Eq. 4.6.5, from memory),
        // exact with a Gauss-Legendre rule of (l1+l2+l3)/2 + 1 nodes.
        let mut worst: f64 = 0.0;
        for (l1, l2, l3) in [
            (2u32, 2u32, 2u32),
            (5, 7, 4),
            (40, 30, 20),
            (100, 150, 200),
            (300, 250, 450),
        ] {
            let n = ((l1 + l2 + l3) / 2 + 1) as usize;
            let gl = GaussLegendre::new(n);
            let lm = l1.max(l2).max(l3) as usize;
            let mut p = vec![0.0; lm + 1];
            let integral = gl.integrate(-1.0, 1.0, |mu| {
                legendre_all(mu, &mut p);
                p[l1 as usize] * p[l2 as usize] * p[l3 as usize]
            });
            let want = wigner3j_000_squared(l1, l2, l3);
            let e = (0.5 * integral - want).abs() / want;
            worst = worst.max(e);
            assert!(e < 1e-10, "({l1} {l2} {l3}): {} vs {want}", 0.5 * integral);
        }
        println!("Gaunt integral worst relative error {worst:.2e}");
    }

    fn legendre_all(mu: f64, p: &mut [f64]) {
        p[0] = 1.0;
        if p.len() > 1 {
            p[1] = mu;
        }
        for l in 1..p.len() - 1 {
            let lf = l as f64;
            p[l + 1] = ((2.0 * lf + 1.0) * mu * p[l] - lf * p[l - 1]) / (lf + 1.0);
        }
    }

    #[test]
    fn recursion_matches_closed_form() {
        let t = Wigner000::new(10_000);
        let mut worst: f64 = 0.0;
        for (l1, l2) in [
            (0u32, 0u32),
            (1, 0),
            (3, 3),
            (20, 7),
            (500, 900),
            (3000, 2999),
            (10000, 10000),
            (10000, 1),
        ] {
            let n = (l1 + l2 + 1) as usize;
            let mut rec = vec![0.0; n];
            let mut closed = vec![0.0; n];
            wigner3j_000_fill_l3_recursive(l1, l2, &mut rec);
            t.fill_l3(l1, l2, &mut closed);
            for l3 in 0..n {
                if closed[l3] == 0.0 {
                    assert_eq!(rec[l3], 0.0, "l1={l1} l2={l2} l3={l3}");
                } else {
                    let e = (rec[l3] / closed[l3] - 1.0).abs();
                    worst = worst.max(e);
                    assert!(
                        e < 1e-12,
                        "l1={l1} l2={l2} l3={l3}: {} vs {}",
                        rec[l3],
                        closed[l3]
                    );
                }
            }
        }
        // A short output slice still gets the fully normalised values.
        let mut short = vec![0.0; 50];
        wigner3j_000_fill_l3_recursive(400, 380, &mut short);
        assert!((short[40] / t.value(400, 380, 40) - 1.0).abs() < 1e-12);
        println!("recursion vs closed form worst relative difference {worst:.2e}");
    }

    #[test]
    fn table_beyond_lmax_and_shared_agree() {
        let small = Wigner000::new(10);
        let big = Wigner000::new(20_000);
        for (a, b, c) in [(3u32, 4u32, 5u32), (400, 500, 600), (15000, 15000, 20000)] {
            let x = small.value(a, b, c);
            let y = big.value(a, b, c);
            assert!((x / y - 1.0).abs() < 1e-14, "({a} {b} {c}): {x} vs {y}");
            assert_eq!(y, wigner3j_000(a, b, c));
        }
        // w(n) against its asymptotic form 1/sqrt(pi n) (1 - 1/(8n) + 1/(128 n^2)).
        let n = 20_000.0;
        let asym = (1.0 / (PI * n).sqrt()) * (1.0 - 1.0 / (8.0 * n) + 1.0 / (128.0 * n * n));
        assert!((big.w(20_000) / asym - 1.0).abs() < 1e-13);
    }
}
