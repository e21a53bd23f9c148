//! Time-correlated readings: lag-1 autocorrelation, gathered in one pass, and the effective
//! number of independent rows it implies.
//!
//! Consecutive readings of a machine are not independent. A baseline of `m` rows whose features
//! follow AR(1) processes with lag-1 autocorrelation `ρ` tells as much about the mean as
//! `m_mean = m / (1 + 2 Σₖ (1 − k/m) ρᵏ)` independent rows (Bayley and Hammersley 1946, "The
//! 'effective' number of independent observations in an autocorrelated time series", Journal of
//! the Royal Statistical Society Supplement 8; citation details from memory), about
//! `m (1 − ρ)/(1 + ρ)` for long baselines. The sample covariance of two AR(1) series with `ρᵢ`,
//! `ρⱼ` has its variance inflated by `(1 + ρᵢρⱼ)/(1 − ρᵢρⱼ)` (the same sum over lags, applied to
//! the products), so the covariance carries fewer rows' worth than `m` too, but more than the mean.
//!
//! [`effective_sizes`] turns per-feature `ρ` into [`Sizes`]: the mean's inflation is averaged
//! over the features, the covariance's over the pairs of features. This treats the features as
//! if their time correlation were that of independent components; `examples/threshold_study.rs`
//! measures how well it holds when they are not.

use serde::Serialize;

use crate::stats::limit::Sizes;

/// Lag-1 co-moments of consecutive rows, one pass, mergeable (the pair across a merge seam is
/// lost, which is one pair in `m`).
#[derive(Clone, Debug)]
pub struct Lag1 {
    p: usize,
    /// A shift for numerical stability: the first row seen.
    shift: Vec<f64>,
    prev: Vec<f64>,
    /// Pairs of consecutive rows seen.
    pairs: u64,
    /// `Σ (x_t − c)`, `Σ (x_{t−1} − c)`, `Σ (x_t − c)(x_{t−1} − c)` over the pairs.
    sum_now: Vec<f64>,
    sum_prev: Vec<f64>,
    sum_cross: Vec<f64>,
}

/// The lag-1 co-moments of several stretches of consecutive rows, one `Lag1` each.
#[derive(Clone, Debug, Default)]
pub struct Lag1Set {
    parts: Vec<Lag1>,
}

impl Lag1 {
    /// An empty accumulator for `p` features.
    pub fn new(p: usize) -> Self {
        Lag1 {
            p,
            shift: Vec::new(),
            prev: vec![0.0; p],
            pairs: 0,
            sum_now: vec![0.0; p],
            sum_prev: vec![0.0; p],
            sum_cross: vec![0.0; p],
        }
    }

    /// The next row in time order.
    #[inline]
    pub fn push(&mut self, row: &[f64]) {
        debug_assert_eq!(row.len(), self.p);
        if self.shift.is_empty() {
            self.shift = row.to_vec();
            self.prev.copy_from_slice(row);
            return;
        }
        for (i, x) in row.iter().enumerate() {
            let now = x - self.shift[i];
            let prev = self.prev[i] - self.shift[i];
            self.sum_now[i] += now;
            self.sum_prev[i] += prev;
            self.sum_cross[i] += now * prev;
        }
        self.prev.copy_from_slice(row);
        self.pairs += 1;
    }

    /// Every row of a row-major block, in order.
    pub fn push_block(&mut self, rows: &[f64]) {
        for r in rows.chunks_exact(self.p) {
            self.push(r);
        }
    }

    /// `Σ (x_t − μ)(x_{t−1} − μ)` over the pairs, for the overall mean `μ`.
    fn cross_about(&self, i: usize, mu: f64) -> f64 {
        if self.pairs == 0 {
            return 0.0;
        }
        let d = mu - self.shift[i];
        self.sum_cross[i] - d * (self.sum_now[i] + self.sum_prev[i]) + self.pairs as f64 * d * d
    }
}

/// The state of a [`Lag1`] as plain numbers (see [`Lag1::parts`]).
pub struct Lag1Parts<'a> {
    /// Pairs of consecutive rows seen.
    pub pairs: u64,
    /// The shift and the last row, once a row has been seen.
    pub shift_prev: Option<(&'a [f64], &'a [f64])>,
    /// `Σ (x_t − c)`, `Σ (x_{t−1} − c)` and `Σ (x_t − c)(x_{t−1} − c)` over the pairs.
    pub sum_now: &'a [f64],
    /// See `sum_now`.
    pub sum_prev: &'a [f64],
    /// See `sum_now`.
    pub sum_cross: &'a [f64],
}

/// A byte form for [`Lag1`] that travels between processes (`fit::memory`'s partial moments).
impl Lag1 {
    /// Whether no row has been pushed.
    pub fn is_empty(&self) -> bool {
        self.shift.is_empty()
    }

    /// The accumulator's state.
    pub fn parts(&self) -> Lag1Parts<'_> {
        Lag1Parts {
            pairs: self.pairs,
            shift_prev: (!self.shift.is_empty()).then(|| (&self.shift[..], &self.prev[..])),
            sum_now: &self.sum_now,
            sum_prev: &self.sum_prev,
            sum_cross: &self.sum_cross,
        }
    }

    /// An accumulator from [`Lag1::parts`] of `p` features.
    ///
    /// # Panics
    /// If a vector's length is not `p`.
    pub fn from_parts(
        p: usize,
        pairs: u64,
        shift_prev: Option<(Vec<f64>, Vec<f64>)>,
        sum_now: Vec<f64>,
        sum_prev: Vec<f64>,
        sum_cross: Vec<f64>,
    ) -> Self {
        assert!(
            sum_now.len() == p && sum_prev.len() == p && sum_cross.len() == p,
            "lag-1 parts of unequal sizes"
        );
        let (shift, prev) = match shift_prev {
            Some((s, v)) => {
                assert!(s.len() == p && v.len() == p, "lag-1 parts of unequal sizes");
                (s, v)
            }
            None => (Vec::new(), vec![0.0; p]),
        };
        Lag1 {
            p,
            shift,
            prev,
            pairs,
            sum_now,
            sum_prev,
            sum_cross,
        }
    }
}

