//! Scoring a labelled CSV through the core and measuring how well the model and its alarm policy
//! separate faults from healthy operation; the per-feature twin of a model, for comparison.

use std::path::Path;

use anyhow::Result;
use ellipsoid_core::{EventKind, ReadingFault};
use statrs::distribution::{ChiSquared, ContinuousCDF};

use crate::data::ingest::{CsvOptions, Reader};
use crate::device::dims::AnyModel;
use crate::device::replay::{to_device, ReplayRow, Replayer};
use crate::stats::metrics;

/// A labelled stream after the core has scored it.
pub struct Scored {
    /// One row per reading.
    pub rows: Vec<ReplayRow>,
    /// The labels (true = anomalous).
    pub labels: Vec<bool>,
}

impl Scored {
    /// d² per reading, `None` for a fault.
    pub fn d2(&self) -> Vec<Option<f32>> {
        self.rows.iter().map(ReplayRow::d2).collect()
    }

    /// Alarm line per reading.
    pub fn alarm(&self) -> Vec<bool> {
        self.rows.iter().map(|r| r.alarm).collect()
    }

    /// How many readings could not be scored, by cause (see [`FaultCounts`]).
    pub fn faults(&self) -> FaultCounts {
        let mut c = FaultCounts::default();
        for r in &self.rows {
            match r.score {
                Ok(_) => {}
                Err(ReadingFault::WindowFilling { .. }) => c.window_filling += 1,
                Err(ReadingFault::UnknownMode { .. }) => c.unknown_mode += 1,
                Err(ReadingFault::NotFinite { .. } | ReadingFault::LogDomain { .. }) => {
                    c.bad_reading += 1
                }
                Err(_) => c.other += 1,
            }
        }
        c
    }

    /// The drift of a bank over the stream: its `drift` events, and the first reading at which
    /// the shift was at its bound.
    pub fn drift(&self) -> DriftSeen {
        DriftSeen {
            events: self
                .rows
                .iter()
                .map(|r| {
                    r.events
                        .iter()
                        .filter(|e| matches!(e, EventKind::Drift { .. }))
                        .count() as u64
                })
                .sum(),
            first_at_bound: self.rows.iter().position(|r| r.drift_at_bound),
        }
    }

    /// The evaluation of this stream.
    pub fn evaluate(&self, rate_hz: f64) -> metrics::Evaluation {
        let above: Vec<bool> = self.rows.iter().map(ReplayRow::above).collect();
        let fault: Vec<bool> = self.rows.iter().map(|r| r.fault).collect();
        metrics::evaluate(
            &self.d2(),
            &above,
            &self.alarm(),
            &fault,
            &self.labels,
            rate_hz,
        )
    }
}

/// Readings the core could not score, by cause. Every one counts as "predicted anomalous" in
/// the per-reading figures and keeps the fault line on in the figures after the policy (the
/// device never calls a reading normal that it could not score): a window still filling after
/// the start of the stream or after a bad reading is a run of such readings.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize)]
pub struct FaultCounts {
    /// A value not finite, or not positive on a log feature: the reading itself.
    pub bad_reading: u64,
    /// The reading window not yet whole (stream start, after a bad reading, after a change of
    /// known mode).
    pub window_filling: u64,
    /// A known-mode bank given no mode, or one it does not have.
    pub unknown_mode: u64,
    /// Any other fault (an overflow of d² or of the contributions).
    pub other: u64,
}

/// What the drift of a bank did over a stream.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize)]
pub struct DriftSeen {
    /// `drift` events (at most one: the first time a feature reaches its bound).
    pub events: u64,
    /// 0-based index of the first reading with the shift at its bound.
    pub first_at_bound: Option<usize>,
}

/// How one stream of readings is read from its file and handed to the core.
#[derive(Clone, Debug, Default)]
pub struct StreamSpec {
    /// The raw feature columns, by name, in model order.
    pub features: Vec<String>,
    /// The column that tells a known-mode bank each reading's mode (an integer 0 to 255; an empty
    /// cell or `nan` is a reading without a mode, which the core reports as a fault).
    pub mode_column: Option<String>,
    /// The label column (1 = anomaly), for evaluation.
    pub label_column: Option<String>,
    /// A timestamp column to skip.
    pub timestamp: Option<String>,
    /// Field delimiter.
    pub delimiter: Option<u8>,
    /// No progress bar.
    pub quiet: bool,
}

