//! # ngreach
//!
//! Forecasts of how tightly a CMB experiment and a 3D galaxy survey constrain primordial
//! non-Gaussianity (f_NL of the local, equilateral, orthogonal and intermediate shapes,
//! and the collapsed-trispectrum amplitude tau_NL), on one footing.
//!
//! ## Pipeline
//! [`cosmology`] (background, growth, linear power) -> CMB physics and survey physics ->
//! shapes -> two Fisher engines on one [`fisher::FisherMatrix`] type -> combine ->
//! [`report`] -> [`cli`].
//!
//! ## Conventions
//! - Lengths in Mpc and wavenumbers in 1/Mpc inside the library; survey inputs and outputs
//!   in h/Mpc and (Mpc/h)^3 as the trade uses them, with the unit in every key name.
//! - Primordial potential Phi = (3/5) zeta (matter domination); P_Phi = (9/25) P_zeta.
//! - f_NL is in the CMB convention: the growth factor that links Phi to the density is
//!   normalized to a in matter domination ([`cosmology::Growth::d_md`]).
//! - tau_NL as in Suyama & Yamaguchi 2008: a single local source gives
//!   tau_NL = (6 f_NL / 5)^2 ([`cmb::collapsed`], [`survey::tau_nl`]).

#![deny(unsafe_code)]
// audited exceptions: the dgemm call in numerics::gemm, the AVX2/FMA dispatch in
// cmb::bispectrum::simd, the AVX-512/AVX2 dispatch in cmb::boltzmann::bessel_sum and the
// AVX2 copy of the mode integration in cmb::boltzmann::modes
#![warn(missing_docs)]

pub mod batch;
pub mod cli;
pub mod cmb;
pub mod combine;
pub mod commands;
pub mod constants;
pub mod cosmology;
pub mod error;
pub mod fisher;
pub mod input;
pub mod limits;
pub mod numerics;
pub mod pipeline;
pub mod progress;
pub mod report;
pub mod scenario;
pub mod shapes;
pub mod special;
pub mod survey;
pub mod triangle_class;

pub use error::{Error, Location, Result};

/// The crate version, written into every output.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");
