//! Tests of [`super`].

use super::*;
use rand_distr::{Distribution, StandardNormal};

fn assert_close(what: &str, got: &[f64], want: &[f64], tol: f64) {
    assert_eq!(got.len(), want.len(), "{what}: length");
    for (k, (g, w)) in got.iter().zip(want).enumerate() {
        assert!(
            (g - w).abs() <= tol,
            "{what}[{k}]: got {g}, want {w}, tol {tol}"
        );
    }
}

// A clear-cut example: 24 good rows and 16 rows scattered widely around a far-away point,
// produced once with numpy 2.4.6, scipy 1.17.1 and scikit-learn 1.9.1 (Python 3.11.7):
//   L = [[1, 0, 0], [0.6, 0.8, 0], [-0.3, 0.2, 0.5]]
//   rng = numpy.random.default_rng(5)
//   good = rng.normal(size=(24, 3)) @ L.T + [20, 5, -1]
//   bad = rng.normal(size=(16, 3)) * 4 + [32, -7, 8]
//   X = numpy.vstack([good, bad]); perm = rng.permutation(40); X = numpy.round(X[perm], 3)
//   m = sklearn.covariance.MinCovDet(random_state=0).fit(X)
// h = 22. An exhaustive search over all 276 subsets of 22 of the 24 good rows (numpy slogdet)
// gives the same optimum, and MinCovDet returned it for every random_state from 0 to 29.
const CLEAR: [f64; 120] = [
    19.93, 6.038, -0.907, 20.189, 5.096, -0.756, 30.591, -5.94, 6.143, 20.845, 6.18, -1.389,
    35.868, -8.442, 4.116, 19.635, 4.659, -0.8, 26.806, -11.804, 2.87, 20.033, 5.055, -1.995,
    18.819, 4.882, -1.047, 38.934, -5.609, 4.234, 20.553, 5.282, -1.473, 29.466, -10.974, 8.192,
    19.767, 4.655, -0.5, 19.447, 4.041, -0.617, 32.641, -8.521, 8.402, 30.085, -9.885, 5.921,
    18.268, 3.894, -1.079, 19.042, 5.705, -0.291, 19.696, 3.979, -1.316, 27.456, -5.315, 3.781,
    18.002, 4.019, -0.897, 20.42, 6.161, -0.844, 21.635, 6.199, -2.053, 20.41, 5.91, -1.778,
    31.784, -1.645, 5.932, 39.605, -5.084, 1.696, 18.711, 4.243, -0.628, 19.669, 4.129, -0.344,
    19.198, 3.459, -1.148, 26.963, -14.347, 7.181, 36.275, -8.3, 9.683, 35.628, -6.929, 5.539,
    19.371, 4.232, -1.265, 18.909, 3.261, -0.831, 20.568, 7.286, -0.363, 19.743, 4.061, -1.206,
    32.412, -10.46, 11.583, 26.912, -4.544, 3.213, 30.71, -7.027, 6.219, 18.891, 5.271, -0.075,
];
/// The scattered rows (perm >= 24).
const CLEAR_PLANTED: [usize; 16] = [2, 4, 6, 9, 11, 14, 15, 19, 24, 25, 29, 30, 31, 36, 37, 38];
/// numpy.nonzero(m.raw_support_)
const SK_RAW_SUPPORT: [usize; 22] = [
    0, 1, 3, 5, 7, 8, 10, 12, 13, 16, 17, 18, 20, 21, 23, 26, 27, 28, 32, 33, 35, 39,
];
/// m.raw_location_
const SK_RAW_LOCATION: [f64; 3] = [19.524909090909095, 4.736909090909092, -0.9629999999999999];
/// m.raw_covariance_ (the 1/h covariance of the support, before correction)
const SK_RAW_COVARIANCE: [f64; 9] = [
    0.5284829008264468,
    0.38261176446281003,
    -0.13712181818181832,
    0.38261176446281003,
    0.7447414462809917,
    -0.041122454545454545,
    -0.13712181818181832,
    -0.041122454545454545,
    0.21265990909090912,
];
/// numpy.linalg.slogdet(m.raw_covariance_)[1]
const SK_RAW_LOGDET: f64 = -3.1704188719607416;
/// m.location_
const SK_LOCATION: [f64; 3] = [19.656291666666664, 4.904041666666666, -0.9834166666666667];
/// m.covariance_
const SK_COVARIANCE: [f64; 9] = [
    0.7528173732030398,
    0.6126899480437792,
    -0.2078968633738363,
    0.6126899480437792,
    1.0941834786430438,
    -0.03985983572101173,
    -0.2078968633738363,
    -0.03985983572101173,
    0.27935357164513835,
];
/// (h/n) / scipy.stats.chi2.cdf(chi2.ppf(h/n, 3), 5) with h = 22, n = 40
const SCIPY_C_RAW: f64 = 2.24325685247914;
/// 0.975 / scipy.stats.chi2.cdf(chi2.ppf(0.975, 3), 5)
const SCIPY_C_975: f64 = 1.078478718355326;

