//! Training a model bank: operating modes, a reading window and slow drift (blob version 2).
//!
//! The steps, after the options are checked ([`BankSpec::check`]):
//!
//! 1. Read the baseline CSV in file order: the feature columns and, for a known-mode bank, the
//!    mode column (an integer 0..=7 the device will be told; it is not a feature).
//! 2. Window the readings as the device does ([`window_samples`]): the mean of the last `w`
//!    readings and, with `--differences`, the first differences. The window restarts where the
//!    device's would: at a change of the mode column, and where a row was skipped.
//! 3. Find each sample's mode: the mode column's value, or (nearest mode) the MAP mode of a
//!    Gaussian mixture ([`crate::fit::mixture`]) fitted by EM to the standardised training part
//!    (the samples before the hold-out), `--modes K` or BIC over 1..=`--max-modes`.
//! 4. Fit each mode by the single-model pipeline ([`train_with`] on
//!    [`crate::fit::memory::fit_rows`]) on its samples, in time order, with the same robust,
//!    shrinkage, hold-out and threshold options: each mode gets its own limit and promise.
//! 5. Drift: rate `1 − 0.5^(1/h)`, bound `--drift-bound` times each feature's pooled
//!    within-mode standard deviation in model units (after the log, before offset and scale).
//! 6. Encode the bank with the core's `blob::encode_bank` and read it back with the core.
//!
//! **Why each mode's promise holds for the bank.** The device flags a sample only when it is
//! outside every mode's alarm ellipsoid (core `bank`), so a sample of mode k is flagged at most
//! as often as mode k's own ellipsoid flags it: each mode's false-alarm figure is an upper bound
//! for the bank on that mode's samples. The windowed samples are autocorrelated (a mean of w
//! readings overlaps its neighbour in w − 1 of them); the limits take that in through the lag-1
//! effective sizes ([`crate::stats::autocorr`]), and a test here checks the promise on simulated
//! windowed data.

use std::path::Path;

use anyhow::{bail, ensure, Context, Result};
use serde::Serialize;

use ellipsoid_core::window::{Window, WindowSpec};
use ellipsoid_core::ReadingFault;

use crate::data::ingest::{self, CsvOptions, Layout, Reader};
use crate::device::replay::to_device;
use crate::fit::check_collinear;
use crate::fit::memory::{fit_rows, Table};
use crate::fit::mixture::{choose_modes_checked, fit_mixture, Mixture, MixtureOptions, SkippedK};
use crate::fit::{Shrinkage, CONSTANT_REL_SD};
use crate::pipeline::train::{train_with, TrainSpec, Trained};
use crate::stats::threshold::Method;

/// Most modes a bank holds (the core's limit).
pub const MAX_MODES: usize = 8;
/// Longest window (the core's limit).
pub const MAX_WINDOW: u8 = 16;
/// Default of `--max-modes`.
pub const DEFAULT_MAX_MODES: usize = 4;
/// Default of `--drift-bound`, in standard deviations.
pub const DEFAULT_DRIFT_BOUND: f64 = 3.0;
/// Most samples EM is fitted to; a longer training part is thinned to every k-th sample (in
/// time order, from the first), so that EM's cost stays bounded. Every sample is then assigned.
pub const EM_MAX_ROWS: usize = 20_000;

/// How many modes.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ModeCount {
    /// Exactly this many.
    Fixed(usize),
    /// Chosen by BIC in 1..=`max_modes`.
    Auto,
}

impl std::str::FromStr for ModeCount {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        if s == "auto" {
            return Ok(ModeCount::Auto);
        }
        match s.parse::<usize>() {
            Ok(k) if (1..=MAX_MODES).contains(&k) => Ok(ModeCount::Fixed(k)),
            _ => Err(format!(
                "`{s}` is not a mode count: give an integer from 1 to {MAX_MODES}, or `auto`"
            )),
        }
    }
}

/// The bank settings of `fit`.
#[derive(Clone, Debug, PartialEq)]
pub struct BankSpec {
    /// `--modes`.
    pub modes: ModeCount,
    /// `--max-modes` (for `auto`).
    pub max_modes: usize,
    /// `--mode-column`: a known-mode bank.
    pub mode_column: Option<String>,
    /// `--window`.
    pub window: u8,
    /// `--differences`.
    pub differences: bool,
    /// `--drift-half-life`, in readings.
    pub drift_half_life: Option<f64>,
    /// `--drift-bound`, in standard deviations.
    pub drift_bound: f64,
    /// Settings of EM (nearest mode).
    pub mixture: MixtureOptions,
}

impl Default for BankSpec {
    fn default() -> Self {
        BankSpec {
            modes: ModeCount::Fixed(1),
            max_modes: DEFAULT_MAX_MODES,
            mode_column: None,
            window: 1,
            differences: false,
            drift_half_life: None,
            drift_bound: DEFAULT_DRIFT_BOUND,
            mixture: MixtureOptions::default(),
        }
    }
}

impl BankSpec {
    /// Nothing a version-1 blob cannot hold: one mode, no window, no differences, no drift.
    pub fn is_plain(&self) -> bool {
        self.modes == ModeCount::Fixed(1)
            && self.mode_column.is_none()
            && self.window == 1
            && !self.differences
            && self.drift_half_life.is_none()
    }

    /// The drift rate `1 − 0.5^(1/h)`, if drift is on.
    pub fn drift_rate(&self) -> Option<f64> {
        self.drift_half_life.map(|h| 1.0 - 0.5f64.powf(1.0 / h))
    }

    /// Readings the window needs before the first score: `w`, or `max(w, 2)` with differences.
    pub fn need(&self) -> usize {
        if self.differences {
            usize::from(self.window).max(2)
        } else {
            usize::from(self.window)
        }
    }

    /// Refuse options that cannot make a bank, with the option's name.
    pub fn check(&self) -> Result<()> {
        if let ModeCount::Fixed(k) = self.modes {
            ensure!(
                (1..=MAX_MODES).contains(&k),
                "--modes {k}: a bank holds 1 to {MAX_MODES} modes"
            );
        }
        ensure!(
            (1..=MAX_MODES).contains(&self.max_modes),
            "--max-modes {}: a bank holds 1 to {MAX_MODES} modes",
            self.max_modes
        );
        if self.mode_column.is_some() {
            ensure!(
                self.modes == ModeCount::Fixed(1),
                "--mode-column and --modes cannot be used together: with a mode column the modes \
                 are its values"
            );
        }
        ensure!(
            (1..=MAX_WINDOW).contains(&self.window),
            "--window {}: a window holds 1 to {MAX_WINDOW} readings",
            self.window
        );
        if let Some(h) = self.drift_half_life {
            ensure!(
                h.is_finite() && h >= 1.0,
                "--drift-half-life {h}: give a number of readings, at least 1"
            );
            let rate = self.drift_rate().unwrap_or(0.0) as f32;
            ensure!(
                rate > 0.0 && rate < 1.0,
                "--drift-half-life {h}: the drift rate {rate} it gives is not strictly between 0 and 1 in f32"
            );
        }
        ensure!(
            self.drift_bound.is_finite() && self.drift_bound > 0.0,
            "--drift-bound {}: give a positive number of standard deviations",
            self.drift_bound
        );
        Ok(())
    }
}

