//! `ellipsoid demo`: the whole job on an invented booster pump, end to end.
//!
//! Generate a healthy baseline and a later stretch with injected faults; fit; choose the threshold;
//! export the blob; replay and evaluate the later stretch through the core; set the full-covariance
//! model beside a per-feature (diagonal) model; fit banks on the same baseline (nearest modes by EM
//! and BIC, known modes told the duty point, a window, drift) and score the same stretch with each
//! through the core's tracker, side by side; write the report (with a panel per mode and the drift
//! of the centre); say what was found and where every file is.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use ellipsoid_core::{AlarmPolicy, Thresholds};

use crate::data::card::ModelCard;
use crate::data::ingest::CsvOptions;
use crate::data::output;
use crate::data::scenario::{self, Episode};
use crate::device::dims::AnyModel;
use crate::device::replay::{CsvSink, ReplayRow, Replayer};
use crate::fit::Shrinkage;
use crate::pipeline::bank::{BankSpec, ModeCount, DEFAULT_DRIFT_BOUND, DEFAULT_MAX_MODES};
use crate::pipeline::bank_out::{train_bank, BankTrained};
use crate::pipeline::evaluate::{
    diagonal_of, model_correlation, qq_points, score_labelled, score_stream_tracked, top_alarms,
    Scored, StreamSpec,
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
    /// The baseline with the controller's duty point beside the readings.
    pub baseline_duty: PathBuf,
    /// The later stretch with the duty point, labelled.
    pub readings_duty: PathBuf,
    /// The bank's blob (nearest mode, window, drift).
    pub bank_blob: PathBuf,
    /// Its model card.
    pub bank_card: PathBuf,
    /// The core's replay of the readings through the bank.
    pub bank_replay: PathBuf,
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
            baseline_duty: dir.join("baseline-duty.csv"),
            readings_duty: dir.join("readings-duty.csv"),
            bank_blob: dir.join("bank.blob"),
            bank_card: ModelCard::path_for(&dir.join("bank.blob")),
            bank_replay: dir.join("bank-replay.csv"),
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

/// The demo's reading window: 5 readings (5 s at 1 Hz). The mean of 5 readings has a fifth of
/// the sensor noise's variance, and a fault has to hold for 5 s to be seen fully: short against
/// every episode here, and against the policy's own 3-reading raise.
pub const DEMO_WINDOW: u8 = 5;

/// The demo's drift half-life: 3 600 readings (one hour at 1 Hz). The centre must not chase the
/// operating point: a zone valve holds an opening for up to 20 minutes, so the half-life is three
/// times the longest hold, and the two duty points are the bank's modes, not something drift
/// should learn. Over one half-life the greenhouse warming moves the bearing temperature by
/// under 3 °C, so the shift can keep up with it (with a lag of about the rate times 1.44 h).
pub const DEMO_DRIFT_HALF_LIFE: f64 = 3600.0;

/// One way of modelling the same baseline, scored on the same test stretch.
pub struct Variant {
    /// What it is, for the table.
    pub name: String,
    /// The test stretch through the core.
    pub scored: Scored,
    /// Its evaluation.
    pub eval: Evaluation,
    /// How each episode was caught.
    pub catches: Vec<Catch>,
    /// The bank, when it is one.
    pub bank: Option<BankTrained>,
    /// The drift shift over the stream: (reading, shift per scored feature in model units).
    pub shifts: Vec<(usize, Vec<f32>)>,
}

/// Readings between two samples of the drift shift kept for the report.
const SHIFT_EVERY: usize = 30;

/// Fit (a) one Gaussian (already done: `single`), (b) a bank of nearest modes found by EM with
/// BIC, (c) a known-mode bank told the duty point, (d) the nearest-mode bank with a window,
/// (e) the same with drift; score the test stretch with each through the core's tracker.
fn side_by_side(
    spec: &TrainSpec,
    files: &DemoFiles,
    data: &scenario::DemoData,
    single: Scored,
) -> Result<Vec<Variant>> {
    let eval = single.evaluate(scenario::RATE_HZ);
    let catches = data.episodes.iter().map(|e| catch(e, &single)).collect();
    let mut out = vec![Variant {
        name: "one Gaussian".into(),
        scored: single,
        eval,
        catches,
        bank: None,
        shifts: Vec::new(),
    }];
    let nearest = BankSpec {
        modes: ModeCount::Auto,
        max_modes: DEFAULT_MAX_MODES,
        ..BankSpec::default()
    };
    let known = BankSpec {
        mode_column: Some(scenario::DUTY_COLUMN.into()),
        ..BankSpec::default()
    };
    out.push(bank_variant(
        "bank, nearest mode (EM, BIC)".into(),
        spec,
        &nearest,
        (&files.baseline, &files.readings),
        data,
    )?);
    // The windowed banks keep the number of modes BIC chose on single readings. Searched again
    // on the windowed samples (`fit --modes auto --window 5`), every mode count is set aside and
    // even one mode cannot be fitted: the trainer's AR(1) effective sizes count the overlapping
    // means' lag-1 autocorrelation (near 1) as a slow process, and leave about 5 independent
    // rows for the covariance of 5 features. The fixed count fits, with very wide limits for two
    // modes; the table shows what that costs.
    let k = out[1].bank.as_ref().map_or(1, |b| b.fit.modes.len());
    let windowed = BankSpec {
        modes: ModeCount::Fixed(k),
        window: DEMO_WINDOW,
        ..BankSpec::default()
    };
    out.push(bank_variant(
        format!("bank, known mode ({})", scenario::DUTY_COLUMN),
        spec,
        &known,
        (&files.baseline_duty, &files.readings_duty),
        data,
    )?);
    out.push(bank_variant(
        format!("bank ({k} modes) + window {DEMO_WINDOW}"),
        spec,
        &windowed,
        (&files.baseline, &files.readings),
        data,
    )?);
    out.push(bank_variant(
        format!("bank ({k} modes) + window {DEMO_WINDOW} + drift"),
        spec,
        &BankSpec {
            drift_half_life: Some(DEMO_DRIFT_HALF_LIFE),
            drift_bound: DEFAULT_DRIFT_BOUND,
            ..windowed
        },
        (&files.baseline, &files.readings),
        data,
    )?);
    Ok(out)
}

/// Fit a bank on `files.0` with the demo's single-model settings and score `files.1` with it
/// through the core's tracker, keeping the drift shift.
fn bank_variant(
    name: String,
    spec: &TrainSpec,
    bank_spec: &BankSpec,
    files: (&PathBuf, &PathBuf),
    data: &scenario::DemoData,
) -> Result<Variant> {
    let mut a = spec.clone();
    a.baseline = files.0.clone();
    let bank = train_bank(&a, bank_spec).with_context(|| format!("fitting the {name}"))?;
    let rp = Replayer::from_blob(&bank.blob)
        .map_err(|e| anyhow::anyhow!("the {name}'s blob does not decode: {e}"))?;
    let stream = StreamSpec {
        features: bank.fit.features.clone(),
        mode_column: bank_spec.mode_column.clone(),
        label_column: Some("label".into()),
        timestamp: None,
        delimiter: None,
        quiet: true,
    };
    let (scored, shifts) = score_stream_tracked(rp, files.1, &stream, SHIFT_EVERY)?;
    let eval = scored.evaluate(scenario::RATE_HZ);
    let catches = data.episodes.iter().map(|e| catch(e, &scored)).collect();
    let shifts = if bank.fit.drift.is_some() {
        shifts
    } else {
        Vec::new()
    };
    Ok(Variant {
        name,
        scored,
        eval,
        catches,
        bank: Some(bank),
        shifts,
    })
}

/// A short cell for the side-by-side table: `64 s`, `F 0 s` (the fault line: could not score),
/// or `missed`.
fn short(c: &Catch) -> String {
    match c.delay {
        None => "missed".into(),
        Some(d) if c.by_fault => format!("F {d} s"),
        Some(d) => format!("{d} s"),
    }
}

/// The drift of a variant with drift: the shift of each scored feature in pooled within-mode
/// standard deviations at reading `at` (the last sample at or before it).
pub fn shift_sigma_at(v: &Variant, at: usize) -> Option<Vec<f64>> {
    let drift = v.bank.as_ref()?.fit.drift.as_ref()?;
    let (_, s) = v.shifts.iter().rev().find(|(i, _)| *i <= at)?;
    Some(
        s.iter()
            .zip(&drift.sd)
            .map(|(x, sd)| f64::from(*x) / sd)
            .collect(),
    )
}

/// Rises of a line (off before, or the first reading) at readings labelled normal.
fn rises_in_normal(s: &Scored, line: fn(&ReplayRow) -> bool) -> u64 {
    let mut before = false;
    let mut n = 0;
    for (r, normal) in s.rows.iter().zip(s.labels.iter().map(|l| !l)) {
        let on = line(r);
        n += u64::from(on && !before && normal);
        before = on;
    }
    n
}

/// The side-by-side table and what the drift did, as text.
fn side_by_side_text(data: &scenario::DemoData, variants: &[Variant]) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "\nSide by side: the same baseline, the same test stretch. FA/day: rises of the alarm line in its normal \
         rows, a day; fault/d: rises of the fault line there (the device could not score: a window filling at the \
         stream's start is one); precision, recall and F1 per reading (a fault counts as flagged); seconds from each \
         episode's start to the first alarm or fault line (F):"
    );
    let w = variants.iter().map(|v| v.name.len()).max().unwrap_or(10);
    let short_names = ["clog", "stuck", "dry", "dropout", "bearing"];
    let mut head = format!(
        "  {:<w$}  {:>6}  {:>7}  {:>5}  {:>5}  {:>5}",
        "variant", "FA/day", "fault/d", "prec", "rec", "F1"
    );
    for (k, _) in data.episodes.iter().enumerate() {
        let _ = write!(
            head,
            "  {:>8}",
            short_names.get(k).copied().unwrap_or("episode")
        );
    }
    let _ = writeln!(s, "{head}");
    for v in variants {
        let c = &v.eval.per_reading.confusion;
        let days = v.eval.normal_readings as f64 / scenario::RATE_HZ / 86_400.0;
        let per_day = |line: fn(&ReplayRow) -> bool| rises_in_normal(&v.scored, line) as f64 / days;
        let mut line = format!(
            "  {:<w$}  {:>6.2}  {:>7.2}  {:>5}  {:>5}  {:>5}",
            v.name,
            per_day(|r| r.alarm),
            per_day(|r| r.fault),
            fmt2(c.precision()),
            fmt2(c.recall()),
            fmt2(c.f1())
        );
        for c in &v.catches {
            let _ = write!(line, "  {:>8}", short(c));
        }
        let _ = writeln!(s, "{line}");
    }
    for v in variants {
        if let Some(b) = &v.bank {
            let modes: Vec<String> = b
                .fit
                .modes
                .iter()
                .enumerate()
                .map(|(k, m)| {
                    format!(
                        "mode {k}: {:.0} % of the baseline, alarm d² > {:.2}",
                        100.0 * m.weight,
                        m.trained.thresholds.alarm
                    )
                })
                .collect();
            let _ = writeln!(s, "  {}: {}", v.name, modes.join("; "));
        }
    }
    if let Some(v) = variants.iter().find(|v| !v.shifts.is_empty()) {
        let b = v.bank.as_ref().expect("a variant with shifts is a bank");
        let d = b
            .fit
            .drift
            .as_ref()
            .expect("a variant with shifts has drift");
        let seen = v.scored.drift();
        let temp = b.fit.scored.iter().position(|f| f == "bearing_temp_c");
        let before_wear = data
            .episodes
            .iter()
            .find(|e| e.name == "wearing bearing")
            .map_or(data.test.len(), |e| e.start)
            .saturating_sub(1);
        let at = |i: usize| {
            shift_sigma_at(v, i)
                .and_then(|sh| temp.map(|t| sh[t]))
                .map_or("n/a".into(), |x| format!("{x:+.2}"))
        };
        let _ = writeln!(
            s,
            "Drift ({}): half-life {} readings, bound {} σ. Bearing temperature shift: {} σ at the warming's start, \
             {} σ just before the bearing wears, {} σ at the end.",
            v.name,
            d.half_life,
            d.bound_sigma,
            at(scenario::WARMING_START),
            at(before_wear),
            at(data.test.len() - 1)
        );
        let event = match seen.first_at_bound {
            Some(i) => {
                let which = shift_sigma_at(v, i + SHIFT_EVERY)
                    .map(|sh| {
                        sh.iter()
                            .enumerate()
                            .filter(|(_, x)| x.abs() >= d.bound_sigma * 0.999)
                            .map(|(k, _)| b.fit.scored[k].clone())
                            .collect::<Vec<_>>()
                            .join(", ")
                    })
                    .unwrap_or_default();
                format!(
                    "the shift reached its bound at reading {i} ({}){}; {} drift event(s)",
                    crate::report::clock_of(i, scenario::RATE_HZ),
                    if which.is_empty() {
                        String::new()
                    } else {
                        format!(" on {which}")
                    },
                    seen.events
                )
            }
            None => format!(
                "the shift stayed inside its bound; {} drift event(s)",
                seen.events
            ),
        };
        let _ = writeln!(s, "  {event}.");
    }
    s
}

