//! The `ellipsoid` command line: it assembles the verbs of [`crate::commands`] into one parser and
//! dispatches. Each verb's arguments and work live in its own file there.

use std::process::ExitCode;

use clap::{Parser, Subcommand};

use crate::commands::{common, demo, evaluate, export, fit, inspect, replay};

/// Train, threshold, check and explain multivariate Gaussian anomaly models for sensor nodes.
///
/// An alarm from Ellipsoid is an aid to maintenance, not a safety function: it does not replace
/// the protective devices that the machine's maker and local codes require.
#[derive(Debug, Parser)]
#[command(name = "ellipsoid", version, propagate_version = true)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

// Parsed once per run: the size of the largest variant (`fit`'s options) does not matter.
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Subcommand)]
enum Command {
    /// Fit a model of healthy operation from a baseline CSV and write a flashable blob.
    #[command(
        after_help = "Example:\n  ellipsoid fit baseline.csv --out pump.blob --holdout 0.2 \\\n      --alarms-per-day 1 --rate-hz 1 --raise-after 3 --report fit.html"
    )]
    Fit(fit::FitArgs),
    /// Validate a blob with the core's decoder and print everything in it.
    #[command(after_help = "Example:\n  ellipsoid inspect pump.blob --json")]
    Inspect(inspect::InspectArgs),
    /// Score every reading of a CSV through the core and its alarm state machine.
    #[command(
        after_help = "Example:\n  ellipsoid replay --model pump.blob --input week.csv --out week-scored.csv"
    )]
    Replay(replay::ReplayArgs),
    /// Score a labelled CSV and report precision, recall, AUCs, delays and false alarms per day.
    #[command(
        after_help = "Example:\n  ellipsoid evaluate --model pump.blob --input faults.csv --label-column label --report eval.html"
    )]
    Evaluate(evaluate::EvaluateArgs),
    /// Write a blob as a C array, as Intel HEX at a slot's address, or as raw bytes.
    #[command(
        after_help = "Examples:\n  ellipsoid export pump.blob --format ihex --board microbit --slot A --out pump-a.hex\n  ellipsoid export pump.blob --format c --name pump_model --out pump_model.h"
    )]
    Export(export::ExportArgs),
    /// Generate the booster-pump scenario and run the whole job on it, end to end.
    #[command(after_help = "Example:\n  ellipsoid demo --out demo-out")]
    Demo(demo::DemoArgs),
}

/// `ellipsoid inspect m.blob | head` closes stdout early; `println!` then panics with a broken
/// pipe. That is not an error of ours: end quietly with the status a shell gives a process
/// killed by SIGPIPE (128 + 13), as other command-line tools do.
fn quiet_on_closed_stdout() {
    let default_hook = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        let payload = info.payload();
        let message = payload
            .downcast_ref::<String>()
            .map(String::as_str)
            .or_else(|| payload.downcast_ref::<&str>().copied());
        if message.is_some_and(|m| m.contains("Broken pipe")) {
            std::process::exit(141);
        }
        default_hook(info);
    }));
}

/// Run the command line; errors are printed as `error: …` with their causes, and exit 1.
pub fn main() -> ExitCode {
    quiet_on_closed_stdout();
    crate::data::output::mark_start();
    let cli = Cli::parse();
    let result = match &cli.command {
        Command::Fit(a) => fit::run(a),
        Command::Inspect(a) => inspect::run(&a.blob, a.json),
        Command::Replay(a) => replay::run(a),
        Command::Evaluate(a) => evaluate::run(a),
        Command::Demo(a) => demo::run(a),
        Command::Export(a) => export::run(a),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) if e.downcast_ref::<common::Partial>().is_some() => {
            eprintln!("warning: {e}");
            ExitCode::from(common::PARTIAL_EXIT)
        }
        Err(e) => {
            eprintln!("error: {e}");
            for cause in e.chain().skip(1) {
                eprintln!("  caused by: {cause}");
            }
            ExitCode::FAILURE
        }
    }
}
