//! Streaming CSV reading, with errors that name file, line, column and value.
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
//! Bad input stops the read with an [`IngestError`] unless [`CsvOptions::skip_bad_rows`] is set;
//! then the row is dropped, counted ([`Reader::skipped`]) and the first [`KEEP_REASONS`] reasons
//! are kept ([`Reader::skipped_reasons`]).

use std::fmt;
use std::fs::File;
use std::io::{self, IsTerminal, Read, Seek, SeekFrom};
use std::path::Path;

use indicatif::{ProgressBar, ProgressStyle};

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
            | IngestError::Record { line, .. } => *line += delta,
            _ => {}
        }
    }
}

/// Read a label cell: `0`, `false`, `normal`, `ok` are normal (`false`); `1`, `true`, `anomaly`,
/// `fault` are anomalies (`true`); case does not matter and surrounding spaces are ignored.
pub fn parse_label(cell: &[u8]) -> Option<bool> {
    let c = trim(cell);
    const NORMAL: [&[u8]; 4] = [b"0", b"false", b"normal", b"ok"];
    const ANOMALY: [&[u8]; 4] = [b"1", b"true", b"anomaly", b"fault"];
    if NORMAL.iter().any(|w| c.eq_ignore_ascii_case(w)) {
        Some(false)
    } else if ANOMALY.iter().any(|w| c.eq_ignore_ascii_case(w)) {
        Some(true)
    } else {
        None
    }
}

fn trim(b: &[u8]) -> &[u8] {
    let mut s = b;
    while let [first, rest @ ..] = s {
        if first.is_ascii_whitespace() {
            s = rest;
        } else {
            break;
        }
    }
    while let [rest @ .., last] = s {
        if last.is_ascii_whitespace() {
            s = rest;
        } else {
            break;
        }
    }
    s
}

/// Parse a number cell, correctly rounded, straight from the bytes. `fast-float2` accepts the
/// same forms as `str::parse::<f64>` (sign, exponent, `nan`, `inf`, `infinity`) and measured about
/// 1.8× faster on the cells of a wide baseline (4 M cells: 100 ms against 55 ms), which matters
/// because parsing is most of a fit. The test `parses_like_std` pins the agreement.
#[inline]
fn parse_f64(cell: &[u8]) -> Option<f64> {
    fast_float2::parse::<f64, _>(cell).ok()
}

