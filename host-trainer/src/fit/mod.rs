//! From a baseline file to a fitted model.
//!
//! # The pipeline
//!
//! 1. Read the header ([`crate::data::ingest::Layout`]). Features named in [`FitOptions::log_columns`]
//!    are replaced by their natural log before anything else (a value `≤ 0` is an error).
//! 2. If [`FitOptions::holdout`] is above zero, count the lines with `memchr` (cheap) and set the
//!    last `holdout` fraction of the data lines aside, in time order, as the held-out tail.
//! 3. Split the training part into [`FitOptions::threads`] byte ranges on line boundaries and
//!    read each range in its own thread into its own [`Moments`] (Welford), then merge them (Chan
//!    et al.). In the plain path no row is stored: memory does not grow with the row count. Each
//!    thread also keeps a bottom-k sample of at most [`SAMPLE_ROWS`] rows, keyed by a hash of the
//!    row's byte offset, so the merged sample is the same whatever the number of threads.
//! 4. [`Shrinkage::LedoitWolf`] and [`FitOptions::robust`] need every training row: in those
//!    modes the threads also keep their rows, and memory grows with the row count (8 bytes a value).
//! 5. Check the result: constant features and features that are linear combinations of others
//!    are named in the error; fewer than `p + 1` rows is an error, fewer than `10 p` a warning.
//! 6. Factor the correlation matrix `R = L Lᵀ` (nalgebra's Cholesky) and keep `W = L⁻¹`.
//!    The core's parameters are then: offset = mean, scale = 1/sd, mean in standardised space = 0,
//!    and `w = W`. The device's `f32` arithmetic thus works on standardised numbers of order 1.
//! 7. Score the sample through the core's `f32` [`Model::score`] and compare with the `f64`
//!    reference [`Fitted::d2_f64`]; score every held-out row through the core.
//!
//! Shrinkage is applied to the correlation matrix, so it does not depend on the units of the
//! features: Ledoit–Wolf runs on the standardised rows, and diagonal loading by `λ` adds `λ` to
//! the correlation's unit diagonal (`λ · var_i` to each variance).

use std::io;
use std::path::Path;
use std::sync::atomic::{AtomicUsize, Ordering};

use anyhow::{bail, Context, Result};
use ellipsoid_core::{
    AlarmPolicy, Model, ModelMeta, ModelParams, Preprocess, Thresholds, MAX_FEATURES,
};
use nalgebra::DMatrix;

use crate::data::ingest::{self, CsvOptions, IngestError, Layout, Reader};
use crate::stats::moments::{correlation_of, Moments};
use crate::stats::{diagnostics, mcd, shrink};

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

/// What scoring needs of a fit: the preprocessing and the factor.
#[derive(Clone, Copy)]
struct Standardise<'a> {
    log_mask: u32,
    mean: &'a [f64],
    sd: &'a [f64],
    w: &'a [f64],
}

impl Standardise<'_> {
    fn params<const N: usize>(
        &self,
        thresholds: Thresholds,
        policy: AlarmPolicy,
        meta: ModelMeta,
    ) -> ModelParams<N> {
        let p = self.mean.len();
        assert_eq!(N, p, "params::<{N}>() on a model of {p} features");
        let mut pre = Preprocess::<N>::identity();
        pre.log_mask = self.log_mask;
        let mut w = [[0.0f32; N]; N];
        for (i, row) in w.iter_mut().enumerate() {
            pre.offset[i] = self.mean[i] as f32;
            pre.scale[i] = (1.0 / self.sd[i]) as f32;
            for (j, wij) in row.iter_mut().enumerate().take(i + 1) {
                *wij = self.w[i * p + j] as f32;
            }
        }
        ModelParams {
            meta,
            preprocess: pre,
            mean: [0.0; N],
            w,
            thresholds,
            policy,
        }
    }

    fn d2_f64(&self, raw: &[f64]) -> f64 {
        let p = self.mean.len();
        let mut u = [0.0f64; MAX_FEATURES];
        for (i, ui) in u.iter_mut().enumerate().take(p) {
            let t = if (self.log_mask >> i) & 1 == 1 {
                if raw[i] > 0.0 {
                    raw[i].ln()
                } else {
                    f64::NAN
                }
            } else {
                raw[i]
            };
            *ui = (t - self.mean[i]) / self.sd[i];
        }
        (0..p)
            .map(|i| {
                let z: f64 = (0..=i).map(|j| self.w[i * p + j] * u[j]).sum();
                z * z
            })
            .sum()
    }

    /// The core's model, with placeholder thresholds (d² does not depend on them).
    fn model<const N: usize>(&self) -> Result<Model<N>> {
        let params = self.params::<N>(
            Thresholds {
                alarm: 1.0,
                clear: 0.0,
            },
            AlarmPolicy::default(),
            ModelMeta::default(),
        );
        Model::<N>::new(params)
            .map_err(|e| anyhow::anyhow!("the fitted model is not valid for the core: {e}"))
    }
}

