//! `ellipsoid._ellipsoid`: the native half of the Python package `ellipsoid`.
//!
//! Everything here calls the trainer library (`ellipsoid-trainer`) and, through it, the core: the fit
//! is [`ellipsoid_trainer::fit::memory::fit_rows`] or `fit_partial` followed by the same
//! [`train_with`] the `ellipsoid fit` command runs, and every score is the core's `f32` scoring. The
//! Python half (`python/ellipsoid/__init__.py`) turns numpy arrays and pandas or polars data frames
//! into a row-major `float64` array and feature names, and holds the docstrings users read.
#![forbid(unsafe_code)]

use std::path::PathBuf;

use anyhow::{anyhow, Result};
use clap::ValueEnum;
use ellipsoid_core::{AlarmPolicy, EventKind};
use ellipsoid_trainer::commands::common::{load_model, ModelInput};
use ellipsoid_trainer::data::card::ModelCard;
use ellipsoid_trainer::data::ingest::CsvOptions;
use ellipsoid_trainer::data::output::Outputs;
use ellipsoid_trainer::device::dims::{decode_any, AnyModel, Decoded};
use ellipsoid_trainer::device::replay::{to_device, Replayer};
use ellipsoid_trainer::fit::memory::{fit_partial, fit_rows, Partial, Table};
use ellipsoid_trainer::fit::Shrinkage;
use ellipsoid_trainer::pipeline::fit_report::report_data;
use ellipsoid_trainer::pipeline::limits::LimitSpec;
use ellipsoid_trainer::pipeline::summary::{summary_json, summary_text};
use ellipsoid_trainer::pipeline::train::{check_output_paths, train_with, TrainSpec, Trained};
use ellipsoid_trainer::stats::promise::SIM_SEED;
use ellipsoid_trainer::stats::threshold::Method;
use numpy::{
    IntoPyArray, PyArray1, PyArray2, PyArrayMethods, PyReadonlyArray2, PyUntypedArrayMethods,
};
use pyo3::exceptions::{PyTypeError, PyValueError};
use pyo3::prelude::*;
use pyo3::types::{PyBytes, PyDict};

/// An error of the trainer as a Python `ValueError`, with its whole chain of causes.
fn err(e: anyhow::Error) -> PyErr {
    PyValueError::new_err(format!("{e:#}"))
}

/// The rows of a C-contiguous 2-D `float64` array, with their count of columns.
fn rows<'a>(a: &'a PyReadonlyArray2<'_, f64>) -> PyResult<(&'a [f64], usize)> {
    let cols = a.shape()[1];
    let s = a.as_slice().map_err(|_| {
        PyValueError::new_err("the array must be C-contiguous (numpy.ascontiguousarray)")
    })?;
    Ok((s, cols))
}

/// The settings of `ellipsoid fit` from the keyword options of `ellipsoid.fit`.
fn spec_from(source: &str, opts: Option<&Bound<'_, PyDict>>) -> PyResult<TrainSpec> {
    let mut s = TrainSpec {
        baseline: PathBuf::from(source),
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
        alpha: None,
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
        trained_at: None,
        threads: Some(1),
        limits: LimitSpec {
            confidence: 0.9,
            sims: None,
            seed: SIM_SEED,
            independent_rows: false,
        },
        strict_baseline: false,
        no_fpu: false,
    };
    let mut shrinkage = "none".to_string();
    let mut loading = 0.01f64;
    let Some(opts) = opts else { return Ok(s) };
    for (k, v) in opts.iter() {
        let key: String = k.extract()?;
        if v.is_none() {
            continue;
        }
        match key.as_str() {
            "log" => s.log_columns = v.extract()?,
            "shrinkage" => shrinkage = v.extract()?,
            "loading" => loading = v.extract()?,
            "robust" => s.robust = v.extract()?,
            "holdout" => s.holdout = v.extract()?,
            "threshold" => {
                let name: String = v.extract()?;
                s.threshold = Method::from_str(&name, false).map_err(|_| {
                    PyValueError::new_err(format!(
                        "threshold `{name}`: use hotelling, confidence, chi-square, empirical or f1"
                    ))
                })?;
            }
            "confidence" => s.limits.confidence = v.extract()?,
            "simulations" => s.limits.sims = Some(v.extract()?),
            "simulation_seed" => s.limits.seed = v.extract()?,
            "independent_rows" => s.limits.independent_rows = v.extract()?,
            "strict_baseline" => s.strict_baseline = v.extract()?,
            "no_fpu" => s.no_fpu = v.extract()?,
            "alarms_per_day" => s.alarms_per_day = v.extract()?,
            "rate_hz" => s.rate_hz = v.extract()?,
            "alpha" => s.alpha = Some(v.extract()?),
            "validation" => s.validation = Some(v.extract::<PathBuf>()?),
            "label_column" => s.label_column = v.extract()?,
            "raise_after" => s.policy.raise_after = v.extract()?,
            "clear_after" => s.policy.clear_after = v.extract()?,
            "clear_fraction" => s.clear_fraction = v.extract()?,
            "latch" => s.policy.latch = v.extract()?,
            "model_id" => s.model_id = Some(v.extract()?),
            "sequence" => s.sequence = v.extract()?,
            "trained_at" => s.trained_at = Some(v.extract()?),
            "skip_bad_rows" => s.csv.skip_bad_rows = v.extract()?,
            "report" => {}
            other => {
                return Err(PyTypeError::new_err(format!(
                    "unknown fit option `{other}`"
                )))
            }
        }
    }
    s.shrinkage = match shrinkage.as_str() {
        "none" => Shrinkage::None,
        "ledoit-wolf" => Shrinkage::LedoitWolf,
        "diagonal" => Shrinkage::Diagonal(loading),
        other => {
            return Err(PyValueError::new_err(format!(
                "shrinkage `{other}`: use none, ledoit-wolf or diagonal"
            )))
        }
    };
    Ok(s)
}

