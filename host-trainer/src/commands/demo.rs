//! `ellipsoid demo`: the whole job on an invented booster pump, end to end.
//!
//! Generate a healthy baseline and a later stretch with injected faults; fit; choose the threshold;
//! export the blob; replay and evaluate the later stretch through the core; set the full-covariance
//! model beside a per-feature (diagonal) model; write the report; say what was found and where
//! every file is.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use ellipsoid_core::{AlarmPolicy, Thresholds};

use crate::data::ingest::CsvOptions;
use crate::data::output;
use crate::data::scenario::{self, Episode};
use crate::device::dims::AnyModel;
use crate::device::replay::CsvSink;
use crate::fit::Shrinkage;
use crate::pipeline::evaluate::{
    diagonal_of, model_correlation, qq_points, score_labelled, top_alarms, Scored,
};
use crate::pipeline::fit_report::report_data;
use crate::pipeline::limits::LimitSpec;
use crate::pipeline::train::{train, write_outputs, TrainSpec, Trained};
use crate::report;
use crate::stats::metrics::Evaluation;
use crate::stats::threshold::Method;
use clap::Args;

/// 2026-03-02T06:00:00Z: when the invented baseline log starts.
pub const DEMO_START_UNIX: i64 = 1_772_431_200;

/// Where the demo writes each file.
#[derive(Clone, Debug)]
pub struct DemoFiles {
    /// Healthy baseline CSV.
    pub baseline: PathBuf,
    /// The later stretch with faults, labelled.
    pub readings: PathBuf,
    /// The firmware-ready blob.
    pub blob: PathBuf,
    /// Its model card.
    pub card: PathBuf,
    /// The core's replay of the readings.
    pub replay: PathBuf,
    /// The HTML report.
    pub report: PathBuf,
    /// The text summary printed at the end.
    pub summary: PathBuf,
}

impl DemoFiles {
    /// The files inside `dir`.
    pub fn in_dir(dir: &Path) -> Self {
        Self {
            baseline: dir.join("baseline.csv"),
            readings: dir.join("readings.csv"),
            blob: dir.join("model.blob"),
            card: dir.join("model.json"),
            replay: dir.join("replay.csv"),
            report: dir.join("report.html"),
            summary: dir.join("summary.txt"),
        }
    }
}

/// How one episode was caught by a model.
#[derive(Clone, Debug)]
pub struct Catch {
    /// Readings from the episode's start to the first alarm or fault line, if any.
    pub delay: Option<usize>,
    /// Whether it was the fault line (could not score) rather than the alarm.
    pub by_fault: bool,
}

fn catch(episode: &Episode, s: &Scored) -> Catch {
    let rows = &s.rows[episode.start..episode.end.min(s.rows.len())];
    match rows.iter().position(|r| r.alarm || r.fault) {
        Some(i) => Catch {
            delay: Some(i),
            by_fault: !rows[i].alarm && rows[i].fault,
        },
        None => Catch {
            delay: None,
            by_fault: false,
        },
    }
}

fn describe(c: &Catch) -> String {
    match c.delay {
        None => "missed".into(),
        Some(d) if c.by_fault => format!("fault line after {d} s (could not score)"),
        Some(d) => format!("alarm after {d} s"),
    }
}

/// Run the demo; returns the summary text.
pub fn run_demo(dir: &Path, seed: u64, quiet: bool) -> Result<String> {
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let files = DemoFiles::in_dir(dir);
    let data = scenario::generate(seed);
    let test_start = DEMO_START_UNIX + data.baseline.len() as i64;
    output::write_atomic(&files.baseline, |w| {
        scenario::write_csv(w, &data.baseline, None, None, DEMO_START_UNIX)
    })?;
    output::write_atomic(&files.readings, |w| {
        scenario::write_csv(w, &data.test, None, Some(&data.labels), test_start)
    })?;

    let spec = TrainSpec {
        no_fpu: false,
        baseline: files.baseline.clone(),
        csv: CsvOptions {
            quiet: true,
            ..CsvOptions::default()
        },
        log_columns: Vec::new(),
        shrinkage: Shrinkage::None,
        robust: false,
        holdout: 0.25,
        threshold: Method::Hotelling,
        alarms_per_day: 1.0,
        rate_hz: scenario::RATE_HZ,
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
        // The model was trained when its baseline ended.
        trained_at: Some(test_start as u64),
        threads: None,
        limits: LimitSpec::default(),
        strict_baseline: false,
    };
    let trained = train(&spec)?;
    write_outputs(&trained, &files.blob)?;

    let features = trained.fitted.features.clone();
    let score = |model: &dyn AnyModel| {
        score_labelled(model, &features, &files.readings, "label", None, None, true)
    };
    let full = score(trained.model.as_ref())?;
    // The same readings through a per-feature model: the same standardisation and the same
    // per-reading false-alarm target, but with the correlations left out (W = I).
    let diagonal = diagonal_of(trained.model.as_ref(), trained.candidates.alpha)?;
    let diag = score(diagonal.1.as_ref())?;

    output::write_atomic(&files.replay, |w| {
        let mut sink = CsvSink::new(w, &features)?;
        for r in &full.rows {
            sink.row(r)?;
        }
        sink.finish()?;
        Ok(())
    })?;

    let eval = full.evaluate(scenario::RATE_HZ);
    let eval_diag = diag.evaluate(scenario::RATE_HZ);
    let catches: Vec<(Catch, Catch)> = data
        .episodes
        .iter()
        .map(|e| (catch(e, &full), catch(e, &diag)))
        .collect();

    let html = report::render(&demo_report(
        &trained,
        &data,
        &full,
        &diag,
        &diagonal.0,
        &catches,
    ))?;
    output::write_bytes(&files.report, html.as_bytes())?;

    let s = demo_summary(
        seed, &data, &trained, &features, &full, &catches, &eval, &eval_diag, &files,
    );
    output::write_bytes(&files.summary, s.as_bytes())?;
    if !quiet {
        print!("{s}");
    }
    Ok(s)
}

