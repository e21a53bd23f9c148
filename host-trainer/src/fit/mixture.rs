//! Gaussian mixtures by expectation–maximisation (Dempster, Laird and Rubin 1977), to find the
//! operating modes of an unlabelled baseline.
//!
//! * Full covariances; `reg_covar` is added to every covariance's diagonal after each M step
//!   (as scikit-learn's `GaussianMixture` does), so a mode whose rows lie on a line still has a
//!   density.
//! * Starts: [`MixtureOptions::n_init`] k-means++ seedings (Arthur and Vassilvitskii 2007) from
//!   one ChaCha8 stream seeded with [`MixtureOptions::seed`], each refined by Lloyd's k-means
//!   (at most [`KMEANS_ITER`] rounds), whose hard labels give the first M step. The start with
//!   the highest final log-likelihood is kept (the earliest on a tie): the same rows and
//!   options give the same mixture, bit for bit.
//! * Responsibilities through log-sum-exp; densities through the Cholesky factor of each
//!   covariance (nalgebra), `ln N(x) = −½ (d ln 2π + ln det Σ + |L⁻¹(x − μ)|²)`.
//! * Convergence: the change of the mean log-likelihood per row between two E steps below
//!   [`MixtureOptions::tol`]. EM never lowers the likelihood (up to rounding, and `reg_covar`
//!   is a fixed shift of the M step's covariance, which keeps that property in practice; the
//!   tests check it).
//! * BIC as scikit-learn defines it: `−2 ln L + p ln n`, `p = K (d + d(d+1)/2) + K − 1`.

use anyhow::{bail, ensure, Result};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Most Lloyd rounds after each k-means++ seeding.
pub const KMEANS_ITER: usize = 100;

/// Added to each mode's weight sum in the M step so that an empty mode divides by no zero
/// (scikit-learn adds ten machine epsilons too).
const NK_EPS: f64 = 10.0 * f64::EPSILON;

/// Settings of [`fit_mixture`].
#[derive(Clone, Debug, PartialEq)]
pub struct MixtureOptions {
    /// Most EM iterations per start.
    pub max_iter: usize,
    /// Convergence: change of the mean log-likelihood per row below this.
    pub tol: f64,
    /// Starts (k-means++ seedings); the best log-likelihood is kept.
    pub n_init: usize,
    /// Added to the diagonal of every covariance.
    pub reg_covar: f64,
    /// Seed of the starts.
    pub seed: u64,
}

impl Default for MixtureOptions {
    fn default() -> Self {
        MixtureOptions {
            max_iter: 500,
            tol: 1e-6,
            n_init: 5,
            reg_covar: 1e-6,
            seed: 0,
        }
    }
}

/// A fitted Gaussian mixture.
#[derive(Clone, Debug, PartialEq)]
pub struct Mixture {
    /// Mixing weights, summing to 1.
    pub weights: Vec<f64>,
    /// Mode means, `K × d`.
    pub means: Vec<Vec<f64>>,
    /// Mode covariances, each `d × d` row-major, `reg_covar` included.
    pub covariances: Vec<Vec<f64>>,
    /// Log-likelihood of the rows under these parameters, summed over the rows.
    pub log_likelihood: f64,
    /// EM iterations run by the start kept.
    pub iterations: usize,
    /// Whether that start met the tolerance before `max_iter`.
    pub converged: bool,
}

/// A mode's density, ready to evaluate.
struct Component {
    ln_weight: f64,
    mean: Vec<f64>,
    /// Lower Cholesky factor of the covariance, row-major.
    chol: Vec<f64>,
    /// `d ln 2π + ln det Σ`.
    norm: f64,
}

