//! The `ellipsoid` command line.
use std::process::ExitCode;

/// Entry point of the binary.
pub fn main() -> ExitCode {
    ExitCode::SUCCESS
}
