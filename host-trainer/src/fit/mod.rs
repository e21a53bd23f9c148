//! From a baseline file to a fitted model.
//!
//! # The pipeline
//!
//! 1. Read the header ([`crate::data::ingest::Layout`]). Features named in [`FitOptions::log_columns`]
//!    are replaced by their natural log before anything else (a value `≤ 0` is an error).
//! 2. If [`FitOptions::holdout`] is above zero, count the lines with `memchr` (cheap) and set the
//!    last `holdout` fraction of the data lines aside, in time order, as the held-out tail.
//! 3. Split the training part into [`FitOptions::threads`] byte ranges on line boundaries and
//!    read each range in its own thread into its own [`Moments`](crate::stats::moments::Moments) (Welford), then merge them (Chan
//!    et al.). In the plain path no row is stored: memory does not grow with the row count. Each
//!    thread also keeps a bottom-k sample of at most [`SAMPLE_ROWS`] rows, keyed by a hash of the
//!    row's byte offset, so the merged sample is the same whatever the number of threads.
//! 4. [`Shrinkage::LedoitWolf`] and [`FitOptions::robust`] need every training row: in those
//!    modes the threads also keep their rows, and memory grows with the row count (8 bytes a value).
//! 5. Check the result: a gross outlier (a value more than [`GROSS_Z`] robust standard deviations
//!    from its feature's median; each thread keeps every feature's minimum and maximum, and the
//!    median and MAD come from the sample; see `outliers.rs`) is refused with its line, or skipped
//!    in a second pass, or set aside before FAST-MCD; a feature of only 0 and 1 is warned about;
//!    constant features, features `f32` cannot resolve at their magnitude and features that are
//!    linear combinations of others are named in the error; fewer than `p + 1` rows is an error,
//!    fewer than `10 p` a warning.
//! 6. Factor the correlation matrix `R = L Lᵀ` (nalgebra's Cholesky) and keep `W = L⁻¹`.
//!    The core's parameters are then: offset = mean, scale = 1/sd, mean in standardised space = 0,
//!    and `w = W`. The device's `f32` arithmetic thus works on standardised numbers of order 1.
//! 7. Score the sample through the core's `f32` [`Model::score`](ellipsoid_core::Model::score) and compare with the `f64`
//!    reference [`Fitted::d2_f64`]; score every held-out row through the core.
//!
//! Shrinkage is applied to the correlation matrix, so it does not depend on the units of the
//! features: Ledoit–Wolf runs on the standardised rows, and diagonal loading by `λ` adds `λ` to
//! the correlation's unit diagonal (`λ · var_i` to each variance).

use std::path::Path;

use anyhow::{bail, Context, Result};
use ellipsoid_core::{AlarmPolicy, ModelMeta, ModelParams, Thresholds, MAX_FEATURES};

use crate::data::ingest::{self, CsvOptions, Layout};
use crate::stats::diagnostics;
use crate::stats::moments::correlation_of;

mod check;
mod estimate;
pub(crate) use estimate::check_collinear;
pub mod memory;
pub mod mixture;
mod outliers;
mod parquet;
mod read;
mod refit;
mod sample;
mod standardise;

pub use refit::refit_rows;

use check::{f32_check, score_holdout, transform, HoldoutOut};
use estimate::{condition, estimate, inverse_factor, Estimate};
pub use outliers::GROSS_Z;
use outliers::{any_gross, drop_gross, Gate};
use read::{read_training, split_holdout, Split};
use standardise::Standardise;

/// Most training rows kept for diagnostics and the `f32`-vs-`f64` check.
pub const SAMPLE_ROWS: usize = 10_000;

/// Rows a reader thread gathers before folding them into its moments ([`Moments::push_block`]).
const BLOCK_ROWS: usize = 128;

/// Seed of the row sample's hash.
pub const SAMPLE_SEED: u64 = 0x5eed_e11f_501d_0001;

/// A pivot of the correlation's Cholesky factor whose square (the share of a feature's variance
/// not explained by the features before it, `1 − R²`) is below this makes the feature collinear.
pub const COLLINEAR_PIVOT2: f64 = 1e-10;

