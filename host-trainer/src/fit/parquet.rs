//! Fitting a Parquet baseline: its feature columns are copied, one row group at a time, into a
//! CSV in a private temporary folder, and that CSV is fitted by the one CSV path, so that every
//! limit and check of a fit applies unchanged. The memory is that of a CSV fit plus one row group;
//! the temporary copy costs disk space about the size of the data as text, and is removed after.
//!
//! Messages and positions are given back in the Parquet file's terms: the copy's line `L` is the
//! file's row `L − 1` (rows count from 1), and the copy's name is replaced by the file's.

use std::path::Path;

use anyhow::Result;

use super::{fit_file, FitOptions, Fitted};
use crate::data::ingest;

/// Fit the Parquet file `path` (see the module documentation).
pub(super) fn fit_parquet(path: &Path, opts: &FitOptions) -> Result<Fitted> {
    let dir = tempfile::Builder::new()
        .prefix(".ellipsoid-parquet-")
        .tempdir()?;
    let copy = dir.path().join("baseline.csv");
    let features = ingest::parquet_to_csv(path, &opts.csv, &copy)?;
    let mut csv_opts = opts.clone();
    csv_opts.csv.columns = Some(features);
    csv_opts.csv.delimiter = Some(b',');
    csv_opts.csv.timestamp = None;
    csv_opts.csv.label = None;
    let name = path.display().to_string();
    let copy_name = copy.display().to_string();
    let mut fitted = fit_file(&copy, &csv_opts)
        .map_err(|e| anyhow::anyhow!(reword(&format!("{e:#}"), &copy_name, &name)))?;
    fitted.file = name.clone();
    let to_row = |l: &mut u64| *l = l.saturating_sub(1);
    fitted.holdout_lines.iter_mut().for_each(to_row);
    if let Some(r) = fitted.robust.as_mut() {
        r.set_aside_lines.iter_mut().for_each(to_row);
    }
    fitted.skipped_reasons = fitted
        .skipped_reasons
        .iter()
        .map(|r| reword(r, &copy_name, &name))
        .collect();
    Ok(fitted)
}

/// Put `file` for `copy` in a message, and `row L − 1` for each `copy:L:`.
fn reword(message: &str, copy: &str, file: &str) -> String {
    let mut out = String::with_capacity(message.len());
    let mut rest = message;
    while let Some(at) = rest.find(copy) {
        out.push_str(&rest[..at]);
        out.push_str(file);
        rest = &rest[at + copy.len()..];
        if let Some(tail) = rest.strip_prefix(':') {
            let digits = tail.bytes().take_while(u8::is_ascii_digit).count();
            if digits > 0 && tail[digits..].starts_with(':') {
                let line: u64 = tail[..digits].parse().unwrap_or(1);
                out.push_str(&format!(": row {}:", line.saturating_sub(1)));
                rest = &tail[digits + 1..];
            }
        }
    }
    out.push_str(rest);
    out.replace(
        "`` is not a number (the cell is empty)",
        "the cell is null (no reading)",
    )
}

#[cfg(test)]
mod tests {
    use super::reword;

    #[test]
    fn messages_name_the_file_and_row() {
        let m = reword(
            "/tmp/x/baseline.csv:5: column `a`: `` is not a number (the cell is empty)",
            "/tmp/x/baseline.csv",
            "log.parquet",
        );
        assert_eq!(
            m,
            "log.parquet: row 4: column `a`: the cell is null (no reading)"
        );
        let m = reword(
            "/tmp/x/baseline.csv: only 3 rows",
            "/tmp/x/baseline.csv",
            "p.parquet",
        );
        assert_eq!(m, "p.parquet: only 3 rows");
    }
}
