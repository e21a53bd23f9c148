//! Tests of [`super`].

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
    10.165, 6.486, -0.774, 9.071, 5.47, -0.197, 10.101, 2.89, 0.87, 11.372, 1.793, 0.166, 6.486,
    14.402, -0.236, 13.369, 5.213, 0.191, 9.084, 0.853, 1.184, 8.807, 5.872, -0.233, 7.906, 5.548,
    0.634, 11.864, 5.753, 0.219, 11.35, 2.172, 1.979, 12.489, 9.735, 1.562, 11.786, 1.649, 1.168,
    10.526, 7.905, 0.652, 10.657, 3.791, 0.195, 11.87, 11.664, 1.033, 8.245, 2.198, 1.527, 9.908,
    5.237, -0.58, 10.764, 5.897, -0.88, 9.095, 2.315, 0.379, 11.443, 3.027, -0.191, 9.296, 2.153,
    1.655, 11.346, 4.398, -0.209, 10.281, 5.204, 1.739, 10.925, 2.376, 0.503, 6.965, 3.957, 1.505,
    8.279, 1.883, 0.359, 12.689, 1.977, 1.148, 10.356, 0.644, 1.934, 9.837, 1.173, -0.502,
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
