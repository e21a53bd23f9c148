//! Streaming CSV and Parquet reading, with errors that name file, line (or row), column and value.
//!
//! A file has one header row of column names, then one reading a row. The delimiter is `,`, `;` or
//! tab; when [`CsvOptions::delimiter`] is `None` it is the one of the three that occurs most often
//! in the header line (`,` if none does). Line ends may be `\n` or `\r\n`; blank lines are ignored.
//!
//! Columns have three roles:
//!
//! * **features**: the numbers the model is fitted on, either the ones named in
//!   [`CsvOptions::columns`] (in that order) or else every column that has no other role (in file order);
//! * **timestamp**: skipped by the maths but kept for reports. Named by [`CsvOptions::timestamp`];
//!   without that option a column called `timestamp`, `time` or `datetime` (any case) is taken;
//! * **label**: read as a bool for evaluation (see [`parse_label`]), only when
//!   [`CsvOptions::label`] names it.
//!
//! [`Reader`] streams: it holds one record and one row of values, so its memory does not grow
//! with the file. [`read_table`] collects every row, for the commands that need them all.
//! [`Layout`] and [`Reader::range`] let a caller read disjoint byte ranges of one file in
//! parallel with the same column mapping (see `fit`).
//!
//! [`Reader::open`] reads a Parquet file too (see the `parquet` submodule: `PAR1` at both ends
//! of the file, one row group in memory at a time); [`Reader::range`] is for CSV only.
//!
//! Bad input stops the read with an [`IngestError`] unless [`CsvOptions::skip_bad_rows`] is set;
//! then the row is dropped, counted ([`Reader::skipped`]) and the first [`KEEP_REASONS`] reasons
//! are kept ([`Reader::skipped_reasons`]).

mod cell;
mod error;
mod layout;
mod lines;
mod parquet;
mod reader;
mod split;
mod table;

pub use cell::parse_label;
pub use error::IngestError;
pub use layout::Layout;
pub use lines::{count_lines, nth_line_start, split_ranges};
pub use parquet::{is_parquet, parquet_to_csv};
pub use reader::{progress_bar, Reader, Row};
pub use split::{split_by, Part, SplitLog, FLUSH_BYTES};
pub use table::{read_table, Table};

/// How many reasons for skipped rows a [`Reader`] keeps.
pub const KEEP_REASONS: usize = 5;

/// Files larger than this get a progress bar (when stderr is a terminal and not `quiet`).
pub const PROGRESS_MIN_BYTES: u64 = 4 * 1024 * 1024;

/// Column names taken as the timestamp when [`CsvOptions::timestamp`] is not given.
pub const TIMESTAMP_NAMES: [&str; 3] = ["timestamp", "time", "datetime"];

/// How to read a CSV file. `Default` is: auto-detected delimiter, every column a feature except
/// an auto-detected timestamp, no label, stop at the first bad row.
#[derive(Clone, Debug, Default)]
pub struct CsvOptions {
    /// `b','`, `b';'` or `b'\t'`; `None` detects it from the header line.
    pub delimiter: Option<u8>,
    /// The feature columns, by name, in the order the model uses. `None`: every other column.
    pub columns: Option<Vec<String>>,
    /// The timestamp column. `None`: a column named `timestamp`, `time` or `datetime`, if any.
    pub timestamp: Option<String>,
    /// The label column (`0/false/normal/ok` or `1/true/anomaly/fault`), for evaluation.
    pub label: Option<String>,
    /// Drop bad rows (and count them) instead of stopping at the first one.
    pub skip_bad_rows: bool,
    /// Read an empty cell, `nan` or `NaN` as `f64::NAN`, and let `inf` through, so that sensor
    /// dropouts reach the core and are scored as faults. Other text is still an error.
    pub allow_missing: bool,
    /// No progress bar.
    pub quiet: bool,
}

#[cfg(test)]
mod tests;
