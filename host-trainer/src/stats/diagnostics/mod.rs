//! How Gaussian does the baseline look? Checks to run before trusting a chi-square threshold.
//!
//! * Per feature: the sample skewness `g₁ = m₃ / m₂^{3/2}` and excess kurtosis `g₂ = m₄ / m₂² − 3`,
//!   with central moments `m_k = (1/n) Σ (x − x̄)^k` (the biased estimators, the defaults of
//!   `scipy.stats.skew` and `scipy.stats.kurtosis`). A constant feature gives NaN.
//! * Mardia (1970), "Measures of multivariate skewness and kurtosis with applications",
//!   Biometrika 57, 519–530 (citation details from memory). With the sample mean x̄ and the
//!   1/n sample covariance S, and
//!   `d_ij = (x_i − x̄)ᵀ S⁻¹ (x_j − x̄)`:
//!   * skewness `b₁,p = (1/n²) Σ_i Σ_j d_ij³`; `n·b₁,p/6` is compared with χ² on
//!     `p(p+1)(p+2)/6` degrees of freedom (upper tail);
//!   * kurtosis `b₂,p = (1/n) Σ_i d_ii²`; `z = (b₂,p − p(p+2)) / √(8p(p+2)/n)` is compared with the
//!     standard normal (two-sided).
//!
//!   Both always use the data's own sample mean and 1/n covariance, whatever estimate the model
//!   was fitted with, because that is how the tests are defined. The skewness costs O(n²): above
//!   [`MARDIA_SKEWNESS_MAX_ROWS`] rows it is computed on a fixed pseudo-random subsample of that
//!   many rows (its own mean and covariance), and [`Diagnostics::mardia_skewness_rows`] says how
//!   many rows were used. The kurtosis always uses every row.
//! * A chi-square QQ plot of the model's squared Mahalanobis distances: sorted d² (with the mean
//!   and covariance passed in, i.e. the fitted model) against χ²(p) quantiles at `(i − 0.5)/n`.
//! * Log suggestions: a feature whose values are all positive and whose skewness is above 1 is
//!   named as a candidate for the model's log preprocessing. This is a rule of thumb (common
//!   practice), not a test.

use nalgebra::DMatrix;
use rand::seq::index::sample;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};

/// Above this many rows Mardia's skewness is computed on a subsample of this many rows.
pub const MARDIA_SKEWNESS_MAX_ROWS: usize = 5000;
/// The QQ plot keeps at most this many points.
pub const QQ_MAX_POINTS: usize = 400;
/// When thinning, the QQ plot keeps every one of this many largest distances (the tail, where a
/// threshold lives) and spreads the remaining points evenly over the other ranks.
pub const QQ_TAIL_POINTS: usize = 100;
/// Skewness above which a positive feature is suggested for a log transform (common practice).
pub const LOG_SKEWNESS_ABOVE: f64 = 1.0;
/// The fixed seed of the Mardia subsample, so a report is reproducible.
const SUBSAMPLE_SEED: u64 = 0x4d61_7264_6961;

/// The result of [`diagnose`].
#[derive(Clone, Debug, serde::Serialize)]
pub struct Diagnostics {
    /// Sample skewness per feature (biased estimator g₁; NaN for a constant feature).
    pub skewness: Vec<f64>,
    /// Sample excess kurtosis per feature (biased estimator g₂; 0 for a normal distribution).
    pub excess_kurtosis: Vec<f64>,
    /// Mardia's skewness test: `statistic` = n·b₁,p/6, `df_or_z` = its degrees of freedom,
    /// `p_value` from the χ² upper tail, `coefficient` = b₁,p.
    pub mardia_skewness: MardiaTest,
    /// Mardia's kurtosis test: `statistic` = b₂,p, `df_or_z` = z, `p_value` two-sided normal,
    /// `coefficient` = b₂,p.
    pub mardia_kurtosis: MardiaTest,
    /// Rows Mardia's skewness used: all of them, or [`MARDIA_SKEWNESS_MAX_ROWS`] when there are more.
    pub mardia_skewness_rows: usize,
    /// (χ²(p) quantile at (i − 0.5)/n, i-th smallest d²), at most [`QQ_MAX_POINTS`] points, in
    /// increasing order. Empty when the covariance passed in is not positive definite.
    pub qq: Vec<(f64, f64)>,
    /// Names of features that are all positive with skewness above [`LOG_SKEWNESS_ABOVE`].
    pub log_suggestions: Vec<String>,
    /// Rows examined.
    pub rows: usize,
}

/// One of Mardia's tests. NaN fields mean the sample covariance was singular (or too few rows).
#[derive(Clone, Debug, serde::Serialize)]
pub struct MardiaTest {
    /// The test statistic (see [`Diagnostics`] for which).
    pub statistic: f64,
    /// Degrees of freedom (skewness) or the z value (kurtosis).
    pub df_or_z: f64,
    /// The p-value under multivariate normality.
    pub p_value: f64,
    /// Mardia's coefficient itself, b₁,p or b₂,p.
    pub coefficient: f64,
}

