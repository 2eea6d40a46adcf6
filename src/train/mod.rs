//! Learning from labelled mail: corpus readers, vectorization, evaluation, calibration,
//! statistics and threshold tuning.

pub mod corpus;
pub mod eval_error;
pub mod platt;
pub mod plots;
pub mod roc;
pub mod stats;
pub mod tune;
pub mod vectorize;