fn fmt2(v: Option<f64>) -> String {
    v.map_or("n/a".into(), |x| format!("{x:.2}"))
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
    // The same rows with the controller's duty point, for the known-mode bank. The plain files
    // keep the five channels only, so that `fit baseline.csv` takes every column as a feature.
    output::write_atomic(&files.baseline_duty, |w| {
        scenario::write_csv(
            w,
            &data.baseline,
            Some(&data.baseline_duty),
            None,
            DEMO_START_UNIX,
        )
    })?;
    output::write_atomic(&files.readings_duty, |w| {
        scenario::write_csv(
            w,
            &data.test,
            Some(&data.test_duty),
            Some(&data.labels),
            test_start,
        )
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

    let variants = side_by_side(&spec, &files, &data, full)?;
    let drift_bank = variants
        .iter()
        .find_map(|v| {
            v.bank
                .as_ref()
                .filter(|b| b.fit.drift.is_some())
                .map(|b| (v, b))
        })
        .context("the side-by-side has no bank with drift")?;
    {
        let (v, bank) = drift_bank;
        let mut outputs = output::Outputs::new();
        outputs.stage_bytes(&files.bank_blob, &bank.blob)?;
        outputs.stage(&files.bank_card, |w| bank.card.write_to(w))?;
        outputs.commit()?;
        let rp = Replayer::from_blob(&bank.blob)
            .map_err(|e| anyhow::anyhow!("the bank's blob does not decode: {e}"))?;
        let names = bank.fit.scored.clone();
        output::write_atomic(&files.bank_replay, |w| {
            let mut sink = CsvSink::for_replayer(w, &names, &rp)?;
            for r in &v.scored.rows {
                sink.row(r)?;
            }
            sink.finish()?;
            Ok(())
        })?;
    }
    let full = &variants[0].scored;

    let html = report::render(&demo_report(
        &trained,
        &data,
        full,
        &diag,
        &diagonal.0,
        &catches,
        &variants,
    ))?;
    output::write_bytes(&files.report, html.as_bytes())?;

    let s = demo_summary(
        seed, &data, &trained, &features, full, &catches, &eval, &eval_diag, &files, &variants,
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
    variants: &[Variant],
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
    s.push_str(&side_by_side_text(data, variants));
    let _ = writeln!(s, "\nFiles:");
    for (what, p) in [
        ("baseline CSV", &files.baseline),
        ("readings with faults (labelled)", &files.readings),
        ("baseline with duty_point", &files.baseline_duty),
        ("readings with duty_point", &files.readings_duty),
        ("firmware-ready model blob", &files.blob),
        ("model card (feature names)", &files.card),
        ("replay through the core", &files.replay),
        ("bank blob (window, drift)", &files.bank_blob),
        ("bank model card", &files.bank_card),
        ("bank replay through the core", &files.bank_replay),
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
    variants: &[Variant],
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
    if let Some(v) = variants.iter().rev().find(|v| v.bank.is_some()) {
        let b = v.bank.as_ref().expect("found a bank");
        let panels = b
            .fit
            .modes
            .iter()
            .enumerate()
            .map(|(k, m)| {
                let p = m.trained.model.params();
                report::modes::ModePanel {
                    mode: k,
                    share: m.weight,
                    alarm: f64::from(m.trained.thresholds.alarm),
                    centre: b
                        .fit
                        .scored
                        .iter()
                        .enumerate()
                        .map(|(i, f)| {
                            (
                                f.clone(),
                                f64::from(p.offset[i])
                                    + f64::from(p.mean[i]) / f64::from(p.scale[i]),
                            )
                        })
                        .collect(),
                    d2: v
                        .scored
                        .rows
                        .iter()
                        .enumerate()
                        .filter(|(_, r)| r.mode == Some(k as u8))
                        .filter_map(|(i, r)| Some((i, r.d2()?)))
                        .collect(),
                    stream_len: v.scored.rows.len(),
                }
            })
            .collect();
        data_out.bank = Some((v.name.clone(), panels));
        if let Some(d) = &b.fit.drift {
            data_out.drift = Some(report::modes::DriftPlot {
                features: b.fit.scored.clone(),
                shifts: v
                    .shifts
                    .iter()
                    .map(|(i, s)| {
                        (
                            *i,
                            s.iter()
                                .zip(&d.sd)
                                .map(|(x, sd)| f64::from(*x) / sd)
                                .collect(),
                        )
                    })
                    .collect(),
                bound: d.bound_sigma,
                events: v
                    .scored
                    .rows
                    .iter()
                    .enumerate()
                    .filter(|(_, r)| {
                        r.events
                            .iter()
                            .any(|e| matches!(e, ellipsoid_core::EventKind::Drift { .. }))
                    })
                    .map(|(i, _)| i)
                    .collect(),
                stream_len: v.scored.rows.len(),
            });
        }
    }
    let short_names = ["clog", "stuck", "dry", "dropout", "bearing"];
    let mut header: Vec<String> = ["variant", "false alarms a day", "precision", "recall", "F1"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    header.extend(
        (0..data.episodes.len())
            .map(|k| short_names.get(k).copied().unwrap_or("episode").to_string()),
    );
    data_out.tables.push((
        "Side by side: one Gaussian, banks, window and drift on the same readings".into(),
        header,
        variants
            .iter()
            .map(|v| {
                let c = &v.eval.per_reading.confusion;
                let mut row = vec![
                    v.name.clone(),
                    format!("{:.2}", v.eval.after_policy.false_alarms_per_day),
                    fmt2(c.precision()),
                    fmt2(c.recall()),
                    fmt2(c.f1()),
                ];
                row.extend(v.catches.iter().map(describe));
                row
            })
            .collect(),
    ));
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