/// A feature whose standard deviation is at most this share of its |mean| is constant: `f32`
/// (a 24-bit significand, relative step about 6e-8) could not tell its readings apart.
pub const CONSTANT_REL_SD: f64 = 1e-7;

/// Above this condition number of the correlation matrix a warning is given.
pub const WARN_CONDITION: f64 = 1e6;

/// Above this worst relative difference between the core's `f32` d² and the `f64` d² a warning
/// is given.
pub const WARN_F32_REL: f64 = 1e-3;

/// How the sample covariance is regularised.
#[derive(Clone, Copy, Debug, PartialEq, Default)]
pub enum Shrinkage {
    /// The plain sample covariance.
    #[default]
    None,
    /// Ledoit–Wolf shrinkage towards the identity, on the standardised rows (needs the rows in memory).
    LedoitWolf,
    /// Add `λ` times each variance to it (diagonal loading of the correlation matrix by `λ`).
    Diagonal(f64),
}

/// Everything [`fit_file`] needs besides the file.
#[derive(Clone, Debug, Default)]
pub struct FitOptions {
    /// How to read the CSV.
    pub csv: CsvOptions,
    /// Features to ln-transform before everything else (values must be positive).
    pub log_columns: Vec<String>,
    /// Regularisation of the covariance.
    pub shrinkage: Shrinkage,
    /// Fit with FAST-MCD, setting outlying training rows aside (needs the rows in memory).
    pub robust: bool,
    /// Share of the data lines, `0 ≤ holdout < 1`, taken from the END of the file (time order)
    /// and not fitted, but scored afterwards. Lines are counted with `memchr` before parsing, so
    /// blank lines count too; above zero at least one line is held out.
    pub holdout: f64,
    /// Reader threads; 0 takes the machine's parallelism (1 for files under 1 MB).
    pub threads: usize,
}

/// What robust fitting set aside.
#[derive(Clone, Debug, PartialEq)]
pub struct RobustInfo {
    /// Training rows the final estimate was computed on.
    pub rows_kept: u64,
    /// File lines of the training rows set aside as outliers, in file order.
    pub set_aside_lines: Vec<u64>,
}

/// A fitted model, in `f64`, with what is needed to report on it.
#[derive(Clone, Debug)]
pub struct Fitted {
    /// The file fitted.
    pub file: String,
    /// Feature names, in model order.
    pub features: Vec<String>,
    /// Bit `i`: feature `i` is ln-transformed.
    pub log_mask: u32,
    /// Training rows read (robust fitting may set some aside; see [`RobustInfo`]).
    pub rows_used: u64,
    /// Rows dropped under `skip_bad_rows`, training and held-out together.
    pub rows_skipped: u64,
    /// Why the first few dropped rows were dropped.
    pub skipped_reasons: Vec<String>,
    /// Held-out rows scored.
    pub rows_holdout: u64,
    /// Mean, in (log-)raw units.
    pub mean: Vec<f64>,
    /// Standard deviations, `sqrt(diag(cov))`.
    pub sd: Vec<f64>,
    /// Covariance `p × p` row-major, in (log-)raw units, after shrinkage or robust fitting.
    pub cov: Vec<f64>,
    /// The correlation matrix of `cov`.
    pub corr: Vec<f64>,
    /// 2-norm condition number of `corr` (largest over smallest eigenvalue).
    pub condition_number: f64,
    /// Shrinkage method and intensity, if any.
    pub shrinkage: Option<(String, f64)>,
    /// What robust fitting set aside, if it ran.
    pub robust: Option<RobustInfo>,
    /// Distribution checks, on the training sample (at most [`SAMPLE_ROWS`] rows).
    pub diagnostics: diagnostics::Diagnostics,
    /// `W = L⁻¹` with `corr = L Lᵀ`, `p × p` row-major, lower-triangular.
    pub w: Vec<f64>,
    /// The core's `f32` d² of every held-out row, in time order; NaN where the core could not
    /// score the row (a fault on the device).
    pub holdout_d2: Vec<f32>,
    /// The file line of each held-out row.
    pub holdout_lines: Vec<u64>,
    /// Worst `|d²_f32 − d²_f64| / max(d²_f64, 1)` over the training sample (over every training
    /// row when there are at most [`SAMPLE_ROWS`]).
    pub f32_vs_f64_worst_rel: f64,
    /// Things the user should know that did not stop the fit.
    pub warnings: Vec<String>,
    /// Lag-1 autocorrelation of each (log-transformed) feature over consecutive training rows
    /// ([`crate::stats::autocorr`]); empty with fewer than two rows.
    pub lag1: Vec<f64>,
    /// The plain sample correlation of the training rows, before shrinkage or robust fitting:
    /// the Gaussian that the simulated limits of a shrinkage fit draw their baselines from.
    pub sample_corr: Vec<f64>,
}