fn lossy(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

/// What the header of a file says: the delimiter, how many fields a row has, and which field
/// plays which role. Shared by every [`Reader`] of the file.
#[derive(Clone, Debug)]
pub struct Layout {
    /// The file's name as given, for messages.
    pub file: String,
    /// The delimiter in use.
    pub delimiter: u8,
    /// Every header name, in file order.
    pub names: Vec<String>,
    /// The feature names, in model order.
    pub features: Vec<String>,
    /// For each feature, its 0-based field index.
    pub feature_fields: Vec<usize>,
    /// The timestamp's field index, if any.
    pub timestamp_field: Option<usize>,
    /// The label's field index, if any.
    pub label_field: Option<usize>,
    /// Byte offset of the first data line (just after the header's line end).
    pub data_start: u64,
    /// The file's length in bytes when the header was read.
    pub file_len: u64,
}

impl Layout {
    /// Read the header of `path` and resolve the column roles of `opts`.
    pub fn read(path: &Path, opts: &CsvOptions) -> Result<Layout, IngestError> {
        let file = path.display().to_string();
        let io_err = |source| IngestError::Io {
            file: file.clone(),
            source,
        };
        let mut f = File::open(path).map_err(io_err)?;
        let file_len = f.metadata().map_err(io_err)?.len();
        // The header is the first line; read until its `\n`.
        let mut head = Vec::new();
        let mut buf = [0u8; 8192];
        let line_end = loop {
            let n = f.read(&mut buf).map_err(io_err)?;
            if n == 0 {
                break None;
            }
            let before = head.len();
            head.extend_from_slice(&buf[..n]);
            if let Some(i) = memchr::memchr(b'\n', &head[before..]) {
                break Some(before + i);
            }
        };
        let rest_has_data = match line_end {
            None => false,
            Some(i) => {
                let mut rest = head[i + 1..].to_vec();
                loop {
                    if rest.iter().any(|b| !b.is_ascii_whitespace()) {
                        break true;
                    }
                    rest.clear();
                    let n = f.read(&mut buf).map_err(io_err)?;
                    if n == 0 {
                        break false;
                    }
                    rest.extend_from_slice(&buf[..n]);
                }
            }
        };
        let data_start = line_end.map_or(head.len(), |i| i + 1) as u64;
        let mut line: &[u8] = &head[..line_end.unwrap_or(head.len())];
        if let Some(rest) = line.strip_prefix(b"\xEF\xBB\xBF") {
            line = rest;
        }
        let line = trim(line);
        if line.is_empty() {
            return Err(IngestError::Empty { file });
        }
        if !rest_has_data {
            return Err(IngestError::HeaderOnly { file });
        }
        let delimiter = opts.delimiter.unwrap_or_else(|| detect_delimiter(line));
        let mut hdr = csv::ReaderBuilder::new()
            .has_headers(false)
            .delimiter(delimiter)
            .flexible(true)
            .from_reader(line);
        let mut rec = csv::ByteRecord::new();
        hdr.read_byte_record(&mut rec)
            .map_err(|e| IngestError::Record {
                file: file.clone(),
                line: 1,
                message: e.to_string(),
            })?;
        let names: Vec<String> = rec.iter().map(|c| lossy(trim(c))).collect();
        for (j, name) in names.iter().enumerate() {
            if let Some(i) = names[..j].iter().position(|n| n == name) {
                if !name.is_empty() {
                    return Err(IngestError::DuplicateColumn {
                        file,
                        name: name.clone(),
                        first: i + 1,
                        second: j + 1,
                    });
                }
            }
        }
        let available = || names.join(", ");
        let find = |role: &'static str, name: &str| {
            names
                .iter()
                .position(|n| n == name)
                .ok_or_else(|| IngestError::MissingColumn {
                    file: file.clone(),
                    role,
                    name: name.to_string(),
                    available: available(),
                })
        };
        let label_field = opts
            .label
            .as_deref()
            .map(|l| find("label", l))
            .transpose()?;
        let explicit_ts = opts
            .timestamp
            .as_deref()
            .map(|t| find("timestamp", t))
            .transpose()?;
        let chosen: Option<Vec<usize>> = opts
            .columns
            .as_ref()
            .map(|cols| cols.iter().map(|c| find("feature", c)).collect())
            .transpose()?;
        let timestamp_field = explicit_ts.or_else(|| {
            names.iter().enumerate().position(|(i, n)| {
                TIMESTAMP_NAMES.iter().any(|t| n.eq_ignore_ascii_case(t))
                    && Some(i) != label_field
                    && chosen.as_ref().is_none_or(|c| !c.contains(&i))
            })
        });
        let conflict = |i: usize, a, b| IngestError::ConflictingRoles {
            file: file.clone(),
            name: names[i].clone(),
            a,
            b,
        };
        if let (Some(t), Some(l)) = (timestamp_field, label_field) {
            if t == l {
                return Err(conflict(t, "timestamp", "label"));
            }
        }
        let feature_fields = match chosen {
            Some(c) => {
                for (k, &i) in c.iter().enumerate() {
                    if Some(i) == label_field {
                        return Err(conflict(i, "feature", "label"));
                    }
                    if Some(i) == timestamp_field {
                        return Err(conflict(i, "feature", "timestamp"));
                    }
                    if let Some(j) = c[..k].iter().position(|&x| x == i) {
                        return Err(IngestError::RepeatedSelection {
                            file,
                            name: names[i].clone(),
                            first: j + 1,
                            second: k + 1,
                        });
                    }
                }
                c
            }
            None => {
                let f: Vec<usize> = (0..names.len())
                    .filter(|i| Some(*i) != label_field && Some(*i) != timestamp_field)
                    .collect();
                if let Some(&i) = f.iter().find(|&&i| names[i].is_empty()) {
                    return Err(IngestError::UnnamedColumn { file, index: i + 1 });
                }
                f
            }
        };
        if feature_fields.is_empty() {
            return Err(IngestError::NoFeatures { file });
        }
        Ok(Layout {
            features: feature_fields.iter().map(|&i| names[i].clone()).collect(),
            file,
            delimiter,
            names,
            feature_fields,
            timestamp_field,
            label_field,
            data_start,
            file_len,
        })
    }
}

