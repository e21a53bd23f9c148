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
mod tests;
