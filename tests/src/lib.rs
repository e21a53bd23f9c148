//! Cross-crate and outside-reference tests for Ellipsoid live in `tests/tests/`.
//!
//! This library holds the small helpers they share: building core models from an `f64` mean and
//! covariance through nalgebra's Cholesky, the way the trainer does; the golden models
//! ([`golden`]); and the pinned-scores files ([`pins`]).

pub mod golden;
pub mod pins;

use ellipsoid_core::{AlarmPolicy, ModelMeta, ModelParams, Preprocess, Thresholds};
use nalgebra::{DMatrix, DVector};

/// `W = L⁻¹` of a covariance (row-major, `n × n`), by nalgebra's Cholesky. `None` if not SPD.
pub fn inverse_cholesky(cov: &[f64], n: usize) -> Option<DMatrix<f64>> {
    let s = DMatrix::from_row_slice(n, n, cov);
    let l = s.cholesky()?.l();
    l.solve_lower_triangular(&DMatrix::identity(n, n))
}

/// Core parameters for a raw-unit Gaussian (no standardisation): offset 0, scale 1.
pub fn raw_params<const N: usize>(mean: &[f64], cov: &[f64]) -> Option<ModelParams<N>> {
    let w = inverse_cholesky(cov, N)?;
    let mut p = ModelParams {
        meta: ModelMeta::default(),
        preprocess: Preprocess::identity(),
        mean: [0.0; N],
        w: [[0.0; N]; N],
        thresholds: Thresholds {
            alarm: 10.0,
            clear: 5.0,
        },
        policy: AlarmPolicy::default(),
    };
    for i in 0..N {
        p.mean[i] = mean[i] as f32;
        for j in 0..=i {
            p.w[i][j] = w[(i, j)] as f32;
        }
    }
    Some(p)
}

/// Core parameters the way the trainer builds them: offset = mean, scale = 1/sd, and `W` from the
/// correlation matrix, so the device works in a well-conditioned space.
pub fn standardised_params<const N: usize>(mean: &[f64], cov: &[f64]) -> Option<ModelParams<N>> {
    let sd: Vec<f64> = (0..N).map(|i| cov[i * N + i].sqrt()).collect();
    let corr: Vec<f64> = (0..N * N)
        .map(|k| cov[k] / (sd[k / N] * sd[k % N]))
        .collect();
    let zero = vec![0.0; N];
    let mut p = raw_params::<N>(&zero, &corr)?;
    for i in 0..N {
        p.preprocess.offset[i] = mean[i] as f32;
        p.preprocess.scale[i] = (1.0 / sd[i]) as f32;
    }
    Some(p)
}

/// `d²` in `f64` by nalgebra: solve `L y = x − μ`, `d² = ‖y‖²`.
pub fn d2_reference(mean: &[f64], cov: &[f64], x: &[f64]) -> f64 {
    let n = mean.len();
    let l = DMatrix::from_row_slice(n, n, cov)
        .cholesky()
        .expect("SPD")
        .l();
    let d = DVector::from_iterator(n, x.iter().zip(mean).map(|(a, b)| a - b));
    let y = l.solve_lower_triangular(&d).expect("solvable");
    y.norm_squared()
}
