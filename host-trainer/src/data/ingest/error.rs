//! What can go wrong reading a CSV, each error naming file, line, column and value.

use std::io;

/// Why a file could not be read. Every variant names the file; those about a row name its line
/// (1-based, the header is line 1), and those about a cell name its column and value.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum IngestError {
    /// The file could not be opened or read.
    #[error("{file}: {source}")]
    Io {
        /// The file.
        file: String,
        /// What the system said.
        source: io::Error,
    },
    /// The file has no header line.
    #[error("{file}: the file is empty (expected a header row of column names, then data rows)")]
    Empty {
        /// The file.
        file: String,
    },
    /// The lines end in a lone carriage return, which this reader does not split.
    #[error(
        "{file}:1: the lines end in a lone carriage return (CR, old Mac style), which is not read \
         as a line end; convert them to LF first, e.g. `tr '\\r' '\\n' < in.csv > out.csv`"
    )]
    CarriageReturns {
        /// The file.
        file: String,
    },
    /// The file has a header line and nothing else.
    #[error("{file}: the file has a header row but no data rows")]
    HeaderOnly {
        /// The file.
        file: String,
    },
    /// Two header cells have the same name.
    #[error("{file}:1: column name `{name}` appears twice (columns {first} and {second})")]
    DuplicateColumn {
        /// The file.
        file: String,
        /// The repeated name.
        name: String,
        /// 1-based position of its first occurrence.
        first: usize,
        /// 1-based position of the repeat.
        second: usize,
    },
    /// The column selection names the same column twice.
    #[error("{file}: the column selection names `{name}` twice (positions {first} and {second} of the list)")]
    RepeatedSelection {
        /// The file.
        file: String,
        /// The repeated name.
        name: String,
        /// 1-based position of its first mention in the selection.
        first: usize,
        /// 1-based position of the repeat.
        second: usize,
    },
    /// A header cell that would be a feature has no name.
    #[error("{file}:1: column {index} has no name")]
    UnnamedColumn {
        /// The file.
        file: String,
        /// 1-based column position.
        index: usize,
    },
    /// A column asked for is not in the header.
    #[error("{file}:1: no {role} column named `{name}` (the header has: {available})")]
    MissingColumn {
        /// The file.
        file: String,
        /// `feature`, `timestamp` or `label`.
        role: &'static str,
        /// The name asked for.
        name: String,
        /// The header's names, comma-separated.
        available: String,
    },
    /// A column was given two roles.
    #[error("{file}:1: column `{name}` cannot be both {a} and {b}")]
    ConflictingRoles {
        /// The file.
        file: String,
        /// The column.
        name: String,
        /// One role.
        a: &'static str,
        /// The other.
        b: &'static str,
    },
    /// No feature columns are left.
    #[error("{file}:1: there are no feature columns")]
    NoFeatures {
        /// The file.
        file: String,
    },
    /// A row has more or fewer fields than the header.
    #[error("{file}:{line}: {found} fields, but the header has {expected}")]
    FieldCount {
        /// The file.
        file: String,
        /// The line.
        line: u64,
        /// Fields in the header.
        expected: usize,
        /// Fields in this row.
        found: usize,
    },
    /// A feature cell is not a number.
    #[error("{file}:{line}: column `{column}`: `{value}` is not a number{hint}")]
    NotNumber {
        /// The file.
        file: String,
        /// The line.
        line: u64,
        /// The column name.
        column: String,
        /// The cell's text.
        value: String,
        /// An extra word of advice, or empty.
        hint: &'static str,
    },
    /// A feature cell is NaN or infinite where a finite number is needed.
    #[error("{file}:{line}: column `{column}`: `{value}` is not a finite number")]
    NotFinite {
        /// The file.
        file: String,
        /// The line.
        line: u64,
        /// The column name.
        column: String,
        /// The cell's text.
        value: String,
    },
    /// A label cell is none of the accepted words.
    #[error(
        "{file}:{line}: column `{column}`: `{value}` is not a label \
         (use 0/false/normal/ok or 1/true/anomaly/fault)"
    )]
    BadLabel {
        /// The file.
        file: String,
        /// The line.
        line: u64,
        /// The column name.
        column: String,
        /// The cell's text.
        value: String,
    },
    /// A log-transformed feature is zero or negative (raised by the fitting code).
    #[error("{file}:{line}: column `{column}`: `{value}` must be positive to take its logarithm")]
    NotPositive {
        /// The file.
        file: String,
        /// The line.
        line: u64,
        /// The column name.
        column: String,
        /// The value.
        value: String,
    },
    /// A baseline value so far from the rest of its column that it must be a fault of the log
    /// (raised by the fitting code's gross-outlier check).
    #[error("{file}:{line}: column `{column}`: {value} {detail}")]
    GrossOutlier {
        /// The file.
        file: String,
        /// The line.
        line: u64,
        /// The column name.
        column: String,
        /// The value, shortened.
        value: String,
        /// How far it lies, and what to do.
        detail: String,
    },
    /// A Parquet file's footer or schema could not be read.
    #[error("{file}: not a readable Parquet file: {message}")]
    ParquetUnreadable {
        /// The file.
        file: String,
        /// The `parquet` crate's words.
        message: String,
    },
    /// A row group of a Parquet file could not be decoded.
    #[error("{file}: row group {group}: the data cannot be decoded (a damaged or truncated file?): {message}")]
    ParquetCorrupt {
        /// The file.
        file: String,
        /// 1-based row group.
        group: usize,
        /// The `parquet` crate's words.
        message: String,
    },
    /// A Parquet file is compressed with a codec this build does not read.
    #[error(
        "{file}: the data is compressed with a codec this build does not read (only uncompressed \
         and Snappy-compressed Parquet is read; rewrite it with one of those): {message}"
    )]
    ParquetCodec {
        /// The file.
        file: String,
        /// The `parquet` crate's words.
        message: String,
    },
    /// The column roles do not fit a Parquet file's columns (a missing or doubly used column).
    #[error("{file}: {message}")]
    ParquetSchema {
        /// The file.
        file: String,
        /// What is wrong.
        message: String,
    },
    /// A Parquet column to be used is nested or repeated.
    #[error("{file}: column `{column}` is nested or repeated; only flat columns can be read")]
    ParquetNested {
        /// The file.
        file: String,
        /// The column's dotted path.
        column: String,
    },
    /// A Parquet feature column does not hold numbers.
    #[error(
        "{file}: column `{column}` holds {found} values, but a feature column must hold numbers \
         (DOUBLE, FLOAT, INT32 or INT64); leave it out with the column option"
    )]
    ParquetColumnType {
        /// The file.
        file: String,
        /// The column.
        column: String,
        /// Its physical type.
        found: String,
    },
    /// A Parquet file has no rows.
    #[error("{file}: the file has no data rows")]
    ParquetNoRows {
        /// The file.
        file: String,
    },
    /// A Parquet feature cell is null.
    #[error("{file}: row {row}: column `{column}` is null (no reading)")]
    ParquetNull {
        /// The file.
        file: String,
        /// 1-based row.
        row: u64,
        /// The column.
        column: String,
    },
    /// A Parquet feature cell is NaN or infinite where a finite number is needed.
    #[error("{file}: row {row}: column `{column}`: `{value}` is not a finite number")]
    ParquetNotFinite {
        /// The file.
        file: String,
        /// 1-based row.
        row: u64,
        /// The column.
        column: String,
        /// The value.
        value: String,
    },
    /// A Parquet label cell is none of the accepted values.
    #[error(
        "{file}: row {row}: column `{column}`: `{value}` is not a label \
         (use 0/false/normal/ok or 1/true/anomaly/fault)"
    )]
    ParquetBadLabel {
        /// The file.
        file: String,
        /// 1-based row.
        row: u64,
        /// The column.
        column: String,
        /// The cell.
        value: String,
    },
    /// A row of a fleet log has no machine id (`fit --by`).
    #[error("{file}{at}: column `{column}` is empty, so the row belongs to no machine")]
    NoMachine {
        /// The file.
        file: String,
        /// `:LINE` for a CSV, `: row ROW` for Parquet.
        at: String,
        /// The machine column.
        column: String,
    },
    /// Reading a row failed for a reason of the CSV layer (for instance an I/O error mid-file).
    #[error("{file}:{line}: {message}")]
    Record {
        /// The file.
        file: String,
        /// The line.
        line: u64,
        /// The CSV layer's words.
        message: String,
    },
}

impl IngestError {
    /// The line this error is about, if it is about a row.
    pub fn line(&self) -> Option<u64> {
        match self {
            IngestError::FieldCount { line, .. }
            | IngestError::NotNumber { line, .. }
            | IngestError::NotFinite { line, .. }
            | IngestError::BadLabel { line, .. }
            | IngestError::NotPositive { line, .. }
            | IngestError::GrossOutlier { line, .. }
            | IngestError::Record { line, .. } => Some(*line),
            _ => None,
        }
    }

    /// Add `delta` to the line number (for readers of a byte range whose first line was not known
    /// when they started).
    pub fn shift_line(&mut self, delta: u64) {
        match self {
            IngestError::FieldCount { line, .. }
            | IngestError::NotNumber { line, .. }
            | IngestError::NotFinite { line, .. }
            | IngestError::BadLabel { line, .. }
            | IngestError::NotPositive { line, .. }
            | IngestError::GrossOutlier { line, .. }
            | IngestError::Record { line, .. } => *line += delta,
            _ => {}
        }
    }
}
