//! One pass over a long log of many machines, each row appended to its machine's own part.
//!
//! `fit --by COLUMN` needs each machine's rows as the single fit reads them. This pass reads the
//! log once (CSV or Parquet) and appends every row, without the machine column, to a CSV part of
//! its machine in a private folder; each machine is then fitted from its part by the one fit path.
//!
//! * A CSV log's part keeps each row's cells byte for byte (only the machine cell is taken out,
//!   a cell is quoted again only if it holds the delimiter, a quote or a line break) under the
//!   header's other names, with `\n` line ends: the part is the file a user would cut out of the
//!   log for that machine, so its fit is the plain fit of those rows.
//! * A Parquet log's part holds the feature columns in Rust's shortest round-trip form, as
//!   [`super::parquet_to_csv`] writes them (a null empty, so the fit refuses or skips it).
//!
//! Memory: a write buffer of [`FLUSH_BYTES`] per machine (the parts are appended to on disk when
//! it fills) and one row group for Parquet, whatever the length of the log. Beside each part an
//! index file keeps the log line (CSV) or row (Parquet) of each of its rows, 8 bytes a row on
//! disk, so that a message about a part's line can name the log's own ([`Part::log_line`]).

use std::collections::HashMap;
use std::fs::{File, OpenOptions};
use std::io::{Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use super::cell::{shown, trim};
use super::parquet::{is_parquet, ParquetRows};
use super::{CsvOptions, IngestError, Layout, KEEP_REASONS};

/// A machine's buffer is appended to its part on disk when it holds this many bytes.
pub const FLUSH_BYTES: usize = 32 * 1024;

/// One machine's rows, in a CSV part on disk.
#[derive(Clone, Debug)]
pub struct Part {
    /// The machine's id, as its cell says (trimmed).
    pub id: String,
    /// The part: a header and the machine's rows.
    pub path: PathBuf,
    /// Rows in the part.
    pub rows: u64,
    /// The index of log lines (or rows), 8 bytes each.
    index: PathBuf,
    buf: Vec<u8>,
    lines: Vec<u8>,
}

impl Part {
    /// The log line (CSV) or row (Parquet) of the part's line `line` (the part's header is line 1).
    pub fn log_line(&self, line: u64) -> Option<u64> {
        let k = line.checked_sub(2)?;
        let mut f = File::open(&self.index).ok()?;
        f.seek(SeekFrom::Start(k * 8)).ok()?;
        let mut b = [0u8; 8];
        f.read_exact(&mut b).ok()?;
        Some(u64::from_le_bytes(b))
    }

    fn flush(&mut self) -> std::io::Result<()> {
        for (path, buf) in [(&self.path, &mut self.buf), (&self.index, &mut self.lines)] {
            if !buf.is_empty() {
                let mut f = OpenOptions::new().create(true).append(true).open(path)?;
                f.write_all(buf)?;
                buf.clear();
            }
        }
        Ok(())
    }
}

/// What the pass found.
#[derive(Debug)]
pub struct SplitLog {
    /// The log's name as given, for messages.
    pub file: String,
    /// The machines, in the order of their first row in the log.
    pub parts: Vec<Part>,
    /// Whether the log is Parquet (then part lines stand for log rows).
    pub parquet: bool,
    /// For a Parquet log, the feature columns the parts hold.
    pub features: Option<Vec<String>>,
    /// The parts' delimiter.
    pub delimiter: u8,
    /// Rows with no machine id skipped under `skip_bad_rows`.
    pub skipped: u64,
    /// Why the first few were skipped.
    pub reasons: Vec<String>,
}

/// Read the log `path` once and write each machine's rows (column `by`) into a part in `dir`.
/// The parts are named `0.csv`, `1.csv`, … in the order the machines first appear.
pub fn split_by(
    path: &Path,
    by: &str,
    opts: &CsvOptions,
    dir: &Path,
) -> Result<SplitLog, IngestError> {
    if is_parquet(path) {
        split_parquet(path, by, opts, dir)
    } else {
        split_csv(path, by, opts, dir)
    }
}

struct Parts {
    dir: PathBuf,
    file: String,
    by_id: HashMap<Vec<u8>, usize>,
    parts: Vec<Part>,
    header: Vec<u8>,
}

impl Parts {
    fn io(&self, source: std::io::Error) -> IngestError {
        IngestError::Io {
            file: self.dir.display().to_string(),
            source,
        }
    }

    /// The part of machine `id`, made on its first row.
    fn part(&mut self, id: &[u8]) -> usize {
        if let Some(&k) = self.by_id.get(id) {
            return k;
        }
        let k = self.parts.len();
        self.parts.push(Part {
            id: String::from_utf8_lossy(id).into_owned(),
            path: self.dir.join(format!("{k}.csv")),
            index: self.dir.join(format!("{k}.lines")),
            rows: 0,
            buf: self.header.clone(),
            lines: Vec::new(),
        });
        self.by_id.insert(id.to_vec(), k);
        k
    }

    /// Account for a row just written to part `k` from log line `line`.
    fn done_row(&mut self, k: usize, line: u64) -> Result<(), IngestError> {
        let part = &mut self.parts[k];
        part.rows += 1;
        part.lines.extend_from_slice(&line.to_le_bytes());
        if part.buf.len() >= FLUSH_BYTES {
            part.flush().map_err(|e| self.io(e))?;
        }
        Ok(())
    }

    fn finish(mut self) -> Result<Vec<Part>, IngestError> {
        for k in 0..self.parts.len() {
            self.parts[k].flush().map_err(|e| self.io(e))?;
        }
        Ok(self.parts)
    }

    fn empty_id(&self, line: u64, by: &str, parquet: bool) -> IngestError {
        IngestError::NoMachine {
            file: self.file.clone(),
            at: if parquet {
                format!(": row {line}")
            } else {
                format!(":{line}")
            },
            column: by.to_string(),
        }
    }
}

fn push_cell(out: &mut Vec<u8>, cell: &[u8], delimiter: u8) {
    if cell
        .iter()
        .any(|&b| b == delimiter || b == b'"' || b == b'\n' || b == b'\r')
    {
        out.push(b'"');
        for &b in cell {
            if b == b'"' {
                out.push(b'"');
            }
            out.push(b);
        }
        out.push(b'"');
    } else {
        out.extend_from_slice(cell);
    }
}

fn split_csv(
    path: &Path,
    by: &str,
    opts: &CsvOptions,
    dir: &Path,
) -> Result<SplitLog, IngestError> {
    // The header, its delimiter and the machine column (the column roles are each part's fit's).
    let probe = CsvOptions {
        delimiter: opts.delimiter,
        columns: Some(vec![by.to_string()]),
        timestamp: None,
        label: None,
        ..CsvOptions::default()
    };
    let layout = Layout::read(path, &probe).map_err(|e| match e {
        IngestError::MissingColumn {
            file, available, ..
        } => IngestError::MissingColumn {
            file,
            role: "machine",
            name: by.to_string(),
            available,
        },
        e => e,
    })?;
    let g = layout.feature_fields[0];
    let d = layout.delimiter;
    let file = layout.file.clone();
    let mut header = Vec::new();
    for (k, name) in layout
        .names
        .iter()
        .enumerate()
        .filter(|(i, _)| *i != g)
        .enumerate()
    {
        if k > 0 {
            header.push(d);
        }
        push_cell(&mut header, name.1.as_bytes(), d);
    }
    header.push(b'\n');
    let mut parts = Parts {
        dir: dir.to_path_buf(),
        file: file.clone(),
        by_id: HashMap::new(),
        parts: Vec::new(),
        header,
    };
    let f = File::open(path).map_err(|source| IngestError::Io {
        file: file.clone(),
        source,
    })?;
    let mut rdr = csv::ReaderBuilder::new()
        .delimiter(d)
        .has_headers(true)
        .flexible(true)
        .buffer_capacity(1 << 17)
        .from_reader(f);
    let mut rec = csv::ByteRecord::new();
    let (mut skipped, mut reasons) = (0u64, Vec::new());
    loop {
        let more = rdr
            .read_byte_record(&mut rec)
            .map_err(|e| IngestError::Record {
                file: file.clone(),
                line: e.position().map_or(0, |p| p.line()),
                message: e.to_string(),
            })?;
        if !more {
            break;
        }
        let line = rec.position().map_or(0, |p| p.line());
        let id = rec.get(g).map(trim).unwrap_or_default();
        if id.is_empty() {
            let e = parts.empty_id(line, by, false);
            if !opts.skip_bad_rows {
                return Err(e);
            }
            skipped += 1;
            if reasons.len() < KEEP_REASONS {
                reasons.push(e.to_string());
            }
            continue;
        }
        if id.len() > 200 {
            return Err(IngestError::Record {
                file,
                line,
                message: format!("column `{by}`: the machine id `{}` is too long", shown(id)),
            });
        }
        let k = parts.part(id);
        let buf = &mut parts.parts[k].buf;
        let mut first = true;
        for (i, cell) in rec.iter().enumerate() {
            if i == g {
                continue;
            }
            if !first {
                buf.push(d);
            }
            first = false;
            push_cell(buf, cell, d);
        }
        buf.push(b'\n');
        parts.done_row(k, line)?;
    }
    Ok(SplitLog {
        file,
        parts: parts.finish()?,
        parquet: false,
        features: None,
        delimiter: d,
        skipped,
        reasons,
    })
}

fn split_parquet(
    path: &Path,
    by: &str,
    opts: &CsvOptions,
    dir: &Path,
) -> Result<SplitLog, IngestError> {
    let mut read_opts = opts.clone();
    read_opts.allow_missing = true;
    read_opts.skip_bad_rows = false;
    read_opts.label = None;
    let (mut rows, layout) = ParquetRows::open_grouped(path, &read_opts, by)?;
    let mut header = Vec::new();
    for (j, name) in layout.features.iter().enumerate() {
        if j > 0 {
            header.push(b',');
        }
        push_cell(&mut header, name.as_bytes(), b',');
    }
    header.push(b'\n');
    let mut parts = Parts {
        dir: dir.to_path_buf(),
        file: layout.file.clone(),
        by_id: HashMap::new(),
        parts: Vec::new(),
        header,
    };
    let p = layout.features.len();
    let mut values = vec![0.0; p];
    let (mut skipped, mut reasons) = (0u64, Vec::new());
    while let Some(r) = rows.next_row()? {
        values.copy_from_slice(r.values);
        let row = r.line;
        let id = rows.last_group();
        let id = id.trim();
        if id.is_empty() {
            let e = parts.empty_id(row, by, true);
            if !opts.skip_bad_rows {
                return Err(e);
            }
            skipped += 1;
            if reasons.len() < KEEP_REASONS {
                reasons.push(e.to_string());
            }
            continue;
        }
        let k = parts.part(id.as_bytes());
        let buf = &mut parts.parts[k].buf;
        for (j, v) in values.iter().enumerate() {
            if j > 0 {
                buf.push(b',');
            }
            if !rows.last_null(j) {
                let _ = write!(buf, "{v:?}");
            }
        }
        buf.push(b'\n');
        parts.done_row(k, row)?;
    }
    Ok(SplitLog {
        file: layout.file.clone(),
        parts: parts.finish()?,
        parquet: true,
        features: Some(layout.features),
        delimiter: b',',
        skipped,
        reasons,
    })
}
