//! CMB physics and the CMB bispectrum Fisher engine.

pub mod bispectrum;
pub mod experiment;
pub mod transfer;
