//! The Minimum Covariance Determinant estimator, computed with FAST-MCD.
//!
//! A baseline log of a healthy machine still holds a few bad rows: a sensor that dropped out, a
//! maintenance stop, a start-up transient. The MCD estimate looks for the `h` rows whose sample
//! covariance has the smallest determinant and fits the location and scatter on them, so up to
//! `n − h` bad rows cannot pull the model. The algorithm follows Rousseeuw and Van Driessen (1999),
//! "A fast algorithm for the minimum covariance determinant estimator", Technometrics 41, 212–223
//! (citation details and the constants 600, 300, 5 and 10 below are from memory of the paper):
//!
//! 1. **Starts.** Draw a random (p+1)-subset and, while its covariance is singular, extend it with
//!    random rows (one at a time up to 2(p+1) rows, then doubling; a start still singular at `h`
//!    rows is dropped). Take the `h` rows closest to it in Mahalanobis distance.
//! 2. **C-steps.** From an `h`-subset, compute its mean and covariance and take the `h` rows with
//!    the smallest distances to them. The determinant never increases (the paper's Theorem 1).
//! 3. **Selection.** Two C-steps per start, keep the 10 with the lowest determinant, iterate those
//!    to convergence, keep the best.
//! 4. **Nested subsets for large n.** For `n > 600` the starts run on disjoint random groups of
//!    about 300 rows (at most 5 groups, 1,500 rows in all), each start sized `⌈h·n_group/n⌉`. The
//!    10 best per group get two C-steps on the merged groups, and the 10 best of those are iterated
//!    to convergence on the full data (at most 200 C-steps each), following the paper's nested
//!    scheme. The groups are drawn once, from a seeded shuffle of all rows.
//! 5. **Consistency.** The raw covariance of the `h` rows (1/h normalisation) is multiplied by
//!    `c(h/n)`, where `c(α) = α / F_{χ²(p+2)}(q_α)` and `q_α` is the χ²(p) quantile at `α`
//!    (Croux and Haesbroeck, 1999, the factor that makes the estimator consistent at the normal).
//!    No small-sample correction factor is applied, so with few rows per feature the raw scatter
//!    is somewhat too small and a few good rows may be set aside.
//! 6. **Reweighting.** Rows whose squared distance to the corrected raw fit is below the
//!    χ²(p) quantile at `reweight_quantile` (0.975) get weight 1, the others 0. The final mean and
//!    covariance (1/m normalisation over the m kept rows) are computed from the kept rows, and the
//!    covariance is multiplied by `c(reweight_quantile)`.
//!
//! Everything is deterministic given [`McdOptions::seed`] (ChaCha8).

use anyhow::{bail, ensure, Result};
use nalgebra::DMatrix;
use rand::seq::index::sample;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use statrs::distribution::{ChiSquared, ContinuousCDF};

/// Above this many rows the starts run on nested subsets (the paper's choice).
const NESTED_ABOVE: usize = 600;
/// Rows in one group of the nested scheme.
const GROUP_ROWS: usize = 300;
/// At most this many groups, so the merged set has at most 1,500 rows.
const MAX_GROUPS: usize = 5;
/// Candidates kept after the two C-steps of each stage.
const KEEP_BEST: usize = 10;
/// C-steps after which a candidate counts as converged even if the subset still moves.
const MAX_C_STEPS: usize = 200;
/// A covariance whose Cholesky pivot for some feature is below this share of its variance
/// (1 − R² of that feature on the ones before it) is treated as singular.
const SINGULAR_RATIO: f64 = 1e-12;

/// Options for [`fast_mcd`].
#[derive(Clone, Debug)]
pub struct McdOptions {
    /// The share `h/n` of rows the raw estimate is fitted on. `None` takes
    /// `h = ⌊(n + p + 1)/2⌋`, the largest breakdown point. A given fraction gives
    /// `h = ⌊fraction·n⌋`, which must be at least `p + 1`.
    pub support_fraction: Option<f64>,
    /// The seed of the random starts.
    pub seed: u64,
    /// The number of random (p+1)-subsets to start from (500 in the paper).
    pub n_starts: usize,
    /// The χ²(p) probability whose quantile separates kept rows from outliers when reweighting.
    pub reweight_quantile: f64,
}