/// Fit the baseline file `path`. See the module documentation for the steps.
///
/// A baseline must be complete: [`CsvOptions::allow_missing`] is ignored here, so an empty or
/// NaN cell is an error (or, with `skip_bad_rows`, a skipped row), never a NaN in the moments.
pub fn fit_file(path: &Path, opts: &FitOptions) -> Result<Fitted> {
    let mut owned = opts.clone();
    owned.csv.allow_missing = false;
    let opts = &owned;
    let layout = Layout::read(path, &opts.csv)?;
    let file = layout.file.clone();
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
    let io = |e: io::Error| anyhow::Error::new(e).context(format!("while reading {file}"));

    // Where the held-out tail starts.
    let (train_end, holdout_at) = if opts.holdout > 0.0 {
        let lines = ingest::count_lines(path, layout.data_start, layout.file_len).map_err(io)?;
        let mut hold = (opts.holdout * lines as f64).round() as u64;
        hold = hold.max(1).min(lines);
        let train_lines = lines - hold;
        let at = ingest::nth_line_start(path, layout.data_start, train_lines).map_err(io)?;
        (at, Some((at, 2 + train_lines)))
    } else {
        (layout.file_len, None)
    };

    let threads = match opts.threads {
        0 if train_end - layout.data_start < 1 << 20 => 1,
        0 => std::thread::available_parallelism().map_or(1, |n| n.get()),
        t => t,
    };
    let bounds = ingest::split_ranges(path, layout.data_start, train_end, threads).map_err(io)?;
    let keep_rows = opts.robust || opts.shrinkage == Shrinkage::LedoitWolf;
    let progress = ingest::progress_bar(train_end - layout.data_start, opts.csv.quiet);

    let first_error = AtomicUsize::new(usize::MAX);
    let outs: Vec<WorkerOut> = std::thread::scope(|s| {
        let handles: Vec<_> = bounds
            .windows(2)
            .enumerate()
            .map(|(k, b)| {
                let (start, end) = (b[0], b[1]);
                let layout = &layout;
                let first_error = &first_error;
                let progress = progress.clone();
                s.spawn(move || {
                    let job = Job {
                        path,
                        layout,
                        csv: &opts.csv,
                        log_mask,
                        keep_rows,
                        index: k,
                        first_error,
                    };
                    job.run(start, end, progress)
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("a reader thread panicked"))
            .collect()
    });

    // Put absolute line numbers on everything, stop at the first error in file order.
    let mut moments = Moments::new(p);
    let mut sample = Sample::new(p);
    let mut rows: Vec<f64> = Vec::new();
    let mut lines: Vec<u64> = Vec::new();
    let mut skipped = 0u64;
    let mut reasons: Vec<String> = Vec::new();
    let mut base = 2u64; // the first data line
    for mut out in outs {
        let shift = base - 1;
        if let Some(mut e) = out.error.take() {
            e.shift_line(shift);
            return Err(e.into());
        }
        moments.merge(&out.moments);
        sample.absorb(out.sample);
        rows.append(&mut out.rows);
        lines.extend(out.lines.iter().map(|l| l + shift));
        skipped += out.skipped;
        for mut r in out.reasons {
            if reasons.len() < ingest::KEEP_REASONS {
                r.shift_line(shift);
                reasons.push(r.to_string());
            }
        }
        base += out.lines_read;
    }
    if let Some(pb) = &progress {
        pb.finish_and_clear();
    }

    let n = moments.n;
    let mut warnings = Vec::new();
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
    if skipped > 0 {
        warnings.push(format!("{skipped} bad training row(s) skipped"));
    }

    let mut mean = moments.mean();
    let mut cov = moments.covariance();
    check_constant(&file, &layout.features, &mean, &cov, &mut warnings)?;

    // Robust fitting and shrinkage.
    let mut robust = None;
    if opts.robust {
        let fit = mcd::fast_mcd(&rows, n as usize, p, &mcd::McdOptions::default())
            .with_context(|| format!("{file}: robust fit"))?;
        let set_aside_lines: Vec<u64> = fit.outliers.iter().map(|&r| lines[r]).collect();
        if !fit.outliers.is_empty() {
            let mut out = fit.outliers.iter().peekable();
            let mut kept = Vec::with_capacity(rows.len());
            for (r, row) in rows.chunks_exact(p).enumerate() {
                if out.peek() == Some(&&r) {
                    out.next();
                } else {
                    kept.extend_from_slice(row);
                }
            }
            rows = kept;
        }
        mean = fit.mean;
        cov = fit.cov;
        robust = Some(RobustInfo {
            rows_kept: (rows.len() / p) as u64,
            set_aside_lines,
        });
    }
    let shrinkage = match opts.shrinkage {
        Shrinkage::None => None,
        Shrinkage::LedoitWolf => {
            let m = rows.len() / p;
            let (lw_cov, intensity) = ledoit_wolf_standardised(&rows, m, p);
            if robust.is_none() {
                mean = moments.mean();
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
    check_constant(&file, &layout.features, &mean, &cov, &mut Vec::new())?;
    let sd: Vec<f64> = (0..p).map(|i| cov[i * p + i].sqrt()).collect();
    let corr = correlation_of(&cov, p);
    let w = inverse_factor(&file, &layout.features, &corr)?;
    let condition_number = condition(&corr, p);
    if condition_number > WARN_CONDITION {
        warnings.push(format!(
            "the correlation matrix is ill-conditioned (condition number {condition_number:.3e}); the device's f32 scores may lose precision; consider shrinkage or dropping a redundant sensor"
        ));
    }

    // Diagnostics on the sample, in the model's (log) space.
    let sample_rows = sample.into_rows();
    let m = sample_rows.len() / p.max(1);
    let t_rows: Vec<f64> = sample_rows
        .chunks_exact(p)
        .flat_map(|r| transform(r, log_mask))
        .collect();
    // Three independent jobs: the distribution checks (on their own thread), the f32-vs-f64
    // check over the sample, and the held-out tail through the core.
    let st = Standardise {
        log_mask,
        mean: &mean,
        sd: &sd,
        w: &w,
    };
    let (diagnostics, worst, hold) = std::thread::scope(|s| {
        let diag = s.spawn(|| diagnostics::diagnose(&t_rows, m, p, &mean, &cov, &layout.features));
        let worst = f32_check(st, &sample_rows);
        let hold = holdout_at
            .map(|(at, first_line)| score_holdout(path, &layout, opts, at, first_line, st))
            .transpose();
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
        features: layout.features.clone(),
        log_mask,
        rows_used: n,
        rows_skipped: skipped,
        skipped_reasons: reasons,
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
    };
    if let Some(h) = hold {
        fitted.rows_holdout = h.d2.len() as u64;
        fitted.holdout_d2 = h.d2;
        fitted.holdout_lines = h.lines;
        fitted.rows_skipped += h.skipped;
        for r in h.reasons {
            if fitted.skipped_reasons.len() < ingest::KEEP_REASONS {
                fitted.skipped_reasons.push(r);
            }
        }
        if h.skipped > 0 {
            fitted
                .warnings
                .push(format!("{} bad held-out row(s) skipped", h.skipped));
        }
        if h.faults > 0 {
            fitted.warnings.push(format!(
                "{} held-out row(s) could not be scored by the core in f32 (a value or d² beyond the f32 range); they count as faults in the hold-out check",
                h.faults
            ));
        }
        if fitted.rows_holdout == 0 {
            fitted
                .warnings
                .push("the held-out tail has no usable rows".to_string());
        }
    }
    Ok(fitted)
}

/// Worst `|d²_f32 − d²_f64| / max(d²_f64, 1)` over `rows` (raw, row-major).
fn f32_check(st: Standardise<'_>, rows: &[f64]) -> Result<f64> {
    let p = st.mean.len();
    crate::with_dim!(p, N => {
        let model = st.model::<N>()?;
        let mut worst = 0.0f64;
        let mut x = [0.0f32; N];
        for r in rows.chunks_exact(p) {
            for (xi, v) in x.iter_mut().zip(r) {
                *xi = *v as f32;
            }
            let reference = st.d2_f64(r);
            let rel = match model.score(&x) {
                Ok(s) => (f64::from(s.d2) - reference).abs() / reference.max(1.0),
                Err(_) => f64::INFINITY,
            };
            worst = worst.max(rel);
        }
        Ok(worst)
    })
    .expect("dimension checked before")
}

/// `ln` of the log features of a raw row.
fn transform(raw: &[f64], log_mask: u32) -> Vec<f64> {
    raw.iter()
        .enumerate()
        .map(|(i, v)| if (log_mask >> i) & 1 == 1 { v.ln() } else { *v })
        .collect()
}

/// The held-out tail, scored.
struct HoldoutOut {
    d2: Vec<f32>,
    lines: Vec<u64>,
    skipped: u64,
    reasons: Vec<String>,
    faults: u64,
}

/// Score the held-out tail through the core, in time order.
fn score_holdout(
    path: &Path,
    layout: &Layout,
    opts: &FitOptions,
    at: u64,
    first_line: u64,
    st: Standardise<'_>,
) -> Result<HoldoutOut> {
    let p = st.mean.len();
    let mut reader = Reader::range(path, layout, &opts.csv, at, u64::MAX, first_line)?;
    let mut out = HoldoutOut {
        d2: Vec::new(),
        lines: Vec::new(),
        skipped: 0,
        reasons: Vec::new(),
        faults: 0,
    };
    crate::with_dim!(p, N => {
        let model = st.model::<N>()?;
        let mut x = [0.0f32; N];
        loop {
            let (line, bad) = match reader.next_row()? {
                None => break,
                Some(row) => {
                    for (xi, v) in x.iter_mut().zip(row.values) {
                        *xi = *v as f32;
                    }
                    (row.line, non_positive_log(layout, row.line, row.values, st.log_mask))
                }
            };
            if let Some(e) = bad {
                reader.skip_or_fail(e)?;
                continue;
            }
            // An unscorable held-out row stays in the stream as NaN, so that replaying the
            // hold-out through the alarm state machine sees the fault where the device would.
            match model.score(&x) {
                Ok(s) => out.d2.push(s.d2),
                Err(_) => {
                    out.d2.push(f32::NAN);
                    out.faults += 1;
                }
            }
            out.lines.push(line);
        }
        Ok::<(), anyhow::Error>(())
    })
    .expect("dimension checked before")?;
    out.skipped = reader.skipped();
    out.reasons = reader
        .skipped_reasons()
        .iter()
        .map(|e| e.to_string())
        .collect();
    Ok(out)
}

/// The error for the first log feature of `raw` that is not positive, if any.
fn non_positive_log(layout: &Layout, line: u64, raw: &[f64], log_mask: u32) -> Option<IngestError> {
    if log_mask == 0 {
        return None;
    }
    raw.iter().enumerate().find_map(|(i, v)| {
        ((log_mask >> i) & 1 == 1 && (v.is_nan() || *v <= 0.0)).then(|| IngestError::NotPositive {
            file: layout.file.clone(),
            line,
            column: layout.features[i].clone(),
            value: v.to_string(),
        })
    })
}

/// One reader thread's share of the file.
struct Job<'a> {
    path: &'a Path,
    layout: &'a Layout,
    csv: &'a CsvOptions,
    log_mask: u32,
    keep_rows: bool,
    /// Position of this range in the file.
    index: usize,
    /// The lowest index of a range that failed: ranges after it stop early.
    first_error: &'a AtomicUsize,
}

/// What a reader thread found. Lines are relative to its range (the first is 1).
struct WorkerOut {
    moments: Moments,
    sample: Sample,
    rows: Vec<f64>,
    lines: Vec<u64>,
    lines_read: u64,
    skipped: u64,
    reasons: Vec<IngestError>,
    error: Option<IngestError>,
}

impl Job<'_> {
    fn run(&self, start: u64, end: u64, progress: Option<indicatif::ProgressBar>) -> WorkerOut {
        let p = self.layout.features.len();
        let mut out = WorkerOut {
            moments: Moments::new(p),
            sample: Sample::new(p),
            rows: Vec::new(),
            lines: Vec::new(),
            lines_read: 0,
            skipped: 0,
            reasons: Vec::new(),
            error: None,
        };
        let mut reader = match Reader::range(self.path, self.layout, self.csv, start, end, 1) {
            Ok(r) => r,
            Err(e) => {
                out.error = Some(e);
                self.first_error.fetch_min(self.index, Ordering::Relaxed);
                return out;
            }
        };
        reader.set_progress(progress);
        let mut block = Vec::with_capacity(BLOCK_ROWS * p);
        let mut count = 0u64;
        loop {
            count += 1;
            if count.is_multiple_of(4096) && self.first_error.load(Ordering::Relaxed) < self.index {
                break; // an earlier range failed: its error is the one reported
            }
            let bad = match reader.next_row() {
                Ok(Some(row)) => {
                    match non_positive_log(self.layout, row.line, row.values, self.log_mask) {
                        Some(e) => Some(e),
                        None => {
                            out.sample.offer(row.byte, row.values);
                            let at = block.len();
                            block.extend_from_slice(row.values);
                            let t = &mut block[at..];
                            if self.log_mask != 0 {
                                for (i, v) in t.iter_mut().enumerate() {
                                    if (self.log_mask >> i) & 1 == 1 {
                                        *v = v.ln();
                                    }
                                }
                            }
                            if self.keep_rows {
                                out.rows.extend_from_slice(t);
                                out.lines.push(row.line);
                            }
                            None
                        }
                    }
                }
                Ok(None) => break,
                Err(e) => Some(e),
            };
            if let Some(e) = bad {
                // A row error stops the range unless `skip_bad_rows` (for the log check) says not.
                let fatal = match e {
                    IngestError::NotPositive { .. } => reader.skip_or_fail(e).err(),
                    e => Some(e),
                };
                if let Some(e) = fatal {
                    out.error = Some(e);
                    self.first_error.fetch_min(self.index, Ordering::Relaxed);
                    break;
                }
                continue;
            }
            if block.len() == BLOCK_ROWS * p {
                out.moments.push_block(&block);
                block.clear();
            }
        }
        out.moments.push_block(&block);
        out.lines_read = reader.lines_read();
        out.skipped = reader.skipped();
        out.reasons = reader.take_skipped_reasons();
        out
    }
}

/// A uniform sample of at most [`SAMPLE_ROWS`] rows: the rows whose hashed byte offsets are the
/// smallest (a bottom-k sample). Mergeable, and independent of how the file was split.
///
/// Candidates below the current cut-off are appended; when twice the sample size has gathered,
/// the smallest half is kept and the cut-off lowered. Memory stays below `2 · SAMPLE_ROWS` rows.
struct Sample {
    p: usize,
    /// `(key, byte offset)` of each candidate, in the order of `rows`.
    keys: Vec<(u64, u64)>,
    rows: Vec<f64>,
    /// Keys at or above this cannot be among the smallest `SAMPLE_ROWS`.
    top: u64,
}

fn mix(mut z: u64) -> u64 {
    // SplitMix64's finaliser: a bijection of u64, so distinct offsets give distinct keys.
    z = z.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

impl Sample {
    fn new(p: usize) -> Self {
        Sample {
            p,
            keys: Vec::new(),
            rows: Vec::new(),
            top: u64::MAX,
        }
    }

    #[inline]
    fn offer(&mut self, byte: u64, row: &[f64]) {
        let key = mix(byte ^ SAMPLE_SEED);
        if key < self.top {
            self.push(key, byte, row);
        }
    }

    fn push(&mut self, key: u64, byte: u64, row: &[f64]) {
        self.keys.push((key, byte));
        self.rows.extend_from_slice(row);
        if self.keys.len() >= 2 * SAMPLE_ROWS {
            self.compact();
        }
    }

    /// Keep the `SAMPLE_ROWS` smallest keys.
    fn compact(&mut self) {
        if self.keys.len() <= SAMPLE_ROWS {
            return;
        }
        let p = self.p;
        let mut order: Vec<usize> = (0..self.keys.len()).collect();
        order.select_nth_unstable_by_key(SAMPLE_ROWS - 1, |&i| self.keys[i].0);
        order.truncate(SAMPLE_ROWS);
        let keys: Vec<(u64, u64)> = order.iter().map(|&i| self.keys[i]).collect();
        let mut rows = Vec::with_capacity(SAMPLE_ROWS * p);
        for &i in &order {
            rows.extend_from_slice(&self.rows[i * p..(i + 1) * p]);
        }
        self.top = keys.iter().map(|k| k.0).max().unwrap_or(u64::MAX);
        self.keys = keys;
        self.rows = rows;
    }

    fn absorb(&mut self, other: Sample) {
        let p = other.p;
        for (i, &(key, byte)) in other.keys.iter().enumerate() {
            if key < self.top {
                self.push(key, byte, &other.rows[i * p..(i + 1) * p]);
            }
        }
    }

    /// The sampled rows, row-major, in file order.
    fn into_rows(mut self) -> Vec<f64> {
        self.compact();
        let p = self.p;
        let mut order: Vec<usize> = (0..self.keys.len()).collect();
        order.sort_by_key(|&i| self.keys[i].1);
        order
            .iter()
            .flat_map(|&i| self.rows[i * p..(i + 1) * p].iter().copied())
            .collect()
    }
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

/// Refuse constant features; warn about nearly constant ones.
fn check_constant(
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
        if sd.is_nan() || sd <= CONSTANT_REL_SD * scale {
            constant.push(format!("`{}` (mean {}, sd {:e})", names[i], mean[i], sd));
        } else if sd < 1e-4 * scale {
            warnings.push(format!(
                "`{}` varies by only {:.1e} of its mean; the device's f32 arithmetic resolves it coarsely",
                names[i],
                sd / scale
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
fn inverse_factor(file: &str, names: &[String], corr: &[f64]) -> Result<Vec<f64>> {
    let p = names.len();
    let r = DMatrix::from_row_slice(p, p, corr);
    let chol = r.clone().cholesky();
    let ok = chol.as_ref().is_some_and(|c| {
        let l = c.l_dirty();
        (0..p).all(|i| l[(i, i)] * l[(i, i)] >= COLLINEAR_PIVOT2)
    });
    if !ok {
        bail!("{file}: {}", explain_collinear(names, &r));
    }
    let l = chol.expect("checked").l();
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

/// Find the first feature `k` whose share of variance unexplained by features `0..k` is below
/// [`COLLINEAR_PIVOT2`], and say which earlier features explain it.
fn explain_collinear(names: &[String], r: &DMatrix<f64>) -> String {
    let p = names.len();
    for k in 1..p {
        let a = r.view((0, 0), (k, k)).into_owned();
        let b = r.view((0, k), (k, 1)).into_owned();
        let Some(ca) = a.cholesky() else { continue };
        let beta = ca.solve(&b);
        let r2 = (b.transpose() * &beta)[(0, 0)];
        let unexplained = r[(k, k)] - r2;
        if unexplained < COLLINEAR_PIVOT2 {
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
    }
    "the correlation matrix is not positive definite (features are linearly dependent); use shrinkage".to_string()
}

/// 2-norm condition number of a symmetric positive definite matrix.
fn condition(corr: &[f64], p: usize) -> f64 {
    let e = DMatrix::from_row_slice(p, p, corr).symmetric_eigenvalues();
    let max = e.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let min = e.iter().cloned().fold(f64::INFINITY, f64::min);
    if min > 0.0 {
        max / min
    } else {
        f64::INFINITY
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_distr::{Distribution, Normal};
    use std::fmt::Write as _;
    use std::path::PathBuf;

    fn write_csv(dir: &tempfile::TempDir, name: &str, header: &str, rows: &[Vec<f64>]) -> PathBuf {
        let mut s = String::from(header);
        s.push('\n');
        for (i, r) in rows.iter().enumerate() {
            write!(
                s,
                "2024-06-01T{:02}:{:02}:{:02}",
                i / 3600 % 24,
                i / 60 % 60,
                i % 60
            )
            .unwrap();
            for v in r {
                write!(s, ",{v:?}").unwrap();
            }
            s.push('\n');
        }
        let p = dir.path().join(name);
        std::fs::write(&p, s).unwrap();
        p
    }

    fn opts(threads: usize) -> FitOptions {
        FitOptions {
            threads,
            csv: CsvOptions {
                quiet: true,
                ..Default::default()
            },
            ..Default::default()
        }
    }

    /// Correlated pump-like readings: flow, pressure, motor current, temperature.
    fn pump_rows(n: usize, seed: u64) -> Vec<Vec<f64>> {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let g = Normal::new(0.0, 1.0).unwrap();
        (0..n)
            .map(|_| {
                let a: f64 = g.sample(&mut rng);
                let b: f64 = g.sample(&mut rng);
                vec![
                    40.0 + 3.0 * a,
                    2.5 + 0.2 * a + 0.05 * b,
                    6.0 + 0.4 * a + 0.3 * g.sample(&mut rng),
                    31.0 + 0.8 * b + 0.5 * g.sample(&mut rng),
                ]
            })
            .collect()
    }

    const PUMP: &str = "timestamp,flow_lpm,pressure_bar,current_a,temp_c";

    fn rel(a: f64, b: f64) -> f64 {
        (a - b).abs() / b.abs().max(1e-300)
    }

    #[test]
    fn iris_through_the_whole_pipeline() {
        let ds = linfa_datasets::iris();
        let x = ds.records();
        let rows: Vec<Vec<f64>> = x.outer_iter().map(|r| r.to_vec()).collect();
        let dir = tempfile::tempdir().unwrap();
        let path = write_csv(
            &dir,
            "iris.csv",
            "time,sepal_length,sepal_width,petal_length,petal_width",
            &rows,
        );
        let f = fit_file(&path, &opts(2)).unwrap();
        assert_eq!(f.rows_used, 150);
        assert_eq!(f.features.len(), 4);
        // shared/reference-values.md, Fisher's Iris (UCI copy shipped by linfa-datasets), computed
        // there with numpy and statrs: mean, covariance (n − 1), ln det Σ and row 0's d².
        let mean = [
            5.843333333333334,
            3.054,
            3.758666666666667,
            1.198666666666667,
        ];
        for (g, w) in f.mean.iter().zip(mean) {
            assert!(rel(*g, w) < 1e-12, "mean {g} vs {w}");
        }
        let diag = [
            0.6856935123042505,
            0.18800402684563763,
            3.1131794183445156,
            0.5824143176733784,
        ];
        for (i, w) in diag.iter().enumerate() {
            assert!(rel(f.cov[i * 4 + i], *w) < 1e-12, "var {i}");
        }
        let off = [
            ((0, 1), -0.03926845637583892),
            ((0, 2), 1.2736823266219242),
            ((0, 3), 0.5169038031319912),
            ((1, 2), -0.3217127516778524),
            ((1, 3), -0.11798120805369128),
            ((2, 3), 1.2963874720357944),
        ];
        for ((i, j), w) in off {
            assert!(rel(f.cov[i * 4 + j], w) < 1e-11, "cov ({i},{j})");
            assert_eq!(f.cov[i * 4 + j], f.cov[j * 4 + i]);
        }
        assert!(
            (f.ln_det_cov() - -6.264178773823227).abs() < 1e-10,
            "{}",
            f.ln_det_cov()
        );
        assert!(rel(f.d2_f64(&rows[0]), 2.1516696621207396) < 1e-10);
        // The invariant: Σ d² over the fitted rows = (n − 1) p = 596.
        let sum: f64 = rows.iter().map(|r| f.d2_f64(r)).sum();
        assert!((sum - 596.0).abs() < 1e-9, "{sum}");
        // The same density from statrs (a reference library): ln pdf of row 0 = −1.6194995769674443.
        let mut cm = vec![0.0; 16];
        for i in 0..4 {
            for j in 0..4 {
                cm[j * 4 + i] = 0.5 * (f.cov[i * 4 + j] + f.cov[j * 4 + i]);
            }
        }
        use statrs::distribution::Continuous;
        let mvn = statrs::distribution::MultivariateNormal::new(f.mean.clone(), cm).unwrap();
        let lp = mvn.ln_pdf(&nalgebra::DVector::from_vec(rows[0].clone()));
        assert!((lp - -1.6194995769674443).abs() < 1e-10, "{lp}");
        // And through the core's f32 model built from these parameters.
        let model = f.standardise().model::<4>().unwrap();
        let x0 = [
            rows[0][0] as f32,
            rows[0][1] as f32,
            rows[0][2] as f32,
            rows[0][3] as f32,
        ];
        let d2 = model.score(&x0).unwrap().d2;
        assert!(rel(f64::from(d2), 2.1516696621207396) < 1e-5, "{d2}");
        let lp32 = model.log_density(&x0).unwrap();
        assert!(
            (f64::from(lp32) - -1.6194995769674443).abs() < 1e-4,
            "{lp32}"
        );
        assert!(f.f32_vs_f64_worst_rel < 1e-5, "{}", f.f32_vs_f64_worst_rel);
        assert!(f.condition_number > 1.0 && f.condition_number.is_finite());
        // Every training row of a small file is in the f32 check (here all 150).
        assert!(f.holdout_d2.is_empty() && f.rows_holdout == 0);
        assert_eq!(f.diagnostics.rows, 150, "a small file is diagnosed whole");
    }

    #[test]
    fn nist_handbook_example_through_fit() {
        // NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.1.
        let rows = vec![
            vec![4.0, 2.0, 0.60],
            vec![4.2, 2.1, 0.59],
            vec![3.9, 2.0, 0.58],
            vec![4.3, 2.1, 0.62],
            vec![4.1, 2.2, 0.63],
        ];
        let dir = tempfile::tempdir().unwrap();
        let path = write_csv(&dir, "nist.csv", "timestamp,len,wid,ht", &rows);
        let f = fit_file(&path, &opts(1)).unwrap();
        for (g, w) in f.mean.iter().zip([4.10, 2.08, 0.604]) {
            assert!((g - w).abs() < 1e-12);
        }
        let want = [
            0.025, 0.0075, 0.00175, 0.0075, 0.007, 0.00135, 0.00175, 0.00135, 0.00043,
        ];
        for (g, w) in f.cov.iter().zip(want) {
            assert!((g - w).abs() < 1e-14, "{g} vs {w}");
        }
        assert!(
            f.warnings
                .iter()
                .any(|w| w.contains("fewer than 10 per feature")),
            "{:?}",
            f.warnings
        );
        let sum: f64 = rows.iter().map(|r| f.d2_f64(r)).sum();
        assert!(
            (sum - 12.0).abs() < 1e-9,
            "Σ d² = (n − 1) p = 12, got {sum}"
        );
    }

    #[test]
    fn threads_merge_to_the_one_thread_result() {
        let rows = pump_rows(3000, 1);
        let dir = tempfile::tempdir().unwrap();
        let path = write_csv(&dir, "pump.csv", PUMP, &rows);
        let mut o = opts(1);
        o.holdout = 0.1;
        let one = fit_file(&path, &o).unwrap();
        assert_eq!(one.rows_used, 2700);
        for t in [2, 3, 8] {
            o.threads = t;
            let f = fit_file(&path, &o).unwrap();
            assert_eq!(f.rows_used, one.rows_used);
            for (a, b) in f.mean.iter().zip(&one.mean) {
                assert!(rel(*a, *b) < 1e-12);
            }
            for (a, b) in f.cov.iter().zip(&one.cov) {
                assert!(rel(*a, *b) < 1e-12, "{t} threads: {a} vs {b}");
            }
            assert_eq!(f.holdout_lines, one.holdout_lines);
            for (a, b) in f.holdout_d2.iter().zip(&one.holdout_d2) {
                assert!(((a - b) / b.max(1.0)).abs() < 1e-5);
            }
            assert!((f.f32_vs_f64_worst_rel - one.f32_vs_f64_worst_rel).abs() < 1e-6);
        }
    }

    #[test]
    fn holdout_is_the_tail_in_time_order() {
        let rows = pump_rows(100, 2);
        let dir = tempfile::tempdir().unwrap();
        let path = write_csv(&dir, "pump.csv", PUMP, &rows);
        let mut o = opts(2);
        o.holdout = 0.2;
        let f = fit_file(&path, &o).unwrap();
        assert_eq!(f.rows_used, 80);
        assert_eq!(f.rows_holdout, 20);
        assert_eq!(f.holdout_lines, (82..=101).collect::<Vec<u64>>());
        // The held-out scores are the core's f32 scores of those rows.
        let model = f.standardise().model::<4>().unwrap();
        for (d2, line) in f.holdout_d2.iter().zip(&f.holdout_lines) {
            let r = &rows[(*line - 2) as usize];
            let x = [r[0] as f32, r[1] as f32, r[2] as f32, r[3] as f32];
            assert_eq!(model.score(&x).unwrap().d2.to_bits(), d2.to_bits());
            assert!(rel(f64::from(*d2), f.d2_f64(r)) < 1e-4);
        }
        // The fit used only the first 80 rows.
        let mut m = Moments::new(4);
        rows[..80].iter().for_each(|r| m.push(r));
        for (a, b) in f.cov.iter().zip(m.covariance()) {
            assert!(rel(*a, b) < 1e-12);
        }
    }

    fn pump_text(n: usize, seed: u64) -> String {
        let rows = pump_rows(n, seed);
        let mut s = format!("{PUMP}\n");
        for (i, r) in rows.iter().enumerate() {
            writeln!(s, "t{i},{},{},{},{}", r[0], r[1], r[2], r[3]).unwrap();
        }
        s
    }

    fn replace_line(text: &str, line: usize, with: &str) -> String {
        text.lines()
            .enumerate()
            .map(|(i, l)| {
                if i + 1 == line {
                    with.to_string()
                } else {
                    l.to_string()
                }
            })
            .collect::<Vec<_>>()
            .join("\n")
    }

    #[test]
    fn bad_cells_in_any_thread_name_the_absolute_line() {
        let dir = tempfile::tempdir().unwrap();
        let text = pump_text(2000, 3);
        for (line, cell, col) in [
            (1700usize, "12..5", "pressure_bar"),
            (5, "x", "pressure_bar"),
            (2001, "", "pressure_bar"),
        ] {
            let bad = replace_line(&text, line, &format!("t,40,{cell},6,31"));
            let path = dir.path().join("baseline.csv");
            std::fs::write(&path, bad).unwrap();
            for t in [1, 4] {
                let e = fit_file(&path, &opts(t)).unwrap_err().to_string();
                assert!(
                    e.contains(&format!("baseline.csv:{line}:"))
                        && e.contains(col)
                        && e.contains(&format!("`{cell}`")),
                    "{t} threads: {e}"
                );
            }
            let mut o = opts(4);
            o.csv.skip_bad_rows = true;
            let f = fit_file(&path, &o).unwrap();
            assert_eq!(f.rows_skipped, 1);
            assert_eq!(f.rows_used, 1999);
            assert!(
                f.skipped_reasons[0].contains(&format!(":{line}:")),
                "{:?}",
                f.skipped_reasons
            );
        }
        // A wrong field count, in the held-out tail.
        let bad = replace_line(&text, 1990, "t,40,2.5,6");
        let path = dir.path().join("baseline.csv");
        std::fs::write(&path, bad).unwrap();
        let mut o = opts(2);
        o.holdout = 0.1;
        let e = fit_file(&path, &o).unwrap_err().to_string();
        assert!(
            e.contains("baseline.csv:1990:") && e.contains("4 fields"),
            "{e}"
        );
    }

    #[test]
    fn log_features_are_fitted_in_log_space_and_refuse_non_positive_values() {
        let dir = tempfile::tempdir().unwrap();
        let text = pump_text(500, 4);
        let path = dir.path().join("baseline.csv");
        std::fs::write(&path, &text).unwrap();
        let mut o = opts(2);
        o.log_columns = vec!["current_a".into()];
        let f = fit_file(&path, &o).unwrap();
        assert_eq!(f.log_mask, 0b0100);
        let rows = pump_rows(500, 4);
        let mut m = Moments::new(4);
        for r in &rows {
            m.push(&[r[0], r[1], r[2].ln(), r[3]]);
        }
        for (a, b) in f.mean.iter().zip(m.mean()) {
            assert!(rel(*a, b) < 1e-12);
        }
        let sum: f64 = rows.iter().map(|r| f.d2_f64(r)).sum();
        assert!((sum - 499.0 * 4.0).abs() < 1e-8, "{sum}");
        let bad = replace_line(&text, 321, "t,40,2.5,-0.25,31");
        std::fs::write(&path, bad).unwrap();
        let e = fit_file(&path, &o).unwrap_err().to_string();
        assert!(
            e.contains("baseline.csv:321:") && e.contains("current_a") && e.contains("-0.25"),
            "{e}"
        );
        o.csv.skip_bad_rows = true;
        assert_eq!(fit_file(&path, &o).unwrap().rows_skipped, 1);
        // allow_missing does not let a dropout into a fit.
        o.csv.skip_bad_rows = false;
        o.csv.allow_missing = true;
        o.log_columns.clear();
        std::fs::write(&path, replace_line(&text, 77, "t,40,,6,31")).unwrap();
        let e = fit_file(&path, &o).unwrap_err().to_string();
        assert!(
            e.contains("baseline.csv:77:") && e.contains("pressure_bar"),
            "{e}"
        );
        o.log_columns = vec!["nope".into()];
        assert!(fit_file(&path, &o)
            .unwrap_err()
            .to_string()
            .contains("`nope`"));
    }

    #[test]
    fn collinear_and_constant_features_are_named() {
        let dir = tempfile::tempdir().unwrap();
        let rows: Vec<Vec<f64>> = pump_rows(400, 5)
            .into_iter()
            .map(|r| vec![r[0], r[1], r[3], r[0] - 2.0 * r[3]])
            .collect();
        let path = write_csv(
            &dir,
            "baseline.csv",
            "time,flow,pressure,temp,derived",
            &rows,
        );
        let e = fit_file(&path, &opts(2)).unwrap_err().to_string();
        assert!(
            e.contains("`derived`") && e.contains("`flow`") && e.contains("`temp`"),
            "{e}"
        );
        assert!(!e.contains("`pressure`"), "{e}");
        // Shrinkage makes it usable.
        let mut o = opts(2);
        o.shrinkage = Shrinkage::Diagonal(0.01);
        assert!(fit_file(&path, &o).is_ok());

        let rows: Vec<Vec<f64>> = pump_rows(400, 6)
            .into_iter()
            .map(|r| vec![r[0], 230.0, r[1]])
            .collect();
        let path = write_csv(&dir, "baseline.csv", "time,flow,mains_v,pressure", &rows);
        let e = fit_file(&path, &opts(2)).unwrap_err().to_string();
        assert!(
            e.contains("constant") && e.contains("`mains_v`") && !e.contains("`flow`"),
            "{e}"
        );
    }

    #[test]
    fn too_few_rows_is_an_error() {
        let dir = tempfile::tempdir().unwrap();
        let path = write_csv(&dir, "baseline.csv", PUMP, &pump_rows(4, 7));
        let e = fit_file(&path, &opts(1)).unwrap_err().to_string();
        assert!(
            e.contains("baseline.csv") && e.contains("only 4") && e.contains("5 are needed"),
            "{e}"
        );
        let path = write_csv(&dir, "ok.csv", PUMP, &pump_rows(5, 7));
        assert!(fit_file(&path, &opts(1)).is_ok());
    }

    #[test]
    fn shrinkage_modes() {
        let dir = tempfile::tempdir().unwrap();
        let rows = pump_rows(60, 8);
        let path = write_csv(&dir, "pump.csv", PUMP, &rows);
        let plain = fit_file(&path, &opts(2)).unwrap();
        let mut o = opts(2);
        o.shrinkage = Shrinkage::Diagonal(0.25);
        let d = fit_file(&path, &o).unwrap();
        for i in 0..4 {
            assert!(rel(d.cov[i * 4 + i], 1.25 * plain.cov[i * 4 + i]) < 1e-12);
            for j in 0..i {
                assert!(rel(d.cov[i * 4 + j], plain.cov[i * 4 + j]) < 1e-12);
            }
        }
        assert!(d.condition_number < plain.condition_number);
        o.shrinkage = Shrinkage::LedoitWolf;
        let lw = fit_file(&path, &o).unwrap();
        let (name, intensity) = lw.shrinkage.clone().unwrap();
        assert_eq!(name, "Ledoit-Wolf");
        assert!((0.0..=1.0).contains(&intensity));
        assert!(lw.condition_number <= plain.condition_number * (1.0 + 1e-12));
        for (a, b) in lw.mean.iter().zip(&plain.mean) {
            assert!(rel(*a, *b) < 1e-12);
        }
    }

    #[test]
    fn robust_fit_sets_gross_outliers_aside() {
        let dir = tempfile::tempdir().unwrap();
        let mut rows = pump_rows(400, 9);
        for k in [50usize, 51, 52, 300] {
            rows[k] = vec![80.0, 1.0, 20.0, 60.0];
        }
        let path = write_csv(&dir, "pump.csv", PUMP, &rows);
        let mut o = opts(2);
        o.robust = true;
        let f = fit_file(&path, &o).unwrap();
        let info = f.robust.clone().unwrap();
        for line in [52u64, 53, 54, 302] {
            assert!(
                info.set_aside_lines.contains(&line),
                "{:?}",
                info.set_aside_lines
            );
        }
        assert_eq!(info.rows_kept as usize, 400 - info.set_aside_lines.len());
        let plain = fit_file(&path, &opts(2)).unwrap();
        assert!(
            f.cov[0] < plain.cov[0],
            "outliers inflate the plain variance"
        );
    }

    #[test]
    fn sample_is_independent_of_the_split() {
        let mut one = Sample::new(1);
        let mut parts = [Sample::new(1), Sample::new(1), Sample::new(1)];
        for b in 0..(SAMPLE_ROWS as u64 * 3) {
            one.offer(b * 17, &[b as f64]);
            parts[(b % 3) as usize].offer(b * 17, &[b as f64]);
        }
        let mut merged = Sample::new(1);
        for p in parts {
            merged.absorb(p);
        }
        let a = one.into_rows();
        assert_eq!(a.len(), SAMPLE_ROWS);
        assert_eq!(a, merged.into_rows());
        assert!(a.windows(2).all(|w| w[0] < w[1]), "file order");
        // Exactly the rows with the smallest keys, by brute force.
        let mut all: Vec<(u64, u64)> = (0..(SAMPLE_ROWS as u64 * 3))
            .map(|b| (mix((b * 17) ^ SAMPLE_SEED), b))
            .collect();
        all.sort();
        let mut want: Vec<f64> = all[..SAMPLE_ROWS].iter().map(|k| k.1 as f64).collect();
        want.sort_by(f64::total_cmp);
        assert_eq!(a, want);
    }
}
