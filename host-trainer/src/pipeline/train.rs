//! Training: from a baseline file to a defended threshold and a flashable blob, in memory.
//!
//! The steps: fit in `f64` ([`crate::fit`]); work out every candidate threshold
//! ([`crate::stats::threshold`]); build the blob through the core's encoder and read it back through
//! the core's decoder; replay the held-out baseline through the core's alarm state machine to
//! measure the false alarms a day that the policy really gives. [`write_outputs`] writes blob and
//! card; the `fit` command and the demo both call this module.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use ellipsoid_core::{blob, AlarmMachine, AlarmPolicy, ModelMeta, Scored, Thresholds, Verdict};
use serde::Serialize;

use crate::data::card::{blob_crc, names_digest, ModelCard, CARD_VERSION};
use crate::data::ingest::{CsvOptions, Reader};
use crate::data::output::Outputs;
use crate::data::paths::{refuse_clashes, Role};
use crate::device::dims::{decode_any, AnyModel};
use crate::device::replay::to_device;
use crate::fit::{fit_file, FitOptions, Fitted, Shrinkage};
use crate::pipeline::limits::{self, LimitSpec, Promise};
use crate::stats::metrics;
use crate::stats::threshold::{Candidates, Method, Target, SECONDS_PER_DAY};

/// What to train: the settings of `ellipsoid fit` that shape the model, without its outputs.
#[derive(Clone, Debug)]
pub struct TrainSpec {
    /// Quantise for a part without an FPU (`fit --no-fpu`): the blob is the fixed-point model.
    pub no_fpu: bool,
    /// Baseline CSV of healthy operation.
    pub baseline: PathBuf,
    /// How the baseline is read.
    pub csv: CsvOptions,
    /// Columns to log-transform first.
    pub log_columns: Vec<String>,
    /// Covariance estimator.
    pub shrinkage: Shrinkage,
    /// FAST-MCD robust fit.
    pub robust: bool,
    /// Fraction held out from the end of the baseline.
    pub holdout: f64,
    /// How the alarm threshold is chosen.
    pub threshold: Method,
    /// Target false alarms a day (used when `alpha` is `None`).
    pub alarms_per_day: f64,
    /// Readings a second.
    pub rate_hz: f64,
    /// Target false-alarm probability per reading.
    pub alpha: Option<f64>,
    /// Labelled validation file (for the F1 threshold).
    pub validation: Option<PathBuf>,
    /// Label column of the validation file.
    pub label_column: String,
    /// The alarm policy in the blob.
    pub policy: AlarmPolicy,
    /// Clear threshold as a fraction of the alarm threshold.
    pub clear_fraction: f64,
    /// Model identifier (default: derived from the fitted statistics).
    pub model_id: Option<u32>,
    /// Slot sequence number.
    pub sequence: u32,
    /// Training time, Unix seconds (default: now).
    pub trained_at: Option<u64>,
    /// Worker threads (default: all cores).
    pub threads: Option<usize>,
    /// Confidence, simulations and time correlation of the limits.
    pub limits: LimitSpec,
    /// Refuse a baseline shorter than the promise needs to hold within 2× (instead of warning).
    pub strict_baseline: bool,
}

/// Above this share of rows set aside by FAST-MCD, `fit` warns that the baseline is probably not
/// elliptical (common practice: the reweighting step loses about 2.5 % of clean Gaussian data).
pub const ROBUST_SHARE_WARN: f64 = 0.10;

/// What replaying the held-out baseline through the core's alarm state machine gave.
#[derive(Clone, Debug, Serialize)]
pub struct HoldoutCheck {
    /// Held-out readings.
    pub readings: u64,
    /// Hours of operation they cover at the stated rate.
    pub hours: f64,
    /// Readings above the alarm threshold.
    pub readings_above: u64,
    /// The same, as a fraction of the held-out readings.
    pub fraction_above: f64,
    /// Alarms the policy raised (each is a false alarm: the baseline is healthy).
    pub alarms_raised: u64,
    /// Those alarms scaled to a day.
    pub false_alarms_per_day: f64,
    /// One-sided 95 % upper bound on the daily rate, treating alarms as a Poisson count over the
    /// hold-out (`χ²₀.₉₅(2k + 2) / 2` alarms in the hold-out's length; 3 for k = 0). A short hold-out
    /// with no alarm only bounds the rate, and this says by how much.
    pub false_alarms_per_day_upper95: f64,
    /// File lines of the readings that raised those alarms (the first [`MAX_ALARM_LINES`]).
    pub alarm_lines: Vec<u64>,
}