impl Default for McdOptions {
    fn default() -> Self {
        McdOptions {
            support_fraction: None,
            seed: 0,
            n_starts: 500,
            reweight_quantile: 0.975,
        }
    }
}

/// The result of [`fast_mcd`]. Matrices are `p × p`, row-major.
#[derive(Clone, Debug)]
pub struct McdFit {
    /// Reweighted location.
    pub mean: Vec<f64>,
    /// Reweighted covariance, consistency-corrected by [`McdFit::reweight_consistency`].
    pub cov: Vec<f64>,
    /// Raw MCD location: the mean of the `h` rows in [`McdFit::support`].
    pub raw_mean: Vec<f64>,
    /// Raw MCD covariance: the 1/h covariance of the support times [`McdFit::consistency`].
    pub raw_cov: Vec<f64>,
    /// The `h` row indices of the raw MCD subset, ascending.
    pub support: Vec<usize>,
    /// The row indices with weight 0 after reweighting, ascending.
    pub outliers: Vec<usize>,
    /// The consistency factor `c(h/n)` applied to the raw covariance (1 when `h = n`).
    pub consistency: f64,
    /// The consistency factor `c(reweight_quantile)` applied to the reweighted covariance.
    pub reweight_consistency: f64,
    /// ln det of the uncorrected 1/h covariance of the support: the MCD objective reached.
    pub raw_log_det: f64,
}

/// Run FAST-MCD on `x` (`n` rows × `p` features, row-major). See the module documentation.
///
/// # Errors
/// When the data do not have `n·p` finite values, the options are out of range, `h < p + 1`,
/// or the data are degenerate: `h` rows on one hyperplane (a constant feature, or features that
/// are exact linear combinations of others) make every candidate covariance singular.
pub fn fast_mcd(x: &[f64], n: usize, p: usize, opts: &McdOptions) -> Result<McdFit> {
    ensure!(p > 0, "there are no features");
    ensure!(
        x.len() == n * p,
        "{} values do not make {n} rows of {p} features",
        x.len()
    );
    if let Some(k) = x.iter().position(|v| !v.is_finite()) {
        bail!(
            "data row {} (0-based), feature {} (0-based) is not a finite number ({})",
            k / p,
            k % p,
            x[k]
        );
    }
    ensure!(
        opts.reweight_quantile > 0.0 && opts.reweight_quantile < 1.0,
        "the reweighting quantile must be strictly between 0 and 1, not {}",
        opts.reweight_quantile
    );
    ensure!(opts.n_starts > 0, "the number of starts must be at least 1");
    let h = match opts.support_fraction {
        // ⌊(n + p + 1)/2⌋
        None => (n + p).div_ceil(2),
        Some(f) => {
            ensure!(
                f > 0.0 && f <= 1.0,
                "the support fraction must be in (0, 1], not {f}"
            );
            // The small epsilon keeps 0.75 · 40 at 30 despite rounding in the product.
            ((f * n as f64) + 1e-9).floor() as usize
        }
    };
    let h = h.min(n);
    ensure!(
        h > p,
        "the support would hold {h} of {n} rows, but {p} features need at least {}",
        p + 1
    );

    let data = Rows { x, n, p };
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);

    // If all rows lie on one hyperplane, so does every subset: say so before searching.
    let all: Vec<usize> = (0..n).collect();
    let (full_mean, full_cov) = mean_cov(&data, &all);
    let Some(full_factor) = Factor::new(&full_cov, p) else {
        bail!(degenerate_message(n, n));
    };

    let best = if h == n {
        // The MCD over all rows is the classical estimate.
        Candidate {
            subset: all,
            mean: full_mean,
            cov: full_cov,
            log_det: full_factor.log_det,
        }
    } else {
        search(&data, h, opts.n_starts, &mut rng)?
    };

    // Raw estimate, consistency-corrected.
    let alpha = h as f64 / n as f64;
    let consistency = consistency_factor(p, alpha);
    let raw_mean = best.mean.clone();
    let raw_cov: Vec<f64> = best.cov.iter().map(|v| v * consistency).collect();
    let raw_factor =
        Factor::new(&raw_cov, p).ok_or_else(|| anyhow::anyhow!(degenerate_message(h, n)))?;

    // Reweighting.
    let chi = ChiSquared::new(p as f64).expect("p ≥ 1 is a valid chi-square df");
    let cutoff = chi.inverse_cdf(opts.reweight_quantile);
    let mut d2 = vec![0.0; n];
    distances(&data, &raw_mean, &raw_factor, &mut d2);
    let (kept, outliers): (Vec<usize>, Vec<usize>) = (0..n).partition(|&i| d2[i] < cutoff);
    ensure!(
        kept.len() > p,
        "only {} rows are within the reweighting cutoff, fewer than {} needed",
        kept.len(),
        p + 1
    );
    let (mean, mut cov) = mean_cov(&data, &kept);
    let reweight_consistency = consistency_factor(p, opts.reweight_quantile);
    for v in &mut cov {
        *v *= reweight_consistency;
    }
    if Factor::new(&cov, p).is_none() {
        bail!(degenerate_message(kept.len(), n));
    }

    Ok(McdFit {
        mean,
        cov,
        raw_mean,
        raw_cov,
        support: best.subset,
        outliers,
        consistency,
        reweight_consistency,
        raw_log_det: best.log_det,
    })
}

