//! The streaming row reader over a byte range, with skip-or-fail and a progress bar.

use std::fs::File;
use std::io::{self, IsTerminal, Read, Seek, SeekFrom};
use std::path::Path;

use indicatif::{ProgressBar, ProgressStyle};

use super::cell::{parse_f64, parse_label, shown, trim};
use super::parquet::{is_parquet, ParquetRows};
use super::{CsvOptions, IngestError, Layout, KEEP_REASONS, PROGRESS_MIN_BYTES};

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
pub(super) struct Source {
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

/// One data row, borrowed from the [`Reader`] until the next call. For a Parquet file `line` and
/// `byte` are both the 1-based row number.
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
    pub(super) layout: Layout,
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
    /// Set when the file is Parquet: then every row comes from here.
    parquet: Option<Box<ParquetRows>>,
}

impl Reader {
    /// Open `path`, read its header, and get ready to stream its data rows.
    /// A Parquet file (`PAR1` at both ends) is read by row group instead.
    pub fn open(path: &Path, opts: &CsvOptions) -> Result<Reader, IngestError> {
        if is_parquet(path) {
            let (rows, layout) = ParquetRows::open(path, opts)?;
            let mut r = Reader::range(path, &layout, opts, 0, 0, 1)?;
            r.parquet = Some(Box::new(rows));
            return Ok(r);
        }
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
            parquet: None,
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
        if let Some(p) = &self.parquet {
            return p.skipped();
        }
        self.skipped
    }

    /// Why the first few ([`KEEP_REASONS`]) dropped rows were dropped.
    pub fn skipped_reasons(&self) -> &[IngestError] {
        if let Some(p) = &self.parquet {
            return p.reasons();
        }
        &self.reasons
    }

    /// Move the kept reasons out (leaving none).
    pub fn take_skipped_reasons(&mut self) -> Vec<IngestError> {
        if let Some(p) = &mut self.parquet {
            return p.take_reasons();
        }
        std::mem::take(&mut self.reasons)
    }

    /// Lines (blank ones included) this reader has moved past.
    pub fn lines_read(&self) -> u64 {
        self.lines
    }

    /// A row the caller found bad (for instance a value its own rules refuse): with
    /// `skip_bad_rows` it is counted and `Ok` is returned, otherwise the error is.
    pub fn skip_or_fail(&mut self, err: IngestError) -> Result<(), IngestError> {
        if let Some(p) = &mut self.parquet {
            return p.skip_or_fail(err);
        }
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
        if self.parquet.is_some() {
            return self.parquet.as_mut().map_or(Ok(None), |p| p.next_row());
        }
        self.next_csv_row()
    }

    fn next_csv_row(&mut self) -> Result<Option<Row<'_>>, IngestError> {
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
                        value: shown(cell),
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
                        value: shown(cell),
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
                        value: shown(trim(self.cell(i))),
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
