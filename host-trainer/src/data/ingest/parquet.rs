//! Parquet input, read one row group at a time with the `parquet` crate's column readers.
//!
//! A file is taken as Parquet when its first four bytes and its last four bytes are `PAR1` (the
//! format's magic number at both ends), whatever its name; every other file is read as CSV. The
//! columns are the schema's top-level leaf columns, matched by name with the same rules as a
//! CSV header (see the module documentation above). Nested (repeated) columns cannot be used.
//!
//! A feature column must hold `DOUBLE`, `FLOAT`, `INT32` or `INT64` values (integers become
//! `f64`, exact up to 2⁵³). A label column may hold `BOOLEAN`, integers 0/1 or the label words;
//! a timestamp column any type (kept as text). A null feature cell is an error naming its row and
//! column, unless [`CsvOptions::allow_missing`] reads it as NaN; rows are numbered from 1.
//!
//! Memory: the reader decodes the used columns of ONE row group at a time (about 9 bytes a value
//! and a null flag), so a file of any length is read in the memory of its largest row group.

use std::fs::File;
use std::io::{Read, Seek, SeekFrom};
use std::path::Path;

use parquet::basic::Type as PhysicalType;
use parquet::column::reader::{ColumnReader, ColumnReaderImpl};
use parquet::data_type::DataType;
use parquet::file::reader::{FileReader, SerializedFileReader};

use super::cell::{parse_label, shown};
use super::layout::{resolve_roles, Roles};
use super::{CsvOptions, IngestError, Layout, Row, KEEP_REASONS};

/// Does `path` hold a Parquet file (`PAR1` at its start or its end)? `false` if it cannot be read.
pub fn is_parquet(path: &Path) -> bool {
    let check = || -> std::io::Result<bool> {
        let mut f = File::open(path)?;
        let len = f.metadata()?.len();
        if len < 12 {
            return Ok(false);
        }
        let mut head = [0u8; 4];
        f.read_exact(&mut head)?;
        f.seek(SeekFrom::End(-4))?;
        let mut tail = [0u8; 4];
        f.read_exact(&mut tail)?;
        // A file that starts as Parquet is read as Parquet, so that one cut short (no footer)
        // is refused as such, not misread as a CSV.
        Ok(&head == b"PAR1" || &tail == b"PAR1")
    };
    check().unwrap_or(false)
}

/// One decoded column of the current row group.
enum Column {
    /// Numbers, with a null flag each.
    Numbers(Vec<f64>, Vec<bool>),
    /// Text (timestamps, label words), `None` for null.
    Text(Vec<Option<String>>),
    /// Booleans (labels), `None` for null.
    Bools(Vec<Option<bool>>),
}

/// A streaming reader of the data rows of a Parquet file.
pub(super) struct ParquetRows {
    file: String,
    reader: SerializedFileReader<File>,
    /// Parquet leaf column of each name in the layout.
    leaves: Vec<usize>,
    roles: Roles,
    features: Vec<String>,
    label_name: Option<String>,
    next_group: usize,
    /// Rows before the current group.
    base: u64,
    /// Rows in the current group, and the next one to hand out.
    group_rows: usize,
    at: usize,
    feat: Vec<Column>,
    ts: Option<Column>,
    label: Option<Column>,
    /// The column that says which machine a row is from (`fit --by`), read as text.
    group_field: Option<usize>,
    group: Option<Column>,
    values: Vec<f64>,
    ts_text: String,
    allow_missing: bool,
    skip_bad_rows: bool,
    skipped: u64,
    reasons: Vec<IngestError>,
}

fn physical_name(t: PhysicalType) -> String {
    format!("{t:?}")
}

impl ParquetRows {
    /// Open `path`, read its schema, resolve the column roles. Returns the reader and a layout
    /// (delimiter and byte offsets are meaningless for Parquet: `data_start` is 0).
    pub(super) fn open(
        path: &Path,
        opts: &CsvOptions,
    ) -> Result<(ParquetRows, Layout), IngestError> {
        Self::open_inner(path, opts, None)
    }