/// The Croux–Haesbroeck factor `c(α) = α / F_{χ²(p+2)}(q_α)`, `q_α` the χ²(p) quantile at `α`,
/// which makes the covariance of the `α` share of a normal sample nearest the centre consistent
/// for the full covariance. `c(1) = 1`.
pub fn consistency_factor(p: usize, alpha: f64) -> f64 {
    if alpha >= 1.0 {
        return 1.0;
    }
    let q = ChiSquared::new(p as f64)
        .expect("p ≥ 1 is a valid chi-square df")
        .inverse_cdf(alpha);
    let f = ChiSquared::new(p as f64 + 2.0)
        .expect("p + 2 is a valid chi-square df")
        .cdf(q);
    alpha / f
}

fn degenerate_message(rows: usize, n: usize) -> String {
    format!(
        "{rows} of the {n} rows lie on one hyperplane, so their covariance is \
         singular; look for a constant feature or one that is an exact combination of others"
    )
}

/// Row-major data with its shape.
#[derive(Clone, Copy)]
struct Rows<'a> {
    x: &'a [f64],
    n: usize,
    p: usize,
}

impl Rows<'_> {
    fn row(&self, i: usize) -> &[f64] {
        &self.x[i * self.p..(i + 1) * self.p]
    }
}

/// A location and scatter found by the search, with the subset it came from (indices into the
/// data set the candidate was last refined on).
#[derive(Clone)]
struct Candidate {
    subset: Vec<usize>,
    mean: Vec<f64>,
    cov: Vec<f64>,
    log_det: f64,
}

/// A Cholesky factorisation Σ = L Lᵀ kept as W = L⁻¹ (lower triangular, row-major) and ln det Σ.
struct Factor {
    w: Vec<f64>,
    log_det: f64,
}