/// A fitted model: its blob and card, what `ellipsoid fit` prints about it, and the core's scoring.
#[pyclass(module = "ellipsoid._ellipsoid", frozen)]
struct Model {
    blob: Vec<u8>,
    card: String,
    features: Vec<String>,
    summary: String,
    summary_json: String,
    report_html: String,
    model: Box<dyn AnyModel>,
}

impl Model {
    fn from_trained(t: Trained, report: bool) -> Result<Self> {
        let mut card = Vec::new();
        t.card.write_to(&mut card)?;
        let report_html = if report {
            ellipsoid_trainer::report::render(&report_data(&t))?
        } else {
            String::new()
        };
        Ok(Model {
            report_html,
            card: String::from_utf8(card)?,
            features: t.fitted.features.clone(),
            summary: summary_text(&t),
            summary_json: serde_json::to_string_pretty(&summary_json(&t))?,
            model: decode_any(&t.blob).map_err(|e| anyhow!("{e}"))?,
            blob: t.blob,
        })
    }

    /// The values of `a` (columns in model order) as the device receives them.
    fn device_rows(&self, a: &PyReadonlyArray2<'_, f64>) -> PyResult<Vec<f32>> {
        let (v, cols) = rows(a)?;
        if cols != self.features.len() {
            return Err(PyValueError::new_err(format!(
                "{cols} columns, but the model has {} features ({})",
                self.features.len(),
                self.features.join(", ")
            )));
        }
        Ok(v.iter().map(|x| to_device(*x)).collect())
    }
}