impl Fitted {
    /// The number of features.
    pub fn dim(&self) -> usize {
        self.features.len()
    }

    /// The core's parameters: offset = mean, scale = 1/sd (log space for log features),
    /// mean = 0, `w` from `corr`, rounded to `f32`.
    ///
    /// # Panics
    /// If `N` is not the number of features.
    pub fn params<const N: usize>(
        &self,
        thresholds: Thresholds,
        policy: AlarmPolicy,
        meta: ModelMeta,
    ) -> ModelParams<N> {
        self.standardise().params(thresholds, policy, meta)
    }

    /// The `f64` reference d² of a raw reading (NaN if a log feature is not positive).
    pub fn d2_f64(&self, raw: &[f64]) -> f64 {
        self.standardise().d2_f64(raw)
    }

    fn standardise(&self) -> Standardise<'_> {
        Standardise {
            log_mask: self.log_mask,
            mean: &self.mean,
            sd: &self.sd,
            w: &self.w,
        }
    }

    /// `ln det Σ` of the fitted covariance in (log-)raw units.
    pub fn ln_det_cov(&self) -> f64 {
        let p = self.dim();
        let sds: f64 = self.sd.iter().map(|s| 2.0 * s.ln()).sum();
        // det W = Π W_ii = 1 / det L.
        let diag: f64 = (0..p).map(|i| -2.0 * self.w[i * p + i].ln()).sum();
        sds + diag
    }
}

/// Fit the baseline file `path`. See the module documentation for the steps.
///
/// A baseline must be complete: [`CsvOptions::allow_missing`] is ignored here, so an empty or
/// NaN cell is an error (or, with `skip_bad_rows`, a skipped row), never a NaN in the moments.
///
/// A Parquet file (see [`ingest::is_parquet`]) is copied to a temporary CSV first (`parquet.rs`).
pub fn fit_file(path: &Path, opts: &FitOptions) -> Result<Fitted> {
    if ingest::is_parquet(path) {
        return parquet::fit_parquet(path, opts);
    }
    let mut owned = opts.clone();
    owned.csv.allow_missing = false;
    let opts = &owned;
    let layout = Layout::read(path, &opts.csv)?;
    let file = layout.file.clone();
    let log_mask = check_options(&layout, opts)?;
    let p = layout.features.len();
    let Split {
        train_end,
        holdout_at,
    } = split_holdout(path, &layout, opts.holdout)?;
    let mut gathered = read_training(path, &layout, opts, log_mask, train_end, None)?;
    let mut sample_rows =
        std::mem::replace(&mut gathered.sample, sample::Sample::new(p)).into_rows();

    // Gross outliers: refused, or skipped, or set aside before FAST-MCD. The pass kept only
    // each feature's extremes; when one is gross, a second pass with the gate finds the rows
    // (and stops at the first, naming its line, unless they are to be skipped).
    let gate = if log_mask == 0 {
        Gate::from_rows(&sample_rows, p)
    } else {
        Gate::from_rows(&transform_rows(&sample_rows, p, log_mask), p)
    };
    let mut gross_lines = Vec::new();
    if any_gross(&gate, &gathered.extremes) {
        if opts.robust && !opts.csv.skip_bad_rows {
            gross_lines = drop_gross(&gate, &mut gathered.rows, &mut gathered.lines, p);
            outliers::sample_without_gross(&gate, &mut sample_rows, p, log_mask);
            let mut m = crate::stats::moments::Moments::new(p);
            m.push_block(&gathered.rows);
            gathered.moments = m;
        } else {
            gathered = read_training(path, &layout, opts, log_mask, train_end, Some(&gate))?;
            sample_rows =
                std::mem::replace(&mut gathered.sample, sample::Sample::new(p)).into_rows();
        }
    }

    finish_fit(
        file,
        &layout.features,
        log_mask,
        opts,
        gathered,
        sample_rows,
        gross_lines,
        |st| {
            holdout_at
                .map(|(at, first_line)| score_holdout(path, &layout, opts, at, first_line, st))
        },
    )
}