/// A mode cell as the device is told it: `None` for an empty cell or NaN (no mode given), a
/// whole number 0 to 255 as is (one the bank does not have is passed on: the core reports
/// it as a fault), anything else an error naming the file, line and field.
pub fn mode_value(v: f64, file: &Path, line: u64, field: &str) -> Result<Option<u8>> {
    if v.is_nan() {
        return Ok(None);
    }
    anyhow::ensure!(
        v.is_finite() && (0.0..=255.0).contains(&v) && v.fract() == 0.0,
        "{}: line {line}: field {field}: the mode `{v}` is not a whole number from 0 to 255 \
         (the integer the machine's controller gives; leave the cell empty for a reading without one)",
        file.display()
    );
    Ok(Some(v as u8))
}

/// Read the stream `path` row by row and step `rp` on each reading (with its mode, when the spec
/// names a mode column), calling `each` with the row and its label. Returns the readings read.
/// State is carried from row to row: one replayer is one stream.
pub fn replay_stream(
    rp: &mut Replayer<'_>,
    path: &Path,
    spec: &StreamSpec,
    mut each: impl FnMut(ReplayRow, Option<bool>) -> Result<()>,
) -> Result<u64> {
    replay_stream_with(rp, path, spec, |row, label, _| each(row, label))
}