impl Factor {
    /// `None` when `cov` is not positive definite or nearly singular (see [`SINGULAR_RATIO`]).
    fn new(cov: &[f64], p: usize) -> Option<Factor> {
        let m = DMatrix::from_row_slice(p, p, cov);
        let chol = m.cholesky()?;
        let l = chol.l();
        let mut log_det = 0.0;
        for i in 0..p {
            let piv = l[(i, i)];
            let var = cov[i * p + i];
            let regular = piv > 0.0 && piv * piv > SINGULAR_RATIO * var;
            if !regular {
                return None;
            }
            log_det += 2.0 * piv.ln();
        }
        let inv = l.solve_lower_triangular(&DMatrix::identity(p, p))?;
        let mut w = vec![0.0; p * p];
        for i in 0..p {
            for j in 0..=i {
                w[i * p + j] = inv[(i, j)];
            }
        }
        if !log_det.is_finite() || w.iter().any(|v| !v.is_finite()) {
            return None;
        }
        Some(Factor { w, log_det })
    }
}

/// Mean and 1/m covariance of the rows `idx`.
fn mean_cov(data: &Rows, idx: &[usize]) -> (Vec<f64>, Vec<f64>) {
    let p = data.p;
    let m = idx.len() as f64;
    let mut mean = vec![0.0; p];
    for &i in idx {
        for (a, v) in mean.iter_mut().zip(data.row(i)) {
            *a += v;
        }
    }
    for a in &mut mean {
        *a /= m;
    }
    let mut cov = vec![0.0; p * p];
    let mut c = vec![0.0; p];
    for &i in idx {
        for ((ci, v), mu) in c.iter_mut().zip(data.row(i)).zip(&mean) {
            *ci = v - mu;
        }
        for a in 0..p {
            for b in 0..=a {
                cov[a * p + b] += c[a] * c[b];
            }
        }
    }
    for a in 0..p {
        for b in 0..=a {
            let v = cov[a * p + b] / m;
            cov[a * p + b] = v;
            cov[b * p + a] = v;
        }
    }
    (mean, cov)
}

/// Squared Mahalanobis distances of every row to (`mean`, Σ) into `out`.
fn distances(data: &Rows, mean: &[f64], f: &Factor, out: &mut [f64]) {
    let p = data.p;
    let mut c = vec![0.0; p];
    for (i, o) in out.iter_mut().enumerate().take(data.n) {
        for ((ci, v), mu) in c.iter_mut().zip(data.row(i)).zip(mean) {
            *ci = v - mu;
        }
        let mut d2 = 0.0;
        for a in 0..p {
            let wr = &f.w[a * p..a * p + a + 1];
            let z: f64 = wr.iter().zip(&c[..=a]).map(|(w, v)| w * v).sum();
            d2 += z * z;
        }
        *o = d2;
    }
}

/// The `h` indices with the smallest `d2`, ascending by index. Ties go to the lower index.
fn smallest(d2: &[f64], h: usize) -> Vec<usize> {
    let mut order: Vec<usize> = (0..d2.len()).collect();
    if h < order.len() {
        order.select_nth_unstable_by(h, |&a, &b| d2[a].total_cmp(&d2[b]).then(a.cmp(&b)));
    }
    let mut out = order[..h].to_vec();
    out.sort_unstable();
    out
}

/// From an estimate, the `h` closest rows of `data` and their fit. `None` if singular.
fn concentrate(
    data: &Rows,
    mean: &[f64],
    f: &Factor,
    h: usize,
    d2: &mut [f64],
) -> Option<Candidate> {
    distances(data, mean, f, d2);
    let subset = smallest(d2, h);
    let (mean, cov) = mean_cov(data, &subset);
    let f = Factor::new(&cov, data.p)?;
    Some(Candidate {
        subset,
        mean,
        cov,
        log_det: f.log_det,
    })
}

