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
mod tests {
    use super::*;
    use rand_distr::{Distribution, Exp1, StandardNormal};

    fn sample_mean_cov(x: &[f64], n: usize, p: usize) -> (Vec<f64>, Vec<f64>) {
        let mut m = vec![0.0; p];
        for r in 0..n {
            for j in 0..p {
                m[j] += x[r * p + j] / n as f64;
            }
        }
        let mut s = vec![0.0; p * p];
        for r in 0..n {
            for a in 0..p {
                for b in 0..p {
                    s[a * p + b] += (x[r * p + a] - m[a]) * (x[r * p + b] - m[b]) / (n - 1) as f64;
                }
            }
        }
        (m, s)
    }

    fn close(got: f64, want: f64, rel: f64) -> bool {
        (got - want).abs() <= rel * want.abs().max(1e-300)
    }

    fn names(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    // Produced once with numpy 2.4.6 and scipy 1.17.1 (Python 3.11.7):
    //   rng = numpy.random.default_rng(99); n = 30
    //   X = numpy.column_stack([rng.normal(10, 2, n), numpy.exp(rng.normal(0, 0.8, n)) * 3,
    //                           rng.uniform(-1, 2, n)]); X = numpy.round(X, 3)
    //   scipy.stats.skew(X, axis=0), scipy.stats.kurtosis(X, axis=0)   (bias=True, Fisher)
    // Mardia from its published formula in numpy: S = numpy.cov(X.T, bias=True), C = X − mean,
    //   D = C @ inv(S) @ C.T, b1 = (D**3).sum()/n², b2 = (diag(D)**2).mean(),
    //   p-values scipy.stats.chi2.sf(n·b1/6, 10) and 2·scipy.stats.norm.sf(|z|).
    // QQ: d² with numpy.cov(X.T) (n − 1) and the sample mean, sorted, against
    //   scipy.stats.chi2.ppf((i − 0.5)/n, 3).
    const DATA: [f64; 90] = [
        10.165, 6.486, -0.774, 9.071, 5.47, -0.197, 10.101, 2.89, 0.87, 11.372, 1.793, 0.166,
        6.486, 14.402, -0.236, 13.369, 5.213, 0.191, 9.084, 0.853, 1.184, 8.807, 5.872, -0.233,
        7.906, 5.548, 0.634, 11.864, 5.753, 0.219, 11.35, 2.172, 1.979, 12.489, 9.735, 1.562,
        11.786, 1.649, 1.168, 10.526, 7.905, 0.652, 10.657, 3.791, 0.195, 11.87, 11.664, 1.033,
        8.245, 2.198, 1.527, 9.908, 5.237, -0.58, 10.764, 5.897, -0.88, 9.095, 2.315, 0.379,
        11.443, 3.027, -0.191, 9.296, 2.153, 1.655, 11.346, 4.398, -0.209, 10.281, 5.204, 1.739,
        10.925, 2.376, 0.503, 6.965, 3.957, 1.505, 8.279, 1.883, 0.359, 12.689, 1.977, 1.148,
        10.356, 0.644, 1.934, 9.837, 1.173, -0.502,
    ];
    const SCIPY_SKEW: [f64; 3] = [-0.3236818213261341, 1.3639433815479158, 0.08152082060662603];
    const SCIPY_KURT: [f64; 3] = [
        -0.36299158060825576,
        1.7471994909110435,
        -1.1403697788326768,
    ];
    // (b1, n·b1/6, df, p, b2, z, p)
    const NUMPY_MARDIA: [f64; 7] = [
        4.150815901633551,
        20.754079508167752,
        10.0,
        0.022875171418367132,
        16.3671009913935,
        0.6835504956967497,
        0.49425905379023316,
    ];
    // (x, y) of the QQ points with 1-based i = 1, 15 and 30.
    const QQ_FIRST: (f64, f64) = (0.16297062912199856, 0.3156889487063037);
    const QQ_15: (f64, f64) = (2.2784251726515374, 2.0996041950463726);
    const QQ_LAST: (f64, f64) = (10.235518240722541, 13.61484398203044);

    #[test]
    fn matches_scipy_and_a_direct_numpy_mardia() {
        let (m, s) = sample_mean_cov(&DATA, 30, 3);
        let d = diagnose(&DATA, 30, 3, &m, &s, &names(&["inlet bar", "flow", "temp"]));
        // Reference: scipy 1.17.1 stats.skew / stats.kurtosis.
        for j in 0..3 {
            assert!(
                close(d.skewness[j], SCIPY_SKEW[j], 1e-12),
                "skew {j}: {}",
                d.skewness[j]
            );
            assert!(
                close(d.excess_kurtosis[j], SCIPY_KURT[j], 1e-12),
                "kurt {j}"
            );
        }
        // Reference: Mardia (1970) formulas evaluated in numpy 2.4.6 / scipy 1.17.1.
        let ms = &d.mardia_skewness;
        assert!(
            close(ms.coefficient, NUMPY_MARDIA[0], 1e-11),
            "b1 {}",
            ms.coefficient
        );
        assert!(close(ms.statistic, NUMPY_MARDIA[1], 1e-11));
        assert_eq!(ms.df_or_z, NUMPY_MARDIA[2]);
        assert!(close(ms.p_value, NUMPY_MARDIA[3], 1e-9), "p {}", ms.p_value);
        let mk = &d.mardia_kurtosis;
        assert!(
            close(mk.statistic, NUMPY_MARDIA[4], 1e-11),
            "b2 {}",
            mk.statistic
        );
        assert!(
            close(mk.df_or_z, NUMPY_MARDIA[5], 1e-10),
            "z {}",
            mk.df_or_z
        );
        assert!(close(mk.p_value, NUMPY_MARDIA[6], 1e-9), "p {}", mk.p_value);
        assert_eq!(d.mardia_skewness_rows, 30);
        // QQ against numpy d² and scipy.stats.chi2.ppf.
        assert_eq!(d.qq.len(), 30);
        for ((gx, gy), (wx, wy)) in [(d.qq[0], QQ_FIRST), (d.qq[14], QQ_15), (d.qq[29], QQ_LAST)] {
            assert!(close(gx, wx, 1e-9), "qq x {gx} vs {wx}");
            assert!(close(gy, wy, 1e-11), "qq y {gy} vs {wy}");
        }
        // "flow" is positive with skewness 1.36 > 1; "inlet bar" is positive but not skewed;
        // "temp" is skewed neither way and has negative values.
        assert_eq!(d.log_suggestions, vec!["flow".to_string()]);
        assert_eq!(d.rows, 30);
    }

    // scipy 1.17.1 stats.skew / stats.kurtosis, and the numpy Mardia above, on the iris.csv.gz
    // that linfa-datasets 0.8.1 ships (read in Python with gzip from the crate's data folder).
    const IRIS_SKEW: [f64; 4] = [
        0.31175305850229373,
        0.33070281277331154,
        -0.2717119501716454,
        -0.1039436662675198,
    ];
    const IRIS_KURT: [f64; 4] = [
        -0.5735679489249779,
        0.24144329938318299,
        -1.3953593021397048,
        -1.3352456441311873,
    ];
    const IRIS_MARDIA: [f64; 7] = [
        2.659918097579844,
        66.4979524394961,
        20.0,
        6.722126397294191e-07,
        23.777628857130136,
        -0.1965501788293545,
        0.8441795614906653,
    ];

    #[test]
    fn iris_against_scipy_numpy_and_the_sum_of_distances() {
        let iris = linfa_datasets::iris();
        let recs = iris.records();
        let (n, p) = recs.dim();
        let x: Vec<f64> = recs.iter().copied().collect();
        let (m, s) = sample_mean_cov(&x, n, p);
        let d = diagnose(&x, n, p, &m, &s, &[]);
        for j in 0..p {
            assert!(close(d.skewness[j], IRIS_SKEW[j], 1e-11), "skew {j}");
            assert!(close(d.excess_kurtosis[j], IRIS_KURT[j], 1e-11), "kurt {j}");
        }
        let ms = &d.mardia_skewness;
        assert!(close(ms.coefficient, IRIS_MARDIA[0], 1e-11));
        assert!(close(ms.statistic, IRIS_MARDIA[1], 1e-11));
        assert_eq!(ms.df_or_z, IRIS_MARDIA[2]);
        assert!(close(ms.p_value, IRIS_MARDIA[3], 1e-8), "p {}", ms.p_value);
        let mk = &d.mardia_kurtosis;
        assert!(close(mk.statistic, IRIS_MARDIA[4], 1e-11));
        assert!(close(mk.df_or_z, IRIS_MARDIA[5], 1e-9));
        assert!(close(mk.p_value, IRIS_MARDIA[6], 1e-9));
        // /work/shared/reference-values.md: with the n − 1 covariance the d² of the fitted rows
        // sum to (n − 1)·p = 596; all 150 points are kept, so the QQ y values carry that sum.
        assert_eq!(d.qq.len(), 150);
        let sum: f64 = d.qq.iter().map(|q| q.1).sum();
        assert!((sum - 596.0).abs() < 1e-9, "{sum}");
        // Iris is positive but no feature has skewness above 1.
        assert!(d.log_suggestions.is_empty());
    }

    fn draws(n: usize, p: usize, seed: u64, exponential: bool) -> Vec<f64> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        (0..n * p)
            .map(|_| {
                if exponential {
                    Exp1.sample(&mut rng)
                } else {
                    StandardNormal.sample(&mut rng)
                }
            })
            .collect()
    }

