//! Where readings come from.
//!
//! [`ReadingSource`] is all the application asks of the hardware on the input side. A real node
//! implements it over an ADC or a sensor on I²C or SPI; the emulator build uses [`Table`], a block
//! of readings that the emulator's loader puts in memory.
//!
//! # The table format
//!
//! ```text
//! offset  size            field
//! 0       4               magic "ERTB" (readings only) or "ERTM" (each reading with a mode)
//! 4       4               N, features per reading (u32, little-endian)
//! 8       4               count, the number of readings (u32, little-endian)
//! 12      R · count       the readings, row after row: N f32 little-endian (NaN = a dropout),
//!                         then, in an "ERTM" table only, the mode as a u32 little-endian
//! ```
//!
//! A row is `R = 4 · N` bytes, or `4 · N + 4` with modes. The mode is the small integer the
//! machine's controller tells the node with each reading (a speed setpoint, a valve command), for
//! a known-mode bank (`ellipsoid_core::bank::ModeSelect::Known`); [`NO_MODE`] means none was
//! given with that reading, which such a bank scores as a fault, never as normal. A node with a
//! nearest-mode bank, or a single model, ignores the mode.

use core::fmt;

/// Gives the application one reading at a time, in raw sensor units.
pub trait ReadingSource<const N: usize> {
    /// The next reading, or `None` when the source has ended (a table; a live sensor never ends).
    ///
    /// A sensor that could not be read reports NaN for it: the core turns that into a reading
    /// fault and the fault line, never into a normal score.
    fn next_reading(&mut self) -> Option<[f32; N]>;

    /// The next reading and the mode given with it (`None` when the source gives none: a plain
    /// table, a sensor without a controller's mode). The default gives [`Self::next_reading`]
    /// without a mode.
    fn next_with_mode(&mut self) -> Option<([f32; N], Option<u8>)> {
        self.next_reading().map(|x| (x, None))
    }

    /// How many readings the source holds in all, if it is a finite table (reported at the
    /// start). `None`, the default, for a live sensor.
    fn total(&self) -> Option<u32> {
        None
    }
}

/// The four bytes a reading table starts with.
pub const TABLE_MAGIC: [u8; 4] = *b"ERTB";
/// The four bytes a reading table with a mode in every row starts with.
pub const TABLE_MAGIC_MODES: [u8; 4] = *b"ERTM";
/// Bytes before the first reading.
pub const TABLE_HEADER_LEN: usize = 12;
/// The mode word of a row that gives no mode.
pub const NO_MODE: u32 = u32::MAX;

/// The mode a row's mode word gives: `None` for [`NO_MODE`]; a value above 254 (no bank has
/// that many modes) as 255, which a known-mode bank refuses as an unknown mode.
pub const fn mode_of_word(word: u32) -> Option<u8> {
    if word == NO_MODE {
        None
    } else if word > 254 {
        Some(u8::MAX)
    } else {
        Some(word as u8)
    }
}

/// The header of a table of `count` readings of `n` features.
pub fn table_header(n: u32, count: u32) -> [u8; TABLE_HEADER_LEN] {
    header_with(TABLE_MAGIC, n, count)
}

/// The header of a table of `count` readings of `n` features, each followed by its mode.
pub fn table_header_modes(n: u32, count: u32) -> [u8; TABLE_HEADER_LEN] {
    header_with(TABLE_MAGIC_MODES, n, count)
}

fn header_with(magic_bytes: [u8; 4], n: u32, count: u32) -> [u8; TABLE_HEADER_LEN] {
    let mut h = [0u8; TABLE_HEADER_LEN];
    let (magic, rest) = h.split_at_mut(4);
    magic.copy_from_slice(&magic_bytes);
    let (nb, cb) = rest.split_at_mut(4);
    nb.copy_from_slice(&n.to_le_bytes());
    cb.copy_from_slice(&count.to_le_bytes());
    h
}

/// Why bytes were refused as a reading table.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum TableError {
    /// The bytes do not start with [`TABLE_MAGIC`] (nothing was loaded).
    Magic,
    /// The table is for another number of features.
    Dimension {
        /// N in the table.
        found: u32,
        /// N of this firmware.
        expected: u32,
    },
    /// The reading file's length could not be read.
    Unreadable,
    /// The stated count of readings does not fit in the bytes given.
    Length {
        /// Readings the header states.
        count: u32,
        /// Bytes available.
        capacity: usize,
    },
}

