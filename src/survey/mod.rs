//! Survey physics: survey descriptions, tracers, bias and noise.

pub mod bias;
pub mod fisher;
pub mod spec;

pub use spec::{KmaxRule, RedshiftBin, Survey, SurveyFile, SurveyTable, Tracer, TracerBin};