/// What the demo found, in plain words, with where every file is.
#[allow(clippy::too_many_arguments)]
fn demo_summary(
    seed: u64,
    data: &scenario::DemoData,
    trained: &Trained,
    features: &[String],
    full: &Scored,
    catches: &[(Catch, Catch)],
    eval: &Evaluation,
    eval_diag: &Evaluation,
    files: &DemoFiles,
) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "Ellipsoid demo: a booster pump on a greenhouse irrigation skid, 5 channels at {} Hz (seed {seed}).",
        scenario::RATE_HZ
    );
    let _ = writeln!(
        s,
        "Baseline {} h of healthy running; the model was fitted on the first {} rows and checked on the last {}.",
        data.baseline.len() / 3600,
        trained.fitted.rows_used,
        trained.fitted.rows_holdout
    );
    let _ = writeln!(
        s,
        "Threshold: d² > {:.3} (the Phase II Hotelling limit for {} features and m = {} rows at α = {:.2e}, 1 false reading a day); \
         raise after {}, clear below {:.3} after {}.",
        trained.thresholds.alarm,
        features.len(),
        trained.promise.m,
        trained.candidates.alpha,
        trained.policy.raise_after,
        trained.thresholds.clear,
        trained.policy.clear_after
    );
    let _ = writeln!(
        s,
        "  false readings a day above it: expected {:.2}, at most {:.2} with {:.0} % confidence; the readings' time \
         correlation makes the {} rows count as {:.0} for the mean and {:.0} for the covariance; chi-square({}) would say {:.3}",
        trained.promise.expected_per_day,
        trained.promise.at_most_per_day,
        100.0 * trained.promise.confidence,
        trained.promise.m,
        trained.promise.sizes.m_mean,
        trained.promise.sizes.m_cov(),
        features.len(),
        trained.candidates.chi_square
    );
    if let Some(e) = &trained.candidates.empirical {
        let _ = match e.value {
            Some(v) => writeln!(
                s,
                "  (the hold-out's empirical quantile for the same α would be {v:.3})"
            ),
            None => writeln!(
                s,
                "  (the hold-out's {} rows are too few for an empirical quantile at this α: it needs {})",
                e.n, e.needed
            ),
        };
    }
    if let Some(h) = &trained.holdout {
        let _ = writeln!(
            s,
            "Held-out baseline through the device's alarm logic: {} alarms in {:.1} h = {:.2} false alarms a day \
             (95 % upper bound {:.1} a day: a longer hold-out narrows it).",
            h.alarms_raised, h.hours, h.false_alarms_per_day, h.false_alarms_per_day_upper95
        );
    }
    let _ = writeln!(
        s,
        "\nThe later {} h, with faults injected (full-covariance model vs per-feature model):",
        data.test.len() / 3600
    );
    let w = data
        .episodes
        .iter()
        .map(|e| e.name.len())
        .max()
        .unwrap_or(10);
    for (e, (c_full, c_diag)) in data.episodes.iter().zip(catches) {
        let top = full.rows[e.start..e.end.min(full.rows.len())]
            .iter()
            .find_map(|r| r.top_feature())
            .map(|i| format!("; top sensor {}", features[i]))
            .unwrap_or_default();
        let _ = writeln!(
            s,
            "  {:<w$}  {:>5} s  full: {}{}  |  per-feature: {}",
            e.name,
            e.end - e.start,
            describe(c_full),
            top,
            describe(c_diag)
        );
    }
    let missed_by_diag: Vec<&str> = data
        .episodes
        .iter()
        .zip(catches)
        .filter(|(_, (f, d))| f.delay.is_some() && d.delay.is_none())
        .map(|(e, _)| e.name)
        .collect();
    if !missed_by_diag.is_empty() {
        let _ = writeln!(
            s,
            "Only the full-covariance model caught: {}.",
            missed_by_diag.join(", ")
        );
    }
    let _ = writeln!(
        s,
        "\nFull model:        {} false alarms a day after the policy; precision {}, recall {} per reading.",
        fmt_opt(Some(eval.after_policy.false_alarms_per_day)),
        fmt_opt(eval.per_reading.confusion.precision()),
        fmt_opt(eval.per_reading.confusion.recall())
    );
    let _ = writeln!(
        s,
        "Per-feature model: {} false alarms a day after the policy; precision {}, recall {} per reading.",
        fmt_opt(Some(eval_diag.after_policy.false_alarms_per_day)),
        fmt_opt(eval_diag.per_reading.confusion.precision()),
        fmt_opt(eval_diag.per_reading.confusion.recall())
    );
    let _ = writeln!(s, "\nFiles:");
    for (what, p) in [
        ("baseline CSV", &files.baseline),
        ("readings with faults (labelled)", &files.readings),
        ("firmware-ready model blob", &files.blob),
        ("model card (feature names)", &files.card),
        ("replay through the core", &files.replay),
        ("report (open in a browser)", &files.report),
        ("this summary", &files.summary),
    ] {
        let _ = writeln!(s, "  {:<32} {}", what, p.display());
    }
    let _ = writeln!(
        s,
        "\nAn Ellipsoid alarm is an aid, not a safety function: protection and shutdown stay with the\nmachine maker's devices, local codes and licensed practice."
    );
    s
}

