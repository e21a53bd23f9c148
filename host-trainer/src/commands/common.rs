//! What several commands take: how a CSV is read, and a model blob with its feature names.

use std::path::PathBuf;

use anyhow::Result;
use clap::Args;

use crate::data::card::ModelCard;
use crate::data::ingest::CsvOptions;
use crate::data::output;
use crate::data::paths::{refuse_clashes, Role};
use ellipsoid_core::blob;

use crate::device::dims::{read_blob_file, AnyModel, Decoded};
use crate::device::track::BankView;

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
    /// The blob's bytes, as read (what a replay runs, as the device runs its slot).
    pub blob: Vec<u8>,
    /// The decoded blob: a single model (format 1) or a model bank (format 2).
    pub decoded: Decoded,
    /// Raw feature names in model order.
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
    let (bytes, decoded) = read_blob_file(path)?;
    let (features, card) = match &input.features {
        Some(f) => (f.clone(), None),
        None => {
            let card = ModelCard::read_for(path, &bytes)?;
            (card.features.clone(), Some(card))
        }
    };
    anyhow::ensure!(
        features.len() == decoded.n(),
        "{} has {} features but {} names were given",
        path.display(),
        decoded.n(),
        features.len()
    );
    Ok(LoadedModel {
        blob: bytes,
        decoded,
        features,
        card,
    })
}

// ---- model banks (format 2): names digest and mode column -------------------------------------

impl LoadedModel {
    /// The single model of a format 1 blob; a bank is refused, naming `what` needs one.
    pub fn single(&self, path: &std::path::Path, what: &str) -> Result<&dyn AnyModel> {
        self.decoded.model().ok_or_else(|| {
            anyhow::anyhow!(
                "{}: a model bank (format 2); {what} is for a single model (format 1) so far",
                path.display()
            )
        })
    }

    /// The names of the scored values: the card's, when it lists them (a window with
    /// differences), else the features themselves (and `Δ<feature>` for differences).
    pub fn scored_features(&self) -> Vec<String> {
        let m = self.bank().map_or(self.features.len(), |b| b.m);
        match &self.card {
            Some(c) if c.scored_features.len() == m => c.scored_features.clone(),
            _ => crate::device::replay::scored_names(&self.features, m),
        }
    }

    /// The bank of a format 2 blob.
    pub fn bank(&self) -> Option<&BankView> {
        match &self.decoded {
            Decoded::Bank(b) => Some(b),
            Decoded::Model(_) => None,
        }
    }

    /// A format 2 blob carries the digest of the raw feature names it was trained on, in order:
    /// refuse to score `input` when the names in use (from the card or `--features`) differ,
    /// naming the file, the names and where they differ from the card's or the file's own order.
    pub fn check_names(&self, input: &ModelInput) -> Result<()> {
        let Some(want) = self.bank().and_then(|b| b.names_digest) else {
            return Ok(());
        };
        let digest = |names: &[String]| blob::names_digest(names.iter().map(String::as_str));
        if digest(&self.features) == want {
            return Ok(());
        }
        let mut hints = Vec::new();
        // Names that would match: the card's (when `--features` replaced it) or the file's own order.
        if let Ok(card) = ModelCard::read_for(&input.model, &self.blob) {
            if card.features != self.features && digest(&card.features) == want {
                hints.push(format!(
                    "the model card beside the blob has the right names: {}",
                    differences(&self.features, &card.features)
                ));
            }
        }
        let header = crate::data::ingest::Reader::open(
            &input.input,
            &crate::data::ingest::CsvOptions {
                columns: Some(self.features.clone()),
                quiet: true,
                ..Default::default()
            },
        );
        if let Ok(r) = header {
            let in_file: Vec<String> = r
                .layout()
                .names
                .iter()
                .filter(|n| self.features.contains(n))
                .cloned()
                .collect();
            if in_file != self.features && digest(&in_file) == want {
                hints.push(format!(
                    "the file's own column order is the trained one: {}",
                    differences(&self.features, &in_file)
                ));
            }
        }
        let source = if self.card.is_some() {
            "the model card"
        } else {
            "--features"
        };
        anyhow::bail!(
            "{}: the feature columns {} (in this order, from {source}) are not the ones {} was \
             trained on: its names digest is {want:#010x}, these names give {:#010x}{}",
            input.input.display(),
            self.features.join(","),
            input.model.display(),
            digest(&self.features),
            if hints.is_empty() {
                "; check the names and their order against the fit's input".to_string()
            } else {
                format!("; {}", hints.join("; "))
            }
        )
    }

    /// The column that gives each reading's mode: `--mode-column` (`given`) or the card's
    /// `mode_column`, for a known-mode bank; none for any other blob (and `given` is refused).
    pub fn mode_column(
        &self,
        given: Option<&str>,
        path: &std::path::Path,
    ) -> Result<Option<String>> {
        let known = self
            .bank()
            .is_some_and(|b| b.select == ellipsoid_core::bank::ModeSelect::Known);
        match (known, given) {
            (true, Some(c)) => Ok(Some(c.to_string())),
            (true, None) => card_mode_column(self.card.as_ref())
                .map(Some)
                .ok_or_else(|| {
                    anyhow::anyhow!(
                        "{}: a known-mode bank is told each reading's mode: give --mode-column \
                     (no model card beside the blob names one)",
                        path.display()
                    )
                }),
            (false, Some(c)) => Err(anyhow::anyhow!(
                "--mode-column {c}: {} {}, which is not told its mode",
                path.display(),
                if self.bank().is_some() {
                    "is a bank that picks each reading's nearest mode itself"
                } else {
                    "is a single model"
                }
            )),
            (false, None) => Ok(None),
        }
    }
}

/// The card's mode column (known-mode banks).
fn card_mode_column(card: Option<&ModelCard>) -> Option<String> {
    card.and_then(|c| c.mode_column.clone())
}

/// Where two name lists differ, position by position (1-based), for an error message.
fn differences(given: &[String], right: &[String]) -> String {
    let mut out = Vec::new();
    for i in 0..given.len().max(right.len()) {
        let (g, r) = (given.get(i), right.get(i));
        if g != r {
            out.push(format!(
                "position {}: `{}` given, `{}` expected",
                i + 1,
                g.map_or("(none)", String::as_str),
                r.map_or("(none)", String::as_str)
            ));
        }
    }
    format!("{} (in order: {})", out.join(", "), right.join(","))
}
