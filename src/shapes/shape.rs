//! The [`Shape`] enum: parsing, names, closed-form bispectra, separable forms and
//! squeezed limits (equations and papers in the module [`crate::shapes`]).

use std::fmt;
use std::str::FromStr;

use crate::cosmology::Primordial;
use crate::error::{Error, Location, Result};
use crate::shapes::separable::{Separable, SqueezedTerm};

/// A validated squeezed index 0 <= Delta <= 3/2 of the intermediate family, remembering
/// whether the user gave Delta or a mediator mass m/H (for [`Shape::name`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SqueezedIndex {
    delta: f64,
    mass_over_h: Option<f64>,
}

impl SqueezedIndex {
    /// The largest index of the family, Delta = 3/2 (mediator mass m = 3H/2, nu = 0).
    pub const MAX: f64 = 1.5;

    /// From Delta directly.
    ///
    /// # Errors
    /// [`Error::OutOfRange`] at `at` unless 0 <= Delta <= 3/2 (NaN included).
    pub fn new(delta: f64, at: Location) -> Result<Self> {
        if !(0.0..=Self::MAX).contains(&delta) {
            return Err(Error::out_of_range(
                at,
                "shape.delta",
                delta,
                "0 <= delta <= 1.5",
            ));
        }
        Ok(Self {
            delta: delta + 0.0, // -0.0 -> +0.0
            mass_over_h: None,
        })
    }

    /// From a mediator mass in units of the Hubble rate during inflation,
    /// Delta = 3/2 - sqrt(9/4 - m^2/H^2) (Chen & Wang 2010, arXiv:0909.0496).
    ///
    /// # Errors
    /// [`Error::OutOfRange`] at `at` unless 0 <= m/H <= 3/2: heavier fields have a complex
    /// nu and an oscillating squeezed limit, outside this family.
    pub fn from_mass(m_over_h: f64, at: Location) -> Result<Self> {
        if !(0.0..=1.5).contains(&m_over_h) {
            return Err(Error::out_of_range(
                at,
                "shape.mass",
                m_over_h,
                "0 <= m/H <= 1.5 (heavier mediators give an oscillating squeezed limit)",
            ));
        }
        let nu = (2.25 - m_over_h * m_over_h).max(0.0).sqrt();
        Ok(Self {
            delta: (1.5 - nu).clamp(0.0, Self::MAX),
            mass_over_h: Some(m_over_h + 0.0),
        })
    }

    /// The squeezed index Delta.
    pub fn delta(&self) -> f64 {
        self.delta
    }

    /// The mediator mass m/H, when the index was given that way.
    pub fn mass_over_h(&self) -> Option<f64> {
        self.mass_over_h
    }
}

/// A primordial bispectrum shape of the potential Phi (see [`crate::shapes`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Shape {
    /// Local: B = 2 [P1 P2 + 2 perms] (Komatsu & Spergel 2001).
    Local,
    /// Equilateral template (Creminelli, Nicolis, Senatore, Tegmark & Zaldarriaga 2006).
    Equilateral,
    /// Orthogonal template (Senatore, Smith & Zaldarriaga 2010).
    Orthogonal,
    /// Separable intermediate template with squeezed index Delta (light mediator,
    /// Chen & Wang 2010): B = 2 {[P1 P2^(1-Delta/3) P3^(Delta/3) + 5 perms] - [P1 P2 + 2 perms]}.
    Intermediate(SqueezedIndex),
}

/// The accepted spellings, for error messages.
const ACCEPTED: &str = "local, equilateral, orthogonal, delta=<0..1.5>, mass=<m/H in 0..1.5> (and tau_nl in shape lists)";

/// A number with two decimals when that is exact, else the shortest exact form.
fn canonical_number(v: f64) -> String {
    let two = format!("{v:.2}");
    if two.parse::<f64>() == Ok(v) {
        two
    } else {
        format!("{v}")
    }
}