impl Component {
    fn new(weight: f64, mean: &[f64], cov: &[f64], d: usize) -> Result<Component> {
        let m = DMatrix::from_row_slice(d, d, cov);
        let Some(c) = m.cholesky() else {
            bail!(
                "a mode's covariance is not positive definite (its rows may be collinear or too few): \
                 raise the covariance regularisation"
            );
        };
        let l = c.l();
        let mut chol = vec![0.0; d * d];
        let mut ln_det = 0.0;
        for i in 0..d {
            for j in 0..=i {
                chol[i * d + j] = l[(i, j)];
            }
            ln_det += 2.0 * l[(i, i)].ln();
        }
        Ok(Component {
            ln_weight: weight.ln(),
            mean: mean.to_vec(),
            chol,
            norm: d as f64 * (2.0 * std::f64::consts::PI).ln() + ln_det,
        })
    }

    /// `ln w + ln N(x; μ, Σ)`.
    fn ln_density(&self, x: &[f64], z: &mut [f64]) -> f64 {
        let d = self.mean.len();
        let mut q = 0.0;
        for i in 0..d {
            let row = &self.chol[i * d..i * d + i];
            let s = row
                .iter()
                .zip(&z[..i])
                .fold(x[i] - self.mean[i], |s, (l, zj)| s - l * zj);
            z[i] = s / self.chol[i * d + i];
            q += z[i] * z[i];
        }
        self.ln_weight - 0.5 * (self.norm + q)
    }
}

/// Parameters during EM.
struct Params {
    weights: Vec<f64>,
    means: Vec<Vec<f64>>,
    covs: Vec<Vec<f64>>,
}

impl Params {
    fn components(&self, d: usize) -> Result<Vec<Component>> {
        (0..self.weights.len())
            .map(|k| Component::new(self.weights[k], &self.means[k], &self.covs[k], d))
            .collect()
    }
}

/// The M step from responsibilities `resp` (`n × K`, row-major).
fn m_step(rows: &[Vec<f64>], resp: &[f64], k: usize, d: usize, reg: f64) -> Params {
    let n = rows.len();
    let mut nk = vec![NK_EPS; k];
    for r in 0..n {
        for c in 0..k {
            nk[c] += resp[r * k + c];
        }
    }
    let mut means = vec![vec![0.0; d]; k];
    for (r, x) in rows.iter().enumerate() {
        for c in 0..k {
            let w = resp[r * k + c];
            for (m, v) in means[c].iter_mut().zip(x) {
                *m += w * v;
            }
        }
    }
    for c in 0..k {
        for m in &mut means[c] {
            *m /= nk[c];
        }
    }
    let mut covs = vec![vec![0.0; d * d]; k];
    let mut diff = vec![0.0; d];
    for (r, x) in rows.iter().enumerate() {
        for c in 0..k {
            let w = resp[r * k + c];
            if w == 0.0 {
                continue;
            }
            for i in 0..d {
                diff[i] = x[i] - means[c][i];
            }
            let cov = &mut covs[c];
            for i in 0..d {
                let wi = w * diff[i];
                for j in 0..=i {
                    cov[i * d + j] += wi * diff[j];
                }
            }
        }
    }
    for c in 0..k {
        let cov = &mut covs[c];
        for i in 0..d {
            for j in 0..=i {
                let v = cov[i * d + j] / nk[c];
                cov[i * d + j] = v;
                cov[j * d + i] = v;
            }
            cov[i * d + i] += reg;
        }
    }
    let weights = nk.iter().map(|v| v / n as f64).collect();
    Params {
        weights,
        means,
        covs,
    }
}

/// The E step: responsibilities into `resp`; returns the total log-likelihood.
fn e_step(rows: &[Vec<f64>], comps: &[Component], resp: &mut [f64]) -> f64 {
    let k = comps.len();
    let d = rows.first().map_or(0, Vec::len);
    let mut z = vec![0.0; d];
    let mut lp = vec![0.0; k];
    let mut total = 0.0;
    for (r, x) in rows.iter().enumerate() {
        for (l, c) in lp.iter_mut().zip(comps) {
            *l = c.ln_density(x, &mut z);
        }
        let lse = log_sum_exp(&lp);
        total += lse;
        for c in 0..k {
            resp[r * k + c] = (lp[c] - lse).exp();
        }
    }
    total
}

