//! Cosmology: parameters, background, growth, and the linear matter power.
//!
//! Pipeline: [`Cosmology`] (validated parameters) -> [`Background`] (distances, times)
//! and [`Growth`] -> [`LinearPower`] (transfer function x growth x primordial).

pub mod background;
pub mod eisenstein_hu;
pub mod growth;
pub mod params;
pub mod power;
pub mod primordial;

pub use background::Background;
pub use eisenstein_hu::EisensteinHu;
pub use growth::Growth;
pub use params::{CosmoParams, Cosmology, CosmologyTable, load_cosmology_file};
pub use power::{LinearPower, Transfer};
pub use primordial::Primordial;