/// How many false-alarm lines the hold-out check lists.
pub const MAX_ALARM_LINES: usize = 20;

/// The one-sided 95 % upper bound on a Poisson mean after observing `k` events.
pub fn poisson_upper95(k: u64) -> f64 {
    use statrs::distribution::{ChiSquared, ContinuousCDF};
    let chi = ChiSquared::new(2.0 * k as f64 + 2.0).expect("positive degrees of freedom");
    chi.inverse_cdf(0.95) / 2.0
}

/// Everything `fit` works out.
pub struct Trained {
    /// With `no_fpu`: the worst d² differences of the quantised model from the `f32` one.
    pub quantised: Option<Vec<crate::pipeline::quantise::Worst>>,
    /// The fitted statistics.
    pub fitted: Fitted,
    /// Every candidate threshold.
    pub candidates: Candidates,
    /// What the chosen threshold promises, and the baseline length check.
    pub promise: Promise,
    /// The method used for the blob.
    pub method: Method,
    /// Thresholds in the blob.
    pub thresholds: Thresholds,
    /// Policy in the blob.
    pub policy: AlarmPolicy,
    /// The blob's bytes.
    pub blob: Vec<u8>,
    /// The model decoded back from those bytes by the core.
    pub model: Box<dyn AnyModel>,
    /// The card that goes beside the blob.
    pub card: ModelCard,
    /// The held-out replay, if there was a hold-out.
    pub holdout: Option<HoldoutCheck>,
    /// Readings a second.
    pub rate_hz: f64,
    /// Baseline file.
    pub baseline: String,
}

/// Encode fitted statistics into a blob with the core's encoder and decode it back with the core's
/// decoder, so that everything downstream uses exactly what the device will.
pub fn build_blob(
    fitted: &Fitted,
    thresholds: Thresholds,
    policy: AlarmPolicy,
    meta: ModelMeta,
) -> Result<(Vec<u8>, Box<dyn AnyModel>)> {
    let n = fitted.features.len();
    let bytes = crate::with_dim!(n, N => {
        let params = fitted.params::<N>(thresholds, policy, meta);
        let mut buf = vec![0u8; blob::max_len(N)];
        let len = blob::encode(&params, &mut buf).map_err(|e| match e {
            blob::EncodeError::Invalid(ellipsoid_core::ModelError::NotFinite { field, index }) => {
                anyhow::anyhow!(
                    "the fitted {field} of column `{}` is not finite in f32: its values exceed the \
                     f32 range (about ±3.4e38) the device computes in; rescale that column",
                    fitted.features.get(usize::from(index)).map_or("?", String::as_str)
                )
            }
            other => anyhow::anyhow!("the fitted model cannot be encoded: {other}"),
        })?;
        buf.truncate(len);
        buf
    })
    .ok_or_else(|| {
        anyhow::anyhow!(
            "{n} features: a model holds 1 to {} features",
            crate::device::dims::MAX_DIM
        )
    })?;
    let model = decode_any(&bytes)
        .map_err(|e| anyhow::anyhow!("the core refused the blob it was given: {e}"))?;
    Ok((bytes, model))
}

/// Score a CSV (columns matched to `features`) through `model`; faults give `None`.
/// Returns the d² stream and, if `label` is given, the labels.
pub fn score_file(
    model: &dyn AnyModel,
    features: &[String],
    path: &Path,
    label: Option<&str>,
    quiet: bool,
) -> Result<(Vec<Option<f32>>, Vec<bool>)> {
    let opts = CsvOptions {
        delimiter: None,
        columns: Some(features.to_vec()),
        timestamp: None,
        label: label.map(str::to_string),
        skip_bad_rows: false,
        allow_missing: true,
        quiet,
    };
    let mut reader = Reader::open(path, &opts)?;
    let mut x = vec![0.0f32; features.len()];
    let (mut d2, mut labels) = (Vec::new(), Vec::new());
    while let Some(row) = reader.next_row()? {
        for (d, s) in x.iter_mut().zip(row.values) {
            *d = to_device(*s);
        }
        d2.push(model.score(&x).ok().map(|s| s.d2));
        if let Some(l) = row.label {
            labels.push(l);
        }
    }
    Ok((d2, labels))
}