impl MardiaTest {
    fn undefined() -> MardiaTest {
        MardiaTest {
            statistic: f64::NAN,
            df_or_z: f64::NAN,
            p_value: f64::NAN,
            coefficient: f64::NAN,
        }
    }
}

/// Diagnose `x` (`n` rows × `p` features, row-major) against the fitted `mean` (length `p`) and
/// `cov` (`p × p`, row-major). `names` label the features for the log suggestions; a missing name
/// becomes "feature k" (1-based).
///
/// # Panics
/// If `x.len() != n * p`, `mean.len() != p` or `cov.len() != p * p` (caller errors).
pub fn diagnose(
    x: &[f64],
    n: usize,
    p: usize,
    mean: &[f64],
    cov: &[f64],
    names: &[String],
) -> Diagnostics {
    assert_eq!(x.len(), n * p, "diagnose: data length is not n * p");
    assert_eq!(mean.len(), p, "diagnose: mean length is not p");
    assert_eq!(cov.len(), p * p, "diagnose: covariance length is not p * p");

    let (skewness, excess_kurtosis) = univariate_moments(x, n, p);

    let log_suggestions = (0..p)
        .filter(|&j| skewness[j] > LOG_SKEWNESS_ABOVE && (0..n).all(|r| x[r * p + j] > 0.0))
        .map(|j| {
            names
                .get(j)
                .cloned()
                .unwrap_or_else(|| format!("feature {}", j + 1))
        })
        .collect();

    let all: Vec<usize> = (0..n).collect();
    let mardia_kurtosis = mardia_kurtosis(x, p, &all);
    let skew_rows = subsample(n);
    let mardia_skewness = mardia_skewness(x, p, &skew_rows);

    Diagnostics {
        skewness,
        excess_kurtosis,
        mardia_skewness,
        mardia_kurtosis,
        mardia_skewness_rows: skew_rows.len(),
        qq: qq_points(x, n, p, mean, cov),
        log_suggestions,
        rows: n,
    }
}

/// Skewness g₁ and excess kurtosis g₂ of each feature, from two passes.
fn univariate_moments(x: &[f64], n: usize, p: usize) -> (Vec<f64>, Vec<f64>) {
    let mut skew = vec![f64::NAN; p];
    let mut kurt = vec![f64::NAN; p];
    if n == 0 {
        return (skew, kurt);
    }
    let nf = n as f64;
    for j in 0..p {
        let mean = (0..n).map(|r| x[r * p + j]).sum::<f64>() / nf;
        let (mut m2, mut m3, mut m4) = (0.0, 0.0, 0.0);
        for r in 0..n {
            let d = x[r * p + j] - mean;
            let d2 = d * d;
            m2 += d2;
            m3 += d2 * d;
            m4 += d2 * d2;
        }
        m2 /= nf;
        m3 /= nf;
        m4 /= nf;
        if m2 > 0.0 {
            skew[j] = m3 / m2.powf(1.5);
            kurt[j] = m4 / (m2 * m2) - 3.0;
        }
    }
    (skew, kurt)
}

/// The rows Mardia's skewness uses: all, or a fixed pseudo-random subsample, ascending.
fn subsample(n: usize) -> Vec<usize> {
    if n <= MARDIA_SKEWNESS_MAX_ROWS {
        return (0..n).collect();
    }
    let mut rng = ChaCha8Rng::seed_from_u64(SUBSAMPLE_SEED);
    let mut idx = sample(&mut rng, n, MARDIA_SKEWNESS_MAX_ROWS).into_vec();
    idx.sort_unstable();
    idx
}

/// Whitened, centred rows `z_i = L⁻¹ (x_i − x̄)` of the rows `idx`, with x̄ and S = L Lᵀ their own
/// sample mean and 1/n covariance; `None` if S is not positive definite or there are too few rows.
fn whitened(x: &[f64], p: usize, idx: &[usize]) -> Option<Vec<f64>> {
    let m = idx.len();
    if m <= p {
        return None;
    }
    let mf = m as f64;
    let mut mean = vec![0.0; p];
    for &r in idx {
        for (a, v) in mean.iter_mut().zip(&x[r * p..(r + 1) * p]) {
            *a += v;
        }
    }
    for a in &mut mean {
        *a /= mf;
    }
    let mut c = Vec::with_capacity(m * p);
    for &r in idx {
        c.extend(
            x[r * p..(r + 1) * p]
                .iter()
                .zip(&mean)
                .map(|(v, mu)| v - mu),
        );
    }
    let cm = DMatrix::from_row_slice(m, p, &c);
    let s = (cm.transpose() * &cm) / mf;
    let chol = s.cholesky()?;
    // Solve L Zᵀ = Cᵀ: column i of Zᵀ is the whitened row i.
    let zt = chol.l().solve_lower_triangular(&cm.transpose())?;
    if zt.iter().any(|v| !v.is_finite()) {
        return None;
    }
    // zt is p × m, column-major, so its storage is the row-major m × p matrix Z.
    Some(zt.as_slice().to_vec())
}