fn log_sum_exp(v: &[f64]) -> f64 {
    let m = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + v.iter().map(|x| (x - m).exp()).sum::<f64>().ln()
}

fn dist2(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

/// k-means++ seeding then Lloyd's rounds; the hard labels of the result.
fn kmeans_labels(rows: &[Vec<f64>], k: usize, rng: &mut ChaCha8Rng) -> Vec<usize> {
    let n = rows.len();
    let mut centres: Vec<Vec<f64>> = Vec::with_capacity(k);
    centres.push(rows[rng.random_range(0..n)].clone());
    let mut best: Vec<f64> = rows.iter().map(|x| dist2(x, &centres[0])).collect();
    while centres.len() < k {
        let total: f64 = best.iter().sum();
        let pick = if total > 0.0 {
            let mut u = rng.random::<f64>() * total;
            let mut pick = n - 1;
            for (i, b) in best.iter().enumerate() {
                if u < *b {
                    pick = i;
                    break;
                }
                u -= b;
            }
            pick
        } else {
            rng.random_range(0..n)
        };
        centres.push(rows[pick].clone());
        for (b, x) in best.iter_mut().zip(rows) {
            *b = b.min(dist2(x, &centres[centres.len() - 1]));
        }
    }
    let mut labels = vec![usize::MAX; n];
    for _ in 0..KMEANS_ITER {
        let mut changed = false;
        for (l, x) in labels.iter_mut().zip(rows) {
            let mut arg = 0;
            let mut dmin = f64::INFINITY;
            for (c, centre) in centres.iter().enumerate() {
                let dd = dist2(x, centre);
                if dd < dmin {
                    dmin = dd;
                    arg = c;
                }
            }
            if *l != arg {
                *l = arg;
                changed = true;
            }
        }
        if !changed {
            break;
        }
        let d = rows[0].len();
        let mut sums = vec![vec![0.0; d]; k];
        let mut counts = vec![0usize; k];
        for (l, x) in labels.iter().zip(rows) {
            counts[*l] += 1;
            for (s, v) in sums[*l].iter_mut().zip(x) {
                *s += v;
            }
        }
        for c in 0..k {
            // An empty cluster keeps its centre.
            if counts[c] > 0 {
                for (m, s) in centres[c].iter_mut().zip(&sums[c]) {
                    *m = s / counts[c] as f64;
                }
            }
        }
    }
    labels
}

/// One EM run from one start; returns the mixture and the mean log-likelihood per row after
/// each E step (for the tests).
fn fit_once(
    rows: &[Vec<f64>],
    k: usize,
    opts: &MixtureOptions,
    rng: &mut ChaCha8Rng,
) -> Result<(Mixture, Vec<f64>)> {
    let n = rows.len();
    let d = rows[0].len();
    let labels = kmeans_labels(rows, k, rng);
    let mut resp = vec![0.0; n * k];
    for (r, l) in labels.iter().enumerate() {
        resp[r * k + l] = 1.0;
    }
    let mut params = m_step(rows, &resp, k, d, opts.reg_covar);
    let mut history = Vec::new();
    let mut prev = f64::NEG_INFINITY;
    let mut converged = false;
    let mut iterations = 0;
    for it in 1..=opts.max_iter {
        iterations = it;
        let comps = params.components(d)?;
        let mean_ll = e_step(rows, &comps, &mut resp) / n as f64;
        history.push(mean_ll);
        params = m_step(rows, &resp, k, d, opts.reg_covar);
        if (mean_ll - prev).abs() < opts.tol {
            converged = true;
            break;
        }
        prev = mean_ll;
    }
    // The likelihood of the parameters returned.
    let comps = params.components(d)?;
    let log_likelihood = e_step(rows, &comps, &mut resp);
    history.push(log_likelihood / n as f64);
    Ok((
        Mixture {
            weights: params.weights,
            means: params.means,
            covariances: params.covs,
            log_likelihood,
            iterations,
            converged,
        },
        history,
    ))
}

fn check_rows(rows: &[Vec<f64>], k: usize, opts: &MixtureOptions) -> Result<usize> {
    ensure!(k >= 1, "a mixture needs at least one mode");
    ensure!(
        rows.len() >= k,
        "{} row(s) cannot be split into {k} modes",
        rows.len()
    );
    let d = rows[0].len();
    ensure!(d >= 1, "the rows have no values");
    for (i, r) in rows.iter().enumerate() {
        ensure!(
            r.len() == d,
            "row {i} has {} values, row 0 has {d}",
            r.len()
        );
        ensure!(
            r.iter().all(|v| v.is_finite()),
            "row {i} holds a value that is not finite"
        );
    }
    ensure!(opts.n_init >= 1, "the mixture needs at least one start");
    ensure!(
        opts.max_iter >= 1,
        "the mixture needs at least one iteration"
    );
    ensure!(
        opts.reg_covar >= 0.0 && opts.reg_covar.is_finite(),
        "the covariance regularisation must be a finite number ≥ 0"
    );
    ensure!(opts.tol > 0.0, "the tolerance must be positive");
    Ok(d)
}

/// Fit a `k`-mode Gaussian mixture to `rows` (each of the same length `d`), best of
/// `opts.n_init` starts.
pub fn fit_mixture(rows: &[Vec<f64>], k: usize, opts: &MixtureOptions) -> Result<Mixture> {
    ensure!(!rows.is_empty(), "no rows to fit a mixture to");
    check_rows(rows, k, opts)?;
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let mut best: Option<Mixture> = None;
    let mut last_err = None;
    for _ in 0..opts.n_init {
        match fit_once(rows, k, opts, &mut rng) {
            Ok((m, _)) => {
                if best
                    .as_ref()
                    .is_none_or(|b| m.log_likelihood > b.log_likelihood)
                {
                    best = Some(m);
                }
            }
            Err(e) => last_err = Some(e),
        }
    }
    match (best, last_err) {
        (Some(b), _) => Ok(b),
        (None, Some(e)) => {
            Err(e.context(format!("no start of the {k}-mode mixture could be fitted")))
        }
        (None, None) => unreachable!("n_init ≥ 1 was checked"),
    }
}

/// Fit 1..=`max_k` modes and keep the lowest BIC (the fewest modes on a tie). Returns the mixture
/// and the BIC of each `k` tried. A `k` with more parameters than there are rows is not tried.
pub fn choose_modes(
    rows: &[Vec<f64>],
    max_k: usize,
    opts: &MixtureOptions,
) -> Result<(Mixture, Vec<(usize, f64)>)> {
    let (m, tried, _) = choose_modes_checked(rows, max_k, opts, |_| Ok(()))?;
    Ok((m, tried))
}

/// A mode count that [`choose_modes_checked`] did not compare, and why.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct SkippedK {
    /// The mode count.
    pub k: usize,
    /// Why: EM failed, or `admissible` refused the mixture.
    pub reason: String,
}

