//! Survey physics: survey descriptions, tracers, bias and its non-Gaussian response, the
//! galaxy bispectrum kernels, covariance models, triangle quadrature and Fisher assembly.
//!
//! Dependencies run one way: `spec` (inputs) and `bias` (relations) -> `response` (with
//! its `full_response` tables) ->
//! `kernels`, `covariance`, `triangles`, `linalg`, `layout` -> `power` -> `fisher`.

pub mod bias;
pub mod bispectrum;
pub mod covariance;
pub mod fisher;
pub mod full_response;
pub mod kernels;
pub mod layout;
pub mod linalg;
pub mod power;
pub mod response;
pub mod spec;
pub mod tau_nl;
pub mod triangle_budget;
pub mod triangles;

pub use covariance::CovarianceModel;
pub use response::ResponseModel;
pub use spec::{KmaxRule, RedshiftBin, Survey, SurveyFile, SurveyTable, Tracer, TracerBin};