fn detect_delimiter(line: &[u8]) -> u8 {
    let count = |d: u8| memchr::memchr_iter(d, line).count();
    let mut best = (b',', count(b','));
    for d in [b';', b'\t'] {
        let c = count(d);
        if c > best.1 {
            best = (d, c);
        }
    }
    best.0
}

/// A progress bar over `len` bytes, or `None` when the input is small, stderr is not a
/// terminal, or `quiet` is set.
pub fn progress_bar(len: u64, quiet: bool) -> Option<ProgressBar> {
    if quiet || len <= PROGRESS_MIN_BYTES || !io::stderr().is_terminal() {
        return None;
    }
    let style = ProgressStyle::with_template(
        "{spinner} reading {bytes}/{total_bytes} [{bar:30}] {bytes_per_sec}, {eta} left",
    )
    .unwrap_or_else(|_| ProgressStyle::default_bar())
    .progress_chars("=> ");
    Some(ProgressBar::new(len).with_style(style))
}

/// The bytes of one range of the file, counted on a progress bar if there is one.
struct Source {
    inner: io::Take<File>,
    progress: Option<ProgressBar>,
}

impl Read for Source {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        if let Some(p) = &self.progress {
            p.inc(n as u64);
        }
        Ok(n)
    }
}

/// One data row, borrowed from the [`Reader`] until the next call.
#[derive(Clone, Copy, Debug)]
pub struct Row<'a> {
    /// 1-based line number in the file (the header is line 1).
    pub line: u64,
    /// Byte offset of the row's start in the file.
    pub byte: u64,
    /// The feature values, in [`Reader::features`] order.
    pub values: &'a [f64],
    /// The label, when a label column was asked for.
    pub label: Option<bool>,
    /// The timestamp cell's text, when there is a timestamp column.
    pub timestamp: Option<&'a str>,
}

/// A streaming reader of data rows. Memory does not grow with the number of rows.
///
/// Lines are split here rather than by the `csv` crate's record reader, so that line numbers are
/// exact with `\r\n` ends and blank lines. A line without `"` is split at the delimiter; a line
/// with quotes is handed to the `csv` crate. A quoted cell may not contain a line break.
pub struct Reader {
    layout: Layout,
    src: io::BufReader<Source>,
    /// The current line, with its line end.
    buf: Vec<u8>,
    /// Unquoted cells of a line that had quotes.
    unquoted: Vec<u8>,
    quoted: bool,
    /// `(start, end)` of each cell, in `buf` or (if `quoted`) in `unquoted`.
    cells: Vec<(usize, usize)>,
    values: Vec<f64>,
    label: Option<bool>,
    /// A timestamp cell that was not valid UTF-8, made readable.
    timestamp: String,
    /// Lines read so far by this reader.
    lines: u64,
    /// The file line of this reader's first line.
    first_line: u64,
    /// Byte offset of the next line.
    pos: u64,
    skip_bad_rows: bool,
    allow_missing: bool,
    skipped: u64,
    reasons: Vec<IngestError>,
}

impl Reader {
    /// Open `path`, read its header, and get ready to stream its data rows.
    pub fn open(path: &Path, opts: &CsvOptions) -> Result<Reader, IngestError> {
        let layout = Layout::read(path, opts)?;
        let pb = progress_bar(layout.file_len, opts.quiet);
        if let Some(p) = &pb {
            p.inc(layout.data_start);
        }
        let start = layout.data_start;
        let mut r = Reader::range(path, &layout, opts, start, u64::MAX, 2)?;
        r.set_progress(pb);
        Ok(r)
    }

