//! Primordial bispectrum shapes, shared by the CMB and the survey Fisher engines.
//!
//! All bispectra are of the Bardeen potential Phi = (3/5) zeta (matter domination) and are
//! written with f_NL = 1; multiply by f_NL. With P_i = P_Phi(k_i) (Mpc^3, k in 1/Mpc, see
//! [`crate::cosmology::Primordial::p_phi`]) the four shapes are:
//!
//! - **Local** (Komatsu & Spergel 2001, Phys. Rev. D 63, 063002), from
//!   Phi = Phi_G + f_NL (Phi_G^2 - <Phi_G^2>):
//!
//!   B_loc = 2 [P1 P2 + P2 P3 + P3 P1].
//!
//! - **Equilateral** template (Creminelli, Nicolis, Senatore, Tegmark & Zaldarriaga 2006,
//!   JCAP 05, 004, astro-ph/0509029):
//!
//!   B_eq = 6 { -[P1 P2 + 2 perms] - 2 (P1 P2 P3)^(2/3) + [P1^(1/3) P2^(2/3) P3 + 5 perms] }.
//!
//! - **Orthogonal** template (Senatore, Smith & Zaldarriaga 2010, JCAP 01, 028,
//!   arXiv:0905.3746):
//!
//!   B_orth = 6 { -3 [P1 P2 + 2 perms] - 8 (P1 P2 P3)^(2/3) + 3 [P1^(1/3) P2^(2/3) P3 + 5 perms] }.
//!
//! - **Intermediate family** with squeezed index Delta, 0 <= Delta <= 3/2, q = Delta/3
//!   (a separable template of this crate, see below):
//!
//!   B_Delta = 2 { [P1 P2^(1-q) P3^q + 5 perms] - [P1 P2 + 2 perms] }.
//!
//! "+ 5 perms" runs over all six orderings of (k1, k2, k3), "+ 2 perms" over the three
//! distinct pairs. For n_s = 1, P_Phi = A / k^3 and the equilateral and orthogonal forms are
//! the published k-space templates (1/k^3 -> P/A); for n_s != 1 the standard replacement
//! k^3 -> k^(4 - n_s) is the same as writing every template in powers of P_Phi, as here.
//!
//! ## Normalization
//! Every monomial has total power 2 in P, and every shape satisfies
//! B(k, k, k) = 6 P_Phi(k)^2 at the equilateral point, the local value (for the
//! equilateral template -3 - 2 + 6 = 1, for the orthogonal -9 - 8 + 18 = 1, for the family
//! 2 (6 - 3) = 6).
//!
//! ## The intermediate family
//! Quasi-single-field inflation (Chen & Wang 2010, Phys. Rev. D 81, 063511,
//! arXiv:0909.0496) couples the inflaton to a field of mass m <= 3H/2 whose super-horizon
//! modes decay as (k tau)^(3/2 -+ nu), nu = sqrt(9/4 - m^2/H^2). The squeezed bispectrum
//! then behaves as B(k_L, k_S, k_S) / [P(k_L) P(k_S)] ~ (k_L/k_S)^Delta with
//! Delta = 3/2 - nu (its use for large-scale structure and the CMB: Sefusatti, Fergusson,
//! Chen & Shellard 2012, arXiv:1204.6318). `B_Delta` is a *separable template* built to
//! reproduce that power law, not the exact quasi-single-field bispectrum (which is not
//! separable). By construction it is symmetric, it equals B_loc at Delta = 0 (then the
//! six-term sum is twice the three-pair sum), it has the equilateral normalization above,
//! and in the isosceles squeezed limit (k1 = k_L, k2 = k3 = k_S, x = k_L/k_S, n_s = 1)
//!
//!   B_Delta / (P_L P_S) = 4 x^Delta + 4 x^(3 - Delta) - 2 x^3      (exact for all x),
//!
//! because the P_L P_S pieces of the six-term sum cancel against the local pairs. The
//! second power x^(3 - Delta) = x^(3/2 + nu) is the decaying mode of the mediator; at
//! Delta = 3/2 the two coincide and the leading amplitude doubles (where the true model
//! has a logarithm). Away from the isosceles line (k_{2,3} = |k_S -+ k_L/2|) the
//! corrections are of order x^2 and do not change Delta < 2. The mass is converted with
//! Delta = 3/2 - sqrt(9/4 - m^2/H^2) (Chen & Wang 2010); m > 3H/2 (complex nu, oscillating
//! squeezed limit) is outside the family and refused.
//!
//! ## Separable representation
//! [`Separable`] lists every shape as an explicit sum, all permutations written out,
//!
//!   B(k1, k2, k3) = Sum_t c_t P(k1)^(p_t1) P(k2)^(p_t2) P(k3)^(p_t3),
//!
//! so a CMB kernel needs one radial function per distinct exponent p
//! ([`Separable::exponents`]; p = 0 means the transfer function alone). Term counts:
//! local 3, equilateral 10, orthogonal 10, family 9 (3 at Delta = 0 or 6 at Delta = 3/2,
//! where coinciding monomials merge).
//!
//! ## Squeezed limit and scale-dependent bias
//! [`Shape::isosceles_series`] gives the exact isosceles expansion
//!
//!   B(k_L, k_S, k_S) = 4 f_NL P_L P_S Sum_j a_j (P_L / P_S)^(-Delta_j / 3),
//!
//! sorted by Delta_j; for a power-law P_Phi, (P_L/P_S)^(-Delta_j/3) =
//! (k_L/k_S)^(Delta_j (4 - n_s)/3), which is (k_L/k_S)^(Delta_j) at n_s = 1.
//! [`Shape::squeezed_limit`] is the leading term (a, Delta):
//!
//! | shape | Delta | a | next terms (Delta_j: a_j) |
//! |---|---|---|---|
//! | local | 0 | 1 | 3: 1/2 |
//! | equilateral | 2 | 3 | 3: -3/2 |
//! | orthogonal | 1 | -3 | 2: 9, 3: -9/2 |
//! | family, Delta < 3/2 | Delta | 1 | 3 - Delta: 1, 3: -1/2 |
//! | family, Delta = 3/2 | 3/2 | 2 | 3: -1/2 |
//!
//! The orthogonal template thus scales as k_L^(-2) (Delta = 1) in the squeezed limit with a
//! negative amplitude (derived here from the template; measured in the tests). This is a
//! property of the template, not of the single-field shapes it approximates, which vanish
//! faster; Senatore, Smith & Zaldarriaga 2010 give an alternative template with a
//! different squeezed limit for that reason (from memory). The equilateral amplitude
//! depends on the angle off the isosceles line: with k_{2,3} = |k_S -+ k_L/2| and mu the
//! cosine between k_L and k_S, a(mu) = 3 (1 - mu^2), whose angular mean is 2; the local,
//! orthogonal and family leading terms do not depend on mu.
//!
//! The survey engine builds the scale-dependent bias from (a, Delta) in the
//! peak-background-split form of Schmidt & Kamionkowski 2010 (Phys. Rev. D 82, 103002,
//! arXiv:1008.0638),
//!
//!   Delta b(k, z) = b_phi f_NL a (k / k_S)^Delta / M(k, z),
//!
//! which is Dalal et al. 2008 for local (a = 1, Delta = 0); k_S is the small scale that
//! the survey engine chooses (the Lagrangian scale of its tracers) and b_phi the
//! response to long-wavelength Phi, both the survey engine's modelling choice. Terms with
//! Delta_j >= 2 are degenerate with ordinary k^2 bias and are usually dropped; near
//! Delta = 3/2 keep the second family term (3 - Delta), which is nearly degenerate with
//! the first.
//!
//! ## Sign
//! B > 0 for f_NL > 0 in the local shape, with Phi the Bardeen potential of
//! [`crate::cosmology::Primordial`] (Delta T / T = -Phi/3 on large scales).

mod parameter;
mod separable;
mod shape;

pub use parameter::{TAU_NL, is_tau_nl, lists_tau_nl};

pub use separable::{Separable, SeparableTerm, SqueezedTerm};
pub use shape::{Shape, SqueezedIndex};
