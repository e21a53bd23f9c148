//! Seeded Monte-Carlo checks that the default limits keep their promise: baselines drawn from
//! known Gaussians (mixed scales and correlations; invented test data), fitted with the trainer's
//! own estimators, limits worked out as `fit` works them out, and each fitted model's *true*
//! false-alarm rate computed against the known distribution (importance sampling of the
//! Gaussian quadratic form, unbiased; see `stats::qform`). The source of truth is the known
//! distribution itself. The full study, with larger cells, is `examples/threshold_study.rs`.

use ellipsoid_trainer::fit::{refit_rows, Shrinkage};
use ellipsoid_trainer::pipeline::limits::{finite_limits, LimitSpec};
use ellipsoid_trainer::stats::autocorr::{effective_sizes, Lag1, Lag1Set};
use ellipsoid_trainer::stats::limit::hotelling_ucl;
use ellipsoid_trainer::stats::moments::{correlation_of, Moments};
use ellipsoid_trainer::stats::qform::QForm;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// A known Gaussian: mean, Cholesky factor of the covariance (row-major, lower).
struct Truth {
    p: usize,
    mean: Vec<f64>,
    chol: Vec<f64>,
}

impl Truth {
    /// Scales from 0.01 to 100 and a random correlation structure, seeded.
    fn new(p: usize, seed: u64) -> Truth {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut chol = vec![0.0; p * p];
        for i in 0..p {
            let scale = 10f64.powf(-2.0 + 4.0 * i as f64 / (p.max(2) - 1) as f64);
            for j in 0..i {
                chol[i * p + j] = scale * rng.random_range(-0.8..0.8);
            }
            chol[i * p + i] = scale * rng.random_range(0.3..1.0);
        }
        let mean = (0..p).map(|i| 100.0 * i as f64 - 3.0).collect();
        Truth { p, mean, chol }
    }

    fn rows(&self, m: usize, rng: &mut ChaCha8Rng) -> Vec<f64> {
        let p = self.p;
        let mut out = Vec::with_capacity(m * p);
        let mut z = vec![0.0; p];
        for _ in 0..m {
            for v in z.iter_mut() {
                *v = rng.sample(StandardNormal);
            }
            for i in 0..p {
                let x: f64 = (0..=i).map(|j| self.chol[i * p + j] * z[j]).sum();
                out.push(self.mean[i] + x);
            }
        }
        out
    }
}

struct Cell {
    achieved_mean: f64,
    conf_exceeded_share: f64,
}

/// `baselines` baselines of `m` rows; for each, the limit `fit` would choose and the true rate
/// there. With `independent` the confidence limit is checked too (fixed effective sizes).
fn run_cell(
    p: usize,
    m: usize,
    alpha: f64,
    shrinkage: Shrinkage,
    baselines: usize,
    sims: Option<usize>,
    seed: u64,
) -> Cell {
    let truth = Truth::new(p, seed);
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0xbead);
    let spec = LimitSpec {
        sims,
        seed,
        ..LimitSpec::default()
    };
    // For the plain fit the confidence limit depends only on p and the effective sizes, which
    // these independent rows leave at m: work it out once (with `independent_rows`). The mean
    // check below uses each baseline's own lag-1 estimate, exactly as `fit` does.
    let plain = shrinkage == Shrinkage::None;
    let once = plain.then(|| {
        let ind = LimitSpec {
            independent_rows: true,
            ..spec.clone()
        };
        let id: Vec<f64> = (0..p * p)
            .map(|k| f64::from(u8::from(k / p == k % p)))
            .collect();
        finite_limits(p, m as u64, &[], &id, false, shrinkage, alpha, &ind).unwrap()
    });
    let (mut sum, mut exceeded) = (0.0, 0usize);
    for b in 0..baselines {
        let x = truth.rows(m, &mut rng);
        let (mean, cov) = refit_rows(&x, m, p, false, shrinkage).unwrap();
        // Lag-1 autocorrelation as the reader gathers it (these rows are independent).
        let mut lag = Lag1::new(p);
        lag.push_block(&x);
        let mut mo = Moments::new(p);
        mo.push_block(&x);
        let mut set = Lag1Set::default();
        set.add(lag);
        let diag: Vec<f64> = (0..p).map(|i| mo.comoment(i, i)).collect();
        let lag1 = set.rho(&mo.mean(), &diag);
        let q = QForm::from_estimate(&truth.mean, &truth.chol, &mean, &cov).unwrap();
        let (t, c) = match &once {
            Some(fl) => (
                hotelling_ucl(&effective_sizes(p, m as f64, &lag1), alpha).unwrap(),
                fl.confidence.unwrap(),
            ),
            None => {
                let spec_b = LimitSpec {
                    seed: spec.seed.wrapping_add(b as u64),
                    ..spec.clone()
                };
                // As `fit` does: simulated baselines drawn from the plain sample correlation.
                let corr = correlation_of(&mo.covariance(), p);
                let fl = finite_limits(p, m as u64, &lag1, &corr, false, shrinkage, alpha, &spec_b)
                    .unwrap();
                (fl.hotelling.unwrap(), fl.confidence.unwrap())
            }
        };
        sum += q.tail_sampled(t, 400, &mut rng).0;
        exceeded += usize::from(q.tail(c) > alpha);
    }
    Cell {
        achieved_mean: sum / baselines as f64,
        conf_exceeded_share: exceeded as f64 / baselines as f64,
    }
}

