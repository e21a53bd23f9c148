//! Shrinkage of a sample covariance: the Ledoit–Wolf estimator and plain diagonal loading.
//!
//! A baseline with few rows per feature gives a sample covariance whose small eigenvalues are
//! too small, so the Mahalanobis distance over-reacts along those directions. Both tools here pull
//! the covariance towards a multiple of the identity.
//!
//! * [`ledoit_wolf`] picks the amount of shrinkage from the data, following Ledoit and Wolf (2004),
//!   "A well-conditioned estimator for large-dimensional covariance matrices", Journal of
//!   Multivariate Analysis 88, 365–411 (citation details from memory).
//! * [`diagonal_loading`] adds a fixed, user-chosen multiple of the mean variance to the diagonal.
//!
//! Data are row-major: `x[r * p + j]` is feature `j` of row `r`.

/// The result of [`ledoit_wolf`].
#[derive(Clone, Debug, PartialEq)]
pub struct LwFit {
    /// The shrunk covariance, `p × p`, row-major: `(1 − δ)·S + δ·μ·I`.
    ///
    /// `S` is the sample covariance with the **1/n** denominator (the maximum-likelihood
    /// normalisation the paper uses), not the unbiased `n − 1` one. Multiply by `n / (n − 1)` if
    /// an unbiased scale is wanted; for the baselines this tool sees the difference is tiny.
    pub cov: Vec<f64>,
    /// The estimated optimal shrinkage intensity δ = min(1, b̄²/d²), in `[0, 1]`.
    pub intensity: f64,
    /// μ = tr(S)/p, the scale of the identity target (the mean variance, 1/n normalisation).
    pub target: f64,
}

/// Ledoit–Wolf shrinkage of the sample covariance of `x` (`n` rows × `p` features, row-major)
/// towards the scaled identity μ·I with μ = tr(S)/p.
///
/// With the paper's normalised Frobenius norm ‖A‖² = tr(A Aᵀ)/p, its consistent estimators are,
/// for the centred rows `x_k`,
///
/// * d² = ‖S − μI‖²,
/// * b̄² = (1/n²) Σ_k ‖x_k x_kᵀ − S‖², computed as (1/(n·p)) · (Σ_k |x_k|⁴ / n − tr(S²)),
/// * b² = min(b̄², d²), and the intensity δ = b²/d².
///
/// The data are centred on their own mean (no known-mean variant). When `d² = 0` (S is already
/// a multiple of the identity) δ is 0 and `S` is returned unchanged.
///
/// # Panics
/// If `x.len() != n * p`, `n == 0` or `p == 0`: these are programming errors of the caller,
/// whose input checks come first.
pub fn ledoit_wolf(x: &[f64], n: usize, p: usize) -> LwFit {
    assert!(
        n > 0 && p > 0,
        "ledoit_wolf needs at least one row and one feature"
    );
    assert_eq!(x.len(), n * p, "ledoit_wolf: data length is not n * p");

    let mut mean = vec![0.0; p];
    for row in x.chunks_exact(p) {
        for (m, v) in mean.iter_mut().zip(row) {
            *m += v;
        }
    }
    for m in &mut mean {
        *m /= n as f64;
    }

    // S (1/n) and Σ_k |x_k|⁴ in one pass over the centred rows.
    let mut s = vec![0.0; p * p];
    let mut sum_norm4 = 0.0;
    let mut c = vec![0.0; p];
    for row in x.chunks_exact(p) {
        for ((ci, v), m) in c.iter_mut().zip(row).zip(&mean) {
            *ci = v - m;
        }
        let norm2: f64 = c.iter().map(|v| v * v).sum();
        sum_norm4 += norm2 * norm2;
        for i in 0..p {
            for j in 0..=i {
                s[i * p + j] += c[i] * c[j];
            }
        }
    }
    for i in 0..p {
        for j in 0..=i {
            let v = s[i * p + j] / n as f64;
            s[i * p + j] = v;
            s[j * p + i] = v;
        }
    }

    let pf = p as f64;
    let nf = n as f64;
    let trace: f64 = (0..p).map(|i| s[i * p + i]).sum();
    let mu = trace / pf;
    let tr_s2: f64 = s.iter().map(|v| v * v).sum();
    // d² = ‖S − μI‖² = (tr(S²) − 2μ tr(S) + p μ²)/p = tr(S²)/p − μ².
    let d2 = (tr_s2 / pf - mu * mu).max(0.0);
    let bbar2 = ((sum_norm4 / nf - tr_s2) / (nf * pf)).max(0.0);
    let b2 = bbar2.min(d2);
    let intensity = if d2 > 0.0 {
        (b2 / d2).clamp(0.0, 1.0)
    } else {
        0.0
    };

    let mut cov = s;
    for v in &mut cov {
        *v *= 1.0 - intensity;
    }
    for i in 0..p {
        cov[i * p + i] += intensity * mu;
    }
    LwFit {
        cov,
        intensity,
        target: mu,
    }
}