impl fmt::Display for TableError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            TableError::Magic => f.write_str("no reading table (bad magic)"),
            TableError::Unreadable => f.write_str("the reading file's length cannot be read"),
            TableError::Dimension { found, expected } => {
                write!(f, "reading table has {found} features, expected {expected}")
            }
            TableError::Length { count, capacity } => {
                write!(
                    f,
                    "reading table states {count} readings, more than {capacity} bytes hold"
                )
            }
        }
    }
}

impl core::error::Error for TableError {}

/// Readings from a table in memory.
#[derive(Clone, Debug)]
pub struct Table<'a, const N: usize> {
    rows: core::slice::ChunksExact<'a, u8>,
    count: u32,
    modes: bool,
}

/// What a table's header states.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct TableShape {
    /// Readings in the table.
    pub count: u32,
    /// Whether every row carries a mode ([`TABLE_MAGIC_MODES`]).
    pub modes: bool,
}

impl TableShape {
    /// Bytes of one row for a node of `n` features.
    pub const fn row_len(&self, n: usize) -> usize {
        4 * n + if self.modes { 4 } else { 0 }
    }
}

/// Check a table's header (the first [`TABLE_HEADER_LEN`] bytes or more of `bytes`) for a node
/// of `N` features whose readings can occupy `body_len` bytes after the header, and return the
/// count of readings it states.
pub fn check_header<const N: usize>(bytes: &[u8], body_len: usize) -> Result<u32, TableError> {
    check_shape::<N>(bytes, body_len).map(|s| s.count)
}

/// [`check_header`], and whether the rows carry modes.
pub fn check_shape<const N: usize>(
    bytes: &[u8],
    body_len: usize,
) -> Result<TableShape, TableError> {
    let word = |at: usize| {
        bytes
            .get(at..at + 4)
            .and_then(|b| <[u8; 4]>::try_from(b).ok())
            .ok_or(TableError::Magic)
    };
    let modes = match word(0)? {
        TABLE_MAGIC => false,
        TABLE_MAGIC_MODES => true,
        _ => return Err(TableError::Magic),
    };
    let n = u32::from_le_bytes(word(4)?);
    let count = u32::from_le_bytes(word(8)?);
    if usize::try_from(n) != Ok(N) {
        return Err(TableError::Dimension {
            found: n,
            expected: N as u32,
        });
    }
    let shape = TableShape { count, modes };
    let fits = (count as usize)
        .checked_mul(shape.row_len(N))
        .is_some_and(|needed| needed <= body_len);
    if !fits {
        return Err(TableError::Length {
            count,
            capacity: body_len,
        });
    }
    Ok(shape)
}

/// A row's readings (the first `4 · N` bytes of `row`; a missing value is NaN) and its mode (the
/// word after them, when `modes`).
fn decode_row<const N: usize>(row: &[u8], modes: bool) -> ([f32; N], Option<u8>) {
    let mut x = [f32::NAN; N];
    for (xi, b) in x.iter_mut().zip(row.chunks_exact(4)) {
        *xi = <[u8; 4]>::try_from(b).map_or(f32::NAN, f32::from_le_bytes);
    }
    let mode = if modes {
        row.get(4 * N..4 * N + 4)
            .and_then(|b| <[u8; 4]>::try_from(b).ok())
            .and_then(|w| mode_of_word(u32::from_le_bytes(w)))
    } else {
        None
    };
    (x, mode)
}

impl<'a, const N: usize> Table<'a, N> {
    /// Check the header of `bytes` (which may be longer than the table).
    pub fn new(bytes: &'a [u8]) -> Result<Self, TableError> {
        let body = bytes.get(TABLE_HEADER_LEN..).unwrap_or(&[]);
        let shape = check_shape::<N>(bytes, body.len())?;
        let row = shape.row_len(N);
        let body = body.get(..shape.count as usize * row).unwrap_or(&[]);
        Ok(Self {
            rows: body.chunks_exact(row),
            count: shape.count,
            modes: shape.modes,
        })
    }

    /// Whether every row carries a mode.
    pub const fn has_modes(&self) -> bool {
        self.modes
    }

    /// Readings in the table.
    pub const fn count(&self) -> u32 {
        self.count
    }
}

impl<const N: usize> ReadingSource<N> for Table<'_, N> {
    fn next_reading(&mut self) -> Option<[f32; N]> {
        self.next_with_mode().map(|(x, _)| x)
    }

    fn next_with_mode(&mut self) -> Option<([f32; N], Option<u8>)> {
        let row = self.rows.next()?;
        Some(decode_row::<N>(row, self.modes))
    }

    fn total(&self) -> Option<u32> {
        Some(self.count)
    }
}