/// Plain fit, Phase II Hotelling limit: the mean achieved rate over baselines is within ±25 % of
/// the target, and the 90 % confidence limit is exceeded by at most a tenth of the baselines
/// (plus three binomial standard errors of the share: √(0.09/n)).
#[test]
fn plain_fit_keeps_its_promise_on_average_and_with_confidence() {
    for (p, m, alpha, n) in [
        (3usize, 30usize, 1e-3, 300usize),
        (8, 40, 1e-3, 300),
        (5, 200, 1e-4, 200),
    ] {
        let c = run_cell(p, m, alpha, Shrinkage::None, n, Some(2000), 17 + p as u64);
        let ratio = c.achieved_mean / alpha;
        assert!(
            (0.75..=1.25).contains(&ratio),
            "p {p} m {m} α {alpha}: achieved {:.3e}, {ratio:.3}× the target",
            c.achieved_mean
        );
        let slack = 3.0 * (0.09 / n as f64).sqrt();
        assert!(
            c.conf_exceeded_share <= 0.1 + slack,
            "p {p} m {m}: the 90 % limit was exceeded by {:.3} of baselines",
            c.conf_exceeded_share
        );
        // And it is not trivially conservative: some baselines do exceed it.
        assert!(c.conf_exceeded_share > 0.02, "{}", c.conf_exceeded_share);
    }
}

/// The chi-square limit on the same short baselines breaks its promise (the reason for the
/// default): the check above could fail.
#[test]
fn chi_square_on_short_baselines_alarms_far_more_than_promised() {
    let (p, m, alpha) = (8usize, 40usize, 1e-3);
    let truth = Truth::new(p, 3);
    let mut rng = ChaCha8Rng::seed_from_u64(4);
    let t = ellipsoid_trainer::stats::threshold::chi_square(p, alpha);
    let mut sum = 0.0;
    for _ in 0..200 {
        let x = truth.rows(m, &mut rng);
        let (mean, cov) = refit_rows(&x, m, p, false, Shrinkage::None).unwrap();
        let q = QForm::from_estimate(&truth.mean, &truth.chol, &mean, &cov).unwrap();
        sum += q.tail_sampled(t, 400, &mut rng).0;
    }
    let ratio = sum / 200.0 / alpha;
    assert!(ratio > 5.0, "chi-square at p 8, m 40: {ratio}× the target");
}

/// Ledoit–Wolf fits: the limit calibrated by simulated refits keeps the mean within ±25 % (one
/// small cell, to keep this test to seconds in a debug build; the study has more).
#[test]
fn ledoit_wolf_fit_keeps_its_promise_on_average() {
    let (p, m, alpha) = (4usize, 30usize, 1e-2);
    let c = run_cell(
        p,
        m,
        alpha,
        Shrinkage::LedoitWolf,
        100,
        Some(100),
        40 + p as u64,
    );
    let ratio = c.achieved_mean / alpha;
    assert!(
        (0.75..=1.25).contains(&ratio),
        "Ledoit–Wolf p {p} m {m} α {alpha}: {ratio:.3}× the target"
    );
    assert!(c.conf_exceeded_share <= 0.1 + 3.0 * (0.09f64 / 100.0).sqrt());
}