fn fmt_opt(v: Option<f64>) -> String {
    v.map_or("n/a".into(), |x| format!("{x:.3}"))
}

fn demo_report(
    t: &Trained,
    data: &scenario::DemoData,
    full: &Scored,
    diag: &Scored,
    diag_thr: &Thresholds,
    catches: &[(Catch, Catch)],
) -> report::ReportData {
    let d2 = full.d2();
    let mut notes = Vec::new();
    for (e, (c_full, c_diag)) in data.episodes.iter().zip(catches) {
        notes.push(format!(
            "{}: full-covariance {}, per-feature {}",
            e.name,
            describe(c_full),
            describe(c_diag)
        ));
    }
    let eval = full.evaluate(scenario::RATE_HZ);
    let rows: Vec<Vec<String>> = data
        .episodes
        .iter()
        .zip(catches)
        .map(|(e, (cf, cd))| {
            vec![
                e.name.to_string(),
                e.description.to_string(),
                format!("{} s", e.end - e.start),
                describe(cf),
                describe(cd),
            ]
        })
        .collect();
    let mut data_out = report_data(t);
    data_out.title = "Ellipsoid demo: greenhouse irrigation booster pump".into();
    data_out.subtitle = format!(
        "{} h baseline, {} h with injected faults, 5 channels at 1 Hz",
        data.baseline.len() / 3600,
        data.test.len() / 3600
    );
    data_out.summary.push((
        "false alarms a day in the fault stretch (after policy)".into(),
        format!("{:.2}", eval.after_policy.false_alarms_per_day),
    ));
    data_out.d2 = d2.clone();
    data_out.alarm = full.alarm();
    data_out.labels = Some(full.labels.clone());
    data_out.episodes = data
        .episodes
        .iter()
        .map(|e| (e.name.to_string(), e.start, e.end))
        .collect();
    data_out.baseline_d2 = t
        .fitted
        .holdout_d2
        .iter()
        .filter(|v| v.is_finite())
        .map(|v| f64::from(*v))
        .collect();
    if data_out.qq.is_empty() {
        data_out.qq = qq_points(&d2, &full.labels, t.fitted.features.len());
    }
    data_out.corr = model_correlation(t.model.as_ref());
    data_out.top_alarms = top_alarms(&full.rows, 8);
    data_out.diagonal = Some(report::DiagonalComparison {
        d2_diag: diag.d2(),
        threshold_diag: f64::from(diag_thr.alarm),
        alarm_diag: diag.alarm(),
        notes,
    });
    data_out.tables.push((
        "Injected faults and who caught them".into(),
        vec![
            "episode".into(),
            "what happens".into(),
            "length".into(),
            "full-covariance model".into(),
            "per-feature model".into(),
        ],
        rows,
    ));
    data_out
}

/// Options of `demo`.
#[derive(Debug, Clone, Args)]
pub struct DemoArgs {
    /// Folder for everything the demo writes.
    #[arg(long, short, default_value = "demo-out", value_name = "DIR")]
    pub out: PathBuf,
    /// Seed of the invented scenario.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Print less.
    #[arg(long, short)]
    pub quiet: bool,
}

/// Run `demo`.
pub fn run(a: &DemoArgs) -> Result<()> {
    run_demo(&a.out, a.seed, a.quiet)?;
    Ok(())
}