/// What [`choose_modes_checked`] returns: the mixture kept, the BIC of each mode count compared,
/// and the mode counts skipped.
pub type ModeChoice = (Mixture, Vec<(usize, f64)>, Vec<SkippedK>);

/// [`choose_modes`], comparing only the mixtures `admissible` accepts: a `k > 1` whose EM fails
/// or whose mixture `admissible` refuses (with a reason) is skipped, so BIC never picks a
/// solution the caller cannot use. `k = 1` is always compared (one mode is the plain model, and
/// the caller's own checks speak for it). Returns the mixture kept, the BIC of each `k`
/// compared, and the `k` skipped with their reasons.
pub fn choose_modes_checked<F>(
    rows: &[Vec<f64>],
    max_k: usize,
    opts: &MixtureOptions,
    mut admissible: F,
) -> Result<ModeChoice>
where
    F: FnMut(&Mixture) -> std::result::Result<(), String>,
{
    ensure!(max_k >= 1, "at least one mode must be allowed");
    ensure!(!rows.is_empty(), "no rows to fit a mixture to");
    let n = rows.len();
    let d = rows[0].len();
    let mut tried = Vec::new();
    let mut skipped = Vec::new();
    let mut best: Option<(f64, Mixture)> = None;
    for k in 1..=max_k {
        if k > 1 && n_parameters(k, d) >= n {
            break;
        }
        let m = match fit_mixture(rows, k, opts) {
            Ok(m) => m,
            Err(e) if k > 1 => {
                skipped.push(SkippedK {
                    k,
                    reason: format!("EM failed: {e:#}"),
                });
                continue;
            }
            Err(e) => return Err(e),
        };
        if k > 1 {
            if let Err(reason) = admissible(&m) {
                skipped.push(SkippedK { k, reason });
                continue;
            }
        }
        let bic = m.bic(n);
        tried.push((k, bic));
        if best.as_ref().is_none_or(|(b, _)| bic < *b) {
            best = Some((bic, m));
        }
    }
    let (_, m) = best.expect("k = 1 is always compared");
    Ok((m, tried, skipped))
}

