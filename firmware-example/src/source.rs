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
//! 0       4               magic "ERTB"
//! 4       4               N, features per reading (u32, little-endian)
//! 8       4               count, the number of readings (u32, little-endian)
//! 12      4 · N · count   the readings, row after row, f32 little-endian (NaN = a dropout)
//! ```

use core::fmt;

/// Gives the application one reading at a time, in raw sensor units.
pub trait ReadingSource<const N: usize> {
    /// The next reading, or `None` when the source has ended (a table; a live sensor never ends).
    ///
    /// A sensor that could not be read reports NaN for it: the core turns that into a reading
    /// fault and the fault line, never into a normal score.
    fn next_reading(&mut self) -> Option<[f32; N]>;

    /// How many readings the source holds in all, if it is a finite table (reported at the
    /// start). `None`, the default, for a live sensor.
    fn total(&self) -> Option<u32> {
        None
    }
}

/// The four bytes a reading table starts with.
pub const TABLE_MAGIC: [u8; 4] = *b"ERTB";
/// Bytes before the first reading.
pub const TABLE_HEADER_LEN: usize = 12;

/// The header of a table of `count` readings of `n` features.
pub fn table_header(n: u32, count: u32) -> [u8; TABLE_HEADER_LEN] {
    let mut h = [0u8; TABLE_HEADER_LEN];
    let (magic, rest) = h.split_at_mut(4);
    magic.copy_from_slice(&TABLE_MAGIC);
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
}

impl<'a, const N: usize> Table<'a, N> {
    /// Check the header of `bytes` (which may be longer than the table).
    pub fn new(bytes: &'a [u8]) -> Result<Self, TableError> {
        let word = |at: usize| {
            bytes
                .get(at..at + 4)
                .and_then(|b| <[u8; 4]>::try_from(b).ok())
                .ok_or(TableError::Magic)
        };
        if word(0)? != TABLE_MAGIC {
            return Err(TableError::Magic);
        }
        let n = u32::from_le_bytes(word(4)?);
        let count = u32::from_le_bytes(word(8)?);
        if usize::try_from(n) != Ok(N) {
            return Err(TableError::Dimension {
                found: n,
                expected: N as u32,
            });
        }
        let body = bytes.get(TABLE_HEADER_LEN..).unwrap_or(&[]);
        let len_err = TableError::Length {
            count,
            capacity: body.len(),
        };
        let needed = (count as usize).checked_mul(4 * N).ok_or(len_err)?;
        let body = body.get(..needed).ok_or(len_err)?;
        Ok(Self {
            rows: body.chunks_exact(4 * N),
            count,
        })
    }

    /// Readings in the table.
    pub const fn count(&self) -> u32 {
        self.count
    }
}

impl<const N: usize> ReadingSource<N> for Table<'_, N> {
    fn next_reading(&mut self) -> Option<[f32; N]> {
        let row = self.rows.next()?;
        let mut x = [0.0f32; N];
        for (xi, b) in x.iter_mut().zip(row.chunks_exact(4)) {
            *xi = <[u8; 4]>::try_from(b).map_or(f32::NAN, f32::from_le_bytes);
        }
        Some(x)
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
}