/// Run `$body` with `$N` and `$M` bound as `const usize`: `$N = $n`, and `$M = $N`, or `2 $N`
/// when `$diff` (the shapes a bank can have). `None` outside them.
macro_rules! with_shape {
    ($n:expr, $diff:expr, $N:ident, $M:ident => $body:block) => {{
        macro_rules! arm {
            ($v:literal) => {{
                const $N: usize = $v;
                if $diff {
                    if 2 * $v <= ellipsoid_core::MAX_FEATURES {
                        const $M: usize = if 2 * $v <= ellipsoid_core::MAX_FEATURES {
                            2 * $v
                        } else {
                            $v
                        };
                        Some($body)
                    } else {
                        None
                    }
                } else {
                    const $M: usize = $v;
                    Some($body)
                }
            }};
        }
        match $n {
            1 => arm!(1),
            2 => arm!(2),
            3 => arm!(3),
            4 => arm!(4),
            5 => arm!(5),
            6 => arm!(6),
            7 => arm!(7),
            8 => arm!(8),
            9 => arm!(9),
            10 => arm!(10),
            11 => arm!(11),
            12 => arm!(12),
            13 => arm!(13),
            14 => arm!(14),
            15 => arm!(15),
            16 => arm!(16),
            17 => arm!(17),
            18 => arm!(18),
            19 => arm!(19),
            20 => arm!(20),
            21 => arm!(21),
            22 => arm!(22),
            23 => arm!(23),
            24 => arm!(24),
            25 => arm!(25),
            26 => arm!(26),
            27 => arm!(27),
            28 => arm!(28),
            29 => arm!(29),
            30 => arm!(30),
            31 => arm!(31),
            32 => arm!(32),
            _ => None,
        }
    }};
}
pub(crate) use with_shape;

/// The baseline rows in file order.
#[derive(Clone, Debug)]
pub struct RawRows {
    /// The file, for messages.
    pub file: String,
    /// Feature names (the mode column is not one).
    pub features: Vec<String>,
    /// Row-major values.
    pub values: Vec<f64>,
    /// The file line of each row.
    pub lines: Vec<u64>,
    /// The mode column's value of each row (empty without a mode column).
    pub modes: Vec<u8>,
}

/// Read the baseline for a bank: features, and the mode column's integer values.
pub fn read_rows(path: &Path, csv: &CsvOptions, mode_column: Option<&str>) -> Result<RawRows> {
    ensure!(
        !ingest::is_parquet(path),
        "{}: a bank (--modes, --mode-column, --window, --differences, --drift-half-life) is \
         fitted from a CSV baseline; convert the Parquet file to CSV first",
        path.display()
    );
    let layout = Layout::read(path, csv)?;
    let file = layout.file.clone();
    let mut features = layout.features.clone();
    let mut opts = csv.clone();
    opts.allow_missing = false;
    if let Some(mc) = mode_column {
        if csv
            .columns
            .as_ref()
            .is_some_and(|c| c.iter().any(|n| n == mc))
        {
            bail!("{file}: --mode-column `{mc}` is also named as a feature; the mode column is not a feature");
        }
        ensure!(
            layout.names.iter().any(|n| n == mc),
            "{file}: there is no column `{mc}` for --mode-column (columns: {})",
            layout.names.join(", ")
        );
        ensure!(
            csv.label.as_deref() != Some(mc) && csv.timestamp.as_deref() != Some(mc),
            "{file}: --mode-column `{mc}` is also the label or timestamp column"
        );
        features.retain(|f| f != mc);
        ensure!(
            !features.is_empty(),
            "{file}: no feature column is left beside the mode column `{mc}`"
        );
        let mut cols = features.clone();
        cols.push(mc.to_string());
        opts.columns = Some(cols);
    }
    let p = features.len();
    let mut reader = Reader::open(path, &opts)?;
    let mut out = RawRows {
        file: file.clone(),
        features,
        values: Vec::new(),
        lines: Vec::new(),
        modes: Vec::new(),
    };
    while let Some(row) = reader.next_row()? {
        out.values.extend_from_slice(&row.values[..p]);
        out.lines.push(row.line);
        if let Some(mc) = mode_column {
            let v = row.values[p];
            if v.fract() != 0.0 || !(0.0..=7.0).contains(&v) {
                bail!(
                    "{file}: line {}, column `{mc}`: {v} is not a mode; the mode column holds the \
                     integer the device is told, 0 to 7",
                    row.line
                );
            }
            out.modes.push(v as u8);
        }
    }
    ensure!(!out.lines.is_empty(), "{file}: no data rows");
    Ok(out)
}

/// The samples the device scores: windowed readings, in file order.
#[derive(Clone, Debug)]
pub struct Samples {
    /// Scored-vector names: the features, then `Δ<feature>` for each with differences.
    pub names: Vec<String>,
    /// Row-major, `M` values a sample.
    pub values: Vec<f64>,
    /// The file line of the newest reading of each sample.
    pub lines: Vec<u64>,
    /// The mode column's value of each sample (empty without a mode column).
    pub modes: Vec<u8>,
    /// Readings that gave no sample because the window was filling.
    pub filling: u64,
}

impl Samples {
    /// The scored vector's length.
    pub fn m(&self) -> usize {
        self.names.len()
    }

    /// Samples.
    pub fn len(&self) -> usize {
        self.lines.len()
    }

    /// No sample at all.
    pub fn is_empty(&self) -> bool {
        self.lines.is_empty()
    }
}

