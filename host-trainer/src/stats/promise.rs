//! What a limit promises, over baselines and for this one: simulated baselines and their rates.
//!
//! A fitted model's true false-alarm rate at a threshold `t` depends on how far its estimated mean
//! and covariance fell from the truth, so it varies from one baseline to the next. [`Spread`] holds
//! the quadratic forms ([`QForm`]) of many simulated baselines of the same size, and from them:
//!
//! * the **mean rate** over baselines at `t` (what "expected false readings a day" means), and the
//!   `t` at which it equals a target;
//! * a **quantile** of the rate over baselines (what "at most … a day with 90 % confidence" means:
//!   nine baselines in ten give a model whose rate is at most that), and the `t` at which the
//!   quantile equals the target (the *confidence limit*).
//!
//! For the plain fit the rate's distribution does not depend on the unknown mean and covariance
//! (the fit is affine equivariant), so [`Spread::plain`] simulates standard baselines directly: the
//! mean `N(0, I/m_mean)` and the covariance by Bartlett's decomposition of a Wishart with `nu`
//! degrees of freedom. This is exact for independent Gaussian rows. For shrinkage and robust fits
//! no such shortcut holds, and [`Spread::refits`] is a parametric bootstrap: draw baselines from the
//! fitted Gaussian, refit each with the same estimator, and score the truth against each refit.

use anyhow::{ensure, Result};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{ChiSquared, Distribution, StandardNormal};
use serde::Serialize;

use crate::stats::limit::{hotelling_ucl, Sizes};
use crate::stats::qform::QForm;

/// The default confidence of the per-baseline figure.
pub const DEFAULT_CONFIDENCE: f64 = 0.9;

/// Standard baselines simulated for the plain fit's per-baseline figure (cheap: one small
/// eigen-decomposition each). The 90 % quantile of 2 000 draws sits within about ±1.3 percentage
/// points of its level (binomial standard error √(0.9·0.1/2000)).
pub const PLAIN_SIMS: usize = 2000;

/// Refits for a shrinkage fit: each costs as much as the estimator on `m` rows.
pub const SHRINK_SIMS: usize = 400;

/// Refits for a FAST-MCD fit. Each refit runs FAST-MCD's 500 random starts: measured in a release
/// build here, 0.1 to 0.25 s for baselines of 400 to 17 000 rows and 1.4 s at 100 000 rows, so
/// 20 refits keep a robust fit within a few seconds (half a minute at 100 000 rows). The
/// Monte-Carlo standard error of the expected rate is reported beside it; `--simulations` buys
/// precision with time.
pub const ROBUST_SIMS: usize = 20;

/// Standard baselines per step of the baseline-length search.
pub const LENGTH_SIMS: usize = 400;

/// Seed of the simulations (reported with them).
pub const SIM_SEED: u64 = 0x7e57_ab1e_0000_0009;

/// Tilted draws per simulated baseline when the saddlepoint rates are checked by importance
/// sampling ([`Spread::calibrate`]).
pub const SAMPLED_DRAWS: usize = 64;

/// An estimator: rows (row-major) and their count in, mean and covariance out.
pub type Refit<'a> = dyn FnMut(&[f64], usize) -> Result<(Vec<f64>, Vec<f64>)> + 'a;

/// Simulated baselines, one quadratic form each.
#[derive(Clone, Debug)]
pub struct Spread {
    /// The form of each simulated baseline's fit.
    pub forms: Vec<QForm>,
    /// Sampled over saddlepoint mean rate at the reference threshold (1 until calibrated).
    pub correction: f64,
    /// Relative Monte-Carlo standard error of the mean rate at the reference threshold.
    pub rel_se: f64,
}

impl Spread {
    /// `sims` standard baselines with the given sizes (see the module documentation).
    ///
    /// # Panics
    /// If the sizes are not [`Sizes::usable`].
    pub fn plain(sizes: &Sizes, sims: usize, seed: u64, alpha: f64) -> Spread {
        let mut s = Spread::plain_saddlepoint(sizes, sims, seed);
        s.calibrate(alpha, seed ^ 0x5a5a_5a5a);
        s
    }

