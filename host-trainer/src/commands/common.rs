//! What several commands take: how a CSV is read, and a model blob with its feature names.

use std::path::PathBuf;

use anyhow::Result;
use clap::Args;

use crate::data::card::ModelCard;
use crate::data::ingest::CsvOptions;
use crate::data::output;
use crate::data::paths::{refuse_clashes, Role};
use crate::device::dims::{decode_file, AnyModel};

/// A run that wrote its outputs but not for every input: `fit --by` with some machines failed.
/// The command line exits with [`PARTIAL_EXIT`], so that a script cannot take it for a full success.
#[derive(Debug)]
pub struct Partial(pub String);

impl std::fmt::Display for Partial {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for Partial {}

/// Exit status of a [`Partial`] run (1 is a failed run, which wrote nothing).
pub const PARTIAL_EXIT: u8 = 3;

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

/// The `--delimiter` value parser.
pub(crate) fn parse_delimiter(s: &str) -> Result<u8, String> {
    match s {
        "," | "comma" => Ok(b','),
        ";" | "semicolon" => Ok(b';'),
        "\t" | "tab" | "\\t" => Ok(b'\t'),
        other => Err(format!(
            "`{other}` is not a supported delimiter: use `,` `;` or `tab`"
        )),
    }
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

impl ModelInput {
    /// Refuse, before any work, an output that is the same file as the readings, the blob or
    /// its card.
    pub fn refuse_overwrite(&self, outputs: &[Role<'_>]) -> Result<()> {
        let card = ModelCard::path_for(&self.model);
        let inputs = [
            Role::new("the --input file", &self.input),
            Role::new("the --model blob", &self.model),
            Role::new("the model card", &card),
        ];
        refuse_clashes(&inputs, outputs)
    }
}

/// A model read from a blob plus the names of its features.
pub struct LoadedModel {
    /// The decoded model.
    pub model: Box<dyn AnyModel>,
    /// Feature names in model order.
    pub features: Vec<String>,
    /// The card, if there was one.
    pub card: Option<ModelCard>,
}

/// Read and validate a blob, and find its feature names (card or `--features`).
pub fn load_model(input: &ModelInput) -> Result<LoadedModel> {
    let path = &input.model;
    // Blob and card are read while no commit runs in their folder, after finishing any that a
    // killed fit left half-done.
    let _settled = output::settle(path)?;
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