/// Window the rows as the device does: `yᵢ = (Σ of the window's xᵢ as f32, oldest first) / w`
/// and, with differences, `y_{N+i} = xₜ,ᵢ − xₜ₋₁,ᵢ`, in f32. With `w = 1` and no differences the
/// samples are the rows themselves, in f64, as the single-model fit reads them. The window
/// restarts at a change of mode (`modes` not empty) and where file lines are not consecutive
/// (a row skipped as bad, as the device restarts at a reading it cannot score).
pub fn window_samples(raw: &RawRows, window: u8, differences: bool) -> Result<Samples> {
    let n = raw.features.len();
    let mut names = raw.features.clone();
    if differences {
        for f in &raw.features {
            let d = format!("Δ{f}");
            ensure!(
                !raw.features.contains(&d),
                "{}: a column is named `{d}`, the name the difference of `{f}` takes; rename it",
                raw.file
            );
            names.push(d);
        }
    }
    let w = usize::from(window);
    if w == 1 && !differences {
        return Ok(Samples {
            names,
            values: raw.values.clone(),
            lines: raw.lines.clone(),
            modes: raw.modes.clone(),
            filling: 0,
        });
    }
    let m = names.len();
    let mut s = Samples {
        names,
        values: Vec::new(),
        lines: Vec::new(),
        modes: Vec::new(),
        filling: 0,
    };
    let spec = WindowSpec {
        length: window,
        differences,
    };
    // The core's own window, so that the samples are the device's bits. Bad readings were
    // refused before (a baseline is complete), so its only faults here are "filling".
    with_shape!(n, differences, N, M => {
        let mut win = Window::<N, M>::new(spec, 0)
            .map_err(|e| anyhow::anyhow!("{}: the window cannot be built: {e}", raw.file))?;
        let mut x = [0f32; N];
        for (r, row) in raw.values.chunks_exact(n).enumerate() {
            let restart = r > 0
                && (raw.lines[r] != raw.lines[r - 1] + 1
                    || (!raw.modes.is_empty() && raw.modes[r] != raw.modes[r - 1]));
            if restart {
                win.restart();
            }
            for (xi, v) in x.iter_mut().zip(row) {
                *xi = to_device(*v);
            }
            match win.push(&x) {
                Ok(y) => {
                    s.values.extend(y.iter().map(|v| f64::from(*v)));
                    s.lines.push(raw.lines[r]);
                    if !raw.modes.is_empty() {
                        s.modes.push(raw.modes[r]);
                    }
                }
                Err(ReadingFault::WindowFilling { .. }) => s.filling += 1,
                Err(e) => bail!("{}: line {}: {e}", raw.file, raw.lines[r]),
            }
        }
        Ok::<(), anyhow::Error>(())
    })
    .ok_or_else(|| anyhow::anyhow!("{}: {n} features and {m} scored values: no bank has that shape (at most {} scored values)", raw.file, ellipsoid_core::MAX_FEATURES))??;
    Ok(s)
}

/// The model-space value of sample `row` (log features ln-transformed).
fn model_space(values: &[f64], log_mask: u32) -> Vec<f64> {
    values
        .iter()
        .enumerate()
        .map(|(i, v)| if (log_mask >> i) & 1 == 1 { v.ln() } else { *v })
        .collect()
}

/// How the modes were found.
#[derive(Clone, Debug, Serialize)]
pub struct ModeSearch {
    /// The BIC of each mode count compared (nearest mode, `auto`).
    pub bic: Vec<(usize, f64)>,
    /// Mode counts `auto` did not compare, and why ([`PartitionCheck`]).
    pub skipped: Vec<SkippedK>,
    /// EM iterations of the mixture kept, and whether it converged.
    pub iterations: usize,
    /// Whether EM met its tolerance.
    pub converged: bool,
    /// Samples EM was fitted to.
    pub rows: usize,
}

/// Mode numbers of a mixture's modes: by weight, heaviest first (ties: EM's order).
fn ranks(mix: &Mixture) -> Vec<u8> {
    let mut order: Vec<usize> = (0..mix.k()).collect();
    order.sort_by(|a, b| mix.weights[*b].total_cmp(&mix.weights[*a]));
    let mut rank = vec![0u8; mix.k()];
    for (r, k) in order.iter().enumerate() {
        rank[*k] = r as u8;
    }
    rank
}

/// Whether a split of the samples into modes can be fitted mode by mode: the single-model
/// pipeline's own refusals, found before it runs, so that `--modes auto` skips such a mode count
/// and an explicit `--modes K` is refused with the mode and the feature named.
///
/// Refused (`--modes K` is an error naming the mode and the feature, `auto` skips K):
/// * fewer samples to fit (after the mode's hold-out) than the `m + 2` a mode needs;
/// * a feature constant within the mode's fitted samples, or varying by at most
///   [`CONSTANT_REL_SD`] of its magnitude (the pipeline's constant rule);
/// * a feature whose within-mode variance, in the standardised units EM works in, is at most
///   EM's covariance regularisation ([`MixtureOptions::reg_covar`]): along that feature the
///   mode's spread is the regulariser's, not the data's (a degenerate solution of EM, whose
///   likelihood, hence BIC, is as large as the regulariser lets it be), and the pipeline would
///   fit it as a nearly singular covariance;
/// * without shrinkage, a feature that is a linear combination of the ones before it within the
///   mode (the pipeline's [`COLLINEAR_PIVOT2`] rule on the mode's correlation matrix).
///
/// Refused by `auto` only: fewer fitted samples than the mode's own parameters,
/// `m + m(m+1)/2` (a mean and a full covariance), less than one sample a parameter. Common
/// practice; it is the per-mode form of the rule [`choose_modes_checked`] applies to the whole
/// mixture (no more parameters than rows). An explicit `--modes K` is held only to `m + 2`.
pub struct PartitionCheck<'a> {
    /// Each sample in model space (log features ln-transformed).
    pub t: &'a [Vec<f64>],
    /// Each sample standardised as EM saw it.
    pub z: &'a [Vec<f64>],
    /// Scored-vector names.
    pub names: &'a [String],
    /// The hold-out share each mode keeps back (the last of its samples).
    pub holdout: f64,
    /// Whether the pipeline shrinks the covariance (then collinearity is no refusal).
    pub shrinkage: Shrinkage,
    /// EM's covariance regularisation.
    pub reg_covar: f64,
}

