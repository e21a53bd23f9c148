//! The `ellipsoid` command line: argument definitions and dispatch. The work is done in
//! [`crate::train`], [`crate::assess`], [`crate::demo`] and the small commands below.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Result;
use clap::{Args, Parser, Subcommand};

use crate::card::ModelCard;
use crate::dims::decode_file;
use crate::ingest::CsvOptions;
use crate::replay::{to_device, CsvSink, Replayer};
use crate::threshold::Method;
use crate::{assess, demo, inspect, output, train};

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

#[derive(Debug, Subcommand)]
enum Command {
    /// Fit a model of healthy operation from a baseline CSV and write a flashable blob.
    #[command(
        after_help = "Example:\n  ellipsoid fit baseline.csv --out pump.blob --holdout 0.2 \\\n      --alarms-per-day 1 --rate-hz 1 --raise-after 3 --report fit.html"
    )]
    Fit(FitArgs),
    /// Validate a blob with the core's decoder and print everything in it.
    #[command(after_help = "Example:\n  ellipsoid inspect pump.blob --json")]
    Inspect(InspectArgs),
    /// Score every reading of a CSV through the core and its alarm state machine.
    #[command(
        after_help = "Example:\n  ellipsoid replay --model pump.blob --input week.csv --out week-scored.csv"
    )]
    Replay(ReplayArgs),
    /// Score a labelled CSV and report precision, recall, AUCs, delays and false alarms per day.
    #[command(
        after_help = "Example:\n  ellipsoid evaluate --model pump.blob --input faults.csv --label-column label --report eval.html"
    )]
    Evaluate(EvaluateArgs),
    /// Generate the booster-pump scenario and run the whole job on it, end to end.
    #[command(after_help = "Example:\n  ellipsoid demo --out demo-out")]
    Demo(DemoArgs),
}

/// How the CSV is read.
#[derive(Debug, Clone, Args)]
pub struct CsvArgs {
    /// Use only these feature columns, in this order (comma-separated names).
    #[arg(long, value_delimiter = ',', value_name = "NAME,...")]
    pub columns: Option<Vec<String>>,
    /// A timestamp column to skip (default: a column named timestamp, time or datetime).
    #[arg(long, value_name = "NAME")]
    pub timestamp: Option<String>,
    /// Field delimiter: `,` `;` or `tab` (default: detected from the header).
    #[arg(long, value_name = "CHAR", value_parser = parse_delimiter)]
    pub delimiter: Option<u8>,
    /// Skip rows that cannot be read instead of stopping (they are counted and reported).
    #[arg(long)]
    pub skip_bad_rows: bool,
    /// No progress bar.
    #[arg(long, short)]
    pub quiet: bool,
}

impl CsvArgs {
    /// The reader's options; `label` names a label column, `allow_missing` reads empty cells as NaN.
    pub fn options(&self, label: Option<String>, allow_missing: bool) -> CsvOptions {
        CsvOptions {
            delimiter: self.delimiter,
            columns: self.columns.clone(),
            timestamp: self.timestamp.clone(),
            label,
            skip_bad_rows: self.skip_bad_rows,
            allow_missing,
            quiet: self.quiet,
        }
    }
}

fn parse_delimiter(s: &str) -> Result<u8, String> {
    match s {
        "," | "comma" => Ok(b','),
        ";" | "semicolon" => Ok(b';'),
        "\t" | "tab" | "\\t" => Ok(b'\t'),
        other => Err(format!(
            "`{other}` is not a supported delimiter: use `,` `;` or `tab`"
        )),
    }
}

/// Covariance estimator.
#[derive(Debug, Clone, Copy, PartialEq, clap::ValueEnum)]
pub enum ShrinkArg {
    /// The plain sample covariance.
    None,
    /// Ledoit–Wolf (2004) shrinkage towards a scaled identity.
    LedoitWolf,
    /// Add `--loading` times the mean variance to the diagonal.
    Diagonal,
}