#[pymethods]
impl Model {
    /// The model blob, byte for byte what `ellipsoid fit --out` writes.
    #[getter]
    fn blob<'py>(&self, py: Python<'py>) -> Bound<'py, PyBytes> {
        PyBytes::new(py, &self.blob)
    }

    /// The model card's JSON text, byte for byte what `ellipsoid fit` writes beside the blob.
    #[getter]
    fn card(&self) -> &str {
        &self.card
    }

    /// Feature names, in model order.
    #[getter]
    fn features(&self) -> Vec<String> {
        self.features.clone()
    }

    /// The alarm threshold on d², as stored in the blob (`f32`).
    #[getter]
    fn threshold(&self) -> f32 {
        self.model.params().thresholds.alarm
    }

    /// The clear threshold on d², as stored in the blob (`f32`).
    #[getter]
    fn clear_threshold(&self) -> f32 {
        self.model.params().thresholds.clear
    }

    /// The fitted mean in raw units (log units for log features), as the blob holds it.
    #[getter]
    fn mean(&self) -> Vec<f64> {
        self.model.params().raw_mean()
    }

    /// What `ellipsoid fit` prints (empty for a model loaded from a file).
    #[getter]
    fn summary(&self) -> &str {
        &self.summary
    }

    /// What `ellipsoid fit --json` prints, as JSON text (empty for a model loaded from a file).
    #[getter]
    fn summary_json(&self) -> &str {
        &self.summary_json
    }

    /// The HTML report `ellipsoid fit --report` writes (empty unless the fit asked for it).
    #[getter]
    fn report_html(&self) -> &str {
        &self.report_html
    }

    /// Write the blob to `path`, the card beside it (`.json`) and the report, all or nothing.
    #[pyo3(signature = (path, report=None))]
    fn save(&self, path: PathBuf, report: Option<PathBuf>) -> PyResult<()> {
        // The command's checks: the card may not be the blob, no two outputs may be one file.
        check_output_paths(&path, report.as_deref(), &[]).map_err(err)?;
        let mut out = Outputs::new();
        out.stage_bytes(&path, &self.blob).map_err(err)?;
        out.stage_bytes(&ModelCard::path_for(&path), self.card.as_bytes())
            .map_err(err)?;
        if let Some(r) = &report {
            out.stage_bytes(r, self.report_html.as_bytes())
                .map_err(err)?;
        }
        out.commit().map_err(err)
    }

    /// The core's d² of each row (`float32`), NaN where the core could not score the row.
    fn score<'py>(
        &self,
        py: Python<'py>,
        values: PyReadonlyArray2<'py, f64>,
    ) -> PyResult<Bound<'py, PyArray1<f32>>> {
        let x = self.device_rows(&values)?;
        let p = self.features.len();
        let model = &self.model;
        let d2: Vec<f32> = py.detach(|| {
            x.chunks_exact(p)
                .map(|r| model.score(r).map_or(f32::NAN, |s| s.d2))
                .collect()
        });
        Ok(d2.into_pyarray(py))
    }

    /// Every row through the core and its alarm state machine, as `ellipsoid replay` does: a dict of
    /// arrays `index`, `d2`, `d2_bits`, `verdict`, `alarm`, `fault`, `event`, `top_feature` and
    /// `contributions` (rows × features, NaN on a fault).
    fn replay<'py>(
        &self,
        py: Python<'py>,
        values: PyReadonlyArray2<'py, f64>,
    ) -> PyResult<Bound<'py, PyDict>> {
        let x = self.device_rows(&values)?;
        let p = self.features.len();
        let n = x.len() / p.max(1);
        let blob = &self.blob;
        let out = py
            .detach(|| {
                // The blob as the device runs it (the core's tracker), like `ellipsoid replay`.
                let mut rp = Replayer::from_blob(blob).map_err(|e| anyhow!("{e}"))?;
                let mut o = ReplayOut::with_capacity(n, p);
                for r in x.chunks_exact(p) {
                    let row = rp.step(r);
                    o.index.push(row.index);
                    o.d2.push(row.d2().unwrap_or(f32::NAN));
                    o.d2_bits.push(row.d2().map_or(0, f32::to_bits));
                    o.verdict.push(match row.d2() {
                        None => "fault",
                        Some(_) if row.above() => "above",
                        Some(_) => "below",
                    });
                    o.alarm.push(row.alarm);
                    o.fault.push(row.fault);
                    let events: Vec<&str> = row.events.iter().map(EventKind::name).collect();
                    o.event.push(events.join("+"));
                    o.top.push(row.top_feature());
                    match &row.contributions {
                        Some(c) => o.contributions.extend_from_slice(c),
                        None => o.contributions.extend(std::iter::repeat_n(f32::NAN, p)),
                    }
                }
                Ok::<_, anyhow::Error>(o)
            })
            .map_err(err)?;
        let d = PyDict::new(py);
        d.set_item("index", out.index.into_pyarray(py))?;
        d.set_item("d2", out.d2.into_pyarray(py))?;
        d.set_item("d2_bits", out.d2_bits.into_pyarray(py))?;
        d.set_item("verdict", out.verdict)?;
        d.set_item("alarm", out.alarm.into_pyarray(py))?;
        d.set_item("fault", out.fault.into_pyarray(py))?;
        d.set_item("event", out.event)?;
        let top: Vec<Option<String>> = out
            .top
            .iter()
            .map(|t| t.and_then(|i| self.features.get(i).cloned()))
            .collect();
        d.set_item("top_feature", top)?;
        let c = PyArray1::from_vec(py, out.contributions).reshape([n, p])?;
        d.set_item("contributions", c)?;
        Ok(d)
    }
}

/// The columns of a replay, gathered without the GIL.
struct ReplayOut {
    index: Vec<u64>,
    d2: Vec<f32>,
    d2_bits: Vec<u32>,
    verdict: Vec<&'static str>,
    alarm: Vec<bool>,
    fault: Vec<bool>,
    event: Vec<String>,
    top: Vec<Option<usize>>,
    contributions: Vec<f32>,
}

