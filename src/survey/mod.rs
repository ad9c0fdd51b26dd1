//! Survey physics: survey descriptions, tracers, bias and noise.

pub mod bias;
pub mod fisher;
pub mod spec;
pub mod tau_nl;

pub use spec::{KmaxRule, RedshiftBin, Survey, SurveyFile, SurveyTable, Tracer, TracerBin};