    fn open_inner(
        path: &Path,
        opts: &CsvOptions,
        by: Option<&str>,
    ) -> Result<(ParquetRows, Layout), IngestError> {
        let file = path.display().to_string();
        let f = File::open(path).map_err(|source| IngestError::Io {
            file: file.clone(),
            source,
        })?;
        let file_len = f.metadata().map(|m| m.len()).unwrap_or(0);
        let reader = SerializedFileReader::new(f).map_err(|e| IngestError::ParquetUnreadable {
            file: file.clone(),
            message: e.to_string(),
        })?;
        let schema = reader.metadata().file_metadata().schema_descr_ptr();
        // Top-level leaves only: a nested column's name is its dotted path.
        let mut names = Vec::new();
        let mut leaves = Vec::new();
        let mut nested = Vec::new();
        for (i, c) in schema.columns().iter().enumerate() {
            let name = c.path().parts().join(".");
            if c.path().parts().len() > 1 || c.max_rep_level() > 0 {
                nested.push(name.clone());
            }
            names.push(name);
            leaves.push(i);
        }
        let mut roles = resolve_roles(&file, &names, opts).map_err(|e| schema_error(&file, e))?;
        let group_field = match by {
            None => None,
            Some(by) => {
                let Some(g) = names.iter().position(|n| n == by) else {
                    return Err(IngestError::ParquetSchema {
                        file,
                        message: format!(
                            "no machine column named `{by}` (the file has: {})",
                            names.join(", ")
                        ),
                    });
                };
                if let Some(k) = roles.feature_fields.iter().position(|&i| i == g) {
                    if opts.columns.is_some() {
                        return Err(IngestError::ParquetSchema {
                            file,
                            message: format!("column `{by}` cannot be both feature and machine"),
                        });
                    }
                    roles.feature_fields.remove(k);
                }
                if roles.feature_fields.is_empty() {
                    return Err(IngestError::NoFeatures { file });
                }
                Some(g)
            }
        };
        let used = roles
            .feature_fields
            .iter()
            .chain(roles.timestamp_field.iter())
            .chain(roles.label_field.iter());
        for &i in used {
            if nested.contains(&names[i]) {
                return Err(IngestError::ParquetNested {
                    file,
                    column: names[i].clone(),
                });
            }
        }
        for &i in &roles.feature_fields {
            let t = schema.column(leaves[i]).physical_type();
            if !matches!(
                t,
                PhysicalType::DOUBLE
                    | PhysicalType::FLOAT
                    | PhysicalType::INT32
                    | PhysicalType::INT64
            ) {
                return Err(IngestError::ParquetColumnType {
                    file,
                    column: names[i].clone(),
                    found: physical_name(t),
                });
            }
        }
        if reader.metadata().file_metadata().num_rows() == 0 {
            return Err(IngestError::ParquetNoRows { file });
        }
        let features: Vec<String> = roles
            .feature_fields
            .iter()
            .map(|&i| names[i].clone())
            .collect();
        let layout = Layout {
            file: file.clone(),
            delimiter: b',',
            names: names.clone(),
            features: features.clone(),
            feature_fields: roles.feature_fields.clone(),
            timestamp_field: roles.timestamp_field,
            label_field: roles.label_field,
            data_start: 0,
            file_len,
        };
        Ok((
            ParquetRows {
                values: vec![0.0; features.len()],
                label_name: roles.label_field.map(|i| names[i].clone()),
                file,
                reader,
                leaves,
                roles,
                features,
                next_group: 0,
                base: 0,
                group_rows: 0,
                at: 0,
                feat: Vec::new(),
                ts: None,
                label: None,
                group_field,
                group: None,
                ts_text: String::new(),
                allow_missing: opts.allow_missing,
                skip_bad_rows: opts.skip_bad_rows,
                skipped: 0,
                reasons: Vec::new(),
            },
            layout,
        ))
    }

