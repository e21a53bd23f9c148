//! From the moments (or the kept rows) to the covariance the model uses: FAST-MCD, shrinkage, and
//! the checks that name a constant or collinear feature.

use anyhow::{bail, Context, Result};
use nalgebra::DMatrix;

use super::outliers::short;
use super::read::Gathered;
use super::{RobustInfo, Shrinkage, COLLINEAR_PIVOT2, CONSTANT_REL_SD};
use crate::stats::moments::{correlation_of, Moments};
use crate::stats::{mcd, shrink};

/// The estimate: mean and covariance in (log-)raw units, and what produced them.
pub(super) struct Estimate {
    pub(super) mean: Vec<f64>,
    pub(super) cov: Vec<f64>,
    pub(super) shrinkage: Option<(String, f64)>,
    pub(super) robust: Option<RobustInfo>,
}

/// Apply the robust fit and the shrinkage the options ask for to the gathered rows.
pub(super) fn estimate(
    file: &str,
    names: &[String],
    g: &mut Gathered,
    robust_fit: bool,
    shrinkage: Shrinkage,
    warnings: &mut Vec<String>,
) -> Result<Estimate> {
    let p = names.len();
    let n = g.moments.n;
    let mut mean = g.moments.mean();
    let mut cov = g.moments.covariance();
    check_constant(file, names, &mean, &cov, warnings)?;

    let mut robust = None;
    if robust_fit {
        let fit = mcd::fast_mcd(&g.rows, n as usize, p, &mcd::McdOptions::default())
            .with_context(|| format!("{file}: robust fit"))?;
        let set_aside_lines: Vec<u64> = fit.outliers.iter().map(|&r| g.lines[r]).collect();
        if !fit.outliers.is_empty() {
            let mut out = fit.outliers.iter().peekable();
            let mut kept = Vec::with_capacity(g.rows.len());
            for (r, row) in g.rows.chunks_exact(p).enumerate() {
                if out.peek() == Some(&&r) {
                    out.next();
                } else {
                    kept.extend_from_slice(row);
                }
            }
            g.rows = kept;
        }
        mean = fit.mean;
        cov = fit.cov;
        robust = Some(RobustInfo {
            rows_kept: (g.rows.len() / p) as u64,
            set_aside_lines,
        });
    }
    let shrinkage = match shrinkage {
        Shrinkage::None => None,
        Shrinkage::LedoitWolf => {
            let m = g.rows.len() / p;
            let (lw_cov, intensity) = ledoit_wolf_standardised(&g.rows, m, p);
            if robust.is_none() {
                mean = g.moments.mean();
            }
            cov = lw_cov;
            Some(("Ledoit-Wolf".to_string(), intensity))
        }
        Shrinkage::Diagonal(lambda) => {
            if !(lambda.is_finite() && lambda >= 0.0) {
                bail!("diagonal loading must be a finite number ≥ 0, not {lambda}");
            }
            let sd: Vec<f64> = (0..p).map(|i| cov[i * p + i].sqrt()).collect();
            let mut r = correlation_of(&cov, p);
            shrink::diagonal_loading(&mut r, p, lambda);
            for i in 0..p {
                for j in 0..p {
                    cov[i * p + j] = r[i * p + j] * sd[i] * sd[j];
                }
            }
            Some(("diagonal loading".to_string(), lambda))
        }
    };
    check_constant(file, names, &mean, &cov, &mut Vec::new())?;
    Ok(Estimate {
        mean,
        cov,
        shrinkage,
        robust,
    })
}

/// Ledoit–Wolf on the standardised rows, scaled back: `(cov, intensity)` with an `n − 1`
/// denominator.
fn ledoit_wolf_standardised(rows: &[f64], n: usize, p: usize) -> (Vec<f64>, f64) {
    let mut m = Moments::new(p);
    rows.chunks_exact(p).for_each(|r| m.push(r));
    let mean = m.mean();
    let sd = m.std_dev();
    let z: Vec<f64> = rows
        .chunks_exact(p)
        .flat_map(|r| (0..p).map(|j| (r[j] - mean[j]) / sd[j]).collect::<Vec<_>>())
        .collect();
    let fit = shrink::ledoit_wolf(&z, n, p);
    // The shrunk matrix uses the 1/n normalisation; bring it to n − 1 like the plain path.
    let unbias = n as f64 / (n as f64 - 1.0);
    let mut cov = vec![0.0; p * p];
    for i in 0..p {
        for j in 0..p {
            cov[i * p + j] = fit.cov[i * p + j] * unbias * sd[i] * sd[j];
        }
    }
    (cov, fit.intensity)
}

/// The gap between neighbouring `f32` values at the magnitude of `x`.
fn f32_step(x: f64) -> f64 {
    let v = (x.abs() as f32).max(f32::MIN_POSITIVE);
    if !v.is_finite() {
        return f64::INFINITY;
    }
    f64::from(f32::from_bits(v.to_bits() + 1)) - f64::from(v)
}