/// Options of `fit`.
#[derive(Debug, Clone, Args)]
pub struct FitArgs {
    /// Baseline CSV of healthy operation, one reading a row.
    pub baseline: PathBuf,
    /// Where to write the model blob; its model card goes beside it (`.json`).
    #[arg(long, short, value_name = "FILE")]
    pub out: PathBuf,
    #[command(flatten)]
    pub csv: CsvArgs,
    /// Take the natural log of this positive, right-skewed column first (repeatable).
    #[arg(long = "log", value_name = "COLUMN")]
    pub log_columns: Vec<String>,
    /// Covariance estimator.
    #[arg(long, value_enum, default_value = "none")]
    pub shrinkage: ShrinkArg,
    /// Diagonal loading, relative to the mean variance (with `--shrinkage diagonal`).
    #[arg(long, default_value_t = 0.01, value_name = "LAMBDA")]
    pub loading: f64,
    /// FAST-MCD robust fit for a baseline with some bad data; the rows it sets aside are reported.
    #[arg(long)]
    pub robust: bool,
    /// Hold out this fraction of the baseline, from its end (time order), to check the threshold.
    #[arg(long, default_value_t = 0.2, value_name = "FRACTION")]
    pub holdout: f64,
    /// How to choose the alarm threshold.
    #[arg(long, value_enum, default_value = "chi-square")]
    pub threshold: Method,
    /// Target false alarms a day, per reading (before the raise-after debounce).
    #[arg(
        long,
        default_value_t = 1.0,
        value_name = "COUNT",
        conflicts_with = "alpha"
    )]
    pub alarms_per_day: f64,
    /// Readings a second, for the per-day figures.
    #[arg(long, default_value_t = 1.0, value_name = "HZ")]
    pub rate_hz: f64,
    /// Target false-alarm probability per reading, instead of `--alarms-per-day`.
    #[arg(long, value_name = "P")]
    pub alpha: Option<f64>,
    /// Labelled CSV with faults, for `--threshold f1` (and reported with the others).
    #[arg(long, value_name = "FILE")]
    pub validation: Option<PathBuf>,
    /// Label column of the validation file (1 = anomaly).
    #[arg(long, default_value = "label", value_name = "NAME")]
    pub label_column: String,
    /// Raise after this many consecutive readings above the threshold.
    #[arg(long, default_value_t = 3, value_name = "K")]
    pub raise_after: u16,
    /// Clear after this many consecutive readings below the clear threshold.
    #[arg(long, default_value_t = 10, value_name = "M")]
    pub clear_after: u16,
    /// The clear threshold as a fraction of the alarm threshold (hysteresis).
    #[arg(long, default_value_t = 0.75, value_name = "FRACTION")]
    pub clear_fraction: f64,
    /// Latch the alarm: only an explicit reset on the device clears it.
    #[arg(long)]
    pub latch: bool,
    /// Model identifier stored in the blob (default: derived from the fitted statistics).
    #[arg(long, value_name = "ID")]
    pub model_id: Option<u32>,
    /// Sequence number: of two valid slots the device takes the higher.
    #[arg(long, default_value_t = 1, value_name = "N")]
    pub sequence: u32,
    /// Training time stored in the blob, Unix seconds (default: now).
    #[arg(long, value_name = "SECONDS")]
    pub trained_at: Option<u64>,
    /// Worker threads for the fit (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Also write an HTML report here.
    #[arg(long, value_name = "FILE")]
    pub report: Option<PathBuf>,
    /// Print the summary as JSON.
    #[arg(long)]
    pub json: bool,
}

/// Options of `inspect`.
#[derive(Debug, Clone, Args)]
pub struct InspectArgs {
    /// The blob.
    pub blob: PathBuf,
    /// Print as JSON.
    #[arg(long)]
    pub json: bool,
}

/// Options shared by the commands that score a CSV.
#[derive(Debug, Clone, Args)]
pub struct ModelInput {
    /// The model blob.
    #[arg(long, short, value_name = "FILE")]
    pub model: PathBuf,
    /// The readings.
    #[arg(long, short, value_name = "FILE")]
    pub input: PathBuf,
    /// The model's feature names, when there is no model card beside the blob.
    #[arg(long, value_delimiter = ',', value_name = "NAME,...")]
    pub features: Option<Vec<String>>,
}

/// Options of `replay`.
#[derive(Debug, Clone, Args)]
pub struct ReplayArgs {
    #[command(flatten)]
    pub model: ModelInput,
    /// Output CSV: index, d2, d2_bits, verdict, alarm, fault, event, top_feature, c_<feature>...
    #[arg(long, short, value_name = "FILE")]
    pub out: PathBuf,
    /// A timestamp column to skip (default: timestamp, time or datetime).
    #[arg(long, value_name = "NAME")]
    pub timestamp: Option<String>,
    /// Field delimiter: `,` `;` or `tab`.
    #[arg(long, value_name = "CHAR", value_parser = parse_delimiter)]
    pub delimiter: Option<u8>,
    /// No progress bar.
    #[arg(long, short)]
    pub quiet: bool,
}