    /// Decode the used columns of the next row group; `false` when there is none.
    fn load_group(&mut self) -> Result<bool, IngestError> {
        let meta = self.reader.metadata();
        let g = self.next_group;
        if g >= meta.num_row_groups() {
            return Ok(false);
        }
        let n = usize::try_from(meta.row_group(g).num_rows()).unwrap_or(0);
        let (feat, ts, label, group) = {
            let file = &self.file;
            let err = |e: parquet::errors::ParquetError| {
                let message = e.to_string();
                if message.contains("Disabled feature") {
                    IngestError::ParquetCodec {
                        file: file.clone(),
                        message,
                    }
                } else {
                    IngestError::ParquetCorrupt {
                        file: file.clone(),
                        group: g + 1,
                        message,
                    }
                }
            };
            let rg = self.reader.get_row_group(g).map_err(err)?;
            let leaves = &self.leaves;
            let read = |i: usize| -> Result<Column, IngestError> {
                let leaf = leaves[i];
                let max_def = rg.metadata().column(leaf).column_descr().max_def_level();
                let col = rg.get_column_reader(leaf).map_err(err)?;
                decode(col, n, max_def).map_err(err)
            };
            let mut feat = Vec::with_capacity(self.roles.feature_fields.len());
            for &i in &self.roles.feature_fields {
                feat.push(read(i)?);
            }
            let ts = self.roles.timestamp_field.map(read).transpose()?;
            let label = self.roles.label_field.map(read).transpose()?;
            let group = self.group_field.map(read).transpose()?;
            (feat, ts, label, group)
        };
        self.group = group;
        self.base += self.group_rows as u64;
        self.next_group += 1;
        self.feat = feat;
        self.ts = ts;
        self.label = label;
        self.group_rows = n;
        self.at = 0;
        Ok(true)
    }

    /// Open `path` with the column `by` read as text beside the features (and never a feature).
    pub(super) fn open_grouped(
        path: &Path,
        opts: &CsvOptions,
        by: &str,
    ) -> Result<(ParquetRows, Layout), IngestError> {
        Self::open_inner(path, opts, Some(by))
    }

    /// The machine column's text in the row [`Self::next_row`] last returned (empty if null).
    pub(super) fn last_group(&self) -> String {
        match &self.group {
            Some(c) if self.at > 0 => cell_text(c, self.at - 1),
            _ => String::new(),
        }
    }

    /// Whether feature `j` of the row [`Self::next_row`] last returned is null.
    pub(super) fn last_null(&self, j: usize) -> bool {
        match self.feat.get(j) {
            Some(Column::Numbers(_, null)) => self.at > 0 && null[self.at - 1],
            _ => false,
        }
    }

    /// Rows dropped under `skip_bad_rows`.
    pub(super) fn skipped(&self) -> u64 {
        self.skipped
    }

    /// Why the first few dropped rows were dropped.
    pub(super) fn reasons(&self) -> &[IngestError] {
        &self.reasons
    }

    /// Move the kept reasons out.
    pub(super) fn take_reasons(&mut self) -> Vec<IngestError> {
        std::mem::take(&mut self.reasons)
    }

    /// Count a bad row under `skip_bad_rows`, or return its error.
    pub(super) fn skip_or_fail(&mut self, err: IngestError) -> Result<(), IngestError> {
        if !self.skip_bad_rows {
            return Err(err);
        }
        self.skipped += 1;
        if self.reasons.len() < KEEP_REASONS {
            self.reasons.push(err);
        }
        Ok(())
    }

    /// The next good row, or `None` at the end of the file.
    pub(super) fn next_row(&mut self) -> Result<Option<Row<'_>>, IngestError> {
        loop {
            while self.at >= self.group_rows {
                if !self.load_group()? {
                    return Ok(None);
                }
            }
            let k = self.at;
            self.at += 1;
            let row = self.base + k as u64 + 1;
            match self.decode_row(k, row) {
                Ok(label) => {
                    let timestamp = match &self.ts {
                        None => None,
                        Some(c) => {
                            write_cell(&mut self.ts_text, c, k);
                            Some(self.ts_text.as_str())
                        }
                    };
                    return Ok(Some(Row {
                        line: row,
                        byte: row,
                        values: &self.values,
                        label,
                        timestamp,
                    }));
                }
                Err(e) => self.skip_or_fail(e)?,
            }
        }
    }

    /// Fill `values` from row `k` of the group (file row `row`); returns the label.
    fn decode_row(&mut self, k: usize, row: u64) -> Result<Option<bool>, IngestError> {
        for (j, col) in self.feat.iter().enumerate() {
            let Column::Numbers(v, null) = col else {
                unreachable!("feature columns are checked to be numeric when the file is opened")
            };
            let x = v[k];
            if null[k] && !self.allow_missing {
                return Err(IngestError::ParquetNull {
                    file: self.file.clone(),
                    row,
                    column: self.features[j].clone(),
                });
            }
            if !x.is_finite() && !self.allow_missing {
                return Err(IngestError::ParquetNotFinite {
                    file: self.file.clone(),
                    row,
                    column: self.features[j].clone(),
                    value: x.to_string(),
                });
            }
            self.values[j] = x;
        }
        let Some(col) = &self.label else {
            return Ok(None);
        };
        let bad = |value: String| IngestError::ParquetBadLabel {
            file: self.file.clone(),
            row,
            column: self.label_name.clone().unwrap_or_default(),
            value,
        };
        match col {
            Column::Bools(b) => b[k].map(Some).ok_or_else(|| bad("null".into())),
            Column::Numbers(v, null) if !null[k] && (v[k] == 0.0 || v[k] == 1.0) => {
                Ok(Some(v[k] == 1.0))
            }
            Column::Numbers(v, null) => Err(bad(if null[k] {
                "null".into()
            } else {
                v[k].to_string()
            })),
            Column::Text(t) => match &t[k] {
                Some(s) => parse_label(s.as_bytes())
                    .map(Some)
                    .ok_or_else(|| bad(shown(s.as_bytes()))),
                None => Err(bad("null".into())),
            },
        }
    }
}

