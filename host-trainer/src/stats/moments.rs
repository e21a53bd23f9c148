//! Mergeable one-pass mean and covariance, in `f64`.
//!
//! Every row is first shifted by the first row pushed (`y = x − k`). Sensor readings sit close
//! to each other, so the shift is exact, and the update then works on small numbers: the
//! result keeps nearly full `f64` precision even for readings around 1e9 with a spread of 1.
//!
//! [`Moments::push`] is Welford's update: with `δ = x − x̄_old`, the mean moves by `δ / n` and the
//! co-moment matrix `C = Σ (x − x̄)(x − x̄)ᵀ` grows by `δ (x − x̄_new)ᵀ`. It never forms the large
//! sums `Σ x²` that make the textbook one-pass formula lose every digit on data with a large offset.
//!
//! [`Moments::merge`] is the pairwise combination of Chan, Golub and LeVeque: with `δ = x̄_b − x̄_a`,
//! `n = n_a + n_b`, `x̄ = x̄_a + δ n_b / n` and `C = C_a + C_b + δ δᵀ n_a n_b / n`. Partial moments
//! of chunks, read in parallel, merge to the moments of the whole to rounding error.

use nalgebra::{DMatrixView, DMatrixViewMut};

/// Count, mean and co-moment of a stream of `p`-dimensional rows.
#[derive(Clone, Debug, PartialEq)]
pub struct Moments {
    /// Rows pushed.
    pub n: u64,
    /// The running mean of `x − shift`.
    mean: Vec<f64>,
    /// The first row pushed, subtracted from every row.
    shift: Vec<f64>,
    /// `Σ (x − x̄)(x − x̄)ᵀ`, row-major `p × p`. Only the lower triangle (`j ≤ i`) is maintained;
    /// the upper part stays zero. Use [`Moments::comoment`] or [`Moments::covariance`].
    comoment: Vec<f64>,
    /// Scratch for `y − ȳ_old`.
    delta: Vec<f64>,
    /// Scratch for `y − ȳ_new` (and a block's mean).
    resid: Vec<f64>,
    /// Scratch for a block of centred rows, row-major.
    block: Vec<f64>,
    /// Scratch for a block's co-moment.
    gram: Vec<f64>,
}

impl Moments {
    /// No rows yet, `p` features.
    pub fn new(p: usize) -> Self {
        Moments {
            n: 0,
            mean: vec![0.0; p],
            shift: vec![0.0; p],
            comoment: vec![0.0; p * p],
            delta: vec![0.0; p],
            resid: vec![0.0; p],
            block: Vec::new(),
            gram: Vec::new(),
        }
    }

    /// The number of features.
    pub fn dim(&self) -> usize {
        self.mean.len()
    }

    /// The mean of the rows pushed.
    pub fn mean(&self) -> Vec<f64> {
        self.shift
            .iter()
            .zip(&self.mean)
            .map(|(k, m)| k + m)
            .collect()
    }

    /// Element `(i, j)` of the co-moment matrix (either triangle).
    pub fn comoment(&self, i: usize, j: usize) -> f64 {
        let p = self.dim();
        if j <= i {
            self.comoment[i * p + j]
        } else {
            self.comoment[j * p + i]
        }
    }

    /// Add one row (Welford).
    ///
    /// # Panics
    /// If `x.len()` is not [`Moments::dim`].
    #[inline]
    pub fn push(&mut self, x: &[f64]) {
        let p = self.dim();
        assert_eq!(x.len(), p, "row has {} values, expected {p}", x.len());
        if self.n == 0 {
            self.shift.copy_from_slice(x);
        }
        self.n += 1;
        let inv_n = 1.0 / self.n as f64;
        // δ = y − ȳ_old into `delta`, then ȳ_new, then e = y − ȳ_new into `resid`.
        for ((((d, e), m), xi), k) in self
            .delta
            .iter_mut()
            .zip(self.resid.iter_mut())
            .zip(self.mean.iter_mut())
            .zip(x)
            .zip(&self.shift)
        {
            let y = xi - k;
            *d = y - *m;
            *m += *d * inv_n;
            *e = y - *m;
        }
        // C += δ eᵀ, lower triangle only.
        for (i, (row, di)) in self
            .comoment
            .chunks_exact_mut(p)
            .zip(&self.delta)
            .enumerate()
        {
            for (c, ej) in row[..=i].iter_mut().zip(&self.resid) {
                *c += di * ej;
            }
        }
    }

