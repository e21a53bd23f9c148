//! `ellipsoid replay`: every reading of a CSV through the core as the device runs it: the
//! reading window, the model bank, the alarm state machine and the drift, one stream.

use std::path::PathBuf;

use anyhow::Result;
use clap::Args;

use crate::commands::common::{load_model, parse_delimiter, ModelInput};
use crate::data::output;
use crate::data::paths::Role;
use crate::device::replay::{CsvSink, Replayer};
use crate::pipeline::evaluate::{replay_stream, StreamSpec};

/// Options of `replay`.
#[derive(Debug, Clone, Args)]
pub struct ReplayArgs {
    #[command(flatten)]
    pub model: ModelInput,
    /// Output CSV: index, d2, d2_bits, verdict, alarm, fault, event, top_feature, c_<feature>...;
    /// a model bank (format 2) adds mode and drift_at_bound after top_feature.
    #[arg(long, short, value_name = "FILE")]
    pub out: PathBuf,
    /// The column that tells a known-mode bank each reading's mode (default: the model card's).
    #[arg(long, value_name = "NAME")]
    pub mode_column: Option<String>,
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

/// Run `replay`.
pub fn run(a: &ReplayArgs) -> Result<()> {
    a.model.refuse_overwrite(&[Role::new("--out", &a.out)])?;
    let loaded = load_model(&a.model)?;
    loaded.check_names(&a.model)?;
    let spec = StreamSpec {
        features: loaded.features.clone(),
        mode_column: loaded.mode_column(a.mode_column.as_deref(), &a.model.model)?,
        label_column: None,
        timestamp: a.timestamp.clone(),
        delimiter: a.delimiter,
        quiet: a.quiet,
    };
    let mut rp = Replayer::from_blob(&loaded.blob)
        .map_err(|e| anyhow::anyhow!("{}: {e}", a.model.model.display()))?;
    let mut counts = (0u64, 0u64, 0u64);
    output::write_atomic(&a.out, |w| {
        let mut sink = CsvSink::for_replayer(w, &loaded.scored_features(), &rp)?;
        replay_stream(&mut rp, &a.model.input, &spec, |r, _| {
            counts.0 += 1;
            counts.1 += u64::from(r.above());
            counts.2 += u64::from(r.score.is_err());
            sink.row(&r)
        })?;
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
