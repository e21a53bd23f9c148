//! The header: delimiter, feature, timestamp and label columns.

use std::fmt;
use std::fs::File;
use std::io::Read;
use std::path::Path;

use super::cell::{lossy, trim};
use super::{CsvOptions, IngestError, TIMESTAMP_NAMES};

/// What the header of a file says: the delimiter, how many fields a row has, and which field
/// plays which role. Shared by every [`Reader`](super::Reader) of the file.
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
            let lf = memchr::memchr(b'\n', &head[before..]).map(|i| before + i);
            // A carriage return followed by anything but a line feed before the first line
            // feed: the file's lines end in a lone CR (old Mac style), which is not read.
            let scan = &head[before.saturating_sub(1)..lf.unwrap_or(head.len())];
            if memchr::memchr_iter(b'\r', scan).any(|i| i + 1 < scan.len() && scan[i + 1] != b'\r')
            {
                return Err(IngestError::CarriageReturns { file });
            }
            if lf.is_some() {
                break lf;
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
        let Roles {
            feature_fields,
            timestamp_field,
            label_field,
        } = resolve_roles(&file, &names, opts)?;
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

/// Which column (0-based, in `names`) plays which role.
pub(super) struct Roles {
    /// For each feature, its column.
    pub(super) feature_fields: Vec<usize>,
    /// The timestamp's column, if any.
    pub(super) timestamp_field: Option<usize>,
    /// The label's column, if any.
    pub(super) label_field: Option<usize>,
}

/// Resolve the column roles of `opts` against the column `names` of `file` (the CSV header or a
/// Parquet schema): the same rules for both.
pub(super) fn resolve_roles(
    file: &str,
    names: &[String],
    opts: &CsvOptions,
) -> Result<Roles, IngestError> {
    let available = || names.join(", ");
    let find = |role: &'static str, name: &str| {
        names
            .iter()
            .position(|n| n == name)
            .ok_or_else(|| IngestError::MissingColumn {
                file: file.to_string(),
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
        file: file.to_string(),
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
                        file: file.to_string(),
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
                return Err(IngestError::UnnamedColumn {
                    file: file.to_string(),
                    index: i + 1,
                });
            }
            f
        }
    };
    if feature_fields.is_empty() {
        return Err(IngestError::NoFeatures {
            file: file.to_string(),
        });
    }
    Ok(Roles {
        feature_fields,
        timestamp_field,
        label_field,
    })
}

pub(super) fn detect_delimiter(line: &[u8]) -> u8 {
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