#[test]
fn matches_scikit_learn_min_cov_det_on_a_clear_cut_example() {
    // Reference: scikit-learn 1.9.1 MinCovDet(random_state=0), see the constants above.
    let fit = fast_mcd(&CLEAR, 40, 3, &McdOptions::default()).unwrap();
    assert_eq!(fit.support, SK_RAW_SUPPORT);
    // Same subset, so the raw estimates agree to rounding.
    assert_close("raw mean", &fit.raw_mean, &SK_RAW_LOCATION, 1e-12);
    let uncorrected: Vec<f64> = fit.raw_cov.iter().map(|v| v / fit.consistency).collect();
    assert_close("raw cov", &uncorrected, &SK_RAW_COVARIANCE, 1e-12);
    assert!((fit.raw_log_det - SK_RAW_LOGDET).abs() < 1e-10);
    // Consistency factors against scipy.stats.chi2.
    assert!(
        (fit.consistency - SCIPY_C_RAW).abs() < 1e-9,
        "{}",
        fit.consistency
    );
    assert!((fit.reweight_consistency - SCIPY_C_975).abs() < 1e-9);
    // Reweighting: exactly the planted rows are set aside (scikit-learn's ~support_ is the
    // same set; the largest kept corrected d² is 5.09, the smallest planted one 414, the
    // cutoff 9.35), and the final estimates agree to rounding.
    assert_eq!(fit.outliers, CLEAR_PLANTED);
    assert_close("mean", &fit.mean, &SK_LOCATION, 1e-12);
    assert_close("cov", &fit.cov, &SK_COVARIANCE, 1e-12);
}

// A harder example: 48 good rows and a tight cluster of 12 bad ones, so the search must pick
// 32 of the 48 good rows. Produced the same way (same L, seed 7, 60 rows):
//   good = rng.normal(size=(48, 3)) @ L.T + [20, 5, -1]
//   bad = rng.normal(size=(12, 3)) * 0.3 + [26, 1, 2]
// scikit-learn 1.9.1's MinCovDet (30 random starts for n ≤ 500) returned, for every
// random_state 0..29, one subset with ln det -5.083093199643939. That subset is a fixed point
// of the C-step but not the optimum: the subset our search returns has ln det
// -5.160265772304873 (numpy.linalg.slogdet of the 1/h covariance of those rows, also a C-step
// fixed point). So here we require a determinant at least as low as the reference's.
const SMALL: [f64; 180] = [
    26.002, 0.887, 1.91, 19.359, 6.215, -0.026, 25.668, 0.635, 2.401, 25.792, 0.902, 1.832, 19.824,
    4.729, -0.637, 19.191, 5.363, -0.949, 20.001, 5.24, -1.078, 20.757, 4.778, -1.007, 19.84,
    4.124, -0.598, 20.695, 4.342, -1.706, 17.871, 4.4, -1.065, 25.954, 1.29, 2.004, 19.205, 5.041,
    -1.628, 19.967, 5.688, -1.105, 20.089, 4.581, -1.204, 25.799, 0.684, 2.101, 21.052, 5.627,
    -1.025, 18.801, 4.34, -0.337, 26.136, 0.838, 1.957, 25.586, 0.758, 2.496, 20.203, 4.751, -1.09,
    20.52, 4.485, -1.402, 20.164, 6.894, -1.016, 25.848, 1.088, 1.99, 19.811, 5.433, -0.84, 19.803,
    3.99, -1.169, 19.461, 4.638, -0.791, 21.442, 5.812, -1.583, 20.06, 6.108, -0.996, 20.667,
    6.551, -1.25, 19.142, 5.263, -0.452, 19.556, 5.667, -0.307, 19.75, 6.069, -0.834, 20.689,
    5.152, -1.457, 19.376, 4.79, -0.525, 19.696, 5.1, -0.899, 19.109, 4.102, -1.32, 19.765, 3.845,
    -1.047, 19.38, 5.02, -0.537, 25.812, 0.617, 2.377, 18.002, 2.896, -0.446, 17.965, 3.535, -0.9,
    19.537, 4.644, -0.252, 20.157, 4.945, -2.343, 18.709, 4.503, -1.387, 19.457, 4.633, -1.244,
    25.81, 0.472, 2.22, 20.035, 4.178, -1.092, 18.099, 2.828, -1.608, 19.888, 5.021, -0.913, 18.47,
    3.7, -1.126, 26.422, 0.564, 1.937, 18.453, 4.759, -0.304, 18.813, 3.824, -0.858, 20.131, 3.849,
    -0.722, 20.899, 6.455, -1.702, 25.993, 1.021, 1.774, 20.105, 4.319, -1.232, 18.775, 4.326,
    0.062, 19.976, 5.52, -1.029,
];
/// Rows that came from the tight cluster (perm >= 48).
const SMALL_PLANTED: [usize; 12] = [0, 2, 3, 11, 15, 18, 19, 23, 39, 46, 51, 56];
/// numpy.linalg.slogdet(m.raw_covariance_)[1] for MinCovDet(random_state=0) on SMALL.
const SK_SMALL_RAW_LOGDET: f64 = -5.083093199643939;
/// numpy.linalg.slogdet of the 1/h covariance of the subset our search returns.
const NUMPY_SMALL_BEST_LOGDET: f64 = -5.160265772304873;