/// A header-level error of the shared role rules, reworded without the CSV's `:1` (there is no
/// header line in a Parquet file).
fn schema_error(file: &str, e: IngestError) -> IngestError {
    let text = e.to_string();
    let message = text
        .strip_prefix(&format!("{file}:1: "))
        .unwrap_or(&text)
        .replace("the header has", "the file has");
    IngestError::ParquetSchema {
        file: file.to_string(),
        message,
    }
}

/// [`cell_text`] into a reused buffer; a whole number (an integer timestamp) is written without
/// going through the `f64` formatter.
fn write_cell(out: &mut String, c: &Column, k: usize) {
    use std::fmt::Write as _;
    out.clear();
    match c {
        Column::Numbers(v, null) if !null[k] && v[k].fract() == 0.0 && v[k].abs() < 9.0e15 => {
            let _ = write!(out, "{}", v[k] as i64);
        }
        c => out.push_str(&cell_text(c, k)),
    }
}

fn cell_text(c: &Column, k: usize) -> String {
    match c {
        Column::Numbers(v, null) => {
            if null[k] {
                String::new()
            } else {
                v[k].to_string()
            }
        }
        Column::Text(t) => t[k].clone().unwrap_or_default(),
        Column::Bools(b) => b[k].map_or(String::new(), |x| x.to_string()),
    }
}

/// Read all `n` records of one column chunk: its values and definition levels.
fn read_all<T: DataType>(
    r: &mut ColumnReaderImpl<T>,
    n: usize,
) -> parquet::errors::Result<(Vec<T::T>, Vec<i16>)> {
    let mut values = Vec::with_capacity(n);
    let mut defs = Vec::with_capacity(n);
    let mut got = 0;
    while got < n {
        let (records, _, _) = r.read_records(n - got, Some(&mut defs), None, &mut values)?;
        if records == 0 {
            return Err(parquet::errors::ParquetError::General(format!(
                "the column chunk ends after {got} of its {n} rows"
            )));
        }
        got += records;
    }
    Ok((values, defs))
}

/// Spread the non-null `values` over `n` rows by the definition levels.
fn spread<T: Clone>(values: Vec<T>, defs: &[i16], n: usize, max_def: i16) -> Vec<Option<T>> {
    if max_def == 0 {
        return values.into_iter().map(Some).collect();
    }
    let mut it = values.into_iter();
    let mut out = Vec::with_capacity(n);
    for &d in defs.iter().take(n) {
        out.push(if d == max_def { it.next() } else { None });
    }
    out
}

/// Numbers from the non-null `values`, NaN and a null flag where the definition level says null.
fn numbers<T: Copy>(
    values: Vec<T>,
    defs: &[i16],
    n: usize,
    max_def: i16,
    f: impl Fn(T) -> f64,
) -> Column {
    if max_def == 0 || values.len() == n {
        // No nulls: every level is the maximum.
        return Column::Numbers(values.into_iter().map(f).collect(), vec![false; n]);
    }
    let mut v = Vec::with_capacity(n);
    let mut null = Vec::with_capacity(n);
    let mut it = values.into_iter();
    for &d in defs.iter().take(n) {
        match (d == max_def).then(|| it.next()).flatten() {
            Some(x) => {
                v.push(f(x));
                null.push(false);
            }
            None => {
                v.push(f64::NAN);
                null.push(true);
            }
        }
    }
    Column::Numbers(v, null)
}