/// The steps of a fit after its training rows are gathered, shared by the file fit and the fit of
/// rows in memory: the checks, the estimate, the factor, the diagnostics, the `f32` check and the
/// hold-out (`score_held_out` scores it through the core, on the calling thread, while the
/// distribution checks run on another).
#[allow(clippy::too_many_arguments)]
fn finish_fit(
    file: String,
    features: &[String],
    log_mask: u32,
    opts: &FitOptions,
    mut gathered: read::Gathered,
    sample_rows: Vec<f64>,
    gross_lines: Vec<u64>,
    score_held_out: impl FnOnce(Standardise<'_>) -> Option<Result<check::HoldoutOut>>,
) -> Result<Fitted> {
    let p = features.len();
    let n = gathered.moments.n;
    let lag1 = {
        let diag: Vec<f64> = (0..p).map(|i| gathered.moments.comoment(i, i)).collect();
        gathered.lag.rho(&gathered.moments.mean(), &diag)
    };
    let sample_corr = gathered.moments.correlation();
    let mut warnings = Vec::new();
    label_like(features, &sample_rows, &mut warnings);
    if n < p as u64 + 1 {
        bail!(
            "{file}: only {n} usable training row(s) for {p} feature(s); at least {} are needed",
            p + 1
        );
    }
    if n < 10 * p as u64 {
        warnings.push(format!(
            "only {n} training rows for {p} features (fewer than 10 per feature): the covariance is poorly determined; consider shrinkage"
        ));
    }
    if gathered.skipped > 0 {
        warnings.push(format!("{} bad training row(s) skipped", gathered.skipped));
    }

    let Estimate {
        mean,
        cov,
        shrinkage,
        mut robust,
    } = estimate(
        &file,
        features,
        &mut gathered,
        opts.robust,
        opts.shrinkage,
        &mut warnings,
    )?;
    if let Some(r) = robust.as_mut().filter(|_| !gross_lines.is_empty()) {
        r.set_aside_lines.extend(&gross_lines);
        r.set_aside_lines.sort_unstable();
    }
    let sd: Vec<f64> = (0..p).map(|i| cov[i * p + i].sqrt()).collect();
    let corr = correlation_of(&cov, p);
    let w = inverse_factor(&file, features, &corr)?;
    let condition_number = condition(&corr, p);
    if condition_number > WARN_CONDITION {
        warnings.push(format!(
            "the correlation matrix is ill-conditioned (condition number {condition_number:.3e}); the device's f32 scores may lose precision; consider shrinkage or dropping a redundant sensor"
        ));
    }

    // Diagnostics on the sample, in the model's (log) space.
    let m = sample_rows.len() / p.max(1);
    let t_rows = transform_rows(&sample_rows, p, log_mask);
    // Three independent jobs: the distribution checks (on their own thread), the f32-vs-f64
    // check over the sample, and the held-out tail through the core.
    let st = Standardise {
        log_mask,
        mean: &mean,
        sd: &sd,
        w: &w,
    };
    let (diagnostics, worst, hold) = std::thread::scope(|s| {
        let diag = s.spawn(|| diagnostics::diagnose(&t_rows, m, p, &mean, &cov, features));
        let worst = f32_check(st, &sample_rows);
        let hold = score_held_out(st).transpose();
        let diag = diag.join().expect("the diagnostics thread panicked");
        (diag, worst, hold)
    });
    let worst = worst.with_context(|| file.clone())?;
    let hold = hold?;
    if worst > WARN_F32_REL {
        warnings.push(format!(
            "the device's f32 d² differs from the f64 reference by up to {:.2} % on the training sample",
            worst * 100.0
        ));
    }
    let mut fitted = Fitted {
        file: file.clone(),
        features: features.to_vec(),
        log_mask,
        rows_used: n + gross_lines.len() as u64,
        rows_skipped: gathered.skipped,
        skipped_reasons: gathered.reasons,
        rows_holdout: 0,
        mean,
        sd,
        cov,
        corr,
        condition_number,
        shrinkage,
        robust,
        diagnostics,
        w,
        holdout_d2: Vec::new(),
        holdout_lines: Vec::new(),
        f32_vs_f64_worst_rel: worst,
        warnings,
        lag1,
        sample_corr,
    };
    if let Some(h) = hold {
        fitted.add_holdout(h);
    }
    Ok(fitted)
}

/// `ln` of the log features of raw rows (row-major).
fn transform_rows(rows: &[f64], p: usize, log_mask: u32) -> Vec<f64> {
    if log_mask == 0 {
        return rows.to_vec();
    }
    rows.chunks_exact(p)
        .flat_map(|r| transform(r, log_mask))
        .collect()
}

/// Warn about a feature that holds only 0 and 1 in the sample: probably a label or an on/off
/// state, which a Gaussian model of sensor readings should not take as a feature.
fn label_like(names: &[String], sample: &[f64], warnings: &mut Vec<String>) {
    let p = names.len();
    for (j, name) in names.iter().enumerate() {
        let col = || sample.chunks_exact(p).map(|r| r[j]);
        let binary = col().all(|v| v == 0.0 || v == 1.0);
        if binary && col().any(|v| v == 0.0) && col().any(|v| v == 1.0) {
            warnings.push(format!(
                "column `{name}` holds only the values 0 and 1: it looks like a label or an on/off \
                 state, not a sensor reading; if it is a label, leave it out with --columns"
            ));
        }
    }
}

/// Check the options against the header; returns the log mask.
fn check_options(layout: &Layout, opts: &FitOptions) -> Result<u32> {
    let file = &layout.file;
    let p = layout.features.len();
    if p > MAX_FEATURES {
        bail!("{file}: {p} feature columns, but a model takes at most {MAX_FEATURES}; choose some with the column option");
    }
    let mut log_mask = 0u32;
    for name in &opts.log_columns {
        match layout.features.iter().position(|f| f == name) {
            Some(i) => log_mask |= 1 << i,
            None => bail!(
                "{file}: the log option names `{name}`, which is not a feature column (features: {})",
                layout.features.join(", ")
            ),
        }
    }
    if !(0.0..1.0).contains(&opts.holdout) {
        bail!(
            "the held-out share must lie in 0 ≤ holdout < 1, not {}",
            opts.holdout
        );
    }
    Ok(log_mask)
}

impl Fitted {
    /// Take the scored held-out tail in, with its skipped rows, faults and warnings.
    fn add_holdout(&mut self, h: HoldoutOut) {
        self.rows_holdout = h.d2.len() as u64;
        self.holdout_d2 = h.d2;
        self.holdout_lines = h.lines;
        self.rows_skipped += h.skipped;
        for r in h.reasons {
            if self.skipped_reasons.len() < ingest::KEEP_REASONS {
                self.skipped_reasons.push(r);
            }
        }
        if h.skipped > 0 {
            self.warnings
                .push(format!("{} bad held-out row(s) skipped", h.skipped));
        }
        if h.faults > 0 {
            self.warnings.push(format!(
                "{} held-out row(s) could not be scored by the core in f32 (a value or d² beyond the f32 range); they count as faults in the hold-out check",
                h.faults
            ));
        }
        if self.rows_holdout == 0 {
            self.warnings
                .push("the held-out tail has no usable rows".to_string());
        }
    }
}

#[cfg(test)]
mod tests;