    /// A reader of the bytes `start..end` of the file `layout` was read from. `start` must be the
    /// start of a line (after the header) and `end` the end of one (or past the end of the file).
    /// `first_line` is the file's line number at `start`; pass 1 if it is not known and fix the
    /// numbers later with [`IngestError::shift_line`] (rows then carry relative lines too).
    pub fn range(
        path: &Path,
        layout: &Layout,
        opts: &CsvOptions,
        start: u64,
        end: u64,
        first_line: u64,
    ) -> Result<Reader, IngestError> {
        let io_err = |source| IngestError::Io {
            file: layout.file.clone(),
            source,
        };
        let mut f = File::open(path).map_err(io_err)?;
        f.seek(SeekFrom::Start(start)).map_err(io_err)?;
        let source = Source {
            inner: f.take(end.saturating_sub(start)),
            progress: None,
        };
        Ok(Reader {
            values: vec![0.0; layout.features.len()],
            cells: Vec::with_capacity(layout.names.len()),
            layout: layout.clone(),
            src: io::BufReader::with_capacity(1 << 17, source),
            buf: Vec::with_capacity(256),
            unquoted: Vec::new(),
            quoted: false,
            label: None,
            timestamp: String::new(),
            lines: 0,
            first_line,
            pos: start,
            skip_bad_rows: opts.skip_bad_rows,
            allow_missing: opts.allow_missing,
            skipped: 0,
            reasons: Vec::new(),
        })
    }

    /// Count the bytes this reader consumes on `progress` (shared between parallel readers).
    pub fn set_progress(&mut self, progress: Option<ProgressBar>) {
        self.src.get_mut().progress = progress;
    }

    /// The header's layout.
    pub fn layout(&self) -> &Layout {
        &self.layout
    }

    /// The feature column names, in the order of [`Row::values`].
    pub fn features(&self) -> &[String] {
        &self.layout.features
    }

    /// The file's name as given, for messages.
    pub fn file(&self) -> &str {
        &self.layout.file
    }

    /// How many rows were dropped under [`CsvOptions::skip_bad_rows`].
    pub fn skipped(&self) -> u64 {
        self.skipped
    }

    /// Why the first few ([`KEEP_REASONS`]) dropped rows were dropped.
    pub fn skipped_reasons(&self) -> &[IngestError] {
        &self.reasons
    }

    /// Move the kept reasons out (leaving none).
    pub fn take_skipped_reasons(&mut self) -> Vec<IngestError> {
        std::mem::take(&mut self.reasons)
    }

    /// Lines (blank ones included) this reader has moved past.
    pub fn lines_read(&self) -> u64 {
        self.lines
    }

    /// A row the caller found bad (for instance a value its own rules refuse): with
    /// `skip_bad_rows` it is counted and `Ok` is returned, otherwise the error is.
    pub fn skip_or_fail(&mut self, err: IngestError) -> Result<(), IngestError> {
        if !self.skip_bad_rows {
            return Err(err);
        }
        self.skipped += 1;
        if self.reasons.len() < KEEP_REASONS {
            self.reasons.push(err);
        }
        Ok(())
    }

