//! The core's f32 scoring against general-purpose reference libraries, in f64:
//! statrs `MultivariateNormal::ln_pdf` and a d² solved through nalgebra's Cholesky,
//! on random SPD matrices for N = 2…16. Tolerance 1e-4 relative, as the f32 budget allows.

use ellipsoid_core::{Model, ModelParams};
use ellipsoid_tests::{d2_reference, raw_params, standardised_params};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use statrs::distribution::{Continuous, MultivariateNormal};

/// A random SPD covariance with unequal scales (0.01 to 100) and real correlation.
fn random_case(n: usize, rng: &mut ChaCha8Rng) -> (Vec<f64>, Vec<f64>) {
    let a = DMatrix::from_fn(n, n, |_, _| rng.random_range(-1.0..1.0));
    let mut s = &a * a.transpose() / n as f64 + DMatrix::identity(n, n) * 0.3;
    let scales: Vec<f64> = (0..n)
        .map(|_| 10f64.powf(rng.random_range(-1.0..2.0)))
        .collect();
    for i in 0..n {
        for j in 0..n {
            s[(i, j)] *= scales[i] * scales[j];
        }
    }
    // statrs needs an exactly symmetric matrix (shared/NOTES.md).
    let s = (&s + s.transpose()) / 2.0;
    let mean: Vec<f64> = (0..n)
        .map(|i| rng.random_range(-50.0..50.0) * scales[i])
        .collect();
    let mut cov = vec![0.0; n * n];
    for i in 0..n {
        for j in 0..n {
            cov[i * n + j] = s[(i, j)];
        }
    }
    (mean, cov)
}

/// A typical reading: μ + L g with g standard normal-ish, scaled so d² spans 0.1·N to 9·N.
fn reading(mean: &[f64], cov: &[f64], rng: &mut ChaCha8Rng) -> Vec<f64> {
    let n = mean.len();
    let l = DMatrix::from_row_slice(n, n, cov).cholesky().unwrap().l();
    let g = DVector::from_fn(n, |_, _| rng.random_range(-1.0f64..1.0) * 3.0);
    let y = l * g;
    mean.iter().zip(y.iter()).map(|(m, v)| m + v).collect()
}

fn check<const N: usize>(seed: u64, build: fn(&[f64], &[f64]) -> Option<ModelParams<N>>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    for _case in 0..20 {
        let (mean, cov) = random_case(N, &mut rng);
        let model = Model::new(build(&mean, &cov).unwrap()).unwrap();
        let mvn = MultivariateNormal::new(mean.clone(), cov.clone()).unwrap();
        for _ in 0..20 {
            let x = reading(&mean, &cov, &mut rng);
            // Compare against the reading the device actually sees (rounded to f32).
            let xf: [f32; N] = core::array::from_fn(|i| x[i] as f32);
            let xr: Vec<f64> = xf.iter().map(|v| f64::from(*v)).collect();
            let want_d2 = d2_reference(&mean, &cov, &xr);
            let got = model.score(&xf).unwrap().d2 as f64;
            assert!(
                (got - want_d2).abs() <= 1e-4 * want_d2.max(1e-3),
                "N={N} d2 {got} vs nalgebra {want_d2}"
            );
            let want_lp = mvn.ln_pdf(&DVector::from_vec(xr.clone()));
            let got_lp = model.log_density(&xf).unwrap() as f64;
            assert!(
                (got_lp - want_lp).abs() <= 1e-4 * want_lp.abs().max(1.0),
                "N={N} ln pdf {got_lp} vs statrs {want_lp}"
            );
            // Contributions sum to d² (1e-5 relative).
            let e = model.explain(&xf).unwrap();
            let sum: f64 = e.contributions.iter().map(|c| f64::from(*c)).sum();
            assert!(
                (sum - got).abs() <= 1e-5 * got.max(1e-3),
                "N={N} contributions sum {sum} vs d2 {got}"
            );
            assert_eq!(e.score.d2.to_bits(), (got as f32).to_bits());
        }
    }
}

macro_rules! dims {
    ($($name:ident = $n:literal),*) => {$(
        #[test]
        fn $name() {
            check::<$n>(1000 + $n, raw_params::<$n>);
            check::<$n>(2000 + $n, standardised_params::<$n>);
        }
    )*};
}

dims!(
    n2 = 2,
    n3 = 3,
    n4 = 4,
    n5 = 5,
    n6 = 6,
    n7 = 7,
    n8 = 8,
    n9 = 9,
    n10 = 10,
    n11 = 11,
    n12 = 12,
    n13 = 13,
    n14 = 14,
    n15 = 15,
    n16 = 16
);
