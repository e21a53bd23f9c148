//! The core's scoring against worked examples published outside the project
//! (values copied into shared/reference-values.md, sources named beside each check).

use ellipsoid_core::Model;
use ellipsoid_tests::{raw_params, standardised_params};
use nalgebra::DMatrix;

/// scipy's `scipy.spatial.distance.mahalanobis` docstring: VI = [[1, .5, .5], [.5, 1, .5], [.5, .5, 1]]
/// is the *inverse* covariance, and the mean is the second argument [0, 1, 0].
#[test]
fn scipy_mahalanobis_docstring_cases() {
    let vi = DMatrix::from_row_slice(3, 3, &[1.0, 0.5, 0.5, 0.5, 1.0, 0.5, 0.5, 0.5, 1.0]);
    let cov = vi.try_inverse().unwrap();
    let cov: Vec<f64> = (0..9).map(|k| cov[(k / 3, k % 3)]).collect();
    let model = Model::new(raw_params::<3>(&[0.0, 1.0, 0.0], &cov).unwrap()).unwrap();
    let cases: [([f32; 3], f64); 3] = [
        ([1.0, 0.0, 0.0], 1.0),
        ([0.0, 2.0, 0.0], 1.0),
        ([2.0, 0.0, 0.0], 1.732_050_807_568_877_2),
    ];
    for (x, want) in cases {
        let d = f64::from(model.score(&x).unwrap().d2).sqrt();
        assert!((d - want).abs() < 1e-6, "{x:?}: {d} vs {want}");
    }
}

/// Standard bivariate normal density (mean 0, identity covariance), from the closed form
/// (2π)⁻¹ exp(−½‖x‖²): pdf([1,1]) = 0.05854983152431917, pdf([1,2]) = 0.013064233284684921.
#[test]
fn standard_bivariate_density() {
    let model = Model::new(raw_params::<2>(&[0.0, 0.0], &[1.0, 0.0, 0.0, 1.0]).unwrap()).unwrap();
    for (x, want) in [
        ([1.0f32, 1.0], 0.058_549_831_524_319_17f64),
        ([1.0, 2.0], 0.013_064_233_284_684_921),
    ] {
        let got = f64::from(model.log_density(&x).unwrap()).exp();
        assert!((got - want).abs() / want < 1e-6, "{x:?}: {got} vs {want}");
    }
}

/// NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.1: the mean vector and
/// covariance of five observations of three variables. A model built from the published mean and
/// covariance scores each observation, and over the fitted rows Σ d² = (n − 1)·p = 12 for any data
/// (an identity of the sample covariance).
#[test]
fn nist_example_d2_sums_to_n_minus_1_times_p() {
    let rows: [[f32; 3]; 5] = [
        [4.0, 2.0, 0.60],
        [4.2, 2.1, 0.59],
        [3.9, 2.0, 0.58],
        [4.3, 2.1, 0.62],
        [4.1, 2.2, 0.63],
    ];
    let mean = [4.10, 2.08, 0.604];
    let cov = [
        0.025, 0.0075, 0.00175, 0.0075, 0.007, 0.00135, 0.00175, 0.00135, 0.00043,
    ];
    for params in [
        raw_params::<3>(&mean, &cov).unwrap(),
        standardised_params::<3>(&mean, &cov).unwrap(),
    ] {
        let model = Model::new(params).unwrap();
        let total: f64 = rows
            .iter()
            .map(|r| f64::from(model.score(r).unwrap().d2))
            .sum();
        // The published covariance is rounded, so allow 1e-3 of the total.
        assert!((total - 12.0).abs() < 12e-3, "Σ d² = {total}");
    }
}
