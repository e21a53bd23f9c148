//! `ellipsoid evaluate`: score a labelled CSV and report precision, recall, AUCs, delays and false
//! alarms a day, with the model set beside its per-feature twin in the report.

use std::path::PathBuf;

use anyhow::Result;
use clap::Args;

use crate::commands::common::{load_model, parse_delimiter, ModelInput};
use crate::data::output;
use crate::data::paths::Role;
use crate::device::replay::Replayer;
use crate::pipeline::evaluate::{
    diagonal_of, model_correlation, qq_points, score_labelled, score_stream, top_alarms, StreamSpec,
};
use crate::report;
use crate::stats::metrics;

/// Options of `evaluate`.
#[derive(Debug, Clone, Args)]
pub struct EvaluateArgs {
    #[command(flatten)]
    pub model: ModelInput,
    /// Label column (1 = anomaly).
    #[arg(long, default_value = "label", value_name = "NAME")]
    pub label_column: String,
    /// The column that tells a known-mode bank each reading's mode (default: the model card's).
    #[arg(long, value_name = "NAME")]
    pub mode_column: Option<String>,
    /// Readings a second (default: the rate in the model card).
    #[arg(long, value_name = "HZ")]
    pub rate_hz: Option<f64>,
    /// A timestamp column to skip (default: timestamp, time or datetime).
    #[arg(long, value_name = "NAME")]
    pub timestamp: Option<String>,
    /// Field delimiter: `,` `;` or `tab`.
    #[arg(long, value_name = "CHAR", value_parser = parse_delimiter)]
    pub delimiter: Option<u8>,
    /// Also write an HTML report here.
    #[arg(long, value_name = "FILE")]
    pub report: Option<PathBuf>,
    /// Print as JSON.
    #[arg(long)]
    pub json: bool,
    /// No progress bar.
    #[arg(long, short)]
    pub quiet: bool,
}

/// Run `evaluate`.
pub fn run(a: &EvaluateArgs) -> Result<()> {
    if let Some(r) = &a.report {
        a.model.refuse_overwrite(&[Role::new("--report", r)])?;
    }
    let loaded = load_model(&a.model)?;
    loaded.check_names(&a.model)?;
    if a.report.is_some() {
        // The report draws one model's thresholds and its per-feature twin; a bank has one
        // pair of limits per mode and a window, which it does not draw yet.
        loaded.single(&a.model.model, "--report")?;
    }
    let rate = a
        .rate_hz
        .or(loaded.card.as_ref().map(|c| c.rate_hz))
        .unwrap_or(1.0);
    anyhow::ensure!(
        rate.is_finite() && rate > 0.0,
        "--rate-hz must be a positive number of readings a second"
    );
    // The device's own code over the stream: window, bank, alarm machine and drift, their state
    // carried from reading to reading (a format 1 blob is the bank of one mode, window one).
    let spec = StreamSpec {
        features: loaded.features.clone(),
        mode_column: loaded.mode_column(a.mode_column.as_deref(), &a.model.model)?,
        label_column: Some(a.label_column.clone()),
        timestamp: a.timestamp.clone(),
        delimiter: a.delimiter,
        quiet: a.quiet,
    };
    let rp = Replayer::from_blob(&loaded.blob)
        .map_err(|e| anyhow::anyhow!("{}: {e}", a.model.model.display()))?;
    let scored = score_stream(rp, &a.model.input, &spec)?;
    let eval = scored.evaluate(rate);
    let faults = scored.faults();
    let drift = loaded
        .bank()
        .and_then(|b| b.drift.as_ref())
        .map(|_| scored.drift());
    if let Some(path) = &a.report {
        let model = loaded.single(&a.model.model, "--report")?;
        let p = model.params();
        let d2 = scored.d2();
        let alpha = loaded.card.as_ref().map_or_else(
            || {
                crate::stats::threshold::chi_square_tail(
                    loaded.features.len(),
                    f64::from(p.thresholds.alarm),
                )
            },
            |c| c.alpha,
        );
        let (diag_thr, diag_model) = diagonal_of(model, alpha)?;
        let diag = score_labelled(
            diag_model.as_ref(),
            &loaded.features,
            &a.model.input,
            &a.label_column,
            a.timestamp.clone(),
            a.delimiter,
            true,
        )?;
        let data = report::ReportData {
            title: format!("Ellipsoid evaluation of {}", a.model.input.display()),
            subtitle: format!(
                "model {} ({} features), {} readings at {} Hz",
                a.model.model.display(),
                loaded.features.len(),
                scored.rows.len(),
                crate::stats::threshold::hz(rate)
            ),
            features: loaded.features.clone(),
            summary: Vec::new(),
            d2: d2.clone(),
            rate_hz: rate,
            alarm_threshold: f64::from(p.thresholds.alarm),
            clear_threshold: f64::from(p.thresholds.clear),
            alarm: scored.alarm(),
            labels: Some(scored.labels.clone()),
            episodes: metrics::label_events(&scored.labels)
                .into_iter()
                .enumerate()
                .map(|(i, (s, e))| (format!("event {}", i + 1), s, e))
                .collect(),
            baseline_d2: d2
                .iter()
                .zip(&scored.labels)
                .filter(|(_, l)| !**l)
                .filter_map(|(d, _)| d.map(f64::from))
                .collect(),
            qq: qq_points(&d2, &scored.labels, loaded.features.len()),
            corr: model_correlation(model),
            top_alarms: top_alarms(&scored.rows, 8),
            diagonal: Some(report::DiagonalComparison {
                d2_diag: diag.d2(),
                threshold_diag: f64::from(diag_thr.alarm),
                alarm_diag: diag.alarm(),
                notes: vec![format!(
                    "per-feature model: the same standardisation and policy with the correlations \
                     left out, thresholded at the chi-square({}) quantile for α = {alpha:.3e}",
                    loaded.features.len()
                )],
            }),
            ..Default::default()
        };
        let html = report::render(&data)?;
        output::write_bytes(path, html.as_bytes())?;
    }
    if a.json {
        let mut v = serde_json::to_value(&eval)?;
        if let Some(o) = v.as_object_mut() {
            o.insert("unscored_by_cause".into(), serde_json::to_value(faults)?);
            if let Some(d) = drift {
                o.insert("drift".into(), serde_json::to_value(d)?);
            }
        }
        println!("{}", serde_json::to_string_pretty(&v)?);
    } else {
        println!(
            "Evaluated {} with {}:",
            a.model.input.display(),
            a.model.model.display()
        );
        println!("{eval}");
        if eval.unscored > 0 {
            println!(
                "not scored, by cause: {} bad reading(s), {} with the reading window filling, {} \
                 without a known mode, {} other; each counts as flagged above (the device never \
                 calls a reading normal that it could not score)",
                faults.bad_reading, faults.window_filling, faults.unknown_mode, faults.other
            );
        }
        if let Some(d) = drift {
            match d.first_at_bound {
                Some(i) => println!(
                    "drift: the centre's shift reached its bound on a feature at reading {i} \
                     ({} drift event(s)); it is clamped there, so the model follows that feature \
                     no further",
                    d.events
                ),
                None => println!("drift: the centre's shift stayed inside its bounds"),
            }
        }
        if let Some(path) = &a.report {
            println!("Wrote {}.", path.display());
        }
    }
    Ok(())
}