/// Replay held-out d² through the core's alarm state machine. A NaN (a row the core could not
/// score) reaches the machine as a non-finite score, which it treats as a fault.
///
/// `lines` are the file lines of the held-out rows (same length as `d2`), so that each false
/// alarm can be traced back to the log.
pub fn check_holdout(
    d2: &[f32],
    lines: &[u64],
    thresholds: Thresholds,
    policy: AlarmPolicy,
    rate_hz: f64,
) -> HoldoutCheck {
    let mut machine = AlarmMachine::new(thresholds, policy);
    let (mut above, mut raised) = (0u64, 0u64);
    let mut alarm_lines = Vec::new();
    for (i, v) in d2.iter().enumerate() {
        let verdict = if *v > thresholds.alarm {
            Verdict::Above
        } else {
            Verdict::Below
        };
        above += u64::from(verdict == Verdict::Above);
        let step = machine.update(&Ok(Scored { d2: *v, verdict }));
        for e in &step.events {
            if e.kind == ellipsoid_core::EventKind::Raised {
                raised += 1;
                if alarm_lines.len() < MAX_ALARM_LINES {
                    alarm_lines.extend(lines.get(i).copied());
                }
            }
        }
    }
    let readings = d2.len() as u64;
    let days = readings as f64 / rate_hz / SECONDS_PER_DAY;
    HoldoutCheck {
        readings,
        hours: days * 24.0,
        readings_above: above,
        fraction_above: if readings == 0 {
            0.0
        } else {
            above as f64 / readings as f64
        },
        alarms_raised: raised,
        false_alarms_per_day: if days > 0.0 {
            raised as f64 / days
        } else {
            0.0
        },
        false_alarms_per_day_upper95: if days > 0.0 {
            poisson_upper95(raised) / days
        } else {
            f64::INFINITY
        },
        alarm_lines,
    }
}

fn now_unix() -> u64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs())
}

/// A model id derived from the fitted statistics: the CRC-32 of their bits and the feature names.
fn derived_id(f: &Fitted) -> u32 {
    let mut bytes = Vec::new();
    for name in &f.features {
        bytes.extend_from_slice(name.as_bytes());
        bytes.push(0);
    }
    for v in f.mean.iter().chain(&f.cov) {
        bytes.extend_from_slice(&v.to_le_bytes());
    }
    bytes.extend_from_slice(&f.rows_used.to_le_bytes());
    blob::checksum(&bytes)
}

/// Fit, choose the threshold, build the blob, check the hold-out. Writes nothing.
pub fn train(a: &TrainSpec) -> Result<Trained> {
    train_with(a, |opts| fit_file(&a.baseline, opts))
}