fn n_parameters(k: usize, d: usize) -> usize {
    k * (d + d * (d + 1) / 2) + k - 1
}

impl Mixture {
    /// Modes.
    pub fn k(&self) -> usize {
        self.weights.len()
    }

    /// Free parameters: `K (d + d(d+1)/2) + K − 1`.
    pub fn n_parameters(&self) -> usize {
        n_parameters(self.k(), self.means.first().map_or(0, Vec::len))
    }

    /// Bayesian information criterion on `n` rows: `−2 ln L + p ln n` (lower is better).
    pub fn bic(&self, n: usize) -> f64 {
        -2.0 * self.log_likelihood + self.n_parameters() as f64 * (n as f64).ln()
    }

    /// The mode of highest posterior probability for `x` (the lowest index on a tie).
    ///
    /// # Panics
    /// If a covariance is not positive definite (a mixture from [`fit_mixture`] never is).
    pub fn assign(&self, x: &[f64]) -> usize {
        let d = x.len();
        let mut z = vec![0.0; d];
        let mut arg = 0;
        let mut top = f64::NEG_INFINITY;
        for k in 0..self.k() {
            let c = Component::new(self.weights[k], &self.means[k], &self.covariances[k], d)
                .expect("a fitted covariance is positive definite");
            let v = c.ln_density(x, &mut z);
            if v > top {
                top = v;
                arg = k;
            }
        }
        arg
    }

    /// The log-likelihood of `rows` under this mixture, summed over the rows.
    pub fn score_rows(&self, rows: &[Vec<f64>]) -> Result<f64> {
        let d = rows.first().map_or(0, Vec::len);
        let comps: Vec<Component> = (0..self.k())
            .map(|k| Component::new(self.weights[k], &self.means[k], &self.covariances[k], d))
            .collect::<Result<_>>()?;
        let mut resp = vec![0.0; rows.len() * self.k()];
        Ok(e_step(rows, &comps, &mut resp))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand_distr::{Distribution, StandardNormal};

    /// `n` rows of a 2-D Gaussian with mean `mu`, standard deviations `sd` and correlation `rho`.
    fn gaussian(
        rng: &mut ChaCha8Rng,
        n: usize,
        mu: [f64; 2],
        sd: [f64; 2],
        rho: f64,
    ) -> Vec<Vec<f64>> {
        (0..n)
            .map(|_| {
                let a: f64 = StandardNormal.sample(rng);
                let b: f64 = StandardNormal.sample(rng);
                let y = rho * a + (1.0 - rho * rho).sqrt() * b;
                vec![mu[0] + sd[0] * a, mu[1] + sd[1] * y]
            })
            .collect()
    }

    fn two_modes(seed: u64) -> Vec<Vec<f64>> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut rows = gaussian(&mut rng, 600, [0.0, 0.0], [1.0, 0.5], 0.6);
        rows.extend(gaussian(&mut rng, 400, [8.0, -5.0], [0.7, 1.2], -0.3));
        rows
    }