/// A file of bytes read from its start to its end, a block at a time: a host file over
/// semihosting, a file on an SD card. What [`Chunked`] needs of it.
pub trait ByteFile {
    /// The file's length in bytes, or `None` if it cannot be told.
    fn length(&mut self) -> Option<usize>;

    /// Read the next bytes into `buf`, as many as fit and remain: the number read (0 at the end),
    /// or `None` if the read failed.
    fn read(&mut self, buf: &mut [u8]) -> Option<usize>;
}

/// Readings per block that [`Chunked`] reads from its file at once.
pub const CHUNK_READINGS: usize = 8;

/// Readings from a reading table in a [`ByteFile`], in the format of [`Table`], read
/// [`CHUNK_READINGS`] readings at a time into a fixed buffer of `32 · N` bytes: for a table that
/// does not fit in the part's memory (on the emulated micro:bit, the demo's 288 KB table is read
/// over semihosting). No heap.
///
/// The header is checked against the file's length when it is opened, so a short file is refused
/// before anything is scored. If a read fails (or the file ends early) later, every reading it
/// could not deliver is given as NaN, which the core scores as a reading fault, never as normal.
pub struct Chunked<F, const N: usize> {
    file: F,
    buf: [[[u8; 4]; N]; CHUNK_READINGS],
    /// The mode word of each reading in `buf`, in a table with modes.
    mode_buf: [[u8; 4]; CHUNK_READINGS],
    modes: bool,
    /// Readings in `buf`, and the next of them to give.
    filled: usize,
    next: usize,
    /// Readings the header states, and how many of them are still to give.
    count: u32,
    left: u32,
    /// A read failed: the rest of the readings are faults.
    broken: bool,
}

impl<F: ByteFile, const N: usize> Chunked<F, N> {
    /// Read and check the table's header at the start of `file`.
    pub fn open(mut file: F) -> Result<Self, TableError> {
        let mut header = [0u8; TABLE_HEADER_LEN];
        let mut got = 0;
        while got < header.len() {
            match file.read(header.get_mut(got..).unwrap_or(&mut [])) {
                Some(0) | None => break,
                Some(k) => got += k,
            }
        }
        let header = header.get(..got).unwrap_or(&[]);
        let length = file.length().ok_or(TableError::Unreadable)?;
        let shape = check_shape::<N>(header, length.saturating_sub(TABLE_HEADER_LEN))?;
        let count = shape.count;
        Ok(Self {
            file,
            buf: [[[0; 4]; N]; CHUNK_READINGS],
            mode_buf: [[0; 4]; CHUNK_READINGS],
            modes: shape.modes,
            filled: 0,
            next: 0,
            count,
            left: count,
            broken: false,
        })
    }

    /// Readings the table states.
    pub const fn count(&self) -> u32 {
        self.count
    }

    /// Whether every row carries a mode.
    pub const fn has_modes(&self) -> bool {
        self.modes
    }

    /// Read the next block of whole readings into the buffer; `false` if none could be read.
    fn refill(&mut self) -> bool {
        let rows = (self.left as usize).min(CHUNK_READINGS);
        self.next = 0;
        if self.modes {
            // A row's readings and its mode word go to two buffers: a row at a time.
            self.filled = 0;
            for (row, mode) in self.buf.iter_mut().zip(&mut self.mode_buf).take(rows) {
                let row = row.as_flattened_mut();
                if read_full(&mut self.file, row) < row.len()
                    || read_full(&mut self.file, mode) < mode.len()
                {
                    break;
                }
                self.filled += 1;
            }
            return self.filled > 0;
        }
        let want = rows * 4 * N;
        let bytes = self.buf.as_flattened_mut().as_flattened_mut();
        let Some(bytes) = bytes.get_mut(..want) else {
            return false;
        };
        self.filled = read_full(&mut self.file, bytes) / (4 * N);
        self.filled > 0
    }
}

/// Read from `file` until `bytes` is full, the file ends or a read fails: the bytes read.
fn read_full(file: &mut impl ByteFile, bytes: &mut [u8]) -> usize {
    let mut got = 0;
    while got < bytes.len() {
        match file.read(bytes.get_mut(got..).unwrap_or(&mut [])) {
            Some(0) | None => break,
            Some(k) => got += k,
        }
    }
    got
}

impl<F: ByteFile, const N: usize> ReadingSource<N> for Chunked<F, N> {
    fn next_reading(&mut self) -> Option<[f32; N]> {
        self.next_with_mode().map(|(x, _)| x)
    }

