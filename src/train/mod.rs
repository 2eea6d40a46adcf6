//! Learning from labelled mail: corpus readers, vectorization, the dataset and its
//! svmlight form, solvers, evaluation, calibration, statistics and threshold tuning.

pub mod corpus;
pub mod dataset;
pub mod eval_error;
pub mod online;
pub mod platt;
pub mod plots;
pub mod roc;
pub mod select;
pub mod solver;
pub mod stats;
pub mod svmlight;
pub mod synthetic;
pub mod tune;
pub mod vectorize;