impl PartitionCheck<'_> {
    /// The first problem of the split `modes` into `k` modes, or `None`. `per_parameter` adds
    /// the refusal of `auto` only (fewer samples than parameters).
    pub fn problem(&self, modes: &[u8], k: usize, per_parameter: bool) -> Option<String> {
        let m = self.names.len();
        let need = m + 2;
        let own = m + m * (m + 1) / 2;
        let mut per_mode: Vec<Vec<usize>> = vec![Vec::new(); k];
        for (i, md) in modes.iter().enumerate() {
            per_mode[usize::from(*md)].push(i);
        }
        for (md, idx) in per_mode.iter().enumerate() {
            let fitted =
                idx.len() - ((self.holdout * idx.len() as f64).round() as usize).min(idx.len());
            if fitted < need {
                return Some(format!(
                    "mode {md} has {} sample(s), {fitted} to fit after the hold-out; a mode of {m} \
                     scored values needs at least {need}",
                    idx.len()
                ));
            }
            if per_parameter && fitted < own {
                return Some(format!(
                    "mode {md} has {fitted} sample(s) to fit, fewer than its own {own} parameters \
                     (a mean and a covariance of {m} scored values)"
                ));
            }
            let rows = &idx[..fitted];
            let nf = fitted as f64;
            let mean: Vec<f64> = (0..m)
                .map(|j| rows.iter().map(|&i| self.t[i][j]).sum::<f64>() / nf)
                .collect();
            let mut cov = vec![0.0; m * m];
            for &i in rows {
                let x = &self.t[i];
                for a in 0..m {
                    let da = x[a] - mean[a];
                    for b in 0..=a {
                        cov[a * m + b] += da * (x[b] - mean[b]);
                    }
                }
            }
            for a in 0..m {
                for b in 0..=a {
                    let v = cov[a * m + b] / (nf - 1.0);
                    cov[a * m + b] = v;
                    cov[b * m + a] = v;
                }
            }
            for j in 0..m {
                let sd = cov[j * m + j].sqrt();
                let name = &self.names[j];
                if sd == 0.0 {
                    return Some(format!(
                        "mode {md}: `{name}` is constant within the mode (all {fitted} samples to \
                         fit are {})",
                        mean[j]
                    ));
                }
                if sd <= CONSTANT_REL_SD * mean[j].abs() {
                    return Some(format!(
                        "mode {md}: `{name}` varies within the mode by only {:.1e} of its \
                         magnitude, which f32 cannot resolve",
                        sd / mean[j].abs()
                    ));
                }
                {
                    let zm = rows.iter().map(|&i| self.z[i][j]).sum::<f64>() / nf;
                    let zv = rows
                        .iter()
                        .map(|&i| (self.z[i][j] - zm).powi(2))
                        .sum::<f64>()
                        / (nf - 1.0);
                    if zv <= self.reg_covar {
                        return Some(format!(
                            "mode {md}: `{name}` is almost constant within the mode (variance \
                             {zv:.1e} of its baseline variance, at most EM's regularisation {:.0e})",
                            self.reg_covar
                        ));
                    }
                }
            }
            if self.shrinkage == Shrinkage::None {
                // The fit's own collinearity rule, on the mode's correlation matrix.
                let corr: Vec<f64> = (0..m * m)
                    .map(|ab| {
                        let (a, b) = (ab / m, ab % m);
                        cov[a * m + b] / (cov[a * m + a] * cov[b * m + b]).sqrt()
                    })
                    .collect();
                match check_collinear(&corr, m) {
                    Ok(()) => {}
                    Err(Some(j)) => {
                        return Some(format!(
                        "mode {md}: `{}` is a linear combination of the scored values before it \
                             within the mode (its covariance would be singular)",
                        self.names[j]
                    ))
                    }
                    Err(None) => {
                        return Some(format!(
                            "mode {md}: the scored values are linearly dependent within the mode \
                             (its covariance would be singular)"
                        ))
                    }
                }
            }
        }
        None
    }
}

/// Each sample's mode, and how they were found. `holdout` and `shrinkage` are the single-model
/// settings each mode is fitted with ([`PartitionCheck`]).
pub fn assign_modes(
    samples: &Samples,
    log_mask: u32,
    train_end: usize,
    spec: &BankSpec,
    holdout: f64,
    shrinkage: Shrinkage,
) -> Result<(Vec<u8>, usize, Option<ModeSearch>)> {
    if !samples.modes.is_empty() {
        let k = usize::from(*samples.modes.iter().max().expect("samples exist")) + 1;
        return Ok((samples.modes.clone(), k, None));
    }
    let m = samples.m();
    let t: Vec<Vec<f64>> = samples
        .values
        .chunks_exact(m)
        .map(|r| model_space(r, log_mask))
        .collect();
    // Standardise by the training part's mean and standard deviation.
    let train = &t[..train_end];
    let nt = train.len() as f64;
    let mean: Vec<f64> = (0..m)
        .map(|i| train.iter().map(|r| r[i]).sum::<f64>() / nt)
        .collect();
    let sd: Vec<f64> = (0..m)
        .map(|i| {
            let v =
                train.iter().map(|r| (r[i] - mean[i]).powi(2)).sum::<f64>() / (nt - 1.0).max(1.0);
            if v > 0.0 {
                v.sqrt()
            } else {
                1.0
            }
        })
        .collect();
    let z: Vec<Vec<f64>> = t
        .iter()
        .map(|r| (0..m).map(|i| (r[i] - mean[i]) / sd[i]).collect())
        .collect();
    let step = train_end.div_ceil(EM_MAX_ROWS).max(1);
    let em_rows: Vec<Vec<f64>> = z[..train_end].iter().step_by(step).cloned().collect();
    let check = PartitionCheck {
        t: &t,
        z: &z,
        names: &samples.names,
        holdout,
        shrinkage,
        reg_covar: spec.mixture.reg_covar,
    };
    let split = |mix: &Mixture| -> Vec<u8> {
        let rank = ranks(mix);
        z.iter().map(|x| rank[mix.assign(x)]).collect()
    };
    let (mix, bic, skipped): (Mixture, Vec<(usize, f64)>, Vec<SkippedK>) = match spec.modes {
        ModeCount::Fixed(k) => {
            let mix = fit_mixture(&em_rows, k, &spec.mixture)
                .context("while looking for the operating modes")?;
            if k > 1 {
                if let Some(p) = check.problem(&split(&mix), k, false) {
                    bail!(
                        "--modes {k}: EM's {k} modes cannot be fitted one by one: {p}; ask for \
                         fewer modes, or use --modes auto, which skips such mode counts"
                    );
                }
            }
            let b = mix.bic(em_rows.len());
            (mix, vec![(k, b)], Vec::new())
        }
        ModeCount::Auto => choose_modes_checked(&em_rows, spec.max_modes, &spec.mixture, |mix| {
            match check.problem(&split(mix), mix.k(), true) {
                Some(p) => Err(p),
                None => Ok(()),
            }
        })
        .context("while looking for the operating modes")?,
    };
    let modes = split(&mix);
    let search = ModeSearch {
        bic,
        skipped,
        iterations: mix.iterations,
        converged: mix.converged,
        rows: em_rows.len(),
    };
    Ok((modes, mix.k(), Some(search)))
}

/// One mode of a trained bank.
pub struct BankMode {
    /// Samples of this mode (fitted and held out).
    pub samples: u64,
    /// Its share of the baseline's samples.
    pub weight: f64,
    /// The single-model training of its samples: fit, limit, promise, hold-out check.
    pub trained: Trained,
}

/// Drift settings as trained.
#[derive(Clone, Debug, Serialize)]
pub struct DriftInfo {
    /// Half-life in readings.
    pub half_life: f64,
    /// `1 − 0.5^(1/h)`.
    pub rate: f64,
    /// The bound in standard deviations.
    pub bound_sigma: f64,
    /// The pooled within-mode standard deviation of each scored feature, model units.
    pub sd: Vec<f64>,
    /// The bound of each scored feature, model units (`bound_sigma · sd`).
    pub bound: Vec<f64>,
    /// The factor every mode's alarm and clear limits were widened by ([`drift_widening`]).
    pub widen: f64,
}