impl ReplayOut {
    fn with_capacity(n: usize, p: usize) -> Self {
        ReplayOut {
            index: Vec::with_capacity(n),
            d2: Vec::with_capacity(n),
            d2_bits: Vec::with_capacity(n),
            verdict: Vec::with_capacity(n),
            alarm: Vec::with_capacity(n),
            fault: Vec::with_capacity(n),
            event: Vec::with_capacity(n),
            top: Vec::with_capacity(n),
            contributions: Vec::with_capacity(n * p),
        }
    }
}

/// Whether the options ask for the HTML report.
fn wants_report(opts: Option<&Bound<'_, PyDict>>) -> PyResult<bool> {
    match opts.map(|o| o.get_item("report")).transpose()?.flatten() {
        Some(v) if !v.is_none() => v.extract(),
        _ => Ok(false),
    }
}

/// Fit rows (time order) with the options of `ellipsoid fit`; `source` names them in messages and
/// in the card.
#[pyfunction]
#[pyo3(signature = (values, features, source, options=None))]
fn fit_rows_py(
    py: Python<'_>,
    values: PyReadonlyArray2<'_, f64>,
    features: Vec<String>,
    source: String,
    options: Option<&Bound<'_, PyDict>>,
) -> PyResult<Model> {
    let (v, cols) = rows(&values)?;
    if cols != features.len() {
        return Err(PyValueError::new_err(format!(
            "{cols} columns but {} feature names",
            features.len()
        )));
    }
    let spec = spec_from(&source, options)?;
    let report = wants_report(options)?;
    py.detach(|| {
        let t = train_with(&spec, |opts| {
            fit_rows(
                &Table {
                    name: &source,
                    features: &features,
                    values: v,
                },
                opts,
            )
        })?;
        Model::from_trained(t, report)
    })
    .map_err(err)
}

/// Fit merged partial moments with the options of `ellipsoid fit` that work without rows.
#[pyfunction]
#[pyo3(signature = (moments, source, options=None))]
fn fit_moments_py(
    py: Python<'_>,
    moments: &PartialMoments,
    source: String,
    options: Option<&Bound<'_, PyDict>>,
) -> PyResult<Model> {
    let spec = spec_from(&source, options)?;
    if spec.threshold == Method::Empirical {
        return Err(PyValueError::new_err(format!(
            "{source}: the empirical threshold is a quantile of held-out rows' d², and partial moments \
             keep no rows: choose hotelling, confidence, chi-square or f1"
        )));
    }
    let report = wants_report(options)?;
    let part = &moments.0;
    py.detach(|| {
        let t = train_with(&spec, |opts| fit_partial(&source, part, opts))?;
        Model::from_trained(t, report)
    })
    .map_err(err)
}

/// Read a blob and the card beside it, as `ellipsoid replay --model` does.
#[pyfunction]
fn load_py(path: PathBuf) -> PyResult<Model> {
    let loaded = load_model(&ModelInput {
        model: path.clone(),
        input: PathBuf::new(),
        features: None,
    })
    .map_err(err)?;
    let blob =
        std::fs::read(&path).map_err(|e| err(anyhow!("cannot read {}: {e}", path.display())))?;
    let card_path = ModelCard::path_for(&path);
    let card = std::fs::read_to_string(&card_path)
        .map_err(|e| err(anyhow!("cannot read {}: {e}", card_path.display())))?;
    let crc = ellipsoid_trainer::data::card::blob_crc(&blob);
    if loaded.card.as_ref().map(|c| c.blob_crc) != Some(crc) {
        return Err(err(anyhow!(
            "{}: changed while it was read",
            path.display()
        )));
    }
    Ok(Model {
        blob,
        card,
        features: loaded.features,
        summary: String::new(),
        summary_json: String::new(),
        report_html: String::new(),
        model: match loaded.decoded {
            Decoded::Model(m) => m,
            Decoded::Bank(_) => {
                return Err(err(anyhow!(
                    "{}: a model bank (format 2); the Python package reads single models \
                     (format 1) so far: replay it with `ellipsoid replay`",
                    path.display()
                )))
            }
        },
    })
}

