//! The core as the device runs it: a run-time dimension mapped to the core's `Model<N>` and
//! `Tracker<N, M>`, and the replay of readings through the core's scoring, reading window, model
//! bank, alarm state machine and drift.

pub mod dims;
pub mod replay;
pub mod track;