/// Refuse constant features, features whose variation `f32` cannot resolve at their magnitude,
/// and features whose moments overflow; warn about nearly constant ones.
pub(super) fn check_constant(
    file: &str,
    names: &[String],
    mean: &[f64],
    cov: &[f64],
    warnings: &mut Vec<String>,
) -> Result<()> {
    let p = names.len();
    let mut constant = Vec::new();
    for i in 0..p {
        let sd = cov[i * p + i].sqrt();
        let scale = mean[i].abs();
        let name = &names[i];
        if !(sd.is_finite() && mean[i].is_finite()) {
            bail!(
                "{file}: the values of `{name}` are so large that its mean or variance overflows \
                 (mean {}, sd {}): the column holds absurd values (near ±1e308); fix those rows, \
                 or skip them with --skip-bad-rows",
                short(mean[i]),
                short(sd)
            );
        }
        if sd == 0.0 {
            constant.push(format!("`{name}` (mean {}, sd {sd:e})", short(mean[i])));
        } else if sd <= CONSTANT_REL_SD * scale {
            bail!(
                "{file}: `{name}` varies (sd {}) around {}, by only {:.1e} of its magnitude: the \
                 device computes in f32, whose neighbouring values there are {} apart, so it cannot \
                 tell these readings apart and the feature would look constant. Subtract an offset \
                 from the column (for example its first value, or the start of the day for a time \
                 in milliseconds) or drop it; if it is a time column, name it with --timestamp",
                short(sd),
                short(mean[i]),
                sd / scale,
                short(f32_step(scale))
            );
        } else if sd < 1e-4 * scale {
            warnings.push(format!(
                "`{name}` varies by only {:.1e} of its mean; the device's f32 arithmetic (steps of \
                 {} at {}) resolves it coarsely: subtracting an offset from the column would help",
                sd / scale,
                short(f32_step(scale)),
                short(mean[i])
            ));
        }
    }
    if !constant.is_empty() {
        bail!(
            "{file}: constant feature(s), which carry no information and make the covariance singular: {}; drop them",
            constant.join(", ")
        );
    }
    Ok(())
}

/// `W = L⁻¹` of `corr = L Lᵀ`, or an error naming the first feature that is a linear combination
/// of the ones before it.
pub(super) fn inverse_factor(file: &str, names: &[String], corr: &[f64]) -> Result<Vec<f64>> {
    let p = names.len();
    let r = DMatrix::from_row_slice(p, p, corr);
    let Some(chol) = full_rank_cholesky(&r) else {
        bail!("{file}: {}", explain_collinear(names, &r));
    };
    let l = chol.l();
    let w = l
        .solve_lower_triangular(&DMatrix::identity(p, p))
        .context("inverting the Cholesky factor")?;
    let mut out = vec![0.0; p * p];
    for i in 0..p {
        for j in 0..=i {
            out[i * p + j] = w[(i, j)];
        }
    }
    Ok(out)
}

/// The Cholesky factor of the correlation matrix `r`, when every pivot squared (the share of a
/// feature's variance the features before it leave unexplained, 1 − R²) is at least
/// [`COLLINEAR_PIVOT2`]: the rule by which a fit refuses collinear features.
fn full_rank_cholesky(r: &DMatrix<f64>) -> Option<nalgebra::Cholesky<f64, nalgebra::Dyn>> {
    let p = r.nrows();
    r.clone().cholesky().filter(|c| {
        let l = c.l_dirty();
        (0..p).all(|i| l[(i, i)] * l[(i, i)] >= COLLINEAR_PIVOT2)
    })
}

/// Whether the `p × p` correlation matrix `corr` fails [`full_rank_cholesky`]'s rule, and if
/// so the first feature the features before it explain (`None` inside when no single one is
/// found); `Ok(())` when it passes.
pub(crate) fn check_collinear(corr: &[f64], p: usize) -> Result<(), Option<usize>> {
    let r = DMatrix::from_row_slice(p, p, corr);
    match full_rank_cholesky(&r) {
        Some(_) => Ok(()),
        None => Err(first_collinear(&r).map(|(k, _, _)| k)),
    }
}

/// The first feature `k ≥ 1` whose share of variance unexplained by features `0..k` is below
/// [`COLLINEAR_PIVOT2`]: `k`, its regression on those features and that share.
fn first_collinear(r: &DMatrix<f64>) -> Option<(usize, DMatrix<f64>, f64)> {
    let p = r.nrows();
    for k in 1..p {
        let a = r.view((0, 0), (k, k)).into_owned();
        let b = r.view((0, k), (k, 1)).into_owned();
        let Some(ca) = a.cholesky() else { continue };
        let beta = ca.solve(&b);
        let r2 = (b.transpose() * &beta)[(0, 0)];
        let unexplained = r[(k, k)] - r2;
        if unexplained < COLLINEAR_PIVOT2 {
            return Some((k, beta, unexplained));
        }
    }
    None
}

/// Find the first feature `k` whose share of variance unexplained by features `0..k` is below
/// [`COLLINEAR_PIVOT2`], and say which earlier features explain it.
fn explain_collinear(names: &[String], r: &DMatrix<f64>) -> String {
    if let Some((k, beta, unexplained)) = first_collinear(r) {
        let mut terms: Vec<(f64, &str)> = (0..k)
            .filter(|&j| beta[(j, 0)].abs() > 1e-6)
            .map(|j| (beta[(j, 0)].abs(), names[j].as_str()))
            .collect();
        terms.sort_by(|x, y| y.0.total_cmp(&x.0));
        let with: Vec<String> = terms.iter().map(|(_, n)| format!("`{n}`")).collect();
        return format!(
            "feature `{}` is a linear combination of {} (R² = 1 − {:.1e}); the covariance is singular: drop one of these columns, or use shrinkage",
            names[k],
            if with.is_empty() { "the features before it".to_string() } else { with.join(", ") },
            unexplained.max(0.0)
        );
    }
    "the correlation matrix is not positive definite (features are linearly dependent); use shrinkage".to_string()
}

/// 2-norm condition number of a symmetric positive definite matrix.
pub(super) fn condition(corr: &[f64], p: usize) -> f64 {
    let e = DMatrix::from_row_slice(p, p, corr).symmetric_eigenvalues();
    let max = e.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let min = e.iter().cloned().fold(f64::INFINITY, f64::min);
    if min > 0.0 {
        max / min
    } else {
        f64::INFINITY
    }
}