    /// Add a block of rows at once (`rows.len() / p` rows, row-major): the block's own mean and
    /// co-moment by two passes, then the pairwise merge. The same result as [`Moments::push`]
    /// on each row, to rounding error, and faster, because the co-moment is a set of contiguous
    /// dot products instead of one dependent update a row.
    ///
    /// # Panics
    /// If `rows.len()` is not a multiple of [`Moments::dim`].
    pub fn push_block(&mut self, rows: &[f64]) {
        let p = self.dim();
        assert_eq!(rows.len() % p, 0, "block is not a whole number of rows");
        let m = rows.len() / p;
        if m == 0 {
            return;
        }
        if self.n == 0 {
            self.shift.copy_from_slice(&rows[..p]);
        }
        // Shifted copy of the rows (row-major, like the input), and the block mean.
        self.block.clear();
        self.block.extend_from_slice(rows);
        let bmean = &mut self.resid;
        bmean.iter_mut().for_each(|v| *v = 0.0);
        for row in self.block.chunks_exact_mut(p) {
            for ((y, k), bm) in row.iter_mut().zip(&self.shift).zip(bmean.iter_mut()) {
                *y -= k;
                *bm += *y;
            }
        }
        let inv_m = 1.0 / m as f64;
        bmean.iter_mut().for_each(|v| *v *= inv_m);
        for row in self.block.chunks_exact_mut(p) {
            for (y, bm) in row.iter_mut().zip(bmean.iter()) {
                *y -= bm;
            }
        }
        // Chan merge of (m, bmean, block co-moment) into self, in the same shift frame.
        let (na, nb) = (self.n as f64, m as f64);
        let n = na + nb;
        let w = na * nb / n;
        for ((d, a), b) in self.delta.iter_mut().zip(&self.mean).zip(bmean.iter()) {
            *d = b - a;
        }
        // The block's co-moment ZᵀZ as one matrix product: nalgebra hands it to matrixmultiply,
        // which picks the CPU's vector instructions at run time. The row-major block is Zᵀ
        // read column-major, and Z read with a row stride of `p`. Products too small for
        // matrixmultiply are summed row by row.
        self.gram.clear();
        self.gram.resize(p * p, 0.0);
        if p > GEMM_MIN && m > GEMM_MIN {
            let zt = DMatrixView::from_slice(&self.block, p, m);
            let z = DMatrixView::from_slice_with_strides(&self.block, m, p, p, 1);
            let mut g = DMatrixViewMut::from_slice(&mut self.gram, p, p);
            g.gemm(1.0, &zt, &z, 0.0);
        } else {
            for row in self.block.chunks_exact(p) {
                for (i, yi) in row.iter().enumerate() {
                    for (g, yj) in self.gram[i * p..i * p + i + 1].iter_mut().zip(row) {
                        *g += yi * yj;
                    }
                }
            }
        }
        for i in 0..p {
            for j in 0..=i {
                // `gram` is symmetric (or, summed by rows, filled in its lower triangle).
                self.comoment[i * p + j] +=
                    self.gram[i * p + j] + self.delta[i] * self.delta[j] * w;
            }
        }
        for (mu, d) in self.mean.iter_mut().zip(&self.delta) {
            *mu += d * (nb / n);
        }
        self.n += m as u64;
    }

