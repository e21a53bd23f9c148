//! The numerics, with no files and no command line: one-pass moments, shrinkage, FAST-MCD,
//! Gaussianity diagnostics, thresholds and evaluation metrics.

pub mod diagnostics;
pub mod mcd;
pub mod metrics;
pub mod moments;
pub mod shrink;
pub mod threshold;
