//! Refitting simulated rows with exactly the estimator a fit used, for the simulated limits of
//! shrinkage and robust fits ([`crate::stats::promise::Spread::refits`]).

use anyhow::Result;

use super::estimate::estimate;
use super::outliers::Extremes;
use super::read::Gathered;
use super::sample::Sample;
use super::Shrinkage;
use crate::stats::autocorr::Lag1Set;
use crate::stats::moments::Moments;

/// The mean and covariance that [`super::fit_file`] would estimate from `m` rows (row-major,
/// already in the model's log space) with the same robust and shrinkage options.
pub fn refit_rows(
    rows: &[f64],
    m: usize,
    p: usize,
    robust: bool,
    shrinkage: Shrinkage,
) -> Result<(Vec<f64>, Vec<f64>)> {
    let rows = &rows[..m * p];
    let mut moments = Moments::new(p);
    moments.push_block(rows);
    let mut g = Gathered {
        moments,
        sample: Sample::new(p),
        rows: rows.to_vec(),
        lines: (0..m as u64).collect(),
        skipped: 0,
        reasons: Vec::new(),
        lag: Lag1Set::default(),
        extremes: Extremes::new(p),
    };
    let names: Vec<String> = (0..p).map(|i| format!("x{i}")).collect();
    let e = estimate(
        "simulated baseline",
        &names,
        &mut g,
        robust,
        shrinkage,
        &mut Vec::new(),
    )?;
    Ok((e.mean, e.cov))
}
