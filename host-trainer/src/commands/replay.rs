//! `ellipsoid replay`: every reading of a CSV through the core and its alarm state machine.

use std::path::PathBuf;

use anyhow::Result;
use clap::Args;

use crate::commands::common::{load_model, parse_delimiter, ModelInput};
use crate::data::ingest::{CsvOptions, Reader};
use crate::data::output;
use crate::data::paths::Role;
use crate::device::replay::{to_device, CsvSink, Replayer};

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

/// Run `replay`.
pub fn run(a: &ReplayArgs) -> Result<()> {
    a.model.refuse_overwrite(&[Role::new("--out", &a.out)])?;
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
    let mut reader = Reader::open(&a.model.input, &opts)?;
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