    /// [`Spread::plain`] without the importance-sampling check (saddlepoint rates only, a few per
    /// cent off; for the baseline-length search, whose answer is rounded coarser than that).
    pub fn plain_saddlepoint(sizes: &Sizes, sims: usize, seed: u64) -> Spread {
        assert!(sizes.usable(), "sizes without degrees of freedom");
        let p = sizes.p;
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let chis: Vec<ChiSquared<f64>> = (0..p)
            .map(|i| ChiSquared::new(sizes.nu - i as f64).expect("nu > p − 1"))
            .collect();
        let id = identity(p);
        let zero = vec![0.0; p];
        let sd_mean = (1.0 / sizes.m_mean).sqrt();
        let mut forms = Vec::with_capacity(sims);
        while forms.len() < sims {
            let mut t = DMatrix::<f64>::zeros(p, p);
            for i in 0..p {
                t[(i, i)] = chis[i].sample(&mut rng).sqrt();
                for j in 0..i {
                    t[(i, j)] = rng.sample(StandardNormal);
                }
            }
            let w = &t * t.transpose() / sizes.nu;
            let cov: Vec<f64> = (0..p * p).map(|k| w[(k / p, k % p)]).collect();
            let mean: Vec<f64> = (0..p)
                .map(|_| sd_mean * rng.sample::<f64, _>(StandardNormal))
                .collect();
            if let Some(q) = QForm::from_estimate(&zero, &id, &mean, &cov) {
                forms.push(q);
            }
        }
        Spread {
            forms,
            correction: 1.0,
            rel_se: 0.0,
        }
    }

    /// Remove the saddlepoint approximation's bias from the averages: at the threshold where the
    /// saddlepoint mean rate is `alpha`, estimate every baseline's rate again by importance
    /// sampling ([`QForm::tail_sampled`], [`SAMPLED_DRAWS`] draws each) and scale all rates by
    /// the ratio of the two means. The sampler is unbiased, so the corrected mean rate is too (at
    /// that threshold; the saddlepoint's relative error changes slowly with the threshold).
    pub fn calibrate(&mut self, alpha: f64, seed: u64) {
        self.correction = 1.0;
        let t = self.solve_mean(alpha);
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let sampled: Vec<f64> = self
            .forms
            .iter()
            .map(|q| q.tail_sampled(t, SAMPLED_DRAWS, &mut rng).0)
            .collect();
        let n = sampled.len() as f64;
        let mean = sampled.iter().sum::<f64>() / n;
        let var = sampled.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0).max(1.0);
        let sp = self.rates(t).iter().sum::<f64>() / n;
        if mean > 0.0 && sp > 0.0 {
            self.correction = mean / sp;
            self.rel_se = (var / n).sqrt() / mean;
        }
    }

    /// A parametric bootstrap: `sims` baselines drawn from `N(0, corr)` (`corr` the fitted
    /// correlation, `p × p` row-major), each of `round(m_cov)` rows, refitted by `refit` (rows
    /// row-major and their count in; mean and covariance out). Where time correlation makes the
    /// mean carry fewer rows than the covariance, each refit's mean gets the missing spread
    /// added. A refit that fails or is singular is an error: nothing is silently dropped.
    pub fn refits(
        corr: &[f64],
        sizes: &Sizes,
        sims: usize,
        seed: u64,
        alpha: f64,
        refit: &mut Refit<'_>,
    ) -> Result<Spread> {
        let p = sizes.p;
        let rows = sizes.m_cov().round().max(p as f64 + 2.0) as usize;
        let l = DMatrix::from_row_slice(p, p, corr)
            .cholesky()
            .ok_or_else(|| anyhow::anyhow!("the fitted correlation is not positive definite"))?
            .l();
        let chol: Vec<f64> = (0..p * p).map(|k| l[(k / p, k % p)]).collect();
        let extra = (1.0 / sizes.m_mean - 1.0 / rows as f64).max(0.0).sqrt();
        let zero = vec![0.0; p];
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut x = vec![0.0; rows * p];
        let mut z = vec![0.0; p];
        let mut forms = Vec::with_capacity(sims);
        for k in 0..sims {
            for r in x.chunks_exact_mut(p) {
                draw(&mut rng, &chol, &mut z, r);
            }
            let (mut mean, cov) = refit(&x, rows)?;
            if extra > 0.0 {
                let mut shift = vec![0.0; p];
                draw(&mut rng, &chol, &mut z, &mut shift);
                for (m, s) in mean.iter_mut().zip(&shift) {
                    *m += extra * s;
                }
            }
            let q = QForm::from_estimate(&zero, &chol, &mean, &cov);
            ensure!(
                q.is_some(),
                "simulated baseline {k} (seed {seed:#x}) gave a covariance that is not positive definite"
            );
            forms.extend(q);
        }
        let mut s = Spread {
            forms,
            correction: 1.0,
            rel_se: 0.0,
        };
        s.calibrate(alpha, seed ^ 0x5a5a_5a5a);
        Ok(s)
    }

    /// Each simulated baseline's rate at `t` (saddlepoint, times [`Spread::correction`]).
    pub fn rates(&self, t: f64) -> Vec<f64> {
        self.forms
            .iter()
            .map(|q| self.correction * q.tail(t))
            .collect()
    }

    /// The mean rate over baselines at `t`, and its Monte-Carlo standard error (the sampled
    /// relative error at the reference threshold, or the spread of the rates if larger).
    pub fn mean_rate(&self, t: f64) -> (f64, f64) {
        let r = self.rates(t);
        let n = r.len() as f64;
        let mean = r.iter().sum::<f64>() / n;
        let var = r.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0).max(1.0);
        (mean, (var / n).sqrt().max(self.rel_se * mean))
    }

    /// The `level` quantile of the rate over baselines at `t` (the `⌈level·K⌉`-th smallest), on
    /// the safe side of the calibration: the rates are scaled by the upper end of the correction's
    /// two-standard-error interval ([`Spread::correction`] · (1 + 2 [`Spread::rel_se`])). On a
    /// long baseline every baseline gives nearly the same rate, and the correction's own
    /// Monte-Carlo error (about 1 %) is as wide as that whole spread; without this margin the
    /// "90 %" figure was exceeded by a fifth of long baselines in the threshold study.
    pub fn quantile_rate(&self, t: f64, level: f64) -> f64 {
        let mut r = self.rates(t);
        r.sort_by(f64::total_cmp);
        let k = ((level * r.len() as f64).ceil() as usize).clamp(1, r.len());
        r[k - 1] * (1.0 + 2.0 * self.rel_se)
    }

    /// The `t` at which the mean rate is `alpha`.
    pub fn solve_mean(&self, alpha: f64) -> f64 {
        solve(|t| self.mean_rate(t).0, alpha, self.start())
    }

    /// The `t` at which the `level` quantile of the rate is `alpha`.
    pub fn solve_quantile(&self, alpha: f64, level: f64) -> f64 {
        solve(|t| self.quantile_rate(t, level), alpha, self.start())
    }

    fn start(&self) -> f64 {
        self.forms.first().map_or(1.0, QForm::mean).max(1e-6)
    }
}