/// Options of `evaluate`.
#[derive(Debug, Clone, Args)]
pub struct EvaluateArgs {
    #[command(flatten)]
    pub model: ModelInput,
    /// Label column (1 = anomaly).
    #[arg(long, default_value = "label", value_name = "NAME")]
    pub label_column: String,
    /// Readings a second (default: the rate in the model card).
    #[arg(long, value_name = "HZ")]
    pub rate_hz: Option<f64>,
    /// A timestamp column to skip (default: timestamp, time or datetime).
    #[arg(long, value_name = "NAME")]
    pub timestamp: Option<String>,
    /// Field delimiter: `,` `;` or `tab`.
    #[arg(long, value_name = "CHAR", value_parser = parse_delimiter)]
    pub delimiter: Option<u8>,
    /// Also write an HTML report here.
    #[arg(long, value_name = "FILE")]
    pub report: Option<PathBuf>,
    /// Print as JSON.
    #[arg(long)]
    pub json: bool,
    /// No progress bar.
    #[arg(long, short)]
    pub quiet: bool,
}

/// Options of `demo`.
#[derive(Debug, Clone, Args)]
pub struct DemoArgs {
    /// Folder for everything the demo writes.
    #[arg(long, short, default_value = "demo-out", value_name = "DIR")]
    pub out: PathBuf,
    /// Seed of the invented scenario.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Print less.
    #[arg(long, short)]
    pub quiet: bool,
}

/// A model read from a blob plus the names of its features.
pub struct LoadedModel {
    /// The decoded model.
    pub model: Box<dyn crate::dims::AnyModel>,
    /// Feature names in model order.
    pub features: Vec<String>,
    /// The card, if there was one.
    pub card: Option<ModelCard>,
}

/// Read and validate a blob, and find its feature names (card or `--features`).
pub fn load_model(input: &ModelInput) -> Result<LoadedModel> {
    let path = &input.model;
    let (bytes, model) = decode_file(path)?;
    let (features, card) = match &input.features {
        Some(f) => (f.clone(), None),
        None => {
            let card = ModelCard::read_for(path, &bytes)?;
            (card.features.clone(), Some(card))
        }
    };
    anyhow::ensure!(
        features.len() == model.n(),
        "{} has {} features but {} names were given",
        path.display(),
        model.n(),
        features.len()
    );
    Ok(LoadedModel {
        model,
        features,
        card,
    })
}

fn replay_cmd(a: &ReplayArgs) -> Result<()> {
    let loaded = load_model(&a.model)?;
    let opts = CsvOptions {
        delimiter: a.delimiter,
        columns: Some(loaded.features.clone()),
        timestamp: a.timestamp.clone(),
        label: None,
        skip_bad_rows: false,
        allow_missing: true,
        quiet: a.quiet,
    };
    let mut reader = crate::ingest::Reader::open(&a.model.input, &opts)?;
    let mut rp = Replayer::new(loaded.model.as_ref());
    let mut x = vec![0.0f32; loaded.features.len()];
    let mut counts = (0u64, 0u64, 0u64);
    output::write_atomic(&a.out, |w| {
        let mut sink = CsvSink::new(w, &loaded.features)?;
        while let Some(row) = reader.next_row()? {
            for (d, s) in x.iter_mut().zip(row.values) {
                *d = to_device(*s);
            }
            let r = rp.step(&x);
            counts.0 += 1;
            counts.1 += u64::from(r.above());
            counts.2 += u64::from(r.score.is_err());
            sink.row(&r)?;
        }
        sink.finish()?;
        Ok(())
    })?;
    if !a.quiet {
        eprintln!(
            "replayed {} readings of {}: {} above the threshold, {} could not be scored; wrote {}",
            counts.0,
            a.model.input.display(),
            counts.1,
            counts.2,
            a.out.display()
        );
    }
    Ok(())
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
    let cli = Cli::parse();
    let result = match &cli.command {
        Command::Fit(a) => train::run(a),
        Command::Inspect(a) => inspect::run(&a.blob, a.json),
        Command::Replay(a) => replay_cmd(a),
        Command::Evaluate(a) => assess::run(a),
        Command::Demo(a) => demo::run(a),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e}");
            for cause in e.chain().skip(1) {
                eprintln!("  caused by: {cause}");
            }
            ExitCode::FAILURE
        }
    }
}
