//! The core as the device runs it: a run-time dimension mapped to the core's `Model<N>`, and the
//! replay of readings through the core's scoring and alarm state machine.

pub mod dims;
pub mod replay;
