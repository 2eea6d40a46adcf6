//! Learning from labelled mail: corpus readers, the dataset, solvers, evaluation,
//! calibration and threshold tuning.

pub mod corpus;
pub mod vectorize;