    /// Fold in the moments of another set of rows (Chan et al.).
    ///
    /// # Panics
    /// If the dimensions differ.
    pub fn merge(&mut self, other: &Moments) {
        let p = self.dim();
        assert_eq!(
            other.dim(),
            p,
            "cannot merge moments of different dimension"
        );
        if other.n == 0 {
            return;
        }
        if self.n == 0 {
            self.n = other.n;
            self.mean.copy_from_slice(&other.mean);
            self.shift.copy_from_slice(&other.shift);
            self.comoment.copy_from_slice(&other.comoment);
            return;
        }
        let (na, nb) = (self.n as f64, other.n as f64);
        let n = na + nb;
        // Both means in this shift's frame.
        for ((((d, a), b), ka), kb) in self
            .delta
            .iter_mut()
            .zip(&self.mean)
            .zip(&other.mean)
            .zip(&self.shift)
            .zip(&other.shift)
        {
            *d = ((kb - ka) + b) - a;
        }
        let w = na * nb / n;
        for i in 0..p {
            for j in 0..=i {
                self.comoment[i * p + j] +=
                    other.comoment[i * p + j] + self.delta[i] * self.delta[j] * w;
            }
        }
        for (m, d) in self.mean.iter_mut().zip(&self.delta) {
            *m += d * (nb / n);
        }
        self.n += other.n;
    }

    /// The sample covariance (denominator `n − 1`), full `p × p`, row-major and exactly
    /// symmetric. NaN entries when fewer than two rows were pushed.
    pub fn covariance(&self) -> Vec<f64> {
        let p = self.dim();
        let denom = self.n as f64 - 1.0;
        let mut cov = vec![f64::NAN; p * p];
        if self.n < 2 {
            return cov;
        }
        for i in 0..p {
            for j in 0..=i {
                let v = self.comoment[i * p + j] / denom;
                cov[i * p + j] = v;
                cov[j * p + i] = v;
            }
        }
        cov
    }

    /// The sample standard deviations (denominator `n − 1`).
    pub fn std_dev(&self) -> Vec<f64> {
        let p = self.dim();
        let denom = self.n as f64 - 1.0;
        (0..p)
            .map(|i| (self.comoment[i * p + i] / denom).sqrt())
            .collect()
    }

    /// The correlation matrix, full `p × p`, with an exact unit diagonal. Rows and columns of a
    /// feature with zero variance are NaN.
    pub fn correlation(&self) -> Vec<f64> {
        correlation_of(&self.covariance(), self.dim())
    }
}

/// The state of [`Moments`] as plain numbers, for a byte form that travels between processes
/// (`fit::memory`'s partial moments).
impl Moments {
    /// `(n, shift, mean of x − shift, co-moment)`; the co-moment is row-major `p × p` with only
    /// its lower triangle (`j ≤ i`) used.
    pub fn parts(&self) -> (u64, &[f64], &[f64], &[f64]) {
        (self.n, &self.shift, &self.mean, &self.comoment)
    }

    /// Moments from [`Moments::parts`]; the upper triangle of `comoment` is cleared.
    ///
    /// # Panics
    /// If the lengths are not `p`, `p` and `p × p`.
    pub fn from_parts(n: u64, shift: Vec<f64>, mean: Vec<f64>, mut comoment: Vec<f64>) -> Self {
        let p = mean.len();
        assert!(
            shift.len() == p && comoment.len() == p * p,
            "moment parts of unequal sizes"
        );
        for i in 0..p {
            for j in i + 1..p {
                comoment[i * p + j] = 0.0;
            }
        }
        let mut m = Moments::new(p);
        m.n = n;
        m.shift = shift;
        m.mean = mean;
        m.comoment = comoment;
        m
    }
}

/// Below this many features or rows a block's co-moment is not worth a matrix-product call.
const GEMM_MIN: usize = 5;

/// The correlation matrix of a `p × p` covariance `cov`: `cov_ij / (sd_i sd_j)`, unit diagonal.
pub fn correlation_of(cov: &[f64], p: usize) -> Vec<f64> {
    let sd: Vec<f64> = (0..p).map(|i| cov[i * p + i].sqrt()).collect();
    let mut r = vec![0.0; p * p];
    for i in 0..p {
        for j in 0..p {
            r[i * p + j] = if i == j && sd[i] > 0.0 {
                1.0
            } else {
                cov[i * p + j] / (sd[i] * sd[j])
            };
        }
    }
    r
}