/// Up to `steps` C-steps from an estimate (its fit need not come from `data`). Stops early when
/// the subset repeats or the determinant stops falling. `None` if a covariance turns singular.
fn c_steps(data: &Rows, start: &Candidate, h: usize, steps: usize) -> Option<Candidate> {
    let mut d2 = vec![0.0; data.n];
    let f = Factor::new(&start.cov, data.p)?;
    let mut cur = concentrate(data, &start.mean, &f, h, &mut d2)?;
    for _ in 1..steps {
        let f = Factor::new(&cur.cov, data.p)?;
        let next = concentrate(data, &cur.mean, &f, h, &mut d2)?;
        let done = next.subset == cur.subset || next.log_det >= cur.log_det;
        if next.log_det <= cur.log_det {
            cur = next;
        }
        if done {
            break;
        }
    }
    Some(cur)
}

/// Random starts on `data`, two C-steps each, and the best `KEEP_BEST` by determinant.
fn starts(data: &Rows, h: usize, count: usize, rng: &mut ChaCha8Rng) -> Vec<Candidate> {
    let p = data.p;
    let mut found = Vec::new();
    for _ in 0..count {
        let mut j = sample(rng, data.n, p + 1).into_vec();
        // Extend a singular start with random further rows (the paper's step (a)): one row at a
        // time up to 2(p+1) rows, then doubling, so that heavily tied data cost O(h) per start;
        // a start that is still singular with h rows is dropped.
        let start = loop {
            let (mean, cov) = mean_cov(data, &j);
            if Factor::new(&cov, p).is_some() {
                break Some(Candidate {
                    subset: j.clone(),
                    mean,
                    cov,
                    log_det: f64::NAN,
                });
            }
            if j.len() >= h {
                break None;
            }
            let grow = if j.len() < 2 * (p + 1) { 1 } else { j.len() };
            let target = (j.len() + grow).min(h);
            while j.len() < target {
                let mut next = rng.random_range(0..data.n);
                while j.contains(&next) {
                    next = (next + 1) % data.n;
                }
                j.push(next);
            }
        };
        // The first concentration builds H1 from the start; two C-steps follow.
        if let Some(c) = start.and_then(|s| c_steps(data, &s, h, 3)) {
            found.push(c);
        }
    }
    keep_best(found)
}

fn keep_best(mut c: Vec<Candidate>) -> Vec<Candidate> {
    c.sort_by(|a, b| a.log_det.total_cmp(&b.log_det));
    c.truncate(KEEP_BEST);
    c
}

/// The whole search of steps 1–4; returns the best candidate on the full data.
fn search(data: &Rows, h: usize, n_starts: usize, rng: &mut ChaCha8Rng) -> Result<Candidate> {
    let n = data.n;
    let p = data.p;
    let finalists = if n <= NESTED_ABOVE {
        starts(data, h, n_starts, rng)
    } else {
        let merged_rows = n.min(GROUP_ROWS * MAX_GROUPS);
        let groups = (merged_rows / GROUP_ROWS).clamp(2, MAX_GROUPS);
        let group_rows = merged_rows / groups;
        let mut order: Vec<usize> = (0..n).collect();
        order.shuffle(rng);
        let merged_idx = &order[..groups * group_rows];
        let merged: Vec<f64> = merged_idx
            .iter()
            .flat_map(|&i| data.row(i).iter().copied())
            .collect();
        let merged = Rows {
            x: &merged,
            n: merged_idx.len(),
            p,
        };
        let per_group = n_starts.div_ceil(groups);
        let h_group = (h * group_rows).div_ceil(n).max(p + 1);
        let mut pool = Vec::new();
        for g in 0..groups {
            let rows = &merged.x[g * group_rows * p..(g + 1) * group_rows * p];
            let group = Rows {
                x: rows,
                n: group_rows,
                p,
            };
            pool.extend(starts(&group, h_group, per_group, rng));
        }
        let h_merged = (h * merged.n).div_ceil(n).max(p + 1);
        keep_best(
            pool.iter()
                .filter_map(|c| c_steps(&merged, c, h_merged, 2))
                .collect(),
        )
    };
    if finalists.is_empty() {
        bail!(degenerate_message(h, n));
    }
    let mut best: Option<Candidate> = None;
    for c in &finalists {
        let Some(done) = c_steps(data, c, h, MAX_C_STEPS) else {
            continue;
        };
        if best.as_ref().is_none_or(|b| done.log_det < b.log_det) {
            best = Some(done);
        }
    }
    best.ok_or_else(|| anyhow::anyhow!(degenerate_message(h, n)))
}

