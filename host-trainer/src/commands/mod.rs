//! The verbs of `ellipsoid`, a file each: its clap arguments and its `run`. A command turns its
//! arguments into settings, calls [`crate::pipeline`] (and the layers below it), and prints.

pub mod common;
pub mod demo;
pub mod evaluate;
pub mod export;
pub mod fit;
pub mod inspect;
pub mod replay;
