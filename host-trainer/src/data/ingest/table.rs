//! A whole small file in memory.

use std::path::Path;

use super::{CsvOptions, IngestError, Reader};

/// A whole file in memory, for replay and evaluation.
#[derive(Clone, Debug, PartialEq)]
pub struct Table {
    /// Feature names, in column order of `values`.
    pub features: Vec<String>,
    /// Row-major values, `rows × features.len()`.
    pub values: Vec<f64>,
    /// The file line of each row.
    pub lines: Vec<u64>,
    /// The label of each row, when a label column was asked for.
    pub labels: Option<Vec<bool>>,
    /// The timestamp text of each row, when there is a timestamp column.
    pub timestamps: Option<Vec<String>>,
    /// Rows dropped under `skip_bad_rows`.
    pub skipped: u64,
    /// Why the first few dropped rows were dropped.
    pub skipped_reasons: Vec<String>,
}

impl Table {
    /// The number of rows.
    pub fn rows(&self) -> usize {
        self.lines.len()
    }

    /// Row `i`'s values.
    ///
    /// # Panics
    /// If `i >= self.rows()`.
    pub fn row(&self, i: usize) -> &[f64] {
        let p = self.features.len();
        &self.values[i * p..(i + 1) * p]
    }
}

/// Read every row of `path` into memory. At least one good row is required.
pub fn read_table(path: &Path, opts: &CsvOptions) -> Result<Table, IngestError> {
    let mut r = Reader::open(path, opts)?;
    let has_label = r.layout.label_field.is_some();
    let has_ts = r.layout.timestamp_field.is_some();
    let mut t = Table {
        features: r.features().to_vec(),
        values: Vec::new(),
        lines: Vec::new(),
        labels: has_label.then(Vec::new),
        timestamps: has_ts.then(Vec::new),
        skipped: 0,
        skipped_reasons: Vec::new(),
    };
    while let Some(row) = r.next_row()? {
        t.values.extend_from_slice(row.values);
        t.lines.push(row.line);
        if let (Some(ls), Some(l)) = (t.labels.as_mut(), row.label) {
            ls.push(l);
        }
        if let (Some(ts), Some(s)) = (t.timestamps.as_mut(), row.timestamp) {
            ts.push(s.to_string());
        }
    }
    r.finish();
    t.skipped = r.skipped();
    t.skipped_reasons = r.skipped_reasons().iter().map(|e| e.to_string()).collect();
    if t.lines.is_empty() {
        return Err(IngestError::HeaderOnly {
            file: r.layout.file.clone(),
        });
    }
    Ok(t)
}