#[test]
fn reaches_at_least_the_reference_determinant_on_a_harder_example() {
    let fit = fast_mcd(&SMALL, 60, 3, &McdOptions::default()).unwrap();
    assert!(
        fit.raw_log_det <= SK_SMALL_RAW_LOGDET + 1e-12,
        "{}",
        fit.raw_log_det
    );
    assert!((fit.raw_log_det - NUMPY_SMALL_BEST_LOGDET).abs() < 1e-10);
    for i in SMALL_PLANTED {
        assert!(fit.outliers.contains(&i), "planted row {i} was kept");
        assert!(!fit.support.contains(&i), "planted row {i} in the support");
    }
}

#[test]
fn same_seed_same_fit_and_other_seeds_find_the_same_optimum() {
    let a = fast_mcd(&SMALL, 60, 3, &McdOptions::default()).unwrap();
    let b = fast_mcd(&SMALL, 60, 3, &McdOptions::default()).unwrap();
    assert_eq!(a.support, b.support);
    assert_eq!(a.cov, b.cov);
    assert_eq!(a.mean, b.mean);
    for seed in 1..5 {
        let opts = McdOptions {
            seed,
            ..McdOptions::default()
        };
        let c = fast_mcd(&SMALL, 60, 3, &opts).unwrap();
        assert_eq!(c.support, a.support, "seed {seed}");
    }
}

/// Data reproduced bit for bit by a Python script: a 64-bit LCG with Knuth's MMIX constants,
/// uniforms `(state >> 11)·2⁻⁵³`, normals approximated by the sum of 12 uniforms minus 6.
/// Every 10th row (i % 10 == 3) is from a shifted, tighter cluster.
fn lcg_rows(n: usize, seed: u64) -> Vec<f64> {
    let mut s = seed;
    let mut uniform = || {
        s = s
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (s >> 11) as f64 * (2.0f64).powi(-53)
    };
    let l = [
        [1.0, 0.0, 0.0, 0.0],
        [0.5, 1.0, 0.0, 0.0],
        [0.2, -0.4, 0.8, 0.0],
        [0.0, 0.3, 0.3, 0.6],
    ];
    let mu = [50.0, 10.0, -5.0, 2.0];
    let mut out = Vec::with_capacity(n * 4);
    for i in 0..n {
        let mut z = [0.0; 4];
        for zk in &mut z {
            let mut acc = 0.0;
            for _ in 0..12 {
                acc += uniform();
            }
            *zk = acc - 6.0;
        }
        if i % 10 == 3 {
            out.extend([
                mu[0] + 6.0 + z[0] * 0.5,
                mu[1] - 6.0 + z[1] * 0.5,
                mu[2] + 4.0 + z[2] * 0.5,
                mu[3] + z[3] * 0.5,
            ]);
        } else {
            for a in 0..4 {
                let mut acc = mu[a];
                for b in 0..=a {
                    acc += l[a][b] * z[b];
                }
                out.push(acc);
            }
        }
    }
    out
}