fn decode(col: ColumnReader, n: usize, max_def: i16) -> parquet::errors::Result<Column> {
    Ok(match col {
        ColumnReader::DoubleColumnReader(mut r) => {
            let (v, d) = read_all(&mut r, n)?;
            numbers(v, &d, n, max_def, |x| x)
        }
        ColumnReader::FloatColumnReader(mut r) => {
            let (v, d) = read_all(&mut r, n)?;
            numbers(v, &d, n, max_def, f64::from)
        }
        ColumnReader::Int32ColumnReader(mut r) => {
            let (v, d) = read_all(&mut r, n)?;
            numbers(v, &d, n, max_def, f64::from)
        }
        ColumnReader::Int64ColumnReader(mut r) => {
            let (v, d) = read_all(&mut r, n)?;
            numbers(v, &d, n, max_def, |x| x as f64)
        }
        ColumnReader::BoolColumnReader(mut r) => {
            let (v, d) = read_all(&mut r, n)?;
            Column::Bools(spread(v, &d, n, max_def))
        }
        ColumnReader::ByteArrayColumnReader(mut r) => {
            let (v, d) = read_all(&mut r, n)?;
            let text = v
                .into_iter()
                .map(|b| String::from_utf8_lossy(b.data()).into_owned())
                .collect();
            Column::Text(spread(text, &d, n, max_def))
        }
        ColumnReader::Int96ColumnReader(mut r) => {
            let (v, d) = read_all(&mut r, n)?;
            let text = v.into_iter().map(|x| format!("{:?}", x.data())).collect();
            Column::Text(spread(text, &d, n, max_def))
        }
        ColumnReader::FixedLenByteArrayColumnReader(mut r) => {
            let (v, d) = read_all(&mut r, n)?;
            let text = v
                .into_iter()
                .map(|b| String::from_utf8_lossy(b.data()).into_owned())
                .collect();
            Column::Text(spread(text, &d, n, max_def))
        }
    })
}

/// Copy the feature columns of the Parquet file `path` (chosen by `opts`) into a CSV at `dest`,
/// one row group in memory at a time, so that the CSV fit can read them: a header of the feature
/// names, then each row's values in Rust's shortest round-trip form (parsed back to the same
/// `f64`). No row is dropped, so CSV line `L` is Parquet row `L − 1`: a null cell is written empty
/// and a NaN or infinity as `NaN` / `inf`, for the CSV fit's own checks to refuse or skip. Returns
/// the feature names.
pub fn parquet_to_csv(
    path: &Path,
    opts: &CsvOptions,
    dest: &Path,
) -> Result<Vec<String>, IngestError> {
    use std::io::Write;
    let mut read_opts = opts.clone();
    read_opts.allow_missing = true;
    read_opts.skip_bad_rows = false;
    read_opts.label = None;
    let (mut rows, layout) = ParquetRows::open(path, &read_opts)?;
    let io_err = |source| IngestError::Io {
        file: dest.display().to_string(),
        source,
    };
    let mut out = std::io::BufWriter::with_capacity(1 << 17, File::create(dest).map_err(io_err)?);
    {
        let mut w = csv::Writer::from_writer(&mut out);
        w.write_record(&layout.features)
            .map_err(|e| IngestError::Record {
                file: dest.display().to_string(),
                line: 1,
                message: e.to_string(),
            })?;
        w.flush().map_err(io_err)?;
    }
    let p = layout.features.len();
    let mut line = Vec::with_capacity(32 * p);
    let mut nulls = vec![false; p];
    let mut values = vec![0.0; p];
    while let Some(r) = rows.next_row()? {
        values.copy_from_slice(r.values);
        for (j, n) in nulls.iter_mut().enumerate() {
            *n = rows.last_null(j);
        }
        line.clear();
        for (j, v) in values.iter().enumerate() {
            if j > 0 {
                line.push(b',');
            }
            if !nulls[j] {
                write!(line, "{v:?}").map_err(io_err)?;
            }
        }
        line.push(b'\n');
        out.write_all(&line).map_err(io_err)?;
    }
    out.flush().map_err(io_err)?;
    Ok(layout.features)
}
