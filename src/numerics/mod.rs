//! Shared numerical building blocks: Gauss-Legendre quadrature and interpolation tables.
//! Everything here is planned once and evaluated many times without allocation. (The ODE
//! solvers live with their users: `cmb::stiff` for recombination, `cmb::boltzmann`'s
//! Dormand-Prince for the perturbations.)

pub mod gemm;
pub mod interp;
pub mod quad;

pub use interp::{CubicSpline, UniformHermite, quintic_hermite_weights, uniform_derivatives};
pub use quad::{GaussLegendre, integrate_gl_panels, log_grid};