    #[test]
    fn big_samples_use_a_fixed_subsample_for_the_skewness() {
        let (n, p) = (6000, 2);
        let x = draws(n, p, 21, false);
        let (m, s) = sample_mean_cov(&x, n, p);
        let a = diagnose(&x, n, p, &m, &s, &[]);
        let b = diagnose(&x, n, p, &m, &s, &[]);
        assert_eq!(a.mardia_skewness_rows, MARDIA_SKEWNESS_MAX_ROWS);
        assert_eq!(a.mardia_skewness.statistic, b.mardia_skewness.statistic);
        // The subsample is what the skewness was computed on.
        let idx = subsample(n);
        assert_eq!(idx.len(), MARDIA_SKEWNESS_MAX_ROWS);
        assert!(idx.windows(2).all(|w| w[0] < w[1]));
        let sub: Vec<f64> = idx
            .iter()
            .flat_map(|&r| x[r * p..(r + 1) * p].to_vec())
            .collect();
        let direct = mardia_skewness(&sub, p, &(0..idx.len()).collect::<Vec<_>>());
        assert!(close(a.mardia_skewness.statistic, direct.statistic, 1e-12));
        // The kurtosis used all rows.
        let all = mardia_kurtosis(&x, p, &(0..n).collect::<Vec<_>>());
        assert_eq!(a.mardia_kurtosis.statistic, all.statistic);
    }