#[cfg(test)]
mod tests {
    use super::*;

    fn one_pass(rows: &[Vec<f64>]) -> Moments {
        let mut m = Moments::new(rows[0].len());
        for r in rows {
            m.push(r);
        }
        m
    }

    fn close(a: f64, b: f64, tol: f64) -> bool {
        (a - b).abs() <= tol * b.abs().max(1e-300) || (a - b).abs() <= tol * 1e-3
    }

    /// NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.1 (shared/reference-values.md).
    fn nist() -> Vec<Vec<f64>> {
        vec![
            vec![4.0, 2.0, 0.60],
            vec![4.2, 2.1, 0.59],
            vec![3.9, 2.0, 0.58],
            vec![4.3, 2.1, 0.62],
            vec![4.1, 2.2, 0.63],
        ]
    }

    #[test]
    fn nist_handbook_mean_and_covariance() {
        let m = one_pass(&nist());
        // NIST/SEMATECH e-Handbook 6.5.4.1: mean [4.10, 2.08, 0.604].
        for (got, want) in m.mean().iter().zip([4.10, 2.08, 0.604]) {
            assert!((got - want).abs() < 1e-12, "{got} vs {want}");
        }
        // Same source: the covariance matrix with an n − 1 denominator.
        let want = [
            0.025, 0.0075, 0.00175, 0.0075, 0.007, 0.00135, 0.00175, 0.00135, 0.00043,
        ];
        for (got, want) in m.covariance().iter().zip(want) {
            assert!((got - want).abs() < 1e-14, "{got} vs {want}");
        }
        let sd = m.std_dev();
        assert!((sd[0] - 0.025f64.sqrt()).abs() < 1e-15);
        let r = m.correlation();
        assert_eq!(r[0], 1.0);
        assert!((r[1] - 0.0075 / (0.025f64 * 0.007).sqrt()).abs() < 1e-12);
        assert_eq!(r[1], r[3]);
    }

    fn sample(n: usize, p: usize, seed: u64, offset: f64) -> Vec<Vec<f64>> {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        (0..n)
            .map(|_| {
                let base: f64 = rng.random_range(-1.0..1.0);
                (0..p)
                    .map(|j| offset + (j as f64 + 1.0) * base + rng.random_range(-0.5..0.5))
                    .collect()
            })
            .collect()
    }

    fn assert_same(a: &Moments, b: &Moments, tol: f64) {
        assert_eq!(a.n, b.n);
        for (x, y) in a.mean().iter().zip(&b.mean()) {
            assert!(close(*x, *y, tol), "mean {x} vs {y}");
        }
        for (x, y) in a.covariance().iter().zip(&b.covariance()) {
            assert!(close(*x, *y, tol), "cov {x} vs {y}");
        }
    }

    #[test]
    fn every_two_way_split_merges_to_one_pass() {
        let rows = sample(60, 4, 7, 3.0);
        let whole = one_pass(&rows);
        for k in 0..=rows.len() {
            let mut a = Moments::new(4);
            let mut b = Moments::new(4);
            rows[..k].iter().for_each(|r| a.push(r));
            rows[k..].iter().for_each(|r| b.push(r));
            let mut ab = a.clone();
            ab.merge(&b);
            assert_same(&ab, &whole, 1e-12);
            // The other order too.
            b.merge(&a);
            assert_same(&b, &whole, 1e-12);
        }
    }

    #[test]
    fn many_chunks_merged_in_any_tree_equal_one_pass() {
        let rows = sample(500, 5, 11, -40.0);
        let whole = one_pass(&rows);
        for chunk in [1, 2, 3, 7, 64, 499] {
            let parts: Vec<Moments> = rows.chunks(chunk).map(one_pass).collect();
            // Left to right.
            let mut acc = Moments::new(5);
            parts.iter().for_each(|m| acc.merge(m));
            assert_same(&acc, &whole, 1e-12);
            // Pairwise tree.
            let mut level = parts;
            while level.len() > 1 {
                level = level
                    .chunks(2)
                    .map(|pair| {
                        let mut m = pair[0].clone();
                        if let Some(b) = pair.get(1) {
                            m.merge(b);
                        }
                        m
                    })
                    .collect();
            }
            assert_same(&level[0], &whole, 1e-12);
        }
    }