impl Lag1Set {
    /// Add one stretch (a reader thread's range).
    pub fn add(&mut self, part: Lag1) {
        self.parts.push(part);
    }

    /// The lag-1 autocorrelation of each feature, `Σ (x_t − μ)(x_{t−1} − μ) / Σ (x_t − μ)²`,
    /// given the overall mean and the co-moment diagonal `Σ (x_t − μ)²` (from the moments).
    /// Empty when no pair was seen.
    pub fn rho(&self, mean: &[f64], comoment_diag: &[f64]) -> Vec<f64> {
        let pairs: u64 = self.parts.iter().map(|l| l.pairs).sum();
        if pairs == 0 {
            return Vec::new();
        }
        (0..mean.len())
            .map(|i| {
                let cross: f64 = self.parts.iter().map(|l| l.cross_about(i, mean[i])).sum();
                let r = cross / comoment_diag[i];
                if r.is_finite() {
                    r.clamp(-1.0, 1.0)
                } else {
                    0.0
                }
            })
            .collect()
    }
}

/// `1 + 2 Σ_{k=1}^{m−1} (1 − k/m) ρᵏ`, the variance inflation of a mean of `m` AR(1) values
/// (Bayley and Hammersley 1946). Negative `ρ` is taken as 0: it would claim more than `m` rows.
pub fn inflation(rho: f64, m: f64) -> f64 {
    let r = rho.clamp(0.0, 0.9999);
    if r == 0.0 {
        return 1.0;
    }
    // Σ (1 − k/m) rᵏ = r/(1 − r) − r (1 − rᵐ) / (m (1 − r)²).
    let s = r / (1.0 - r) - r * (1.0 - r.powf(m)) / (m * (1.0 - r) * (1.0 - r));
    (1.0 + 2.0 * s).max(1.0)
}

/// The effective sizes of a baseline of `m` rows with per-feature lag-1 autocorrelations `rho`
/// (independent rows when `rho` is empty).
pub fn effective_sizes(p: usize, m: f64, rho: &[f64]) -> Sizes {
    if rho.is_empty() {
        return Sizes::independent(p, m);
    }
    let f_mean = rho.iter().map(|r| inflation(*r, m)).sum::<f64>() / rho.len() as f64;
    let mut f_cov = 0.0;
    for a in rho {
        for b in rho {
            f_cov += inflation(a.max(0.0) * b.max(0.0), m);
        }
    }
    f_cov /= (rho.len() * rho.len()) as f64;
    Sizes {
        p,
        m,
        m_mean: m / f_mean,
        nu: (m - 1.0) / f_cov,
    }
}

/// A summary of the time correlation for the reports.
#[derive(Clone, Debug, Serialize)]
pub struct TimeCorrelation {
    /// Lag-1 autocorrelation of each feature, in model order.
    pub lag1: Vec<f64>,
    /// Effective rows for the mean.
    pub m_mean: f64,
    /// Effective rows for the covariance (`nu + 1`).
    pub m_cov: f64,
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::moments::Moments;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;
    use rand_distr::StandardNormal;

    #[test]
    fn lag1_of_an_ar1_series_split_in_stretches() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let (n, rho) = (200_000, 0.8f64);
        let mut x = 0.0f64;
        let mut rows = Vec::with_capacity(2 * n);
        for _ in 0..n {
            x = rho * x + (1.0 - rho * rho).sqrt() * rng.sample::<f64, _>(StandardNormal);
            // Feature 0 is AR(1) around 1000 (the shift matters), feature 1 is white.
            rows.push(1000.0 + x);
            rows.push(rng.sample::<f64, _>(StandardNormal));
        }
        let mut m = Moments::new(2);
        m.push_block(&rows);
        let mut set = Lag1Set::default();
        for part in rows.chunks(2 * 70_001) {
            let mut l = Lag1::new(2);
            l.push_block(part);
            set.add(l);
        }
        let diag = [m.comoment(0, 0), m.comoment(1, 1)];
        let r = set.rho(&m.mean(), &diag);
        assert!((r[0] - rho).abs() < 0.01, "{r:?}");
        assert!(r[1].abs() < 0.01, "{r:?}");
    }

    /// Bayley and Hammersley's finite sum against the direct sum for a small m, and its limit.
    #[test]
    fn inflation_is_the_finite_sum() {
        for (rho, m) in [(0.5f64, 10.0f64), (0.9, 37.0), (0.2, 3.0)] {
            let direct: f64 = 1.0
                + 2.0
                    * (1..m as i32)
                        .map(|k| (1.0 - k as f64 / m) * rho.powi(k))
                        .sum::<f64>();
            assert!((inflation(rho, m) - direct).abs() < 1e-12);
        }
        assert!((inflation(0.9, 1e9) - 19.0).abs() < 1e-6);
        assert_eq!(inflation(-0.3, 100.0), 1.0);
        let s = effective_sizes(3, 1000.0, &[0.0, 0.0, 0.0]);
        assert_eq!(s, Sizes::independent(3, 1000.0));
    }
}