#[cfg(test)]
mod tests {
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
        18.819, 4.882, -1.047, 38.934, -5.609, 4.234, 20.553, 5.282, -1.473, 29.466, -10.974,
        8.192, 19.767, 4.655, -0.5, 19.447, 4.041, -0.617, 32.641, -8.521, 8.402, 30.085, -9.885,
        5.921, 18.268, 3.894, -1.079, 19.042, 5.705, -0.291, 19.696, 3.979, -1.316, 27.456, -5.315,
        3.781, 18.002, 4.019, -0.897, 20.42, 6.161, -0.844, 21.635, 6.199, -2.053, 20.41, 5.91,
        -1.778, 31.784, -1.645, 5.932, 39.605, -5.084, 1.696, 18.711, 4.243, -0.628, 19.669, 4.129,
        -0.344, 19.198, 3.459, -1.148, 26.963, -14.347, 7.181, 36.275, -8.3, 9.683, 35.628, -6.929,
        5.539, 19.371, 4.232, -1.265, 18.909, 3.261, -0.831, 20.568, 7.286, -0.363, 19.743, 4.061,
        -1.206, 32.412, -10.46, 11.583, 26.912, -4.544, 3.213, 30.71, -7.027, 6.219, 18.891, 5.271,
        -0.075,
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
        26.002, 0.887, 1.91, 19.359, 6.215, -0.026, 25.668, 0.635, 2.401, 25.792, 0.902, 1.832,
        19.824, 4.729, -0.637, 19.191, 5.363, -0.949, 20.001, 5.24, -1.078, 20.757, 4.778, -1.007,
        19.84, 4.124, -0.598, 20.695, 4.342, -1.706, 17.871, 4.4, -1.065, 25.954, 1.29, 2.004,
        19.205, 5.041, -1.628, 19.967, 5.688, -1.105, 20.089, 4.581, -1.204, 25.799, 0.684, 2.101,
        21.052, 5.627, -1.025, 18.801, 4.34, -0.337, 26.136, 0.838, 1.957, 25.586, 0.758, 2.496,
        20.203, 4.751, -1.09, 20.52, 4.485, -1.402, 20.164, 6.894, -1.016, 25.848, 1.088, 1.99,
        19.811, 5.433, -0.84, 19.803, 3.99, -1.169, 19.461, 4.638, -0.791, 21.442, 5.812, -1.583,
        20.06, 6.108, -0.996, 20.667, 6.551, -1.25, 19.142, 5.263, -0.452, 19.556, 5.667, -0.307,
        19.75, 6.069, -0.834, 20.689, 5.152, -1.457, 19.376, 4.79, -0.525, 19.696, 5.1, -0.899,
        19.109, 4.102, -1.32, 19.765, 3.845, -1.047, 19.38, 5.02, -0.537, 25.812, 0.617, 2.377,
        18.002, 2.896, -0.446, 17.965, 3.535, -0.9, 19.537, 4.644, -0.252, 20.157, 4.945, -2.343,
        18.709, 4.503, -1.387, 19.457, 4.633, -1.244, 25.81, 0.472, 2.22, 20.035, 4.178, -1.092,
        18.099, 2.828, -1.608, 19.888, 5.021, -0.913, 18.47, 3.7, -1.126, 26.422, 0.564, 1.937,
        18.453, 4.759, -0.304, 18.813, 3.824, -0.858, 20.131, 3.849, -0.722, 20.899, 6.455, -1.702,
        25.993, 1.021, 1.774, 20.105, 4.319, -1.232, 18.775, 4.326, 0.062, 19.976, 5.52, -1.029,
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
}