    /// The next good row, or `None` at the end of the file (or range).
    pub fn next_row(&mut self) -> Result<Option<Row<'_>>, IngestError> {
        loop {
            self.buf.clear();
            let n = io::BufRead::read_until(&mut self.src, b'\n', &mut self.buf).map_err(|e| {
                IngestError::Record {
                    file: self.layout.file.clone(),
                    line: self.first_line + self.lines,
                    message: e.to_string(),
                }
            })?;
            if n == 0 {
                return Ok(None);
            }
            let line = self.first_line + self.lines;
            let byte = self.pos;
            self.lines += 1;
            self.pos += n as u64;
            let mut len = n;
            while len > 0 && matches!(self.buf[len - 1], b'\n' | b'\r') {
                len -= 1;
            }
            if trim(&self.buf[..len]).is_empty() {
                continue;
            }
            let result = self.split(len, line).and_then(|()| self.decode(line));
            match result {
                Ok(()) => {
                    // The timestamp is borrowed from the line, copied only if it is not UTF-8.
                    let timestamp = match self.layout.timestamp_field {
                        None => None,
                        Some(i) => {
                            let (a, b) = self.cells[i];
                            let raw = trim(if self.quoted {
                                &self.unquoted[a..b]
                            } else {
                                &self.buf[a..b]
                            });
                            match std::str::from_utf8(raw) {
                                Ok(text) => Some(text),
                                Err(_) => {
                                    self.timestamp = String::from_utf8_lossy(raw).into_owned();
                                    Some(self.timestamp.as_str())
                                }
                            }
                        }
                    };
                    return Ok(Some(Row {
                        line,
                        byte,
                        values: &self.values,
                        label: self.label,
                        timestamp,
                    }));
                }
                Err(e) => self.skip_or_fail(e)?,
            }
        }
    }

    /// Find the cells of `buf[..len]`.
    fn split(&mut self, len: usize, line: u64) -> Result<(), IngestError> {
        self.cells.clear();
        let text = &self.buf[..len];
        let d = self.layout.delimiter;
        if memchr::memchr(b'"', text).is_none() {
            self.quoted = false;
            let mut start = 0;
            for i in memchr::memchr_iter(d, text) {
                self.cells.push((start, i));
                start = i + 1;
            }
            self.cells.push((start, len));
            return Ok(());
        }
        self.quoted = true;
        self.unquoted.clear();
        let mut rdr = csv::ReaderBuilder::new()
            .has_headers(false)
            .delimiter(d)
            .flexible(true)
            .from_reader(text);
        let mut rec = csv::ByteRecord::new();
        rdr.read_byte_record(&mut rec)
            .map_err(|e| IngestError::Record {
                file: self.layout.file.clone(),
                line,
                message: e.to_string(),
            })?;
        for cell in rec.iter() {
            let s = self.unquoted.len();
            self.unquoted.extend_from_slice(cell);
            self.cells.push((s, self.unquoted.len()));
        }
        Ok(())
    }

    fn cell(&self, i: usize) -> &[u8] {
        let (a, b) = self.cells[i];
        if self.quoted {
            &self.unquoted[a..b]
        } else {
            &self.buf[a..b]
        }
    }

    /// Fill `values`, `label` and `timestamp` from the cells.
    fn decode(&mut self, line: u64) -> Result<(), IngestError> {
        let lay = &self.layout;
        if self.cells.len() != lay.names.len() {
            return Err(IngestError::FieldCount {
                file: lay.file.clone(),
                line,
                expected: lay.names.len(),
                found: self.cells.len(),
            });
        }
        for (k, (&field, name)) in lay.feature_fields.iter().zip(&lay.features).enumerate() {
            let cell = trim(self.cell(field));
            let v = match parse_f64(cell) {
                Some(x) if x.is_finite() || self.allow_missing => x,
                Some(_) => {
                    return Err(IngestError::NotFinite {
                        file: lay.file.clone(),
                        line,
                        column: name.clone(),
                        value: lossy(cell),
                    })
                }
                None if self.allow_missing && cell.is_empty() => f64::NAN,
                None => {
                    let hint = if lay.delimiter != b',' && cell.contains(&b',') {
                        " (use `.` as the decimal mark)"
                    } else if cell.is_empty() {
                        " (the cell is empty)"
                    } else {
                        ""
                    };
                    return Err(IngestError::NotNumber {
                        file: lay.file.clone(),
                        line,
                        column: name.clone(),
                        value: lossy(cell),
                        hint,
                    });
                }
            };
            self.values[k] = v;
        }
        self.label = match lay.label_field {
            None => None,
            Some(i) => match parse_label(self.cell(i)) {
                Some(b) => Some(b),
                None => {
                    return Err(IngestError::BadLabel {
                        file: lay.file.clone(),
                        line,
                        column: lay.names[i].clone(),
                        value: lossy(trim(self.cell(i))),
                    })
                }
            },
        };
        Ok(())
    }

    /// Stop counting on the progress bar, if there is one, and clear it.
    pub fn finish(&mut self) {
        if let Some(p) = self.src.get_mut().progress.take() {
            p.finish_and_clear();
        }
    }
}

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

impl fmt::Display for Layout {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{}: {} feature(s) [{}]",
            self.file,
            self.features.len(),
            self.features.join(", ")
        )
    }
}

// Cheap passes over the raw bytes (no parsing), for splitting a file.

const CHUNK: usize = 1 << 18;