impl Shape {
    /// Parses `local`, `equilateral`, `orthogonal`, `delta=<Delta>` or `mass=<m/H>`
    /// (ASCII case and surrounding blanks ignored); `at` says where the text came from,
    /// e.g. `Location::Flag("--shape".into())`.
    ///
    /// # Errors
    /// [`Error::BadField`] for an unknown name or an unreadable number,
    /// [`Error::OutOfRange`] for Delta outside [0, 1.5] or m/H outside [0, 1.5].
    pub fn parse(text: &str, at: Location) -> Result<Self> {
        let t = text.trim();
        let bad = |at: Location, message: String| Error::BadField {
            at,
            field: "shape".to_string(),
            message,
        };
        if let Some((key, value)) = t.split_once('=') {
            let key = key.trim().to_ascii_lowercase();
            let value = value.trim();
            let number = |at: Location| -> Result<f64> {
                value.parse::<f64>().map_err(|_| {
                    bad(
                        at,
                        format!("`{t}`: `{value}` is not a number; accepted: {ACCEPTED}"),
                    )
                })
            };
            return match key.as_str() {
                "delta" => Ok(Shape::Intermediate(SqueezedIndex::new(
                    number(at.clone())?,
                    at,
                )?)),
                "mass" => Ok(Shape::Intermediate(SqueezedIndex::from_mass(
                    number(at.clone())?,
                    at,
                )?)),
                _ => Err(bad(
                    at,
                    format!("unknown shape parameter in `{t}`; accepted: {ACCEPTED}"),
                )),
            };
        }
        match t.to_ascii_lowercase().as_str() {
            "local" => Ok(Shape::Local),
            "equilateral" => Ok(Shape::Equilateral),
            "orthogonal" => Ok(Shape::Orthogonal),
            _ => Err(bad(
                at,
                format!("unknown shape `{t}`; accepted: {ACCEPTED}"),
            )),
        }
    }

    /// Canonical name for output, accepted back by [`Shape::parse`]: `local`,
    /// `equilateral`, `orthogonal`, `delta=0.50` or `mass=1.20` (two decimals when exact,
    /// otherwise all the digits needed to read the same value back).
    pub fn name(&self) -> String {
        match self {
            Shape::Local => "local".to_string(),
            Shape::Equilateral => "equilateral".to_string(),
            Shape::Orthogonal => "orthogonal".to_string(),
            Shape::Intermediate(ix) => match ix.mass_over_h {
                Some(m) => format!("mass={}", canonical_number(m)),
                None => format!("delta={}", canonical_number(ix.delta)),
            },
        }
    }

    /// B_Phi(k1, k2, k3) in Mpc^6 for f_NL = 1, k in 1/Mpc (> 0), from the closed form.
    pub fn bispectrum_phi(&self, prim: &Primordial, k1: f64, k2: f64, k3: f64) -> f64 {
        self.bispectrum_from_power(prim.p_phi(k1), prim.p_phi(k2), prim.p_phi(k3))
    }

    /// The closed form at given P_Phi values (Mpc^3, > 0) on the three legs, f_NL = 1.
    pub fn bispectrum_from_power(&self, p1: f64, p2: f64, p3: f64) -> f64 {
        let pairs = p1 * p2 + p2 * p3 + p3 * p1;
        match self {
            Shape::Local => 2.0 * pairs,
            Shape::Equilateral | Shape::Orthogonal => {
                let (c1, c2, c3) = (p1.cbrt(), p2.cbrt(), p3.cbrt());
                let prod = c1 * c2 * c3;
                let cube23 = prod * prod; // (P1 P2 P3)^(2/3)
                // Sum over the six orderings of P_a^(1/3) P_b^(2/3) P_c.
                let mix = c1 * (c2 * c2 * p3 + c3 * c3 * p2)
                    + c2 * (c1 * c1 * p3 + c3 * c3 * p1)
                    + c3 * (c1 * c1 * p2 + c2 * c2 * p1);
                if matches!(self, Shape::Equilateral) {
                    6.0 * (-pairs - 2.0 * cube23 + mix)
                } else {
                    6.0 * (-3.0 * pairs - 8.0 * cube23 + 3.0 * mix)
                }
            }
            Shape::Intermediate(ix) => {
                let q = ix.delta / 3.0;
                let (u1, u2, u3) = (p1.powf(q), p2.powf(q), p3.powf(q));
                let (v1, v2, v3) = (p1.powf(1.0 - q), p2.powf(1.0 - q), p3.powf(1.0 - q));
                // Sum over the six orderings of P_a P_b^(1-q) P_c^q.
                let mix =
                    p1 * (v2 * u3 + v3 * u2) + p2 * (v1 * u3 + v3 * u1) + p3 * (v1 * u2 + v2 * u1);
                2.0 * (mix - pairs)
            }
        }
    }

