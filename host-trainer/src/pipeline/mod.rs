//! The work the commands share, as functions that take settings and return values: training a
//! model ([`train`]), its threshold candidates and their promises ([`limits`]), what a fit tells
//! ([`summary`]) and scoring a labelled file ([`evaluate`]).
//! Nothing here parses a command line or prints.

pub mod bank;
pub mod bank_out;
pub mod evaluate;
pub mod fit_report;
pub mod fleet;
pub mod limits;
pub mod quantise;
pub mod summary;
pub mod train;