/// Data lines from `start` to `end` (a last line without a line end counts).
pub fn count_lines(path: &Path, start: u64, end: u64) -> io::Result<u64> {
    let mut f = File::open(path)?;
    f.seek(SeekFrom::Start(start))?;
    let mut f = f.take(end - start);
    let mut buf = vec![0u8; CHUNK];
    let mut lines = 0u64;
    let mut last = b'\n';
    loop {
        let n = f.read(&mut buf)?;
        if n == 0 {
            break;
        }
        lines += memchr::memchr_iter(b'\n', &buf[..n]).count() as u64;
        last = buf[n - 1];
    }
    if last != b'\n' {
        lines += 1;
    }
    Ok(lines)
}

/// The byte offset just after the `n`-th line end from `start` (`start` itself for 0).
pub fn nth_line_start(path: &Path, start: u64, n: u64) -> io::Result<u64> {
    if n == 0 {
        return Ok(start);
    }
    let mut f = File::open(path)?;
    f.seek(SeekFrom::Start(start))?;
    let mut buf = vec![0u8; CHUNK];
    let mut pos = start;
    let mut seen = 0u64;
    loop {
        let got = f.read(&mut buf)?;
        if got == 0 {
            return Ok(pos);
        }
        for i in memchr::memchr_iter(b'\n', &buf[..got]) {
            seen += 1;
            if seen == n {
                return Ok(pos + i as u64 + 1);
            }
        }
        pos += got as u64;
    }
}