#[test]
fn nested_search_agrees_with_scikit_learn_on_2000_rows() {
    // Reference: the same 2,000 rows in Python (the generator above, written again there),
    // sklearn.covariance.MinCovDet(random_state=0).fit(X), scikit-learn 1.9.1, numpy 2.4.6.
    // The first row and the sum of all values pin the generator.
    let x = lcg_rows(2000, 42);
    assert_eq!(
        &x[..4],
        &[
            48.10193415469782,
            8.998915095051123,
            -5.100305422550976,
            2.4860949299829596
        ]
    );
    assert!((x.iter().sum::<f64>() - 114696.26558900869).abs() < 1e-8);

    const SK_LOCATION: [f64; 4] = [
        49.9749325210784,
        9.977396012706524,
        -5.001083750585834,
        1.994341517428683,
    ];
    const SK_COVARIANCE: [f64; 16] = [
        1.0303269820162915,
        0.5594016558057949,
        0.1943801366802685,
        0.01344879514229688,
        0.5594016558057949,
        1.339388362504008,
        -0.28730437935299225,
        0.31930769076270804,
        0.1943801366802685,
        -0.28730437935299225,
        0.8140360229250868,
        0.12578156720461248,
        0.01344879514229688,
        0.31930769076270804,
        0.12578156720461248,
        0.5697971633406681,
    ];
    // Over random_state 0..4, scikit-learn's own answers spread by at most 0.003 in the
    // location and 0.0097 in a covariance entry, set aside 233 or 234 rows (all 200 planted),
    // and reached raw ln det between -4.03361 and -4.03297. Both programs are randomised
    // searches for the same optimum, so we allow about three times that spread.
    let fit = fast_mcd(&x, 2000, 4, &McdOptions::default()).unwrap();
    assert_close("mean", &fit.mean, &SK_LOCATION, 0.01);
    assert_close("cov", &fit.cov, &SK_COVARIANCE, 0.03);
    for i in (3..2000).step_by(10) {
        assert!(fit.outliers.contains(&i), "planted row {i} was kept");
    }
    assert!(
        (225..=245).contains(&fit.outliers.len()),
        "{} outliers",
        fit.outliers.len()
    );
    assert!(
        fit.raw_log_det < -4.03297 + 0.002,
        "raw ln det {}",
        fit.raw_log_det
    );
    // h = ⌊(2000 + 4 + 1)/2⌋
    assert_eq!(fit.support.len(), 1002);
}

fn gaussian(n: usize, p: usize, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut x = Vec::with_capacity(n * p);
    for _ in 0..n {
        let z: Vec<f64> = (0..p).map(|_| StandardNormal.sample(&mut rng)).collect();
        // A correlated truth: x = A z + m with a fixed lower-triangular A.
        for a in 0..p {
            let mut acc = 3.0 * a as f64;
            for (b, zb) in z.iter().enumerate().take(a + 1) {
                acc += zb * if a == b { 1.0 + 0.5 * a as f64 } else { 0.4 };
            }
            x.push(acc);
        }
    }
    x
}

#[test]
fn without_outliers_the_reweighted_fit_is_close_to_the_sample_fit() {
    let (n, p) = (5000, 3);
    let x = gaussian(n, p, 11);
    let all: Vec<usize> = (0..n).collect();
    let (m, s) = mean_cov(&Rows { x: &x, n, p }, &all);
    let fit = fast_mcd(&x, n, p, &McdOptions::default()).unwrap();
    // With the consistency factors, both estimate the same Σ. The reweighted MCD has lower
    // efficiency at the normal, so the two differ by sampling noise of order
    // sqrt(2/n)·σᵢσⱼ ≈ 0.02 σᵢσⱼ; we allow 0.06 σᵢσⱼ (about three times that).
    for i in 0..p {
        let si = s[i * p + i].sqrt();
        assert!((fit.mean[i] - m[i]).abs() < 0.05 * si, "mean {i}");
        for j in 0..p {
            let sj = s[j * p + j].sqrt();
            let diff = (fit.cov[i * p + j] - s[i * p + j]).abs();
            assert!(
                diff < 0.06 * si * sj,
                "cov ({i},{j}): {} vs {}",
                fit.cov[i * p + j],
                s[i * p + j]
            );
        }
    }
    // About 2.5 % of Gaussian rows lie beyond the 0.975 quantile.
    let share = fit.outliers.len() as f64 / n as f64;
    assert!((0.01..0.04).contains(&share), "share set aside {share}");
}