/// [`train`] with another fit than the file's (rows in memory, merged partial moments:
/// [`crate::fit::memory`]); `a.baseline` then only names the data in messages and in the card.
pub fn train_with(
    a: &TrainSpec,
    fit: impl FnOnce(&FitOptions) -> Result<Fitted>,
) -> Result<Trained> {
    anyhow::ensure!(
        (0.0..1.0).contains(&a.holdout),
        "--holdout must be a fraction in [0, 1), not {}",
        a.holdout
    );
    anyhow::ensure!(
        a.clear_fraction > 0.0 && a.clear_fraction <= 1.0,
        "--clear-fraction must lie in (0, 1], not {}",
        a.clear_fraction
    );
    let target = match a.alpha {
        Some(p) => Target::PerReading(p),
        None => Target::PerDay {
            alarms_per_day: a.alarms_per_day,
            rate_hz: a.rate_hz,
        },
    };
    target.check()?;
    anyhow::ensure!(
        a.rate_hz.is_finite() && a.rate_hz > 0.0,
        "--rate-hz must be a positive number of readings a second"
    );
    let policy = a.policy;
    let opts = FitOptions {
        csv: a.csv.clone(),
        log_columns: a.log_columns.clone(),
        shrinkage: a.shrinkage,
        robust: a.robust,
        holdout: a.holdout,
        threads: a
            .threads
            .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get())),
    };
    let fitted = fit(&opts)?;
    let alpha = target.alpha();
    let meta = ModelMeta {
        model_id: a.model_id.unwrap_or_else(|| derived_id(&fitted)),
        trained_at: a.trained_at.unwrap_or_else(now_unix),
        sequence: a.sequence,
    };

    // The F1 candidate needs d² of the validation file, which does not depend on the threshold.
    let f1 = match &a.validation {
        None => None,
        Some(path) => {
            let probe = Thresholds {
                alarm: 1.0,
                clear: 0.0,
            };
            let (_, model) = build_blob(&fitted, probe, policy, meta)?;
            let (d2, labels) = score_file(
                model.as_ref(),
                &fitted.features,
                path,
                Some(&a.label_column),
                a.csv.quiet,
            )?;
            anyhow::ensure!(
                labels.iter().any(|l| *l),
                "{}: no reading is labelled as an anomaly in column `{}`, so F1 is undefined",
                path.display(),
                a.label_column
            );
            let scores: Vec<f64> = d2
                .iter()
                .map(|d| d.map_or(f64::INFINITY, f64::from))
                .collect();
            metrics::f1_optimal_threshold(&scores, &labels)
        }
    };
    let (candidates, mut promise, rates_at) = limits::candidates(
        &fitted,
        alpha,
        a.rate_hz,
        a.holdout,
        a.robust,
        a.shrinkage,
        f1,
        &a.limits,
    )?;
    let alarm = candidates.pick(a.threshold)?;
    limits::settle(&mut promise, rates_at.as_ref(), alarm, a.rate_hz);
    if a.strict_baseline {
        if let Some(short) = promise.lengths.first().filter(|l| !l.met) {
            anyhow::bail!(
                "{}: {} rows fitted, but the false-alarm promise holds within {}× (with {:.0} % confidence) only from \
                 {} rows fitted, {} rows logged with the {:.0} % hold-out ({} at {} Hz); log a longer baseline, \
                 or drop --strict-baseline to fit anyway with a warning",
                a.baseline.display(),
                promise.m,
                short.within,
                100.0 * promise.confidence,
                short.rows_fitted,
                promise.rows_logged(short),
                100.0 * a.holdout,
                limits::duration_words(promise.rows_logged(short) / a.rate_hz),
                crate::stats::threshold::hz(a.rate_hz)
            );
        }
    }
    anyhow::ensure!(
        alarm.is_finite() && alarm > 0.0 && alarm < f64::from(f32::MAX),
        "the {:?} threshold came out as {alarm}, which cannot be used",
        a.threshold
    );
    let thresholds = Thresholds {
        alarm: alarm as f32,
        clear: (alarm * a.clear_fraction) as f32,
    };
    let (blob_bytes, model) = build_blob(&fitted, thresholds, policy, meta)?;
    let (blob_bytes, model, quantised) = if a.no_fpu {
        let q = crate::pipeline::quantise::quantise(
            &fitted,
            model.as_ref(),
            thresholds,
            policy,
            meta,
            &a.baseline,
            a.validation.as_deref(),
        )?;
        (q.blob, q.model, Some(q.worst))
    } else {
        (blob_bytes, model, None)
    };
    let holdout = (!fitted.holdout_d2.is_empty()).then(|| {
        check_holdout(
            &fitted.holdout_d2,
            &fitted.holdout_lines,
            thresholds,
            policy,
            a.rate_hz,
        )
    });
    let log_features: Vec<String> = fitted
        .features
        .iter()
        .enumerate()
        .filter(|(i, _)| (fitted.log_mask >> i) & 1 == 1)
        .map(|(_, f)| f.clone())
        .collect();
    let card = ModelCard {
        kind: "ellipsoid-model-card".into(),
        version: CARD_VERSION,
        names_digest: names_digest(blob_crc(&blob_bytes), &fitted.features, &log_features),
        features: fitted.features.clone(),
        log_features,
        blob_crc: blob_crc(&blob_bytes),
        blob_len: blob_bytes.len(),
        threshold_method: method_name(a.threshold).into(),
        alpha,
        rate_hz: a.rate_hz,
        trained_on: a.baseline.display().to_string(),
        modes: Vec::new(),
        select: None,
        mode_column: None,
        window: 1,
        differences: false,
        scored_features: Vec::new(),
        drift: None,
    };
    Ok(Trained {
        quantised,
        fitted,
        candidates,
        promise,
        method: a.threshold,
        thresholds,
        policy,
        blob: blob_bytes,
        model,
        card,
        holdout,
        rate_hz: a.rate_hz,
        baseline: a.baseline.display().to_string(),
    })
}