/// Cut `start..end` into at most `parts` byte ranges that begin and end on line boundaries, for
/// parallel readers ([`Reader::range`]): `parts + 1` or fewer increasing offsets from `start` to `end`, each (but the ends) just after a `\n`.
pub fn split_ranges(path: &Path, start: u64, end: u64, parts: usize) -> io::Result<Vec<u64>> {
    let mut bounds = vec![start];
    if parts > 1 && end > start {
        let mut f = File::open(path)?;
        let mut buf = vec![0u8; 1 << 16];
        for k in 1..parts {
            let target = start + (end - start) * k as u64 / parts as u64;
            let prev = *bounds.last().expect("not empty");
            if target <= prev {
                continue;
            }
            // The first line start at or after `target`: after the first `\n` at `target − 1` or later.
            let mut pos = target - 1;
            f.seek(SeekFrom::Start(pos))?;
            let cut = loop {
                let got = f.read(&mut buf)?;
                if got == 0 {
                    break end;
                }
                if let Some(i) = memchr::memchr(b'\n', &buf[..got]) {
                    break (pos + i as u64 + 1).min(end);
                }
                pos += got as u64;
            };
            if cut > prev && cut < end {
                bounds.push(cut);
            }
        }
    }
    bounds.push(end);
    Ok(bounds)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Write;

    fn write(dir: &tempfile::TempDir, name: &str, body: &str) -> std::path::PathBuf {
        let p = dir.path().join(name);
        std::fs::File::create(&p)
            .unwrap()
            .write_all(body.as_bytes())
            .unwrap();
        p
    }

    fn err(body: &str, opts: &CsvOptions) -> String {
        let dir = tempfile::tempdir().unwrap();
        let p = write(&dir, "baseline.csv", body);
        match read_table(&p, opts) {
            Ok(t) => panic!("expected an error, read {t:?}"),
            Err(e) => {
                let s = e.to_string();
                assert!(s.contains("baseline.csv"), "no file name in {s}");
                s
            }
        }
    }

    #[test]
    fn reads_comma_file_skipping_timestamp() {
        let dir = tempfile::tempdir().unwrap();
        let p = write(
            &dir,
            "a.csv",
            "Timestamp,flow_lpm,pressure_bar\n2024-05-01T00:00,12.5,2.25\n2024-05-01T00:01,13,-1e-3\n",
        );
        let t = read_table(&p, &CsvOptions::default()).unwrap();
        assert_eq!(t.features, ["flow_lpm", "pressure_bar"]);
        assert_eq!(t.values, [12.5, 2.25, 13.0, -1e-3]);
        assert_eq!(t.lines, [2, 3]);
        assert_eq!(
            t.timestamps.unwrap(),
            ["2024-05-01T00:00", "2024-05-01T00:01"]
        );
        assert!(t.labels.is_none());
    }

    #[test]
    fn detects_semicolon_and_tab_and_handles_crlf() {
        let dir = tempfile::tempdir().unwrap();
        let p = write(&dir, "s.csv", "a;b;c\r\n1;2;3\r\n\r\n4;5;6\r\n");
        let t = read_table(&p, &CsvOptions::default()).unwrap();
        assert_eq!(t.features, ["a", "b", "c"]);
        assert_eq!(t.values, [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        assert_eq!(t.lines, [2, 4]);
        let p = write(&dir, "t.tsv", "time\tx\ty\nt0\t1.5\t2\nt1\t3\t4");
        let t = read_table(&p, &CsvOptions::default()).unwrap();
        assert_eq!(t.features, ["x", "y"]);
        assert_eq!(t.values, [1.5, 2.0, 3.0, 4.0]);
    }

    #[test]
    fn parses_like_std() {
        // The reference is Rust's own `str::parse::<f64>` (correctly rounded, IEEE 754).
        let cases = [
            "0",
            "-0",
            "+1.5",
            "1e5",
            "1E-5",
            ".5",
            "5.",
            "123456789012345678901234567890",
            "2.2250738585072014e-308",
            "4.9e-324",
            "1.7976931348623157e308",
            "0.1",
            "43.12345",
            "-2881.09165",
            "9007199254740993",
            "1e400",
            "nan",
            "NaN",
            "inf",
            "-Infinity",
            "1_0",
            "0x10",
            "",
            "1.2.3",
            "e5",
            "1e",
            "--1",
            "١",
        ];
        for c in cases {
            let ours = parse_f64(c.as_bytes());
            let std = c.parse::<f64>().ok();
            match (ours, std) {
                (Some(a), Some(b)) if a.is_nan() => assert!(b.is_nan(), "{c}"),
                (a, b) => assert_eq!(a.map(f64::to_bits), b.map(f64::to_bits), "{c}"),
            }
        }
    }

    #[test]
    fn quoted_cells_are_unquoted() {
        let dir = tempfile::tempdir().unwrap();
        let p = write(
            &dir,
            "q.csv",
            "\"time\",\"a\",b\n\"2024-05-01, 00:00\",\"1.5\",2\n",
        );
        let t = read_table(&p, &CsvOptions::default()).unwrap();
        assert_eq!(t.features, ["a", "b"]);
        assert_eq!(t.values, [1.5, 2.0]);
        assert_eq!(t.timestamps.unwrap(), ["2024-05-01, 00:00"]);
    }

    #[test]
    fn selects_columns_in_the_order_asked_and_reads_labels() {
        let dir = tempfile::tempdir().unwrap();
        let p = write(
            &dir,
            "l.csv",
            "a,b,c,state\n1,2,3,ok\n4,5,6,FAULT\n7,8,9,0\n1,1,1,True\n",
        );
        let opts = CsvOptions {
            columns: Some(vec!["c".into(), "a".into()]),
            label: Some("state".into()),
            ..Default::default()
        };
        let t = read_table(&p, &opts).unwrap();
        assert_eq!(t.features, ["c", "a"]);
        assert_eq!(t.values, [3.0, 1.0, 6.0, 4.0, 9.0, 7.0, 1.0, 1.0]);
        assert_eq!(t.labels.unwrap(), [false, true, false, true]);
    }

    #[test]
    fn every_bad_input_names_file_line_and_column() {
        let d = CsvOptions::default();
        let e = err("a,flow_lpm\n1,2\n3,abc\n", &d);
        assert!(e.contains("baseline.csv:3:") && e.contains("`flow_lpm`") && e.contains("`abc`"));
        let e = err("a,b\n1,2\n3\n", &d);
        assert!(
            e.contains(":3:") && e.contains("1 fields") && e.contains("has 2"),
            "{e}"
        );
        assert!(err("", &d).contains("empty"));
        assert!(err("  \n", &d).contains("empty"));
        assert!(err("a,b\n", &d).contains("no data rows"));
        assert!(err("a,b\n\n", &d).contains("no data rows"));
        let e = err(
            "a,b\n1,2\n",
            &CsvOptions {
                columns: Some(vec!["zz".into()]),
                ..Default::default()
            },
        );
        assert!(e.contains("`zz`") && e.contains("a, b"), "{e}");
        let e = err("a,b,a\n1,2,3\n", &d);
        assert!(e.contains(":1:") && e.contains("`a`") && e.contains("columns 1 and 3"));
        for bad in ["NaN", "inf", "-infinity"] {
            let e = err(&format!("a,b\n1,2\n4,{bad}\n"), &d);
            assert!(
                e.contains(":3:") && e.contains("`b`") && e.contains(bad),
                "{e}"
            );
        }
        let e = err("a,b\n1,\n", &d);
        assert!(
            e.contains(":2:") && e.contains("`b`") && e.contains("empty"),
            "{e}"
        );
        let e = err(
            "a,lab\n1,maybe\n",
            &CsvOptions {
                label: Some("lab".into()),
                ..Default::default()
            },
        );
        assert!(e.contains(":2:") && e.contains("`lab`") && e.contains("`maybe`"));
        let e = err("a;b\n1,5;2\n", &d);
        assert!(e.contains("decimal mark"), "{e}");
    }

    #[test]
    fn skip_bad_rows_counts_and_keeps_reasons() {
        let dir = tempfile::tempdir().unwrap();
        let mut body = String::from("a,b\n");
        for i in 0..10 {
            body.push_str(&format!("{i},x\n{i},{i}\n"));
        }
        let p = write(&dir, "s.csv", &body);
        let t = read_table(
            &p,
            &CsvOptions {
                skip_bad_rows: true,
                ..Default::default()
            },
        )
        .unwrap();
        assert_eq!(t.rows(), 10);
        assert_eq!(t.skipped, 10);
        assert_eq!(t.skipped_reasons.len(), KEEP_REASONS);
        assert!(
            t.skipped_reasons[0].contains(":2:"),
            "{:?}",
            t.skipped_reasons
        );
        assert_eq!(t.lines[0], 3);
    }

    #[test]
    fn allow_missing_reads_dropouts_as_nan_but_not_junk() {
        let dir = tempfile::tempdir().unwrap();
        let p = write(&dir, "m.csv", "a,b,c\n1,,nan\nNaN,inf,3\n");
        let opts = CsvOptions {
            allow_missing: true,
            ..Default::default()
        };
        let t = read_table(&p, &opts).unwrap();
        assert_eq!(t.values[0], 1.0);
        assert!(t.values[1].is_nan() && t.values[2].is_nan() && t.values[3].is_nan());
        assert_eq!(t.values[4], f64::INFINITY);
        let p = write(&dir, "baseline.csv", "a,b\n1,n/a\n");
        let e = read_table(&p, &opts).unwrap_err().to_string();
        assert!(e.contains(":2:") && e.contains("`n/a`"), "{e}");
    }

    #[test]
    fn ranges_read_disjoint_parts_with_shifted_lines() {
        let dir = tempfile::tempdir().unwrap();
        let p = write(&dir, "r.csv", "a,b\n1,2\n3,4\n5,x\n");
        let lay = Layout::read(&p, &CsvOptions::default()).unwrap();
        assert_eq!(lay.data_start, 4);
        // Second half: "5,x\n" starts at byte 12, which is line 4.
        let mut r = Reader::range(&p, &lay, &CsvOptions::default(), 12, 16, 1).unwrap();
        let mut e = r.next_row().unwrap_err();
        assert_eq!(e.line(), Some(1));
        e.shift_line(3);
        assert!(e.to_string().contains("r.csv:4:"), "{e}");
        let mut r = Reader::range(&p, &lay, &CsvOptions::default(), 4, 12, 2).unwrap();
        let row = r.next_row().unwrap().unwrap();
        assert_eq!((row.line, row.byte), (2, 4));
        assert_eq!(row.values, [1.0, 2.0]);
        let row = r.next_row().unwrap().unwrap();
        assert_eq!((row.line, row.byte), (3, 8));
        assert!(r.next_row().unwrap().is_none());
        assert_eq!(r.lines_read(), 2);
    }
}