fn mardia_skewness(x: &[f64], p: usize, idx: &[usize]) -> MardiaTest {
    let Some(z) = whitened(x, p, idx) else {
        return MardiaTest::undefined();
    };
    let m = idx.len();
    // b₁,p = (1/m²) Σᵢⱼ (zᵢᵀzⱼ)³ equals Σ_abc T_abc² with the third-moment tensor
    // T_abc = (1/m) Σᵢ z_ia z_ib z_ic (expand the cube and swap the sums). That costs
    // O(m·p³/6) over the distinct a ≤ b ≤ c instead of O(m²·p) over pairs of rows.
    let mut t = vec![0.0f64; p * (p + 1) * (p + 2) / 6];
    for zi in z.chunks_exact(p) {
        let mut k = 0;
        for a in 0..p {
            for b in a..p {
                let zab = zi[a] * zi[b];
                for zc in &zi[b..] {
                    t[k] += zab * zc;
                    k += 1;
                }
            }
        }
    }
    let mut sum = 0.0;
    let mut k = 0;
    for a in 0..p {
        for b in a..p {
            for c in b..p {
                // How many orderings of (a, b, c) the entry stands for.
                let mult = match (a == b, b == c) {
                    (true, true) => 1.0,
                    (false, false) => 6.0,
                    _ => 3.0,
                };
                sum += mult * t[k] * t[k];
                k += 1;
            }
        }
    }
    let mf = m as f64;
    let b1 = sum / (mf * mf);
    debug_assert!(k == t.len());
    let statistic = mf * b1 / 6.0;
    let pf = p as f64;
    let df = pf * (pf + 1.0) * (pf + 2.0) / 6.0;
    let p_value = ChiSquared::new(df).expect("df > 0 for p ≥ 1").sf(statistic);
    MardiaTest {
        statistic,
        df_or_z: df,
        p_value,
        coefficient: b1,
    }
}

fn mardia_kurtosis(x: &[f64], p: usize, idx: &[usize]) -> MardiaTest {
    let Some(z) = whitened(x, p, idx) else {
        return MardiaTest::undefined();
    };
    let mf = idx.len() as f64;
    let b2 = z
        .chunks_exact(p)
        .map(|zi| {
            let d: f64 = zi.iter().map(|v| v * v).sum();
            d * d
        })
        .sum::<f64>()
        / mf;
    let pf = p as f64;
    let zval = (b2 - pf * (pf + 2.0)) / (8.0 * pf * (pf + 2.0) / mf).sqrt();
    let p_value = 2.0 * Normal::standard().sf(zval.abs());
    MardiaTest {
        statistic: b2,
        df_or_z: zval,
        p_value,
        coefficient: b2,
    }
}

/// Squared Mahalanobis distances of every row to (`mean`, `cov`); `None` if `cov` is not SPD.
fn squared_distances(x: &[f64], n: usize, p: usize, mean: &[f64], cov: &[f64]) -> Option<Vec<f64>> {
    let s = DMatrix::from_row_slice(p, p, cov);
    let chol = s.cholesky()?;
    let mut c = DMatrix::zeros(p, n);
    for r in 0..n {
        for j in 0..p {
            c[(j, r)] = x[r * p + j] - mean[j];
        }
    }
    let z = chol.l().solve_lower_triangular(&c)?;
    let d2: Vec<f64> = z.column_iter().map(|col| col.norm_squared()).collect();
    d2.iter().all(|v| v.is_finite()).then_some(d2)
}

/// The 0-based ranks a thinned QQ plot keeps, ascending.
fn qq_ranks(n: usize) -> Vec<usize> {
    if n <= QQ_MAX_POINTS {
        return (0..n).collect();
    }
    let body = n - QQ_TAIL_POINTS;
    let spread = QQ_MAX_POINTS - QQ_TAIL_POINTS;
    let mut ranks: Vec<usize> = (0..spread)
        .map(|k| ((k as f64) * (body - 1) as f64 / (spread - 1) as f64).round() as usize)
        .collect();
    ranks.extend(body..n);
    ranks
}

fn qq_points(x: &[f64], n: usize, p: usize, mean: &[f64], cov: &[f64]) -> Vec<(f64, f64)> {
    if n == 0 || p == 0 {
        return Vec::new();
    }
    let Some(mut d2) = squared_distances(x, n, p, mean, cov) else {
        return Vec::new();
    };
    d2.sort_by(f64::total_cmp);
    let chi = ChiSquared::new(p as f64).expect("p ≥ 1 is a valid df");
    qq_ranks(n)
        .into_iter()
        .map(|i| (chi.inverse_cdf((i as f64 + 0.5) / n as f64), d2[i]))
        .collect()
}

#[cfg(test)]
mod tests;