    #[test]
    fn blocks_of_any_size_equal_row_by_row() {
        for offset in [0.0, 1e6, -3e9] {
            let rows = sample(1000, 7, 13, offset);
            let whole = one_pass(&rows);
            let flat: Vec<f64> = rows.iter().flatten().copied().collect();
            for b in [1, 2, 5, 64, 333, 1000] {
                let mut m = Moments::new(7);
                for chunk in flat.chunks(b * 7) {
                    m.push_block(chunk);
                }
                assert_same(&m, &whole, 1e-12);
                // Mixed with single pushes and merges.
                let mut mixed = Moments::new(7);
                mixed.push(&rows[0]);
                mixed.push_block(&flat[7..7 * (b + 1).min(1000)]);
                let mut rest = Moments::new(7);
                rest.push_block(&flat[7 * (b + 1).min(1000)..]);
                mixed.merge(&rest);
                assert_same(&mixed, &whole, 1e-12);
            }
        }
    }

    #[test]
    fn stable_with_a_large_offset() {
        // Readings around 1e9 with noise of order 1: the textbook one-pass formula
        // (Σx² − n x̄²)/(n − 1) cancels catastrophically, a two-pass computation does not.
        let rows = sample(10_000, 3, 5, 1e9);
        let n = rows.len() as f64;
        let p = 3;
        let mut mean = vec![0.0; p];
        for r in &rows {
            for j in 0..p {
                mean[j] += r[j] / n;
            }
        }
        let mut two_pass = vec![0.0; p * p];
        let mut naive_sq = vec![0.0; p * p];
        let mut naive_sum = vec![0.0; p];
        for r in &rows {
            for i in 0..p {
                naive_sum[i] += r[i];
                for j in 0..p {
                    two_pass[i * p + j] += (r[i] - mean[i]) * (r[j] - mean[j]) / (n - 1.0);
                    naive_sq[i * p + j] += r[i] * r[j];
                }
            }
        }
        let m = one_pass(&rows);
        let cov = m.covariance();
        for k in 0..p * p {
            assert!(
                (cov[k] - two_pass[k]).abs() < 1e-9 * two_pass[k].abs().max(0.1),
                "welford {} vs two-pass {}",
                cov[k],
                two_pass[k]
            );
        }
        // Show the data really are hard: the textbook formula is off by more than 1 %.
        let naive00 = (naive_sq[0] - naive_sum[0] * naive_sum[0] / n) / (n - 1.0);
        assert!(
            ((naive00 - two_pass[0]) / two_pass[0]).abs() > 0.01,
            "textbook {naive00} vs {}",
            two_pass[0]
        );
        // And merging chunks keeps the accuracy.
        let mut merged = Moments::new(p);
        for c in rows.chunks(777) {
            merged.merge(&one_pass(c));
        }
        for (a, b) in merged.covariance().iter().zip(&two_pass) {
            assert!((a - b).abs() < 1e-9 * b.abs().max(0.1));
        }
    }

    #[test]
    fn empty_and_single_row_moments() {
        let mut m = Moments::new(2);
        assert!(m.covariance().iter().all(|v| v.is_nan()));
        m.merge(&Moments::new(2));
        assert_eq!(m.n, 0);
        m.push(&[1.0, 2.0]);
        assert_eq!(m.mean(), [1.0, 2.0]);
        assert!(m.covariance()[0].is_nan());
        m.push(&[3.0, 2.0]);
        assert_eq!(m.covariance(), [2.0, 0.0, 0.0, 0.0]);
        let r = m.correlation();
        assert_eq!(r[0], 1.0);
        assert!(r[3].is_nan(), "constant feature has no correlation");
    }
}
