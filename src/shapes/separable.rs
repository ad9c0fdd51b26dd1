//! The separable representation of a bispectrum shape: an explicit list of monomials
//! c P(k1)^p1 P(k2)^p2 P(k3)^p3, all permutations written out (see the module
//! [`crate::shapes`] for the forms and the papers).

use crate::cosmology::Primordial;

/// One monomial `coeff * P(k1)^powers[0] * P(k2)^powers[1] * P(k3)^powers[2]` of a
/// separable bispectrum (f_NL = 1, P = P_Phi in Mpc^3).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SeparableTerm {
    /// Dimensionless coefficient.
    pub coeff: f64,
    /// Exponents of P_Phi on legs 1, 2, 3; they sum to 2 for every shape.
    pub powers: [f64; 3],
}

impl SeparableTerm {
    /// The monomial at given P_Phi values (Mpc^3) on the three legs.
    #[inline]
    pub fn eval_powers(&self, p: [f64; 3]) -> f64 {
        self.coeff
            * pow(p[0], self.powers[0])
            * pow(p[1], self.powers[1])
            * pow(p[2], self.powers[2])
    }
}

/// x^e with the exponents that occur here taken exactly where cheap.
#[inline]
fn pow(x: f64, e: f64) -> f64 {
    if e == 0.0 {
        1.0
    } else if e == 1.0 {
        x
    } else {
        x.powf(e)
    }
}

/// A bispectrum as an explicit sum of [`SeparableTerm`]s: every permutation of the legs is
/// its own term, and monomials with identical exponents are merged, so
/// B(k1, k2, k3) = Sum over [`Separable::terms`] exactly.
#[derive(Debug, Clone, PartialEq)]
pub struct Separable {
    terms: Vec<SeparableTerm>,
}

/// The six orderings of three legs.
const PERMUTATIONS: [[usize; 3]; 6] = [
    [0, 1, 2],
    [0, 2, 1],
    [1, 0, 2],
    [1, 2, 0],
    [2, 0, 1],
    [2, 1, 0],
];

impl Separable {
    /// An empty sum (the builder's start).
    pub(crate) fn new() -> Self {
        Self { terms: Vec::new() }
    }

    /// Adds `coeff * P1^p1 P2^p2 P3^p3` summed over all six orderings of the legs
    /// (so a triple with repeated exponents is counted with its multiplicity).
    pub(crate) fn add_ordered(&mut self, coeff: f64, powers: [f64; 3]) {
        for perm in PERMUTATIONS {
            self.push([powers[perm[0]], powers[perm[1]], powers[perm[2]]], coeff);
        }
    }

    /// Adds `coeff` times the sum over the *distinct* orderings of `powers`
    /// (three for a pair such as (1, 1, 0), one for (2/3, 2/3, 2/3)).
    pub(crate) fn add_distinct(&mut self, coeff: f64, powers: [f64; 3]) {
        let mut seen: [[f64; 3]; 6] = [[f64::NAN; 3]; 6];
        let mut n = 0;
        for perm in PERMUTATIONS {
            let p = [powers[perm[0]], powers[perm[1]], powers[perm[2]]];
            if !seen[..n].contains(&p) {
                seen[n] = p;
                n += 1;
                self.push(p, coeff);
            }
        }
    }

    /// Merges into an existing monomial with bit-identical exponents, or appends.
    fn push(&mut self, powers: [f64; 3], coeff: f64) {
        match self.terms.iter_mut().find(|t| t.powers == powers) {
            Some(t) => t.coeff += coeff,
            None => self.terms.push(SeparableTerm { coeff, powers }),
        }
    }

    /// Drops monomials whose coefficients cancelled (relative to the largest).
    pub(crate) fn finish(mut self) -> Self {
        let scale = self.terms.iter().fold(0.0_f64, |m, t| m.max(t.coeff.abs()));
        self.terms.retain(|t| t.coeff.abs() > 1e-14 * scale);
        self
    }

    /// The monomials, every permutation explicit.
    pub fn terms(&self) -> &[SeparableTerm] {
        &self.terms
    }

    /// The distinct exponents of P_Phi that occur on any leg, ascending: the radial
    /// functions a CMB kernel has to tabulate (0 means the transfer function alone).
    pub fn exponents(&self) -> Vec<f64> {
        let mut e: Vec<f64> = self.terms.iter().flat_map(|t| t.powers).collect();
        e.sort_by(f64::total_cmp);
        e.dedup();
        e
    }

    /// The sum at given P_Phi values (Mpc^3) on the three legs.
    pub fn eval_powers(&self, p1: f64, p2: f64, p3: f64) -> f64 {
        self.terms.iter().map(|t| t.eval_powers([p1, p2, p3])).sum()
    }

