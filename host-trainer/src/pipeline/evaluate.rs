//! Scoring a labelled CSV through the core and measuring how well the model and its alarm policy
//! separate faults from healthy operation; the per-feature twin of a model, for comparison.

use std::path::Path;

use anyhow::Result;
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

/// Replay a labelled CSV through `model` and its alarm state machine.
pub fn score_labelled(
    model: &dyn AnyModel,
    features: &[String],
    path: &Path,
    label_column: &str,
    timestamp: Option<String>,
    delimiter: Option<u8>,
    quiet: bool,
) -> Result<Scored> {
    let opts = CsvOptions {
        delimiter,
        columns: Some(features.to_vec()),
        timestamp,
        label: Some(label_column.to_string()),
        skip_bad_rows: false,
        allow_missing: true,
        quiet,
    };
    let mut reader = Reader::open(path, &opts)?;
    let mut rp = Replayer::new(model);
    let mut x = vec![0.0f32; features.len()];
    let (mut rows, mut labels) = (Vec::new(), Vec::new());
    while let Some(row) = reader.next_row()? {
        for (d, s) in x.iter_mut().zip(row.values) {
            *d = to_device(*s);
        }
        labels.push(row.label.unwrap_or(false));
        rows.push(rp.step(&x));
    }
    anyhow::ensure!(
        !rows.is_empty(),
        "{}: no readings to evaluate",
        path.display()
    );
    Ok(Scored { rows, labels })
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