/// How much the drift widens the spread of a healthy reading about its shifted centre, and so
/// the factor each mode's limits are multiplied by: `2 / (2 − r)` at rate `r`.
///
/// The shift is an exponentially weighted mean of past deviations, so it follows their noise as
/// well as the slow drift. For readings whose deviations from the centre form an AR(1) series
/// with lag-1 autocorrelation `ρ`, variance `σ²` and `a = 1 − r`, the shift's steady-state
/// variance is `σ² r² (1 + aρ) / ((1 − a²)(1 − aρ))` and its covariance with the next reading
/// `σ² r ρ / (1 − aρ)`, so `t − s − c` has variance `σ² (1 + r (1 − (2 + a) ρ) / ((1 + a)(1 − aρ)))`.
/// That is largest at `ρ = 0` (it falls as `ρ` grows), where it is `σ² · 2 / (2 − r)`: d² then
/// scales by the same factor in every direction, and widening the limits by it keeps each
/// mode's false-alarm promise for every `ρ ≥ 0`. Positively correlated readings, the common case
/// for sensors, get a little more margin than they need. `tests/drift_promise.rs` checks it
/// on white-noise readings through the core's tracker (a half-life of 2 readings doubles the
/// false alarms without it). At a half-life of 100 readings the factor is 1.0035.
pub fn drift_widening(rate: f64) -> f64 {
    2.0 / (2.0 - rate)
}

/// Everything a bank's training works out, before the blob.
pub struct BankFit {
    /// The raw feature names, in column order.
    pub features: Vec<String>,
    /// The scored vector's names.
    pub scored: Vec<String>,
    /// The modes.
    pub modes: Vec<BankMode>,
    /// How the nearest modes were found (`None` for known modes).
    pub search: Option<ModeSearch>,
    /// Drift, if on.
    pub drift: Option<DriftInfo>,
    /// Readings read, and those that gave no sample (window filling).
    pub readings: u64,
    /// Readings spent filling the window.
    pub filling: u64,
}

/// Fit the modes of a bank. `a` gives the single-model settings each mode is fitted with.
pub fn fit_bank(a: &TrainSpec, b: &BankSpec) -> Result<BankFit> {
    b.check()?;
    ensure!(
        !a.no_fpu,
        "--no-fpu cannot be used with a bank (--modes, --mode-column, --window, --differences, \
         --drift-half-life): the fixed-point blob holds one model"
    );
    ensure!(
        a.validation.is_none() && a.threshold != Method::F1,
        "--validation and --threshold f1 are not available for a bank yet: the validation file \
         would have to be windowed and split by mode; choose another threshold"
    );
    let raw = read_rows(&a.baseline, &a.csv, b.mode_column.as_deref())?;
    let mut log_mask = 0u32;
    for name in &a.log_columns {
        match raw.features.iter().position(|f| f == name) {
            Some(i) => log_mask |= 1 << i,
            None => bail!(
                "{}: --log names `{name}`, which is not a feature column (features: {})",
                raw.file,
                raw.features.join(", ")
            ),
        }
    }
    let n = raw.features.len();
    for (r, row) in raw.values.chunks_exact(n).enumerate() {
        if let Some(j) = (0..n).find(|j| (log_mask >> j) & 1 == 1 && row[*j] <= 0.0) {
            bail!(
                "{}: line {}, column `{}`: {} is not positive, so it has no logarithm (the column is log-transformed)",
                raw.file,
                raw.lines[r],
                raw.features[j],
                row[j]
            );
        }
    }
    let samples = window_samples(&raw, b.window, b.differences)?;
    let m = samples.m();
    ensure!(
        m <= ellipsoid_core::MAX_FEATURES,
        "{}: {m} scored values a sample ({n} features{}), but a model takes at most {}",
        raw.file,
        if b.differences {
            " and their differences"
        } else {
            ""
        },
        ellipsoid_core::MAX_FEATURES
    );
    ensure!(
        !samples.is_empty(),
        "{}: {} rows, but the window of {} readings never filled",
        raw.file,
        raw.lines.len(),
        b.need()
    );
    let total = samples.len();
    let train_end = if a.holdout > 0.0 {
        total - ((a.holdout * total as f64).round() as usize).clamp(1, total)
    } else {
        total
    };
    ensure!(
        train_end > m,
        "{}: {train_end} samples to fit before the hold-out, but {m} scored values need at least {}",
        raw.file,
        m + 1
    );
    let trained_at = a.trained_at.unwrap_or_else(|| {
        std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_secs())
    });
    // `auto` sets aside a mode count whose modes include one too poorly known to be worth its
    // own ellipsoid (see [`MAX_LIMIT_INFLATION`]), and tries the fewer modes BIC ranks next.
    let mut spec_b = b.clone();
    let mut inflated: Vec<SkippedK> = Vec::new();
    let (_, mut search, mut out_modes) = loop {
        let (k, search, out_modes) =
            fit_modes(a, &spec_b, &raw, &samples, log_mask, train_end, trained_at)?;
        if spec_b.modes == ModeCount::Auto && k > 1 {
            if let Some((md, ratio)) = most_inflated(&out_modes) {
                let t = &out_modes[md].trained;
                inflated.push(SkippedK {
                    k,
                    reason: format!(
                        "mode {md}'s limit {:.1} is {ratio:.0} times the chi-square quantile {:.1} at \
                         the same α (above {MAX_LIMIT_INFLATION}): its samples count as only {:.0} \
                         independent rows for the mean and {:.0} for the covariance, too few for an \
                         ellipsoid of its own",
                        t.thresholds.alarm,
                        t.candidates.chi_square,
                        t.promise.sizes.m_mean,
                        t.promise.sizes.m_cov()
                    ),
                });
                spec_b.max_modes = k - 1;
                continue;
            }
        }
        break (k, search, out_modes);
    };
    if let Some(s) = search.as_mut() {
        s.skipped.extend(inflated);
        s.skipped.sort_by_key(|x| x.k);
    }
    let drift_widen = b.drift_rate().map(drift_widening);
    if let Some(c) = drift_widen {
        for bm in &mut out_modes {
            let th = &mut bm.trained.thresholds;
            th.alarm = (f64::from(th.alarm) * c) as f32;
            th.clear = (f64::from(th.clear) * c) as f32;
        }
    }
    let drift = b.drift_half_life.map(|h| {
        // Pooled within-mode variance: Σ (n_k − 1) s²_k / Σ (n_k − 1), in model units.
        let mut num = vec![0.0; m];
        let mut den = 0.0;
        for bm in &out_modes {
            let f = &bm.trained.fitted;
            let dof = f.rows_used as f64 - 1.0;
            for (v, s) in num.iter_mut().zip(&f.sd) {
                *v += dof * s * s;
            }
            den += dof;
        }
        let sd: Vec<f64> = num.iter().map(|v| (v / den).sqrt()).collect();
        DriftInfo {
            half_life: h,
            rate: b.drift_rate().expect("drift is on"),
            bound_sigma: b.drift_bound,
            bound: sd.iter().map(|s| s * b.drift_bound).collect(),
            sd,
            widen: drift_widen.expect("drift is on"),
        }
    });
    Ok(BankFit {
        features: raw.features,
        scored: samples.names,
        modes: out_modes,
        search,
        drift,
        readings: raw.lines.len() as u64,
        filling: samples.filling,
    })
}

