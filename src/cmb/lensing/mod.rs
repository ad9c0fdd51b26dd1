//! Gravitational lensing of the CMB: the lensing potential from our own Boltzmann
//! solver ([`potential`]) and the lensed spectra ([`lensed_cl`]).

pub mod potential;

pub use potential::{L_LOS, LensingSpectra, WeylSource};