    fn next_with_mode(&mut self) -> Option<([f32; N], Option<u8>)> {
        if self.left == 0 {
            return None;
        }
        if self.next == self.filled && (self.broken || !self.refill()) {
            // The file could not give this reading: a fault, never a normal score (and no mode).
            self.broken = true;
            self.left -= 1;
            return Some(([f32::NAN; N], None));
        }
        self.left -= 1;
        let row = self.buf.get(self.next)?;
        let mode = if self.modes {
            self.mode_buf
                .get(self.next)
                .and_then(|w| mode_of_word(u32::from_le_bytes(*w)))
        } else {
            None
        };
        self.next += 1;
        Some((row.map(f32::from_le_bytes), mode))
    }

    fn total(&self) -> Option<u32> {
        Some(self.count)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reads_back_what_was_written_including_nan() {
        let rows = [[1.5f32, -2.0], [f32::NAN, 3.25]];
        let mut bytes = table_header(2, 2).to_vec();
        for r in &rows {
            for v in r {
                bytes.extend_from_slice(&v.to_le_bytes());
            }
        }
        bytes.extend_from_slice(&[0xFF; 7]); // the rest of the memory region
        let mut t = Table::<2>::new(&bytes).unwrap();
        assert_eq!(t.count(), 2);
        assert_eq!(t.next_reading(), Some([1.5, -2.0]));
        let second = t.next_reading().unwrap();
        assert!(second[0].is_nan() && second[1] == 3.25);
        assert_eq!(t.next_reading(), None);
    }

    #[test]
    fn refuses_bad_headers() {
        assert_eq!(Table::<2>::new(&[0; 40]).unwrap_err(), TableError::Magic);
        assert_eq!(Table::<2>::new(b"ERT").unwrap_err(), TableError::Magic);
        let h = table_header(3, 1);
        assert_eq!(
            Table::<2>::new(&h).unwrap_err(),
            TableError::Dimension {
                found: 3,
                expected: 2
            }
        );
        let mut b = table_header(2, 2).to_vec();
        b.extend_from_slice(&[0; 12]);
        assert_eq!(
            Table::<2>::new(&b).unwrap_err(),
            TableError::Length {
                count: 2,
                capacity: 12
            }
        );
        let b = table_header(2, u32::MAX);
        assert!(matches!(
            Table::<2>::new(&b),
            Err(TableError::Length { .. })
        ));
    }

    /// A file in memory that gives at most `step` bytes a read, and fails every read after
    /// `fail_after` bytes.
    struct Mem {
        bytes: Vec<u8>,
        at: usize,
        step: usize,
        fail_after: usize,
    }

    impl ByteFile for Mem {
        fn length(&mut self) -> Option<usize> {
            Some(self.bytes.len())
        }

        fn read(&mut self, buf: &mut [u8]) -> Option<usize> {
            if self.at >= self.fail_after {
                return None;
            }
            let k = buf.len().min(self.step).min(self.bytes.len() - self.at);
            buf[..k].copy_from_slice(&self.bytes[self.at..self.at + k]);
            self.at += k;
            Some(k)
        }
    }

    fn rows_table(n_rows: usize) -> (Vec<u8>, Vec<[f32; 3]>) {
        let rows: Vec<[f32; 3]> = (0..n_rows)
            .map(|i| {
                [
                    i as f32,
                    -(i as f32) * 0.5,
                    if i == 5 { f32::NAN } else { 1.0 },
                ]
            })
            .collect();
        let mut bytes = table_header(3, n_rows as u32).to_vec();
        for r in &rows {
            for v in r {
                bytes.extend_from_slice(&v.to_le_bytes());
            }
        }
        (bytes, rows)
    }

    fn same(a: &[f32; 3], b: &[f32; 3]) -> bool {
        a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits())
    }

    #[test]
    fn chunked_gives_every_reading_across_blocks_and_short_reads() {
        // 21 readings: two full blocks of 8 and a last one of 5; reads of 7 bytes split rows.
        let (bytes, rows) = rows_table(2 * CHUNK_READINGS + 5);
        for step in [7, 1000] {
            let file = Mem {
                bytes: bytes.clone(),
                at: 0,
                step,
                fail_after: usize::MAX,
            };
            let mut c = Chunked::<_, 3>::open(file).unwrap();
            assert_eq!(c.total(), Some(rows.len() as u32));
            for (i, r) in rows.iter().enumerate() {
                let got = c.next_reading().unwrap();
                assert!(same(&got, r), "reading {i}, step {step}: {got:?} != {r:?}");
            }
            assert_eq!(c.next_reading(), None);
        }
    }

