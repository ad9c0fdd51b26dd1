//! Shared numerical building blocks: Gauss-Legendre quadrature, interpolation tables and
//! an adaptive ODE integrator. Everything here is planned once and evaluated many times
//! without allocation.

pub mod interp;
pub mod ode;
pub mod quad;

pub use interp::{CubicSpline, UniformHermite};
pub use quad::{GaussLegendre, integrate_gl_panels, log_grid};