    /// The separable form: every monomial c P(k1)^p1 P(k2)^p2 P(k3)^p3 written out.
    pub fn separable(&self) -> Separable {
        let third = 1.0 / 3.0;
        let two_thirds = 2.0 / 3.0;
        let mut s = Separable::new();
        match self {
            Shape::Local => s.add_distinct(2.0, [1.0, 1.0, 0.0]),
            Shape::Equilateral | Shape::Orthogonal => {
                let (a, b, c) = if matches!(self, Shape::Equilateral) {
                    (-6.0, -12.0, 6.0)
                } else {
                    (-18.0, -48.0, 18.0)
                };
                s.add_distinct(a, [1.0, 1.0, 0.0]);
                s.add_distinct(b, [two_thirds; 3]);
                s.add_distinct(c, [third, two_thirds, 1.0]);
            }
            Shape::Intermediate(ix) => {
                let q = ix.delta / 3.0;
                s.add_ordered(2.0, [1.0, 1.0 - q, q]);
                s.add_distinct(-2.0, [1.0, 1.0, 0.0]);
            }
        }
        s.finish()
    }

    /// The exact isosceles expansion B(k_L, k_S, k_S) = 4 f_NL P_L P_S Sum_j a_j
    /// (P_L/P_S)^(-Delta_j/3), ascending in Delta_j (the table in [`crate::shapes`]).
    pub fn isosceles_series(&self) -> Vec<SqueezedTerm> {
        self.separable().isosceles_series()
    }

    /// The leading squeezed term (a, Delta): B(k_L, k_S, k_S) -> 4 a f_NL P(k_L) P(k_S)
    /// (k_L/k_S)^Delta as k_L/k_S -> 0 (n_s = 1; [`SqueezedTerm::k_index`] for n_s != 1).
    /// Local (1, 0), equilateral (3, 2), orthogonal (-3, 1), family (1, Delta) for
    /// Delta < 3/2 and (2, 3/2) at Delta = 3/2.
    pub fn squeezed_limit(&self) -> SqueezedTerm {
        // Every shape has a non-empty series (the equilateral point is 6 P^2 != 0).
        self.isosceles_series()[0]
    }
}

impl FromStr for Shape {
    type Err = Error;
    /// [`Shape::parse`] with [`Location::Builtin`].
    fn from_str(s: &str) -> Result<Self> {
        Shape::parse(s, Location::Builtin)
    }
}