    #[test]
    fn gaussian_passes_and_exponential_fails() {
        let (n, p) = (2000, 3);
        let g = draws(n, p, 5, false);
        let (m, s) = sample_mean_cov(&g, n, p);
        let dg = diagnose(&g, n, p, &m, &s, &[]);
        // A fixed normal sample: neither test should reject at the 0.1 % level.
        assert!(
            dg.mardia_skewness.p_value > 1e-3,
            "{:?}",
            dg.mardia_skewness
        );
        assert!(
            dg.mardia_kurtosis.p_value > 1e-3,
            "{:?}",
            dg.mardia_kurtosis
        );
        assert!(dg.skewness.iter().all(|v| v.abs() < 0.25));
        assert!(
            dg.log_suggestions.is_empty(),
            "normal values are not all positive"
        );
        // Exponential: skewness 2 and excess kurtosis 6 in theory; Mardia rejects outright.
        let e = draws(n, p, 6, true);
        let (m, s) = sample_mean_cov(&e, n, p);
        let de = diagnose(&e, n, p, &m, &s, &names(&["a", "b"]));
        assert!(de.mardia_skewness.p_value < 1e-12);
        assert!(de.mardia_kurtosis.p_value < 1e-12);
        assert!(
            de.skewness.iter().all(|v| (1.5..2.5).contains(v)),
            "{:?}",
            de.skewness
        );
        assert!(de.excess_kurtosis.iter().all(|v| (3.0..9.0).contains(v)));
        // The third feature has no name and gets a positional one.
        assert_eq!(de.log_suggestions, names(&["a", "b", "feature 3"]));
    }

    #[test]
    fn qq_is_thinned_to_400_points_keeping_the_tail() {
        let (n, p) = (1000, 2);
        let x = draws(n, p, 9, false);
        let (m, s) = sample_mean_cov(&x, n, p);
        let d = diagnose(&x, n, p, &m, &s, &[]);
        assert_eq!(d.qq.len(), QQ_MAX_POINTS);
        assert!(d.qq.windows(2).all(|w| w[0].0 < w[1].0 && w[0].1 <= w[1].1));
        let mut d2 = squared_distances(&x, n, p, &m, &s).unwrap();
        d2.sort_by(f64::total_cmp);
        assert_eq!(d.qq[0].1, d2[0]);
        // The last 100 are exactly the 100 largest distances.
        for k in 0..QQ_TAIL_POINTS {
            assert_eq!(
                d.qq[QQ_MAX_POINTS - QQ_TAIL_POINTS + k].1,
                d2[n - QQ_TAIL_POINTS + k]
            );
        }
        // For df = 2 the quantile is −2 ln(1 − q) (reference-values.md); the largest point is at
        // q = 999.5/1000.
        let want = -2.0 * (1.0 - 999.5 / 1000.0f64).ln();
        assert!(close(d.qq[QQ_MAX_POINTS - 1].0, want, 1e-9));
    }

    #[test]
    fn degenerate_inputs_give_undefined_values_not_numbers() {
        // A constant feature: skewness undefined, covariance singular.
        let x = [1.0, 5.0, 2.0, 5.0, 3.0, 5.0, 4.0, 5.0];
        let d = diagnose(&x, 4, 2, &[2.5, 5.0], &[1.0, 0.0, 0.0, 0.0], &[]);
        assert!(d.skewness[1].is_nan());
        assert!(d.skewness[0].abs() < 1e-15);
        assert!(d.mardia_skewness.p_value.is_nan());
        assert!(d.mardia_kurtosis.p_value.is_nan());
        assert!(d.qq.is_empty());
        // NaN becomes null in JSON, so a report can still be written.
        let json = serde_json::to_string(&d).unwrap();
        assert!(json.contains("\"p_value\":null"), "{json}");
    }
}