    #[test]
    fn recovers_two_separated_modes() {
        let rows = two_modes(1);
        let m = fit_mixture(&rows, 2, &MixtureOptions::default()).unwrap();
        assert!(m.converged);
        // Order the modes by their first mean.
        let (a, b) = if m.means[0][0] < m.means[1][0] {
            (0, 1)
        } else {
            (1, 0)
        };
        // Weights: 0.6/0.4; the sampling standard error of a share is sqrt(0.24/1000) ≈ 0.015,
        // but the rows were drawn 600/400 exactly, so the weights match to the assignment.
        assert!((m.weights[a] - 0.6).abs() < 0.01, "{:?}", m.weights);
        // Means within 4 sampling standard errors (sd/√n): 4·1/√600 ≈ 0.16, 4·1.2/√400 = 0.24.
        let tol_a = [4.0 * 1.0 / 600f64.sqrt(), 4.0 * 0.5 / 600f64.sqrt()];
        let tol_b = [4.0 * 0.7 / 400f64.sqrt(), 4.0 * 1.2 / 400f64.sqrt()];
        for i in 0..2 {
            assert!(
                (m.means[a][i] - [0.0, 0.0][i]).abs() < tol_a[i],
                "{:?}",
                m.means
            );
            assert!(
                (m.means[b][i] - [8.0, -5.0][i]).abs() < tol_b[i],
                "{:?}",
                m.means
            );
        }
        // Variances within 5 standard errors (var·√(2/n)).
        let va = [1.0, 0.25];
        let vb = [0.49, 1.44];
        for i in 0..2 {
            let ca = m.covariances[a][i * 2 + i];
            let cb = m.covariances[b][i * 2 + i];
            assert!(
                (ca - va[i]).abs() < 5.0 * va[i] * (2.0 / 600f64).sqrt(),
                "{ca}"
            );
            assert!(
                (cb - vb[i]).abs() < 5.0 * vb[i] * (2.0 / 400f64).sqrt(),
                "{cb}"
            );
        }
        // Assignment: the generating mode of every row but a handful.
        let wrong = rows
            .iter()
            .enumerate()
            .filter(|(i, x)| (m.assign(x) == a) != (*i < 600))
            .count();
        assert!(wrong <= 2, "{wrong} rows assigned to the other mode");
        let w: f64 = m.weights.iter().sum();
        assert!((w - 1.0).abs() < 1e-12);
    }

    #[test]
    fn bic_picks_two_on_two_modes_and_one_on_one() {
        let rows = two_modes(2);
        let (m, tried) = choose_modes(&rows, 4, &MixtureOptions::default()).unwrap();
        assert_eq!(m.k(), 2, "{tried:?}");
        assert_eq!(tried.len(), 4);
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let one = gaussian(&mut rng, 1000, [3.0, 1.0], [2.0, 0.5], 0.8);
        let (m, tried) = choose_modes(&one, 4, &MixtureOptions::default()).unwrap();
        assert_eq!(m.k(), 1, "{tried:?}");
        // One mode: the maximum-likelihood Gaussian, so the mean is the sample mean.
        let mean0 = one.iter().map(|r| r[0]).sum::<f64>() / 1000.0;
        assert!((m.means[0][0] - mean0).abs() < 1e-9);
    }