/// The name a method has on the command line and in the card.
pub fn method_name(m: Method) -> &'static str {
    match m {
        Method::Hotelling => "hotelling",
        Method::Confidence => "confidence",
        Method::ChiSquare => "chi-square",
        Method::Empirical => "empirical",
        Method::F1 => "f1",
    }
}

/// Refuse output paths that would overwrite an input or each other (the card is the blob's
/// path with `.json`), before any work is done.
pub fn check_output_paths(out: &Path, report: Option<&Path>, inputs: &[Role<'_>]) -> Result<()> {
    let card = ModelCard::path_for(out);
    anyhow::ensure!(
        card != out,
        "--out {} would be overwritten by its own model card ({}): give the blob another extension, such as .blob",
        out.display(),
        card.display()
    );
    let mut outputs = vec![
        Role::new("--out", out),
        Role::new("the model card written beside --out,", &card),
    ];
    if let Some(r) = report {
        outputs.push(Role::new("--report", r));
    }
    refuse_clashes(inputs, &outputs)
}

/// Stage the blob and its card in `outputs`, to be committed with the command's other outputs.
pub fn stage_outputs(t: &Trained, out: &Path, outputs: &mut Outputs) -> Result<()> {
    outputs.stage_bytes(out, &t.blob)?;
    outputs
        .stage(&ModelCard::path_for(out), |w| t.card.write_to(w))
        .context("while writing the model card")?;
    Ok(())
}

/// Write the blob and its card, both or neither (see [`crate::data::output`]).
pub fn write_outputs(t: &Trained, out: &Path) -> Result<()> {
    let mut outputs = Outputs::new();
    stage_outputs(t, out, &mut outputs)?;
    outputs.commit()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Exact Poisson upper limits (Garwood 1936), as tabulated e.g. in the NIST/SEMATECH
    /// e-Handbook's confidence limits for a Poisson count: k = 0 → 2.996, k = 1 → 4.744,
    /// k = 5 → 10.513 (one-sided 95 %; values from memory, and they equal χ²₀.₉₅(2k+2)/2,
    /// which is what is computed).
    #[test]
    fn poisson_upper_bounds() {
        for (k, want) in [(0u64, 2.996), (1, 4.744), (5, 10.513)] {
            assert!(
                (poisson_upper95(k) - want).abs() < 1e-3,
                "k {k}: {}",
                poisson_upper95(k)
            );
        }
    }

    #[test]
    fn holdout_check_counts_policy_alarms() {
        let thresholds = Thresholds {
            alarm: 10.0,
            clear: 5.0,
        };
        let policy = AlarmPolicy {
            raise_after: 2,
            clear_after: 1,
            latch: false,
        };
        // 86 400 readings at 1 Hz = one day; two runs of two readings above raise twice,
        // and one lone reading above does not raise.
        let mut d2 = vec![1.0f32; 86_400];
        d2[100] = 11.0;
        d2[101] = 11.0;
        d2[500] = 11.0;
        d2[900] = 12.0;
        d2[901] = 12.0;
        let lines: Vec<u64> = (2..2 + d2.len() as u64).collect();
        let h = check_holdout(&d2, &lines, thresholds, policy, 1.0);
        assert_eq!(h.alarm_lines, vec![103, 903]);
        assert_eq!(h.readings_above, 5);
        assert_eq!(h.alarms_raised, 2);
        assert!((h.false_alarms_per_day - 2.0).abs() < 1e-12);
        assert!((h.hours - 24.0).abs() < 1e-12);
        assert!(h.false_alarms_per_day_upper95 > 6.29 && h.false_alarms_per_day_upper95 < 6.3);
    }
}