/// `x = L z`, `z ~ N(0, I)`, into `out`.
fn draw(rng: &mut ChaCha8Rng, chol: &[f64], z: &mut [f64], out: &mut [f64]) {
    let p = z.len();
    for v in z.iter_mut() {
        *v = rng.sample(StandardNormal);
    }
    for i in 0..p {
        out[i] = (0..=i).map(|j| chol[i * p + j] * z[j]).sum();
    }
}

fn identity(p: usize) -> Vec<f64> {
    (0..p * p)
        .map(|k| if k / p == k % p { 1.0 } else { 0.0 })
        .collect()
}

/// The `t` with `rate(t) = alpha` for a decreasing `rate`, by bisection on `ln t`.
fn solve(rate: impl Fn(f64) -> f64, alpha: f64, start: f64) -> f64 {
    let (mut lo, mut hi) = (start, start);
    while rate(lo) < alpha && lo > 1e-12 {
        lo *= 0.5;
    }
    while rate(hi) > alpha && hi < 1e12 {
        hi *= 2.0;
    }
    for _ in 0..100 {
        let mid = (lo * hi).sqrt();
        if hi / lo < 1.0 + 1e-8 {
            break;
        }
        if rate(mid) > alpha {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    (lo * hi).sqrt()
}

/// How long a baseline must be for the default limit's promise to hold within a factor, with a
/// stated confidence.
#[derive(Clone, Copy, Debug, Serialize)]
pub struct LengthNeed {
    /// The factor: the per-baseline rate may exceed the target by at most this much.
    pub within: f64,
    /// Rows to fit (after the hold-out), with the baseline's own time correlation.
    pub rows_fitted: f64,
    /// Whether the baseline has that many.
    pub met: bool,
}

/// The smallest number of fitted rows at which, with the time correlation of `sizes`, the
/// `level` quantile of the rate at the Hotelling limit is at most `within · alpha`. Found by
/// bisection on `ln m` to about 3 %, with [`LENGTH_SIMS`] standard baselines a step (the same
/// seed at every step). `None` above 10⁹ rows.
pub fn rows_needed(sizes: &Sizes, alpha: f64, within: f64, level: f64) -> Option<f64> {
    let ratio = |m: f64| -> f64 {
        let s = sizes.rescaled(m);
        match hotelling_ucl(&s, alpha) {
            Some(ucl) => {
                Spread::plain_saddlepoint(&s, LENGTH_SIMS, SIM_SEED).quantile_rate(ucl, level)
                    / alpha
            }
            None => f64::INFINITY,
        }
    };
    // The 90 % figure is not monotone in m: very short baselines mostly give models that alarm
    // far less than promised (and a few that alarm far more), so it first rises with m and then
    // falls. The length asked for is where it falls below `within` for good: search down from a
    // length that meets it to one that does not, then bisect.
    let floor = sizes.p as f64 + 2.0;
    // Independent rows peak at 50 to 100 rows per the simulations; start well above, in rows
    // with this baseline's time correlation.
    let inflation = (sizes.m / sizes.m_mean).max((sizes.m - 1.0) / sizes.nu);
    let mut hi = sizes.m.max(inflation * (200.0 + 20.0 * sizes.p as f64));
    while ratio(hi) > within {
        hi *= 4.0;
        if hi > 1e9 {
            return None;
        }
    }
    let mut lo = hi;
    loop {
        lo /= 1.5;
        if lo <= floor {
            return Some(floor.ceil());
        }
        if ratio(lo) > within {
            break;
        }
        hi = lo;
    }
    while hi / lo > 1.03 {
        let mid = (lo * hi).sqrt();
        if ratio(mid) > within {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    Some(hi.ceil())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::limit::{hotelling_tail, phase2_ucl};
    use crate::stats::moments::Moments;

    /// The mean rate over simulated standard baselines at the Phase II limit is α: the Hotelling
    /// F distribution (statrs's `FisherSnedecor`, through [`hotelling_tail`]) against the
    /// baseline-by-baseline quadratic forms.
    #[test]
    fn mean_rate_of_plain_baselines_is_the_hotelling_tail() {
        for (p, m, alpha) in [(3usize, 30usize, 1e-3), (8, 60, 1e-4), (5, 400, 1e-5)] {
            let s = Sizes::independent(p, m as f64);
            let ucl = phase2_ucl(p, m, alpha).unwrap();
            let spread = Spread::plain(&s, 1500, 5, alpha);
            let (mean, se) = spread.mean_rate(ucl);
            assert!(
                (mean - alpha).abs() < 4.0 * se + 0.03 * alpha,
                "p {p} m {m}: {mean} ± {se} vs {alpha}"
            );
            // And elsewhere on the curve.
            let t = 0.8 * ucl;
            let (mean, se) = spread.mean_rate(t);
            let want = hotelling_tail(&s, t);
            assert!((mean - want).abs() < 4.0 * se + 0.03 * want);
        }
    }

    /// A refit that is the plain estimator reproduces the plain spread's limits.
    #[test]
    fn refits_with_the_plain_estimator_agree_with_the_pivot() {
        let (p, m, alpha) = (3usize, 40usize, 1e-3);
        let s = Sizes::independent(p, m as f64);
        let corr = [1.0, 0.6, 0.0, 0.6, 1.0, 0.3, 0.0, 0.3, 1.0];
        let mut plain = |x: &[f64], n: usize| -> Result<(Vec<f64>, Vec<f64>)> {
            let mut mo = Moments::new(p);
            mo.push_block(&x[..n * p]);
            Ok((mo.mean(), mo.covariance()))
        };
        let spread = Spread::refits(&corr, &s, 600, 9, alpha, &mut plain).unwrap();
        let t = spread.solve_mean(alpha);
        let ucl = phase2_ucl(p, m, alpha).unwrap();
        assert!((t / ucl - 1.0).abs() < 0.06, "{t} vs {ucl}");
        let conf = spread.solve_quantile(alpha, 0.9);
        assert!(conf > t);
        assert!((spread.quantile_rate(conf, 0.9) / alpha - 1.0).abs() < 1e-6);
    }

    #[test]
    fn longer_baselines_are_needed_for_tighter_promises() {
        let s = Sizes::independent(4, 200.0);
        let two = rows_needed(&s, 1e-4, 2.0, 0.9).unwrap();
        let tight = rows_needed(&s, 1e-4, 1.25, 0.9).unwrap();
        assert!(two < tight, "{two} {tight}");
        // At the 2× length the 90 % figure is about 2× the target.
        let at = Sizes::independent(4, two);
        let ucl = hotelling_ucl(&at, 1e-4).unwrap();
        // (The printed figure carries the calibration's margin, 1 + 2·rel_se, on top; the
        // length search works without it.)
        let sp = Spread::plain(&at, 2000, 1, 1e-4);
        let margin = 1.0 + 2.0 * sp.rel_se;
        let q = sp.quantile_rate(ucl, 0.9) / 1e-4;
        assert!((q / margin - 2.0).abs() < 0.25, "{q} with margin {margin}");
        // Time correlation asks for more rows.
        let slow = crate::stats::autocorr::effective_sizes(4, 200.0, &[0.9; 4]);
        let slow_need = rows_needed(&slow, 1e-4, 2.0, 0.9).unwrap();
        assert!(slow_need > 5.0 * two, "{slow_need} vs {two}");
    }
}