    #[test]
    fn bic_matches_its_definition() {
        let rows = two_modes(4);
        let m = fit_mixture(&rows, 3, &MixtureOptions::default()).unwrap();
        // d = 2: 3·(2 + 3) + 2 = 17 parameters.
        assert_eq!(m.n_parameters(), 17);
        let want = -2.0 * m.log_likelihood + 17.0 * 1000f64.ln();
        assert!((m.bic(1000) - want).abs() < 1e-9);
        let again = m.score_rows(&rows).unwrap();
        assert!((again - m.log_likelihood).abs() < 1e-9 * again.abs());
    }

    #[test]
    fn log_likelihood_never_decreases() {
        // Overlapping modes, so that EM takes many iterations.
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let mut rows = gaussian(&mut rng, 500, [0.0, 0.0], [1.0, 1.0], 0.3);
        rows.extend(gaussian(&mut rng, 500, [1.5, 1.0], [1.0, 0.8], -0.4));
        let opts = MixtureOptions {
            tol: 1e-12,
            ..MixtureOptions::default()
        };
        for k in [2, 3] {
            let mut rng = ChaCha8Rng::seed_from_u64(9);
            let (m, history) = fit_once(&rows, k, &opts, &mut rng).unwrap();
            assert!(history.len() > 10, "k {k}: only {} steps", history.len());
            for w in history.windows(2) {
                assert!(w[1] >= w[0] - 1e-12, "k {k}: {} then {}", w[0], w[1]);
            }
            assert!((history.last().unwrap() * 1000.0 - m.log_likelihood).abs() < 1e-6);
        }
    }

    #[test]
    fn same_seed_same_bits_other_seed_still_a_fit() {
        let rows = two_modes(6);
        let opts = MixtureOptions::default();
        let a = fit_mixture(&rows, 3, &opts).unwrap();
        let b = fit_mixture(&rows, 3, &opts).unwrap();
        assert_eq!(a, b);
        let c = fit_mixture(
            &rows,
            2,
            &MixtureOptions {
                seed: 77,
                ..opts.clone()
            },
        )
        .unwrap();
        let d = fit_mixture(&rows, 2, &opts).unwrap();
        // Two separated modes: every seed finds the same optimum, to the tolerance.
        assert!((c.log_likelihood - d.log_likelihood).abs() < 1e-3);
    }

    #[test]
    fn bad_input_is_refused() {
        let o = MixtureOptions::default();
        assert!(fit_mixture(&[], 1, &o).is_err());
        assert!(fit_mixture(&[vec![1.0], vec![2.0]], 3, &o).is_err());
        assert!(fit_mixture(&[vec![1.0], vec![2.0, 3.0]], 1, &o).is_err());
        assert!(fit_mixture(&[vec![1.0], vec![f64::NAN]], 1, &o).is_err());
    }

    #[test]
    fn a_refused_mode_count_is_skipped_with_its_reason() {
        let rows = two_modes(7);
        // Refuse every mixture of more than two modes: BIC compares K = 1, 2 only.
        let (m, tried, skipped) = choose_modes_checked(&rows, 4, &MixtureOptions::default(), |m| {
            if m.k() > 2 {
                Err(format!("{} modes refused", m.k()))
            } else {
                Ok(())
            }
        })
        .unwrap();
        assert_eq!(m.k(), 2);
        assert_eq!(tried.iter().map(|t| t.0).collect::<Vec<_>>(), [1, 2]);
        assert_eq!(
            skipped,
            [
                SkippedK {
                    k: 3,
                    reason: "3 modes refused".into()
                },
                SkippedK {
                    k: 4,
                    reason: "4 modes refused".into()
                }
            ]
        );
        // K = 1 is compared even when the check would refuse everything.
        let (m, tried, skipped) =
            choose_modes_checked(&rows, 3, &MixtureOptions::default(), |_| Err("no".into()))
                .unwrap();
        assert_eq!((m.k(), tried.len(), skipped.len()), (1, 1, 2));
    }
}