    /// B_Phi(k1, k2, k3) in Mpc^6 for f_NL = 1 (k in 1/Mpc), from the monomials.
    pub fn evaluate(&self, prim: &Primordial, k1: f64, k2: f64, k3: f64) -> f64 {
        self.eval_powers(prim.p_phi(k1), prim.p_phi(k2), prim.p_phi(k3))
    }

    /// The exact isosceles expansion B(k_L, k_S, k_S) = 4 P_L P_S Sum_j a_j
    /// (P_L/P_S)^(-Delta_j/3), ascending in Delta_j, cancelled powers removed.
    ///
    /// A monomial with exponent p1 on the soft leg contributes
    /// c P_L^p1 P_S^(2 - p1) = c P_L P_S (P_L/P_S)^(p1 - 1), i.e. Delta_j = 3 (1 - p1);
    /// this relies on every monomial having total power 2 (checked in the tests).
    pub fn isosceles_series(&self) -> Vec<SqueezedTerm> {
        let mut series: Vec<(f64, f64)> = Vec::new(); // (p1, summed coefficient)
        for t in &self.terms {
            match series.iter_mut().find(|(p, _)| *p == t.powers[0]) {
                Some((_, c)) => *c += t.coeff,
                None => series.push((t.powers[0], t.coeff)),
            }
        }
        let scale = series.iter().fold(0.0_f64, |m, (_, c)| m.max(c.abs()));
        let mut out: Vec<SqueezedTerm> = series
            .into_iter()
            .filter(|(_, c)| c.abs() > 1e-14 * scale)
            .map(|(p1, c)| SqueezedTerm {
                delta: 3.0 - 3.0 * p1,
                amplitude: c / 4.0,
            })
            .collect();
        out.sort_by(|a, b| a.delta.total_cmp(&b.delta));
        out
    }
}

/// One power in the squeezed expansion B(k_L, k_S, k_S) -> 4 a f_NL P(k_L) P(k_S)
/// (k_L/k_S)^Delta (n_s = 1; see [`SqueezedTerm::k_index`] otherwise). Local has
/// a = 1, Delta = 0.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SqueezedTerm {
    /// Squeezed index Delta at n_s = 1; the exact statement is (P_L/P_S)^(-Delta/3).
    pub delta: f64,
    /// Amplitude a relative to local (dimensionless).
    pub amplitude: f64,
}

impl SqueezedTerm {
    /// The power of k_L/k_S for a power-law P_Phi with tilt n_s:
    /// (P_L/P_S)^(-Delta/3) = (k_L/k_S)^(Delta (4 - n_s)/3).
    pub fn k_index(&self, n_s: f64) -> f64 {
        self.delta * (4.0 - n_s) / 3.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ordered_sum_merges_repeated_exponents() {
        // Sum over six orderings of (1, 1, 0) is twice the three distinct pairs.
        let mut s = Separable::new();
        s.add_ordered(1.0, [1.0, 1.0, 0.0]);
        let s = s.finish();
        assert_eq!(s.terms().len(), 3);
        assert!(s.terms().iter().all(|t| t.coeff == 2.0));
        let mut d = Separable::new();
        d.add_distinct(2.0, [0.0, 1.0, 1.0]);
        let d = d.finish();
        for t in d.terms() {
            assert!(s.terms().contains(t), "{t:?} missing");
        }
    }

    #[test]
    fn distinct_orderings_count() {
        for (powers, n) in [
            ([0.5, 0.5, 0.5], 1),
            ([1.0, 0.5, 0.5], 3),
            ([1.0, 0.25, 0.75], 6),
        ] {
            let mut s = Separable::new();
            s.add_distinct(1.0, powers);
            assert_eq!(s.finish().terms().len(), n, "{powers:?}");
        }
    }

    #[test]
    fn cancelled_terms_are_dropped() {
        let mut s = Separable::new();
        s.add_distinct(1.0, [1.0, 1.0, 0.0]);
        s.add_ordered(-0.5, [1.0, 1.0, 0.0]);
        s.add_distinct(3.0, [2.0 / 3.0; 3]);
        let s = s.finish();
        assert_eq!(s.terms().len(), 1);
        assert_eq!(s.exponents(), vec![2.0 / 3.0]);
    }

    #[test]
    fn k_index_scales_with_tilt() {
        let t = SqueezedTerm {
            delta: 2.0,
            amplitude: 3.0,
        };
        assert_eq!(t.k_index(1.0), 2.0);
        assert!((t.k_index(0.9649) - 2.0 * 3.0351 / 3.0).abs() < 1e-15);
    }
}