/// [`replay_stream`], with `each` also shown the replayer after the step (to read its drift
/// shift, [`Replayer::shift`]).
pub fn replay_stream_with(
    rp: &mut Replayer<'_>,
    path: &Path,
    spec: &StreamSpec,
    mut each: impl FnMut(ReplayRow, Option<bool>, &Replayer<'_>) -> Result<()>,
) -> Result<u64> {
    let n = spec.features.len();
    let mut columns = spec.features.clone();
    if let Some(mode) = &spec.mode_column {
        anyhow::ensure!(
            !spec.features.contains(mode),
            "the mode column `{mode}` is one of the model's features; a known-mode bank is told \
             its mode beside the readings, not as one of them"
        );
        // Name the mode column's role when the file lacks it (the reader would call it a feature).
        let header = Reader::open(
            path,
            &CsvOptions {
                delimiter: spec.delimiter,
                columns: Some(spec.features.clone()),
                timestamp: spec.timestamp.clone(),
                label: spec.label_column.clone(),
                quiet: true,
                ..CsvOptions::default()
            },
        )?;
        let names = &header.layout().names;
        anyhow::ensure!(
            names.contains(mode),
            "{}:1: no mode column named `{mode}` (the header has: {})",
            path.display(),
            names.join(", ")
        );
        columns.push(mode.clone());
    }
    let opts = CsvOptions {
        delimiter: spec.delimiter,
        columns: Some(columns),
        timestamp: spec.timestamp.clone(),
        label: spec.label_column.clone(),
        skip_bad_rows: false,
        allow_missing: true,
        quiet: spec.quiet,
    };
    let mut reader = Reader::open(path, &opts)?;
    let mut x = vec![0.0f32; n];
    let mut count = 0u64;
    while let Some(row) = reader.next_row()? {
        for (d, s) in x.iter_mut().zip(&row.values[..n]) {
            *d = to_device(*s);
        }
        let mode = match &spec.mode_column {
            Some(field) => mode_value(row.values[n], path, row.line, field)?,
            None => None,
        };
        let label = row.label;
        let r = rp.step_mode(&x, mode);
        each(r, label, rp)?;
        count += 1;
    }
    Ok(count)
}

/// Replay a labelled CSV through `model` (built in memory) and its alarm state machine.
pub fn score_labelled(
    model: &dyn AnyModel,
    features: &[String],
    path: &Path,
    label_column: &str,
    timestamp: Option<String>,
    delimiter: Option<u8>,
    quiet: bool,
) -> Result<Scored> {
    let spec = StreamSpec {
        features: features.to_vec(),
        mode_column: None,
        label_column: Some(label_column.to_string()),
        timestamp,
        delimiter,
        quiet,
    };
    score_stream(Replayer::new(model), path, &spec)
}

/// Replay a labelled stream through `rp` (for a blob, [`Replayer::from_blob`]: window, bank,
/// alarm and drift as on the device). `spec.label_column` must be set.
pub fn score_stream(rp: Replayer<'_>, path: &Path, spec: &StreamSpec) -> Result<Scored> {
    // The shift is kept at the first reading only.
    score_stream_tracked(rp, path, spec, usize::MAX).map(|(s, _)| s)
}

/// The drift shift after some readings: (reading index, shift per scored feature, model units).
pub type Shifts = Vec<(usize, Vec<f32>)>;

/// [`score_stream`], also keeping the tracker's drift shift (model units, one value per scored
/// feature) after every `every`-th reading, with the reading's index: the centre's drift over
/// the stream as the device has it.
pub fn score_stream_tracked(
    mut rp: Replayer<'_>,
    path: &Path,
    spec: &StreamSpec,
    every: usize,
) -> Result<(Scored, Shifts)> {
    anyhow::ensure!(
        spec.label_column.is_some(),
        "an evaluation needs a label column"
    );
    let every = every.max(1);
    let (mut rows, mut labels, mut shifts) = (Vec::new(), Vec::new(), Vec::new());
    replay_stream_with(&mut rp, path, spec, |row, label, r| {
        let i = rows.len();
        if i % every == 0 {
            if let Some(s) = r.shift() {
                shifts.push((i, s));
            }
        }
        labels.push(label.unwrap_or(false));
        rows.push(row);
        Ok(())
    })?;
    anyhow::ensure!(
        !rows.is_empty(),
        "{}: no readings to evaluate",
        path.display()
    );
    Ok((Scored { rows, labels }, shifts))
}

/// QQ points of the d² of readings labelled normal against chi-square(n) quantiles, at most 400.
pub fn qq_points(d2: &[Option<f32>], labels: &[bool], n: usize) -> Vec<(f64, f64)> {
    let mut v: Vec<f64> = d2
        .iter()
        .zip(labels)
        .filter(|(_, l)| !**l)
        .filter_map(|(d, _)| d.map(f64::from))
        .collect();
    v.sort_by(f64::total_cmp);
    let Ok(chi) = ChiSquared::new(n as f64) else {
        return Vec::new();
    };
    let m = v.len();
    let step = (m / 400).max(1);
    (0..m)
        .step_by(step)
        .map(|i| (chi.inverse_cdf((i as f64 + 0.5) / m as f64), v[i]))
        .collect()
}

/// The correlation matrix the model encodes, rebuilt from its factor.
pub fn model_correlation(model: &dyn AnyModel) -> Vec<f64> {
    let p = model.params();
    let n = model.n();
    let cov = p.covariance().unwrap_or_else(|| vec![0.0; n * n]);
    crate::stats::moments::correlation_of(&cov, n)
}

/// The readings where an alarm was raised, the largest d² first, with their contributions.
pub fn top_alarms(rows: &[ReplayRow], most: usize) -> Vec<(usize, f32, Vec<f32>)> {
    let mut raised: Vec<(usize, f32, Vec<f32>)> = rows
        .iter()
        .enumerate()
        .filter(|(_, r)| r.events.contains(&ellipsoid_core::EventKind::Raised))
        .filter_map(|(i, r)| Some((i, r.d2()?, r.contributions.clone()?)))
        .collect();
    raised.sort_by(|a, b| b.1.total_cmp(&a.1));
    raised.truncate(most);
    raised
}

/// The per-feature (diagonal) model beside a full one: the same preprocessing, mean and policy,
/// but `W = I`, so each channel is judged against its own mean and spread and the correlations
/// are ignored. Its threshold is the chi-square(N) quantile for the same per-reading `alpha`.
pub fn diagonal_of(
    model: &dyn AnyModel,
    alpha: f64,
) -> Result<(ellipsoid_core::Thresholds, Box<dyn AnyModel>)> {
    use ellipsoid_core::{Model, ModelParams, Preprocess, Thresholds};
    let p = model.params();
    let n = model.n();
    let alarm = crate::stats::threshold::chi_square(n, alpha) as f32;
    let thresholds = Thresholds {
        alarm,
        clear: alarm * (p.thresholds.clear / p.thresholds.alarm),
    };
    let built = crate::with_dim!(n, N => {
        let mut w = [[0.0f32; N]; N];
        for (i, row) in w.iter_mut().enumerate() {
            row[i] = 1.0;
        }
        let params = ModelParams::<N> {
            meta: p.meta,
            preprocess: Preprocess {
                log_mask: p.log_mask,
                offset: core::array::from_fn(|i| p.offset[i]),
                scale: core::array::from_fn(|i| p.scale[i]),
            },
            mean: core::array::from_fn(|i| p.mean[i]),
            w,
            thresholds,
            policy: p.policy,
        };
        Model::new(params).map(|m| Box::new(m) as Box<dyn AnyModel>)
    });
    match built {
        Some(Ok(m)) => Ok((thresholds, m)),
        Some(Err(e)) => Err(anyhow::anyhow!("the per-feature model is invalid: {e}")),
        None => Err(anyhow::anyhow!("{n} features: no model of that size")),
    }
}