    /// A table with a mode word after every row: `modes[i]` for row `i` (`NO_MODE` for none).
    fn mode_table(rows: &[[f32; 3]], modes: &[u32]) -> Vec<u8> {
        let mut bytes = table_header_modes(3, rows.len() as u32).to_vec();
        for (r, m) in rows.iter().zip(modes) {
            for v in r {
                bytes.extend_from_slice(&v.to_le_bytes());
            }
            bytes.extend_from_slice(&m.to_le_bytes());
        }
        bytes
    }

    #[test]
    fn a_table_with_modes_gives_each_reading_its_mode_in_memory_and_in_blocks() {
        let (_, rows) = rows_table(2 * CHUNK_READINGS + 3);
        let modes: Vec<u32> = (0..rows.len() as u32)
            .map(|i| match i % 5 {
                3 => NO_MODE,
                4 => 300,
                k => k,
            })
            .collect();
        let want = |i: usize| match modes[i] {
            NO_MODE => None,
            300 => Some(255),
            k => Some(k as u8),
        };
        let bytes = mode_table(&rows, &modes);
        let mut t = Table::<3>::new(&bytes).unwrap();
        assert!(t.has_modes());
        for (i, r) in rows.iter().enumerate() {
            let (x, m) = t.next_with_mode().unwrap();
            assert!(same(&x, r), "reading {i}");
            assert_eq!(m, want(i), "reading {i}");
        }
        assert_eq!(t.next_with_mode(), None);
        for step in [5, 1000] {
            let file = Mem {
                bytes: bytes.clone(),
                at: 0,
                step,
                fail_after: usize::MAX,
            };
            let mut c = Chunked::<_, 3>::open(file).unwrap();
            assert!(c.has_modes());
            for (i, r) in rows.iter().enumerate() {
                let (x, m) = c.next_with_mode().unwrap();
                assert!(same(&x, r), "reading {i}, step {step}");
                assert_eq!(m, want(i), "reading {i}, step {step}");
            }
            assert_eq!(c.next_with_mode(), None);
        }
        // A plain table gives no mode; a mode table one row short is refused.
        let (plain, _) = rows_table(3);
        let mut t = Table::<3>::new(&plain).unwrap();
        assert!(!t.has_modes());
        assert_eq!(t.next_with_mode().map(|(_, m)| m), Some(None));
        let short = &bytes[..bytes.len() - 4];
        assert!(matches!(
            Table::<3>::new(short),
            Err(TableError::Length { .. })
        ));
        // A read that fails mid-row: that reading and the rest are faults, without a mode.
        let file = Mem {
            bytes: bytes.clone(),
            at: 0,
            step: 1000,
            fail_after: TABLE_HEADER_LEN + 2 * 16 + 6,
        };
        let mut c = Chunked::<_, 3>::open(Mem { step: 4, ..file }).unwrap();
        for (i, r) in rows.iter().enumerate() {
            let (x, m) = c.next_with_mode().unwrap();
            if i < 2 {
                assert!(same(&x, r) && m == want(i), "reading {i}");
            } else {
                assert!(x.iter().all(|v| v.is_nan()) && m.is_none(), "reading {i}");
            }
        }
        assert_eq!(c.next_with_mode(), None);
    }

    #[test]
    fn chunked_refuses_a_short_file_and_turns_a_failed_read_into_faults() {
        let (bytes, rows) = rows_table(20);
        // The header states 20 readings but the file holds 19 and a half.
        let short = Mem {
            bytes: bytes[..bytes.len() - 6].to_vec(),
            at: 0,
            step: 64,
            fail_after: usize::MAX,
        };
        assert_eq!(
            Chunked::<_, 3>::open(short).err(),
            Some(TableError::Length {
                count: 20,
                capacity: 19 * 12 + 6
            })
        );
        let other_n = Mem {
            bytes: bytes.clone(),
            at: 0,
            step: 64,
            fail_after: usize::MAX,
        };
        assert!(matches!(
            Chunked::<_, 2>::open(other_n).err(),
            Some(TableError::Dimension { found: 3, .. })
        ));
        // Reads fail after the header and 10 readings: the first block of 8 is whole, the second
        // gives 2 readings, the remaining 10 are NaN (faults) and the count still ends the source.
        let failing = Mem {
            bytes,
            at: 0,
            step: 1000,
            fail_after: TABLE_HEADER_LEN + 10 * 12,
        };
        let mut c = Chunked::<_, 3>::open(Mem { step: 4, ..failing }).unwrap();
        for (i, r) in rows.iter().enumerate() {
            let got = c.next_reading().unwrap();
            if i < 10 {
                assert!(same(&got, r), "reading {i}");
            } else {
                assert!(got.iter().all(|v| v.is_nan()), "reading {i}: {got:?}");
            }
        }
        assert_eq!(c.next_reading(), None);
    }
}