/// A model from its blob, card text and summaries (the pickle of `ellipsoid.Model`): the card must be
/// valid and describe this blob (CRC and length), as `ellipsoid replay` requires of a card file.
#[pyfunction]
#[pyo3(signature = (blob, card, summary=String::new(), summary_json=String::new()))]
fn model_from_parts(
    blob: Vec<u8>,
    card: String,
    summary: String,
    summary_json: String,
) -> PyResult<Model> {
    let model =
        decode_any(&blob).map_err(|e| err(anyhow!("the blob is refused by the core: {e}")))?;
    let parsed: ModelCard =
        serde_json::from_str(&card).map_err(|e| err(anyhow!("not a valid model card: {e}")))?;
    let crc = ellipsoid_trainer::data::card::blob_crc(&blob);
    if parsed.blob_crc != crc || parsed.blob_len != blob.len() || parsed.features.len() != model.n()
    {
        return Err(err(anyhow!(
            "the card describes another blob (CRC {:#010x}, {} bytes, {} features) than the one given \
             (CRC {crc:#010x}, {} bytes, {} features)",
            parsed.blob_crc,
            parsed.blob_len,
            parsed.features.len(),
            blob.len(),
            model.n()
        )));
    }
    Ok(Model {
        blob,
        features: parsed.features,
        card,
        summary,
        summary_json,
        report_html: String::new(),
        model,
    })
}

/// Partial moments: see `ellipsoid.Moments`.
#[pyclass(module = "ellipsoid._ellipsoid")]
struct PartialMoments(Partial);

#[pymethods]
impl PartialMoments {
    #[new]
    #[pyo3(signature = (features, log=Vec::new()))]
    fn new(features: Vec<String>, log: Vec<String>) -> PyResult<Self> {
        Partial::new(features, &log).map(Self).map_err(err)
    }

    /// Add rows (time order).
    #[pyo3(signature = (values, name, skip_bad_rows=false))]
    fn push(
        &mut self,
        py: Python<'_>,
        values: PyReadonlyArray2<'_, f64>,
        name: String,
        skip_bad_rows: bool,
    ) -> PyResult<()> {
        let (v, cols) = rows(&values)?;
        if cols != self.0.features().len() {
            return Err(PyValueError::new_err(format!(
                "{name}: {cols} columns, but the moments have {} features ({})",
                self.0.features().len(),
                self.0.features().join(", ")
            )));
        }
        let part = &mut self.0;
        py.detach(|| part.push_rows(&name, v, skip_bad_rows))
            .map_err(err)
    }

    /// Fold in another partial.
    fn merge(&mut self, other: &Self) -> PyResult<()> {
        self.0.merge(&other.0).map_err(err)
    }

    /// The versioned byte form.
    fn to_bytes<'py>(&self, py: Python<'py>) -> Bound<'py, PyBytes> {
        PyBytes::new(py, &self.0.to_bytes())
    }

    /// Read the byte form.
    #[staticmethod]
    fn from_bytes(b: &[u8]) -> PyResult<Self> {
        Partial::from_bytes(b).map(Self).map_err(err)
    }

    /// A copy.
    fn copy(&self) -> Self {
        Self(self.0.clone())
    }

    #[getter]
    fn features(&self) -> Vec<String> {
        self.0.features().to_vec()
    }

    #[getter]
    fn log_features(&self) -> Vec<String> {
        self.0.log_features()
    }

    #[getter]
    fn n(&self) -> u64 {
        self.0.moments().n
    }

    #[getter]
    fn skipped(&self) -> u64 {
        self.0.skipped()
    }

    /// The mean (log units for log features).
    fn mean<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray1<f64>> {
        self.0.moments().mean().into_pyarray(py)
    }

    /// The sample covariance (denominator n − 1).
    fn covariance<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyArray2<f64>>> {
        let p = self.0.features().len();
        PyArray1::from_vec(py, self.0.moments().covariance()).reshape([p, p])
    }
}

/// The version of the byte form that `PartialMoments.to_bytes` writes.
#[pyfunction]
fn moments_version() -> u16 {
    ellipsoid_trainer::fit::memory::PARTIAL_VERSION
}

#[pymodule]
#[pyo3(name = "_ellipsoid")]
fn ellipsoid_module(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_class::<Model>()?;
    m.add_class::<PartialMoments>()?;
    m.add_function(wrap_pyfunction!(fit_rows_py, m)?)?;
    m.add_function(wrap_pyfunction!(fit_moments_py, m)?)?;
    m.add_function(wrap_pyfunction!(load_py, m)?)?;
    m.add_function(wrap_pyfunction!(model_from_parts, m)?)?;
    m.add_function(wrap_pyfunction!(moments_version, m)?)?;
    Ok(())
}