impl fmt::Display for Shape {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.name())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Planck 2018 (TT,TE,EE+lowE+lensing) A_s and n_s, pivot 0.05/Mpc (conventions.md).
    fn planck() -> Primordial {
        Primordial::from_values(2.0989e-9, 0.9649, 0.05)
    }
    fn scale_invariant() -> Primordial {
        Primordial::from_values(2.0989e-9, 1.0, 0.05)
    }

    fn family(delta: f64) -> Shape {
        Shape::Intermediate(SqueezedIndex::new(delta, Location::Builtin).unwrap())
    }

    fn all_shapes() -> Vec<Shape> {
        let mut v = vec![Shape::Local, Shape::Equilateral, Shape::Orthogonal];
        for d in [0.0, 0.37, 1.0, 1.3, 1.5] {
            v.push(family(d));
        }
        v
    }

    /// Sum of |monomials|: the natural floating-point scale of a shape at a triangle.
    fn magnitude(s: &Separable, prim: &Primordial, k: [f64; 3]) -> f64 {
        let p = [prim.p_phi(k[0]), prim.p_phi(k[1]), prim.p_phi(k[2])];
        s.terms().iter().map(|t| t.eval_powers(p).abs()).sum()
    }

    /// xorshift64* (Vigna 2016), uniform in [0, 1).
    struct XorShift(u64);
    impl XorShift {
        fn next(&mut self) -> f64 {
            self.0 ^= self.0 >> 12;
            self.0 ^= self.0 << 25;
            self.0 ^= self.0 >> 27;
            (self.0.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 / (1u64 << 53) as f64
        }
    }

    /// Random triangle: k1 in [1e-4, 1]/Mpc log-uniform, k2/k1 log-uniform down to
    /// `min_ratio`, random angle; rejected unless min/max side >= `min_ratio`.
    fn triangle(rng: &mut XorShift, min_ratio: f64) -> [f64; 3] {
        loop {
            let k1 = 10f64.powf(-4.0 + 4.0 * rng.next());
            let k2 = k1 * min_ratio.powf(rng.next());
            let mu = 2.0 * rng.next() - 1.0;
            let k3 = (k1 * k1 + k2 * k2 + 2.0 * k1 * k2 * mu).sqrt();
            let (lo, hi) = (k1.min(k2).min(k3), k1.max(k2).max(k3));
            if lo >= min_ratio * hi {
                return [k1, k2, k3];
            }
        }
    }

    /// B(k_L, k_S, k_S) / [P(k_L) P(k_S)] at x = k_L/k_S, k_S = 0.1/Mpc.
    fn squeezed_ratio(shape: &Shape, prim: &Primordial, x: f64) -> f64 {
        let ks = 0.1;
        let kl = x * ks;
        shape.bispectrum_phi(prim, kl, ks, ks) / (prim.p_phi(kl) * prim.p_phi(ks))
    }

    /// d ln|ratio| / d ln x between x = 1e-4 and 1e-5.
    fn squeezed_slope(shape: &Shape, prim: &Primordial) -> f64 {
        let (x1, x2) = (1e-4, 1e-5);
        (squeezed_ratio(shape, prim, x1) / squeezed_ratio(shape, prim, x2)).ln() / (x1 / x2).ln()
    }

    #[test]
    fn equilateral_point_normalization() {
        // Convention (conventions.md): B(k, k, k) = 6 f_NL P_Phi(k)^2 for every shape.
        for prim in [planck(), scale_invariant()] {
            for shape in all_shapes() {
                for k in [1e-4, 0.05, 0.3] {
                    let b = shape.bispectrum_phi(&prim, k, k, k);
                    let want = 6.0 * prim.p_phi(k).powi(2);
                    assert!(
                        ((b - want) / want).abs() < 1e-13,
                        "{shape} k={k}: {b} vs {want}"
                    );
                    let s = shape.separable().evaluate(&prim, k, k, k);
                    assert!(((s - want) / want).abs() < 1e-13, "{shape} separable k={k}");
                }
            }
        }
    }

    #[test]
    fn every_monomial_has_total_power_two() {
        // Needed for the equilateral normalization to hold for n_s != 1 and for the
        // isosceles series (Delta_j = 3 (1 - p1)).
        for shape in all_shapes() {
            for t in shape.separable().terms() {
                let sum: f64 = t.powers.iter().sum();
                assert!((sum - 2.0).abs() < 1e-15, "{shape}: {t:?}");
            }
        }
    }

    #[test]
    fn permutation_symmetry() {
        let mut rng = XorShift(0x9E37_79B9_7F4A_7C15);
        let prim = planck();
        for shape in all_shapes() {
            let sep = shape.separable();
            for _ in 0..200 {
                let k = triangle(&mut rng, 1e-3);
                let b0 = shape.bispectrum_phi(&prim, k[0], k[1], k[2]);
                let scale = magnitude(&sep, &prim, k);
                for [a, b, c] in [[0, 2, 1], [1, 0, 2], [1, 2, 0], [2, 0, 1], [2, 1, 0]] {
                    let bp = shape.bispectrum_phi(&prim, k[a], k[b], k[c]);
                    assert!((bp - b0).abs() <= 1e-14 * scale, "{shape} {k:?}");
                    let sp = sep.evaluate(&prim, k[a], k[b], k[c]);
                    assert!((sp - b0).abs() <= 1e-13 * scale, "{shape} separable {k:?}");
                }
            }
        }
    }

    #[test]
    fn separable_sum_equals_closed_form() {
        let mut rng = XorShift(20_240_601);
        for prim in [planck(), scale_invariant()] {
            for shape in all_shapes() {
                let sep = shape.separable();
                // Generic triangles (sides within a factor 50): relative to |B| itself,
                // except near a zero of B (orthogonal changes sign across triangle space),
                // where the floating-point scale is the sum of |monomials|.
                for _ in 0..2000 {
                    let k = triangle(&mut rng, 0.02);
                    let closed = shape.bispectrum_phi(&prim, k[0], k[1], k[2]);
                    let s = sep.evaluate(&prim, k[0], k[1], k[2]);
                    let scale = closed.abs().max(1e-2 * magnitude(&sep, &prim, k));
                    assert!(
                        (s - closed).abs() <= 1e-12 * scale,
                        "{shape} {k:?}: {s} vs {closed}"
                    );
                }
                // Strongly squeezed triangles: large cancellations, so relative to the
                // sum of |monomials|.
                for _ in 0..500 {
                    let k = triangle(&mut rng, 1e-4);
                    let closed = shape.bispectrum_phi(&prim, k[0], k[1], k[2]);
                    let s = sep.evaluate(&prim, k[0], k[1], k[2]);
                    let scale = magnitude(&sep, &prim, k);
                    assert!((s - closed).abs() <= 1e-13 * scale, "{shape} {k:?}");
                }
            }
        }
    }

    #[test]
    fn term_counts_and_exponents() {
        let n = |s: Shape| s.separable().terms().len();
        assert_eq!(n(Shape::Local), 3);
        assert_eq!(n(Shape::Equilateral), 10);
        assert_eq!(n(Shape::Orthogonal), 10);
        assert_eq!(n(family(0.0)), 3);
        assert_eq!(n(family(0.8)), 9);
        assert_eq!(n(family(1.5)), 6);
        assert_eq!(Shape::Local.separable().exponents(), vec![0.0, 1.0]);
        assert_eq!(
            Shape::Equilateral.separable().exponents(),
            vec![0.0, 1.0 / 3.0, 2.0 / 3.0, 1.0]
        );
        assert_eq!(family(1.5).separable().exponents(), vec![0.0, 0.5, 1.0]);
    }

    #[test]
    fn family_at_zero_is_local() {
        let prim = planck();
        let mut rng = XorShift(7);
        let f0 = family(0.0);
        for _ in 0..200 {
            let k = triangle(&mut rng, 1e-3);
            let a = f0.bispectrum_phi(&prim, k[0], k[1], k[2]);
            let b = Shape::Local.bispectrum_phi(&prim, k[0], k[1], k[2]);
            assert!(((a - b) / b).abs() < 1e-14, "{k:?}");
        }
        assert_eq!(f0.separable(), Shape::Local.separable());
    }

    #[test]
    fn squeezed_slopes_measured_from_closed_form() {
        // Local 0, equilateral 2 (conventions.md); orthogonal template 1 (derived in the
        // module docs: B/(P_L P_S) = -12 x + 36 x^2 - 18 x^3 at n_s = 1).
        let prim = scale_invariant();
        for (shape, want) in [
            (Shape::Local, 0.0),
            (Shape::Equilateral, 2.0),
            (Shape::Orthogonal, 1.0),
        ] {
            let slope = squeezed_slope(&shape, &prim);
            assert!((slope - want).abs() < 1e-3, "{shape}: slope {slope}");
        }
        for d in [0.0, 0.1, 0.25, 0.5, 0.75, 1.0, 1.2, 1.35, 1.45, 1.5] {
            let slope = squeezed_slope(&family(d), &prim);
            assert!((slope - d).abs() < 0.05, "delta={d}: slope {slope}");
        }
        // n_s != 1: the index is Delta (4 - n_s)/3 for a power-law P_Phi.
        let prim = planck();
        for shape in all_shapes() {
            let want = shape.squeezed_limit().k_index(prim.n_s());
            let slope = squeezed_slope(&shape, &prim);
            assert!(
                (slope - want).abs() < 0.05,
                "{shape} n_s=0.9649: slope {slope} vs {want}"
            );
        }
    }

    #[test]
    fn squeezed_limit_table() {
        // Hand-derived isosceles expansions (module docs).
        let close = |a: f64, b: f64| (a - b).abs() < 1e-12;
        let check = |shape: Shape, want: &[(f64, f64)]| {
            let got = shape.isosceles_series();
            assert_eq!(got.len(), want.len(), "{shape}: {got:?}");
            for (g, (d, a)) in got.iter().zip(want) {
                assert!(
                    close(g.delta, *d) && close(g.amplitude, *a),
                    "{shape}: {got:?}"
                );
            }
        };
        check(Shape::Local, &[(0.0, 1.0), (3.0, 0.5)]);
        check(Shape::Equilateral, &[(2.0, 3.0), (3.0, -1.5)]);
        check(Shape::Orthogonal, &[(1.0, -3.0), (2.0, 9.0), (3.0, -4.5)]);
        check(family(0.6), &[(0.6, 1.0), (2.4, 1.0), (3.0, -0.5)]);
        check(family(1.5), &[(1.5, 2.0), (3.0, -0.5)]);
        check(family(0.0), &[(0.0, 1.0), (3.0, 0.5)]);
    }

    #[test]
    fn isosceles_series_is_exact() {
        // The series reproduces B(k_L, k_S, k_S) at any x, for a tilted spectrum too.
        let prim = planck();
        for shape in all_shapes() {
            let series = shape.isosceles_series();
            let sep = shape.separable();
            for x in [1e-3, 0.05, 0.5, 1.0, 1.9] {
                let (ks, kl) = (0.08, 0.08 * x);
                let (pl, ps) = (prim.p_phi(kl), prim.p_phi(ks));
                let from_series: f64 = 4.0
                    * pl
                    * ps
                    * series
                        .iter()
                        .map(|t| t.amplitude * (pl / ps).powf(-t.delta / 3.0))
                        .sum::<f64>();
                let closed = shape.bispectrum_phi(&prim, kl, ks, ks);
                let scale = magnitude(&sep, &prim, [kl, ks, ks]);
                assert!(
                    (from_series - closed).abs() <= 1e-13 * scale,
                    "{shape} x={x}"
                );
            }
        }
    }

    #[test]
    fn squeezed_amplitude_off_the_isosceles_line() {
        // k_{2,3} = |k_S -+ k_L/2|, mu = cosine between k_L and k_S. Equilateral:
        // a(mu) = 3 (1 - mu^2) (module docs). Local, orthogonal and the family: the
        // isosceles powers below Delta_j = 2 (relative to the leading one) with no mu
        // dependence; the mu-dependent corrections are O(x^(2 - Delta)).
        let prim = scale_invariant();
        let (ks, x) = (0.1_f64, 1e-4_f64);
        let kl = x * ks;
        for mu in [0.0, 0.3, 0.6, 0.9] {
            let k2 = (ks * ks + 0.25 * kl * kl - ks * kl * mu).sqrt();
            let k3 = (ks * ks + 0.25 * kl * kl + ks * kl * mu).sqrt();
            for shape in all_shapes() {
                let series = shape.isosceles_series();
                let lead = series[0];
                let want = if shape == Shape::Equilateral {
                    3.0 * (1.0 - mu * mu)
                } else {
                    series
                        .iter()
                        .filter(|t| t.delta < 2.0)
                        .map(|t| t.amplitude * x.powf(t.delta - lead.delta))
                        .sum()
                };
                let a = shape.bispectrum_phi(&prim, kl, k2, k3)
                    / (4.0 * prim.p_phi(kl) * prim.p_phi(ks) * x.powf(lead.delta));
                assert!(
                    (a - want).abs() < 2e-2 * want.abs(),
                    "{shape} mu={mu}: {a} vs {want}"
                );
            }
        }
    }

    #[test]
    fn mass_to_index() {
        let at = Location::Builtin;
        let d = |m: f64| SqueezedIndex::from_mass(m, at.clone()).unwrap().delta();
        assert_eq!(d(0.0), 0.0);
        assert_eq!(d(1.5), 1.5);
        // m^2/H^2 = 2: nu = 1/2, Delta = 1.
        assert!((d(2f64.sqrt()) - 1.0).abs() < 1e-15);
        // m/H = 1.2: nu = 0.9, Delta = 0.6.
        assert!((d(1.2) - 0.6).abs() < 1e-15);
        let mut last = -1.0;
        for i in 0..=30 {
            let v = d(0.05 * i as f64);
            assert!(v > last);
            last = v;
        }
    }

    #[test]
    fn parse_round_trips() {
        let flag = Location::Flag("--shape".into());
        for text in [
            "local",
            "equilateral",
            "orthogonal",
            "delta=0.50",
            "delta=0.123",
            "mass=1.20",
            "delta=1.50",
        ] {
            let s = Shape::parse(text, flag.clone()).unwrap();
            assert_eq!(s.name(), text);
            assert_eq!(Shape::parse(&s.name(), flag.clone()).unwrap(), s);
        }
        assert_eq!(
            " Equilateral ".parse::<Shape>().unwrap(),
            Shape::Equilateral
        );
        assert_eq!("delta = 0.5".parse::<Shape>().unwrap().name(), "delta=0.50");
        assert_eq!("delta=0.5".parse::<Shape>().unwrap(), family(0.5));
        assert_eq!("delta=-0".parse::<Shape>().unwrap().name(), "delta=0.00");
        let m = "mass=1.2".parse::<Shape>().unwrap();
        match m {
            Shape::Intermediate(ix) => {
                assert_eq!(ix.mass_over_h(), Some(1.2));
                assert!((ix.delta() - 0.6).abs() < 1e-15);
            }
            _ => panic!("mass=1.2 parsed as {m:?}"),
        }
        // An index computed from a mass still round-trips through its name.
        let odd = Shape::Intermediate(SqueezedIndex::new(1.0 / 3.0, Location::Builtin).unwrap());
        assert_eq!(odd.name().parse::<Shape>().unwrap(), odd);
        assert_eq!(format!("{odd}"), odd.name());
    }

    #[test]
    fn parse_errors_are_typed() {
        let flag = Location::Flag("--shape".into());
        for text in [
            "flattened",
            "",
            "delta=",
            "delta=abc",
            "width=0.5",
            "local=1",
        ] {
            let e = Shape::parse(text, flag.clone()).unwrap_err();
            assert!(e.is_input_error());
            assert!(e.to_string().contains("accepted"), "{e}");
            match e {
                Error::BadField { at, field, .. } => {
                    assert_eq!(at, flag);
                    assert_eq!(field, "shape");
                }
                other => panic!("`{text}`: {other:?}"),
            }
        }
        for (text, field) in [
            ("delta=1.6", "shape.delta"),
            ("delta=-0.1", "shape.delta"),
            ("delta=nan", "shape.delta"),
            ("delta=inf", "shape.delta"),
            ("mass=1.6", "shape.mass"),
            ("mass=-1", "shape.mass"),
        ] {
            match Shape::parse(text, flag.clone()) {
                Err(Error::OutOfRange { at, field: f, .. }) => {
                    assert_eq!(at, flag);
                    assert_eq!(f, field, "{text}");
                }
                other => panic!("`{text}`: {other:?}"),
            }
        }
    }
}