/// Diagonal loading: `cov ← cov + λ·(tr(cov)/p)·I`, in place, for a `p × p` row-major matrix.
///
/// `lambda` is relative to the mean variance, so `lambda = 0.01` adds 1 % of the average
/// diagonal entry to every diagonal entry, whatever the units of the features. A `lambda` of 0
/// leaves the matrix unchanged.
///
/// # Panics
/// If `cov.len() != p * p`, or if `lambda` is negative or not finite.
pub fn diagonal_loading(cov: &mut [f64], p: usize, lambda: f64) {
    assert_eq!(
        cov.len(),
        p * p,
        "diagonal_loading: matrix length is not p * p"
    );
    assert!(
        lambda.is_finite() && lambda >= 0.0,
        "diagonal_loading: lambda must be finite and not negative"
    );
    if p == 0 {
        return;
    }
    let trace: f64 = (0..p).map(|i| cov[i * p + i]).sum();
    let add = lambda * trace / p as f64;
    for i in 0..p {
        cov[i * p + i] += add;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::DMatrix;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, StandardNormal};

    fn assert_close(got: &[f64], want: &[f64], tol: f64) {
        assert_eq!(got.len(), want.len());
        for (k, (g, w)) in got.iter().zip(want).enumerate() {
            assert!(
                (g - w).abs() <= tol * w.abs().max(1.0),
                "entry {k}: got {g}, want {w}"
            );
        }
    }

    fn is_spd(m: &[f64], p: usize) -> bool {
        DMatrix::from_row_slice(p, p, m).cholesky().is_some()
    }

    // Data and expected values produced once with numpy 2.4.6 and scikit-learn 1.9.1 (Python 3.11.7):
    //   rng = numpy.random.default_rng(20240611)
    //   A = rng.normal(size=(12, 3)) @ [[2, 0, 0], [0.8, 1, 0], [-0.5, 0.3, 0.5]] + [10, -3, 0.5]
    //   A = numpy.round(A, 3)
    //   cov, shrinkage = sklearn.covariance.ledoit_wolf(A)
    //   mu = numpy.trace(numpy.cov(A.T, bias=True)) / 3
    // (values printed with repr(float(v)), i.e. all 17 significant digits).
    const DATA_A: [f64; 36] = [
        9.089, -3.473, 0.575, 6.809, -2.812, 0.339, 9.602, -3.487, -0.476, 8.893, -3.608, 0.705,
        10.609, -4.208, 0.033, 6.27, -3.692, 0.66, 11.88, -2.761, 0.517, 8.83, -3.049, 0.092,
        9.889, -2.946, 0.928, 11.704, -1.754, 0.296, 10.844, -2.266, 1.348, 7.287, -2.433, -0.012,
    ];
    const SKLEARN_A_SHRINKAGE: f64 = 0.21473054390204002;
    const SKLEARN_A_MU: f64 = 1.2405245231481483;
    const SKLEARN_A_COV: [f64; 9] = [
        2.67711919895741,
        0.25589637933029485,
        0.08225626660244673,
        0.25589637933029485,
        0.6105428854452627,
        0.05385049098335068,
        0.08225626660244673,
        0.05385049098335068,
        0.43391148504177324,
    ];

    // The same session, continuing the same generator:
    //   B = numpy.round(rng.normal(size=(6, 5)) * [1, 2, 0.5, 1.5, 1], 3)
    //   cov, shrinkage = sklearn.covariance.ledoit_wolf(B)
    // Few rows for five features, so the shrinkage is strong.
    const DATA_B: [f64; 30] = [
        -0.869, -0.037, -0.755, -1.792, -0.506, -0.322, -3.807, -0.437, -0.219, -0.132, -0.662,
        -0.008, -0.257, 1.76, -0.809, 0.059, -0.979, 0.427, -1.457, 0.877, -1.195, -2.734, -0.274,
        0.138, -1.521, -0.504, -0.008, -0.018, 1.313, 0.784,
    ];
    const SKLEARN_B_SHRINKAGE: f64 = 0.6217879235378696;
    const SKLEARN_B_MU: f64 = 0.9889267111111112;
    const SKLEARN_B_COV: [f64; 25] = [
        0.674729711794761,
        0.0042836194721190745,
        0.03553119655858091,
        -0.037795730860506915,
        0.10911961560497827,
        0.0042836194721190745,
        1.4576572020477978,
        0.023095520449159985,
        0.10086835183884219,
        0.1368891439304033,
        0.03553119655858091,
        0.023095520449159985,
        0.6651422352683752,
        0.01616699038510416,
        0.0717666870388804,
        -0.037795730860506915,
        0.10086835183884219,
        0.01616699038510416,
        1.2585993955194767,
        -0.06319029746357008,
        0.10911961560497827,
        0.1368891439304033,
        0.0717666870388804,
        -0.06319029746357008,
        0.8885050109251451,
    ];

    #[test]
    fn matches_scikit_learn_on_a_small_correlated_sample() {
        // Reference: scikit-learn 1.9.1 sklearn.covariance.ledoit_wolf (see the constants above).
        let fit = ledoit_wolf(&DATA_A, 12, 3);
        assert!(
            (fit.intensity - SKLEARN_A_SHRINKAGE).abs() < 1e-12,
            "{}",
            fit.intensity
        );
        assert!((fit.target - SKLEARN_A_MU).abs() < 1e-12, "{}", fit.target);
        assert_close(&fit.cov, &SKLEARN_A_COV, 1e-12);
    }

    #[test]
    fn matches_scikit_learn_with_few_rows_per_feature() {
        // Reference: scikit-learn 1.9.1 sklearn.covariance.ledoit_wolf (see the constants above).
        let fit = ledoit_wolf(&DATA_B, 6, 5);
        assert!(
            (fit.intensity - SKLEARN_B_SHRINKAGE).abs() < 1e-12,
            "{}",
            fit.intensity
        );
        assert!((fit.target - SKLEARN_B_MU).abs() < 1e-12, "{}", fit.target);
        assert_close(&fit.cov, &SKLEARN_B_COV, 1e-12);
        // The raw 1/n sample covariance of 6 rows in 5 dimensions is singular up to rounding;
        // the shrunk one is not.
        assert!(is_spd(&fit.cov, 5));
    }

    fn gaussian_rows(n: usize, p: usize, seed: u64) -> Vec<f64> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        (0..n * p)
            .map(|k| {
                let z: f64 = StandardNormal.sample(&mut rng);
                // Distinct scales per feature, so the truth is well conditioned but not μ·I.
                z * (1.0 + (k % p) as f64) + 5.0
            })
            .collect()
    }

    #[test]
    fn intensity_in_unit_interval_and_result_spd() {
        for (n, p, seed) in [
            (3, 8, 1u64),
            (5, 5, 2),
            (10, 20, 3),
            (40, 4, 4),
            (200, 6, 5),
        ] {
            let x = gaussian_rows(n, p, seed);
            let fit = ledoit_wolf(&x, n, p);
            assert!(
                (0.0..=1.0).contains(&fit.intensity),
                "n={n} p={p}: δ = {}",
                fit.intensity
            );
            assert!(is_spd(&fit.cov, p), "n={n} p={p}: not SPD");
            // Symmetric by construction.
            for i in 0..p {
                for j in 0..p {
                    assert_eq!(fit.cov[i * p + j], fit.cov[j * p + i]);
                }
            }
            // Shrinkage towards μ·I keeps the trace.
            let tr: f64 = (0..p).map(|i| fit.cov[i * p + i]).sum();
            assert!((tr - fit.target * p as f64).abs() < 1e-9 * tr.abs().max(1.0));
        }
    }

    #[test]
    fn intensity_vanishes_when_rows_far_outnumber_features() {
        // δ estimates a quantity of order p/n times a constant; for a fixed, well-conditioned
        // truth it must fall as n grows and be small for n ≫ p.
        let p = 4;
        let small = ledoit_wolf(&gaussian_rows(50, p, 7), 50, p).intensity;
        let large = ledoit_wolf(&gaussian_rows(50_000, p, 8), 50_000, p).intensity;
        assert!(large < 0.01, "δ = {large} at n = 50000");
        assert!(large < small, "δ did not fall: {small} → {large}");
    }

    #[test]
    fn identity_shaped_sample_needs_no_shrinkage() {
        // Four rows at (±1, ±1): S = I exactly, so d² = 0 and δ = 0.
        let x = [1.0, 1.0, 1.0, -1.0, -1.0, 1.0, -1.0, -1.0];
        let fit = ledoit_wolf(&x, 4, 2);
        assert_eq!(fit.intensity, 0.0);
        assert_close(&fit.cov, &[1.0, 0.0, 0.0, 1.0], 1e-15);
    }

    #[test]
    fn diagonal_loading_adds_a_share_of_the_mean_variance() {
        let mut cov = vec![4.0, 1.0, 1.0, 2.0];
        diagonal_loading(&mut cov, 2, 0.5);
        // mean variance 3, so 1.5 is added to each diagonal entry.
        assert_eq!(cov, vec![5.5, 1.0, 1.0, 3.5]);
        diagonal_loading(&mut cov, 2, 0.0);
        assert_eq!(cov, vec![5.5, 1.0, 1.0, 3.5]);
        // A singular matrix becomes SPD.
        let mut sing = vec![1.0, 1.0, 1.0, 1.0];
        assert!(!is_spd(&sing, 2));
        diagonal_loading(&mut sing, 2, 1e-3);
        assert!(is_spd(&sing, 2));
    }
}
