//! CMB physics and the CMB bispectrum Fisher engine.
//!
//! - [`thermal`]: the thermal history of the photon-baryon plasma, i.e. hydrogen and
//!   helium recombination (effective three-level atom of Seager, Sasselov & Scott 1999),
//!   the matter temperature, tanh reionization fixed by the optical depth, and what
//!   follows from them: the optical depth and visibility function, the last-scattering
//!   and drag redshifts, the sound horizon, the acoustic angle and the diffusion damping
//!   scale. A line-of-sight Boltzmann solver reads the opacity and visibility from the
//!   conformal-time tables of [`ThermalHistory`].
//! - [`shell`]: the idealized finite-thickness last-scattering shell (Sachs-Wolfe
//!   temperature, a tight-coupling E-mode model), a cheap source of transfer tables.
//! - [`transfer`]: transfer-function tables Delta^X_l(k), the input of the engine.
//! - [`experiment`]: noise, beams, sky fraction.
//! - [`bispectrum`]: the Fisher engine (T, E, T+E; cumulative in l_max).

pub mod bispectrum;
pub mod experiment;
pub mod shell;
mod stiff;
pub mod thermal;
pub mod transfer;

pub use thermal::{Reionization, ThermalHistory, ThermalSummary};
