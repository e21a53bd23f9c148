//! Ellipsoid's workstation side: read a baseline log, fit a multivariate Gaussian in `f64`, choose an
//! alarm threshold that can be defended, export the model blob (through the core's encoder), and
//! replay, evaluate and explain readings through the core's own `f32` scoring.
//!
//! # Layers
//!
//! The modules form layers, and every import points down the stack (the test `layers_point_down`
//! checks it):
//!
//! ```text
//!  cli            the `ellipsoid` parser: assembles the verbs and dispatches
//!  commands/      one file per verb (fit, inspect, replay, evaluate, demo): clap arguments + run
//!  pipeline/      the work the verbs share: train a model, summarise a fit, score a labelled file
//!  fit/  report/  from a baseline file to fitted statistics; the HTML page and its figures
//!  stats/ data/ device/
//!                 numerics (moments, shrinkage, MCD, diagnostics, thresholds, metrics);
//!                 files (CSV reading, model card, atomic output, demo scenario);
//!                 the core through a run-time dimension, and replay
//!  ellipsoid-core the blob, validation, scoring, alarm state machine (no_std)
//! ```
//!
//! A module may use its own layer and the layers below it, never one above it nor a peer on the
//! same line: `fit` uses `stats`, `data` and `device` (for `with_dim!`), not `report`; `stats`,
//! `data` and `device` use only the core.
//!
//! Where to look:
//!
//! * reading a CSV: [`data::ingest`]; the model card: [`data::card`]; atomic writes: [`data::output`];
//! * the maths: [`stats::moments`], [`stats::shrink`], [`stats::mcd`], [`stats::diagnostics`],
//!   [`stats::threshold`], [`stats::metrics`];
//! * the fit of a file, in parallel: [`fit`];
//! * the core from the host: [`device::dims`] (run-time N), [`device::replay`];
//! * the report: [`report`];
//! * what `fit` and the demo share: [`pipeline::train`], [`pipeline::summary`], [`pipeline::fit_report`],
//!   [`pipeline::evaluate`];
//! * the verbs: [`commands`], assembled by [`cli`].
#![forbid(unsafe_code)]

pub mod cli;
pub mod commands;
pub mod data;
pub mod device;
pub mod fit;
pub mod pipeline;
pub mod report;
pub mod stats;