#[test]
fn the_c_step_never_raises_the_determinant() {
    // The paper's Theorem 1, on the planted example from many random h-subsets.
    let data = Rows {
        x: &SMALL,
        n: 60,
        p: 3,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let mut d2 = vec![0.0; 60];
    for _ in 0..50 {
        let mut h0 = sample(&mut rng, 60, 32).into_vec();
        h0.sort_unstable();
        let (mean, cov) = mean_cov(&data, &h0);
        let mut cur = Factor::new(&cov, 3).unwrap().log_det;
        let mut m = mean;
        let mut c = cov;
        for _ in 0..10 {
            let f = Factor::new(&c, 3).unwrap();
            let next = concentrate(&data, &m, &f, 32, &mut d2).unwrap();
            assert!(next.log_det <= cur + 1e-12, "{} > {cur}", next.log_det);
            cur = next.log_det;
            m = next.mean;
            c = next.cov;
        }
        // And the search's answer is at least as good as any of these.
        assert!(NUMPY_SMALL_BEST_LOGDET <= cur + 1e-12);
    }
}

#[test]
fn full_support_is_the_classical_estimate() {
    let opts = McdOptions {
        support_fraction: Some(1.0),
        ..McdOptions::default()
    };
    let fit = fast_mcd(&SMALL, 60, 3, &opts).unwrap();
    let all: Vec<usize> = (0..60).collect();
    let (m, s) = mean_cov(
        &Rows {
            x: &SMALL,
            n: 60,
            p: 3,
        },
        &all,
    );
    assert_eq!(fit.support, all);
    assert_eq!(fit.consistency, 1.0);
    assert_close("raw mean", &fit.raw_mean, &m, 1e-12);
    assert_close("raw cov", &fit.raw_cov, &s, 1e-12);
}

#[test]
fn a_support_fraction_sets_h() {
    let opts = McdOptions {
        support_fraction: Some(0.75),
        ..McdOptions::default()
    };
    let fit = fast_mcd(&SMALL, 60, 3, &opts).unwrap();
    assert_eq!(fit.support.len(), 45);
    // 48 good rows exist, so a 45-row support can and should avoid all 12 planted ones.
    for i in SMALL_PLANTED {
        assert!(!fit.support.contains(&i), "planted row {i} in the support");
    }
}

#[test]
fn bad_input_is_refused_with_a_reason() {
    let err = |x: &[f64], n, p, o: &McdOptions| fast_mcd(x, n, p, o).unwrap_err().to_string();
    let d = McdOptions::default();
    assert!(err(&SMALL[..179], 60, 3, &d).contains("do not make 60 rows"));
    let mut bad = SMALL.to_vec();
    bad[7] = f64::NAN;
    assert!(err(&bad, 60, 3, &d).contains("data row 2 (0-based), feature 1"));
    assert!(err(&SMALL[..9], 3, 3, &d).contains("at least 4"));
    let q = McdOptions {
        reweight_quantile: 1.0,
        ..McdOptions::default()
    };
    assert!(err(&SMALL, 60, 3, &q).contains("quantile"));
    let f = McdOptions {
        support_fraction: Some(1.5),
        ..McdOptions::default()
    };
    assert!(err(&SMALL, 60, 3, &f).contains("support fraction"));
    // A constant feature: every covariance is singular.
    let mut flat = SMALL.to_vec();
    for r in 0..60 {
        flat[r * 3 + 2] = 1.25;
    }
    assert!(err(&flat, 60, 3, &d).contains("hyperplane"));
    // More than half the rows identical: the subsets are singular, the full data are not.
    let mut tied = SMALL.to_vec();
    for r in 0..40 {
        tied[r * 3..r * 3 + 3].copy_from_slice(&[20.0, 5.0, -1.0]);
    }
    assert!(err(&tied, 60, 3, &d).contains("hyperplane"));
}
