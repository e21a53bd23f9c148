//! Ellipsoid's workstation side: read a baseline log, fit a multivariate Gaussian in `f64`, choose an
//! alarm threshold that can be defended, export the model blob (through the core's encoder), and
//! replay, evaluate and explain readings through the core's own `f32` scoring.
//!
//! One concept a file:
//!
//! * [`ingest`]: streaming CSV reading with errors that name file, line, column and value.
//! * [`stats`]: mergeable one-pass mean and covariance (Welford, Chan et al.).
//! * [`shrink`], [`mcd`]: Ledoit–Wolf shrinkage, diagonal loading, FAST-MCD.
//! * [`diagnostics`]: skewness, kurtosis, Mardia's tests, chi-square QQ.
//! * [`fit`]: from a baseline file to fitted statistics and [`ellipsoid_core::ModelParams`].
//! * [`threshold`]: chi-square, empirical and F1-optimal thresholds.
//! * [`metrics`]: confusion matrix, ROC and PR AUC, detection delay, false alarms per day.
//! * [`replay`]: every reading through the core's scoring and alarm state machine.
//! * [`report`]: one self-contained HTML file with inline SVG plots.
//! * [`demo_data`], [`demo`]: the invented booster-pump scenario, end to end.
//! * [`output`]: write to a temporary file, then rename.
//! * [`card`]: the model card, the JSON beside each blob that names its features.
//! * [`dims`]: from a run-time dimension to the core's `const N`.
//! * [`train`], [`inspect`], [`assess`]: the `fit`, `inspect` and `evaluate` commands.
//! * [`cli`]: the `ellipsoid` command line.
#![forbid(unsafe_code)]

pub mod assess;
pub mod card;
pub mod cli;
pub mod demo;
pub mod demo_data;
pub mod diagnostics;
pub mod dims;
pub mod fit;
pub mod ingest;
pub mod inspect;
pub mod mcd;
pub mod metrics;
pub mod output;
pub mod replay;
pub mod report;
pub mod shrink;
pub mod stats;
pub mod threshold;
pub mod train;
