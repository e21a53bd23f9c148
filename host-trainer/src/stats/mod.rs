//! The numerics, with no files and no command line: one-pass moments, shrinkage, FAST-MCD,
//! Gaussianity diagnostics, thresholds and their finite-sample promises, evaluation metrics.

pub mod autocorr;
pub mod diagnostics;
pub mod limit;
pub mod mcd;
pub mod metrics;
pub mod moments;
pub mod promise;
pub mod qform;
pub mod shrink;
pub mod threshold;