/// The most a mode's alarm limit may exceed the chi-square quantile at the same α for `--modes
/// auto` to keep its mode count: a ratio of 10 widens the ellipsoid more than √10 ≈ 3.2 times in
/// every direction beyond its covariance, for the uncertainty of the mode's own mean and
/// covariance. Such a mode is known from a few independent stretches of the baseline (with
/// autocorrelated or windowed samples, often a single visit), and under the nearest rule, which
/// divides each mode's d² by its limit, it would take in readings far outside every other mode.
/// The figure 10 is our judgement, not a published rule; `fit` says which mode count it set
/// aside and why, and an explicit `--modes K` keeps the mode with a warning in the summary.
pub const MAX_LIMIT_INFLATION: f64 = 10.0;

/// The mode whose limit is the largest multiple of its chi-square quantile, if above
/// [`MAX_LIMIT_INFLATION`].
pub fn most_inflated(modes: &[BankMode]) -> Option<(usize, f64)> {
    modes
        .iter()
        .enumerate()
        .map(|(k, md)| {
            let t = &md.trained;
            (k, f64::from(t.thresholds.alarm) / t.candidates.chi_square)
        })
        .filter(|(_, r)| *r > MAX_LIMIT_INFLATION)
        .max_by(|x, y| x.1.total_cmp(&y.1))
}

