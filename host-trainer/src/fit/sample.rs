//! A bottom-k sample of the training rows that does not depend on how the file was split.

use super::{SAMPLE_ROWS, SAMPLE_SEED};

/// A uniform sample of at most [`SAMPLE_ROWS`] rows: the rows whose hashed byte offsets are the
/// smallest (a bottom-k sample). Mergeable, and independent of how the file was split.
///
/// Candidates below the current cut-off are appended; when twice the sample size has gathered,
/// the smallest half is kept and the cut-off lowered. Memory stays below `2 · SAMPLE_ROWS` rows.
pub(super) struct Sample {
    p: usize,
    /// `(key, byte offset)` of each candidate, in the order of `rows`.
    keys: Vec<(u64, u64)>,
    rows: Vec<f64>,
    /// Keys at or above this cannot be among the smallest `SAMPLE_ROWS`.
    top: u64,
}

pub(super) fn mix(mut z: u64) -> u64 {
    // SplitMix64's finaliser: a bijection of u64, so distinct offsets give distinct keys.
    z = z.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

impl Sample {
    pub(super) fn new(p: usize) -> Self {
        Sample {
            p,
            keys: Vec::new(),
            rows: Vec::new(),
            top: u64::MAX,
        }
    }

    #[inline]
    pub(super) fn offer(&mut self, byte: u64, row: &[f64]) {
        let key = mix(byte ^ SAMPLE_SEED);
        if key < self.top {
            self.push(key, byte, row);
        }
    }

    fn push(&mut self, key: u64, byte: u64, row: &[f64]) {
        self.keys.push((key, byte));
        self.rows.extend_from_slice(row);
        if self.keys.len() >= 2 * SAMPLE_ROWS {
            self.compact();
        }
    }

    /// Keep the `SAMPLE_ROWS` smallest keys.
    fn compact(&mut self) {
        if self.keys.len() <= SAMPLE_ROWS {
            return;
        }
        let p = self.p;
        let mut order: Vec<usize> = (0..self.keys.len()).collect();
        order.select_nth_unstable_by_key(SAMPLE_ROWS - 1, |&i| self.keys[i].0);
        order.truncate(SAMPLE_ROWS);
        let keys: Vec<(u64, u64)> = order.iter().map(|&i| self.keys[i]).collect();
        let mut rows = Vec::with_capacity(SAMPLE_ROWS * p);
        for &i in &order {
            rows.extend_from_slice(&self.rows[i * p..(i + 1) * p]);
        }
        self.top = keys.iter().map(|k| k.0).max().unwrap_or(u64::MAX);
        self.keys = keys;
        self.rows = rows;
    }

    pub(super) fn absorb(&mut self, other: Sample) {
        let p = other.p;
        for (i, &(key, byte)) in other.keys.iter().enumerate() {
            if key < self.top {
                self.push(key, byte, &other.rows[i * p..(i + 1) * p]);
            }
        }
    }

    /// The sampled rows, row-major, in file order.
    pub(super) fn into_rows(mut self) -> Vec<f64> {
        self.compact();
        let p = self.p;
        let mut order: Vec<usize> = (0..self.keys.len()).collect();
        order.sort_by_key(|&i| self.keys[i].1);
        order
            .iter()
            .flat_map(|&i| self.rows[i * p..(i + 1) * p].iter().copied())
            .collect()
    }
}