/// Find the modes and fit each by the single-model pipeline.
fn fit_modes(
    a: &TrainSpec,
    b: &BankSpec,
    raw: &RawRows,
    samples: &Samples,
    log_mask: u32,
    train_end: usize,
    trained_at: u64,
) -> Result<(usize, Option<ModeSearch>, Vec<BankMode>)> {
    let m = samples.m();
    let total = samples.len();
    let (modes, k, search) = assign_modes(samples, log_mask, train_end, b, a.holdout, a.shrinkage)?;

    // Each mode's samples, in time order, checked for enough rows to fit.
    let need = m + 2;
    let mut per_mode: Vec<Vec<usize>> = vec![Vec::new(); k];
    for (i, md) in modes.iter().enumerate() {
        per_mode[usize::from(*md)].push(i);
    }
    for (md, idx) in per_mode.iter().enumerate() {
        let fitted = idx.len() - ((a.holdout * idx.len() as f64).round() as usize).min(idx.len());
        if fitted < need {
            match &b.mode_column {
                Some(mc) => bail!(
                    "{}: column `{mc}`: mode {md} has {} sample(s) ({fitted} to fit after the hold-out); \
                     a mode of {m} scored values needs at least {need} to fit; the mode column's values \
                     must run 0 to {} with enough rows each",
                    raw.file,
                    idx.len(),
                    k - 1
                ),
                None => bail!(
                    "{}: mode {md} of {k} found by EM has {} sample(s) ({fitted} to fit after the hold-out); \
                     a mode of {m} scored values needs at least {need}: ask for fewer modes",
                    raw.file,
                    idx.len()
                ),
            }
        }
    }
    let mut out_modes = Vec::with_capacity(k);
    for (md, idx) in per_mode.iter().enumerate() {
        let mut values = Vec::with_capacity(idx.len() * m);
        for i in idx {
            values.extend_from_slice(&samples.values[i * m..(i + 1) * m]);
        }
        let name = if k == 1 {
            raw.file.clone()
        } else {
            format!("{} (mode {md})", raw.file)
        };
        let table = Table {
            name: &name,
            features: &samples.names,
            values: &values,
        };
        let mut spec = a.clone();
        spec.trained_at = Some(trained_at);
        let trained = train_with(&spec, |opts| fit_rows(&table, opts))
            .with_context(|| format!("while fitting mode {md}"))?;
        out_modes.push(BankMode {
            samples: idx.len() as u64,
            weight: idx.len() as f64 / total as f64,
            trained,
        });
    }
    Ok((k, search, out_modes))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ellipsoid_core::AlarmPolicy;

    fn raw(values: Vec<f64>, n: usize, modes: Vec<u8>) -> RawRows {
        let rows = values.len() / n;
        RawRows {
            file: "t.csv".into(),
            features: (0..n).map(|i| format!("f{i}")).collect(),
            values,
            lines: (2..2 + rows as u64).collect(),
            modes,
        }
    }

    #[test]
    fn window_means_and_differences_restart_at_a_mode_change() {
        let r = raw(
            vec![1.0, 10.0, 2.0, 20.0, 4.0, 40.0, 8.0, 80.0, 16.0, 160.0],
            2,
            vec![0, 0, 0, 1, 1],
        );
        let s = window_samples(&r, 2, true).unwrap();
        assert_eq!(s.names, ["f0", "f1", "Δf0", "Δf1"]);
        // Lines 2..4 are mode 0: samples at lines 3 and 4; mode 1 restarts at line 5: sample at 6.
        assert_eq!(s.lines, [3, 4, 6]);
        assert_eq!(s.filling, 2);
        assert_eq!(
            s.values,
            [1.5, 15.0, 1.0, 10.0, 3.0, 30.0, 2.0, 20.0, 12.0, 120.0, 8.0, 80.0]
        );
        assert_eq!(s.modes, [0, 0, 1]);
        // w = 1 with differences needs two readings.
        let s = window_samples(&raw(vec![1.0, 3.0, 7.0], 1, vec![]), 1, true).unwrap();
        assert_eq!(s.values, [3.0, 2.0, 7.0, 4.0]);
        // A skipped row (a gap in the lines) restarts the window.
        let mut g = raw(vec![1.0, 2.0, 3.0, 4.0], 1, vec![]);
        g.lines = vec![2, 3, 5, 6];
        let s = window_samples(&g, 2, false).unwrap();
        assert_eq!(s.lines, [3, 6]);
        assert_eq!(s.values, [1.5, 3.5]);
    }

    use crate::pipeline::limits::LimitSpec;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, StandardNormal};

    /// Two duty points; the noise of each feature is AR(1) with `φ = 0.6`, the two features
    /// correlated 0.5: autocorrelated readings, made more so by the window.
    fn readings(rng: &mut ChaCha8Rng, blocks: usize, block: usize) -> (Vec<[f64; 2]>, Vec<u8>) {
        let centres = [[10.0, 5.0], [16.0, 2.0]];
        let sd = [[1.0, 0.5], [0.6, 0.8]];
        let phi: f64 = 0.6;
        let (mut e, mut rows, mut modes) = ([0.0f64; 2], Vec::new(), Vec::new());
        for b in 0..blocks {
            let md = b % 2;
            for _ in 0..block {
                let a: f64 = StandardNormal.sample(rng);
                let c: f64 = StandardNormal.sample(rng);
                let innov = [a, 0.5 * a + 0.75f64.sqrt() * c];
                for i in 0..2 {
                    e[i] = phi * e[i] + (1.0 - phi * phi).sqrt() * innov[i];
                }
                rows.push([
                    centres[md][0] + sd[md][0] * e[0],
                    centres[md][1] + sd[md][1] * e[1],
                ]);
                modes.push(md as u8);
            }
        }
        (rows, modes)
    }

    fn spec(path: &Path, alpha: f64) -> TrainSpec {
        TrainSpec {
            no_fpu: false,
            baseline: path.to_path_buf(),
            csv: CsvOptions {
                quiet: true,
                ..CsvOptions::default()
            },
            log_columns: Vec::new(),
            shrinkage: Shrinkage::None,
            robust: false,
            holdout: 0.2,
            threshold: Method::Hotelling,
            alarms_per_day: 1.0,
            rate_hz: 1.0,
            alpha: Some(alpha),
            validation: None,
            label_column: "label".into(),
            policy: AlarmPolicy {
                raise_after: 3,
                clear_after: 10,
                latch: false,
            },
            clear_fraction: 0.75,
            model_id: None,
            sequence: 1,
            trained_at: Some(0),
            threads: Some(1),
            limits: LimitSpec {
                sims: Some(200),
                ..LimitSpec::default()
            },
            strict_baseline: false,
        }
    }

    /// The false-alarm promise each mode's limit makes, checked on fresh readings of the same
    /// process, windowed (w = 4, with differences) as the device windows them: autocorrelated
    /// samples, both for a known-mode bank and for a nearest-mode bank (flagged only outside
    /// every mode's limit). The promise is the expected rate over baselines, so one baseline's
    /// rate is compared with the "at most" figure at the stated confidence, over several seeds.
    #[test]
    fn the_promise_holds_on_windowed_autocorrelated_samples() {
        let alpha = 0.01;
        let dir = tempfile::tempdir().unwrap();
        let mut over_at_most = 0;
        let seeds = 3;
        for seed in 0..seeds {
            let mut rng = ChaCha8Rng::seed_from_u64(100 + seed);
            let (rows, modes) = readings(&mut rng, 8, 400);
            let path = dir.path().join(format!("b{seed}.csv"));
            let mut text = String::from("a,b,speed\n");
            for (r, m) in rows.iter().zip(&modes) {
                text.push_str(&format!("{},{},{m}\n", r[0], r[1]));
            }
            std::fs::write(&path, text).unwrap();
            let (test_rows, test_modes) = readings(&mut rng, 40, 2000);
            let test = RawRows {
                file: "test".into(),
                features: vec!["a".into(), "b".into()],
                values: test_rows.iter().flatten().copied().collect(),
                lines: (2..2 + test_rows.len() as u64).collect(),
                modes: test_modes,
            };
            let samples = window_samples(&test, 4, true).unwrap();
            for known in [true, false] {
                let b = BankSpec {
                    modes: ModeCount::Fixed(if known { 1 } else { 2 }),
                    mode_column: known.then(|| "speed".to_string()),
                    window: 4,
                    differences: true,
                    ..BankSpec::default()
                };
                let mut a = spec(&path, alpha);
                if !known {
                    a.csv.columns = Some(vec!["a".into(), "b".into()]);
                }
                let fit = fit_bank(&a, &b).unwrap();
                assert_eq!(fit.modes.len(), 2);
                // The true mode of each test sample: known-mode modes are numbered by the
                // column; EM's by weight, so match them by the first feature's mean.
                let order: Vec<usize> = if known || fit.modes[0].trained.fitted.mean[0] < 13.0 {
                    vec![0, 1]
                } else {
                    vec![1, 0]
                };
                let mut flagged = [0u64; 2];
                let mut count = [0u64; 2];
                for (y, md) in samples.values.chunks_exact(4).zip(&samples.modes) {
                    let truth = usize::from(*md);
                    let outside = |k: usize| {
                        let t = &fit.modes[k].trained;
                        t.fitted.d2_f64(y) > f64::from(t.thresholds.alarm)
                    };
                    let flag = if known {
                        outside(order[truth])
                    } else {
                        outside(0) && outside(1)
                    };
                    count[truth] += 1;
                    flagged[truth] += u64::from(flag);
                }
                for truth in 0..2 {
                    let p = &fit.modes[order[truth]].trained.promise;
                    let rate = flagged[truth] as f64 / count[truth] as f64;
                    // Monte-Carlo error of the rate: the samples are correlated, so allow
                    // 4 binomial standard errors of a tenth of the samples.
                    let se = (p.expected_per_reading / (count[truth] as f64 / 10.0)).sqrt();
                    assert!(
                        rate <= p.at_most_per_reading + 4.0 * se,
                        "seed {seed}, known {known}, mode {truth}: {rate} flagged, promised at most {} (expected {})",
                        p.at_most_per_reading,
                        p.expected_per_reading
                    );
                    eprintln!(
                        "seed {seed} known {known} mode {truth}: flagged {rate:.5}, expected {:.5}, at most {:.5}",
                        p.expected_per_reading, p.at_most_per_reading
                    );
                    if rate > p.at_most_per_reading {
                        over_at_most += 1;
                    }
                    // Not vacuous: the limit is not far above what it needs to be.
                    assert!(
                        rate > 0.2 * alpha,
                        "seed {seed}, known {known}, mode {truth}: {rate}"
                    );
                }
            }
        }
        // "At most" holds with 90 % confidence: of 12 checks, more than 4 over it would be
        // unlikely (binomial, p = 0.1: P(X ≥ 5) ≈ 0.004).
        assert!(
            over_at_most <= 4,
            "{over_at_most} of {} over the at-most figure",
            4 * seeds
        );
    }

    /// Three groups, the lightest with `f0` held at exactly 1.0 (a valve at its end stop, say),
    /// beside the first, far from the second, so two modes are the first two with the third merged:
    /// EM's third mode sits on it with a variance equal to its regularisation, which makes BIC
    /// prefer K = 3 by a wide margin, but that mode has a constant feature and the single-model
    /// pipeline cannot fit it.
    fn constant_in_one_group(path: &Path) -> Vec<Vec<f64>> {
        let mut rng = ChaCha8Rng::seed_from_u64(21);
        let mut text = String::from("f0,f1\n");
        let mut rows = Vec::new();
        for i in 0..1300 {
            let a: f64 = StandardNormal.sample(&mut rng);
            let b: f64 = StandardNormal.sample(&mut rng);
            let r = match i % 13 {
                0..5 => [a, b],
                5..10 => [20.0 + a, 20.0 + b],
                _ => [1.0, -4.0 + b],
            };
            text.push_str(&format!("{},{}\n", r[0], r[1]));
            rows.push(r.to_vec());
        }
        std::fs::write(path, text).unwrap();
        rows
    }

    #[test]
    fn auto_skips_a_mode_count_with_a_constant_feature_and_fixed_k_names_it() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("stops.csv");
        let rows = constant_in_one_group(&path);
        // Without the check, BIC picks the degenerate K = 3.
        let (m, tried) =
            crate::fit::mixture::choose_modes(&rows, 4, &MixtureOptions::default()).unwrap();
        assert_eq!(m.k(), 3, "{tried:?}");
        let a = spec(&path, 0.01);
        let b = BankSpec {
            modes: ModeCount::Auto,
            ..BankSpec::default()
        };
        let fit = fit_bank(&a, &b).unwrap();
        let search = fit.search.as_ref().unwrap();
        let three = search
            .skipped
            .iter()
            .find(|s| s.k == 3)
            .unwrap_or_else(|| panic!("K = 3 not skipped: {search:?}"));
        // EM's third mode holds the stop's rows and a few of the first group's with f0 within
        // a hair of 1.0: not exactly constant, but with the regulariser's variance.
        assert!(
            three
                .reason
                .contains("mode 2: `f0` is almost constant within the mode"),
            "{}",
            three.reason
        );
        assert!(!search.bic.iter().any(|(k, _)| *k == 3), "{search:?}");
        assert_eq!(fit.modes.len(), 2, "{search:?}");
        // Every mode kept was fitted by the pipeline, so none holds a constant feature.
        for md in &fit.modes {
            assert!(md.trained.fitted.sd.iter().all(|s| *s > 0.0));
        }
        // The summary tells the user.
        let trained = crate::pipeline::bank_out::train_bank(&a, &b).unwrap();
        let text = crate::pipeline::bank_out::bank_summary_text(&trained);
        assert!(
            text.contains(
                "Mode count K=3 skipped, not compared by BIC: mode 2: `f0` is almost constant"
            ),
            "{text}"
        );
        // An explicit --modes 3 is refused, naming the mode and the feature.
        let e = fit_bank(
            &a,
            &BankSpec {
                modes: ModeCount::Fixed(3),
                ..BankSpec::default()
            },
        )
        .err()
        .expect("--modes 3 must be refused");
        let e = format!("{e:#}");
        assert!(
            e.contains("--modes 3")
                && e.contains("mode 2: `f0` is almost constant within the mode"),
            "{e}"
        );
        // --modes 2 is fitted.
        let two = fit_bank(
            &a,
            &BankSpec {
                modes: ModeCount::Fixed(2),
                ..BankSpec::default()
            },
        )
        .unwrap();
        assert_eq!(two.modes.len(), 2);
    }

    #[test]
    fn a_mode_with_fewer_samples_than_parameters_or_collinear_is_refused() {
        let names: Vec<String> = vec!["a".into(), "b".into()];
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let t: Vec<Vec<f64>> = (0..40)
            .map(|i| {
                let a: f64 = StandardNormal.sample(&mut rng);
                let b: f64 = StandardNormal.sample(&mut rng);
                // Mode 1 (the last 10): b = 2 a + 1 exactly.
                if i < 30 {
                    vec![a, b]
                } else {
                    vec![a, 2.0 * a + 1.0]
                }
            })
            .collect();
        let modes: Vec<u8> = (0..40).map(|i| u8::from(i >= 30)).collect();
        let check = PartitionCheck {
            t: &t,
            z: &t,
            names: &names,
            holdout: 0.0,
            shrinkage: Shrinkage::None,
            reg_covar: 1e-6,
        };
        let p = check.problem(&modes, 2, false).unwrap();
        assert!(p.contains("mode 1: `b` is a linear combination"), "{p}");
        // A feature held exactly in mode 1.
        let held: Vec<Vec<f64>> = t
            .iter()
            .enumerate()
            .map(|(i, r)| if i >= 30 { vec![r[0], 3.0] } else { r.clone() })
            .collect();
        let p = PartitionCheck {
            t: &held,
            z: &held,
            ..check
        }
        .problem(&modes, 2, false)
        .unwrap();
        assert!(
            p.contains("mode 1: `b` is constant within the mode (all 10 samples to fit are 3)"),
            "{p}"
        );
        // Shrinkage makes the collinear mode fittable.
        let shrunk = PartitionCheck {
            shrinkage: Shrinkage::LedoitWolf,
            ..check
        };
        assert_eq!(shrunk.problem(&modes, 2, false), None);
        // Four samples in mode 1: enough for the pipeline (m + 2 = 4), fewer than its own
        // 5 parameters, so `auto` refuses it.
        let modes: Vec<u8> = (0..40).map(|i| u8::from(i >= 36)).collect();
        let t2: Vec<Vec<f64>> = t
            .iter()
            .enumerate()
            .map(|(i, r)| {
                if i >= 36 {
                    vec![r[0], r[0] * r[0]]
                } else {
                    r.clone()
                }
            })
            .collect();
        let check = PartitionCheck {
            t: &t2,
            z: &t2,
            ..shrunk
        };
        assert_eq!(check.problem(&modes, 2, false), None);
        let p = check.problem(&modes, 2, true).unwrap();
        assert!(
            p.contains("mode 1 has 4 sample(s) to fit, fewer than its own 5 parameters"),
            "{p}"
        );
    }

    #[test]
    fn options_are_checked_with_their_names() {
        let ok = BankSpec::default();
        assert!(ok.check().is_ok() && ok.is_plain());
        let e = BankSpec {
            window: 17,
            ..ok.clone()
        }
        .check()
        .unwrap_err();
        assert!(e.to_string().contains("--window 17"), "{e}");
        let e = BankSpec {
            mode_column: Some("m".into()),
            modes: ModeCount::Fixed(2),
            ..ok.clone()
        }
        .check()
        .unwrap_err();
        assert!(e.to_string().contains("--mode-column and --modes"), "{e}");
        let e = BankSpec {
            drift_half_life: Some(0.5),
            ..ok.clone()
        }
        .check()
        .unwrap_err();
        assert!(e.to_string().contains("--drift-half-life"), "{e}");
        let e = BankSpec {
            drift_bound: -1.0,
            ..ok.clone()
        }
        .check()
        .unwrap_err();
        assert!(e.to_string().contains("--drift-bound"), "{e}");
        assert!("9".parse::<ModeCount>().is_err());
        assert_eq!("auto".parse::<ModeCount>(), Ok(ModeCount::Auto));
        // Half-life 1 reading: each step moves half way.
        let h = BankSpec {
            drift_half_life: Some(1.0),
            ..ok
        };
        assert!((h.drift_rate().unwrap() - 0.5).abs() < 1e-15);
    }
}
