//! `ellipsoid fit`: from a baseline file to a defended threshold and a flashable blob.

use std::path::PathBuf;

use anyhow::Result;
use clap::Args;
use ellipsoid_core::AlarmPolicy;

use crate::commands::common::CsvArgs;
use crate::data::card::ModelCard;
use crate::data::output::Outputs;
use crate::data::paths::Role;
use crate::fit::mixture::MixtureOptions;
use crate::fit::Shrinkage;
use crate::pipeline::bank::{BankSpec, ModeCount, DEFAULT_DRIFT_BOUND, DEFAULT_MAX_MODES};
use crate::pipeline::bank_out::{bank_summary_json, bank_summary_text, train_bank};
use crate::pipeline::fit_report::report_data;
use crate::pipeline::fleet::{fit_fleet, FleetSpec};
use crate::pipeline::limits::LimitSpec;
use crate::pipeline::summary::{summary_json, summary_text};
use crate::pipeline::train::{check_output_paths, stage_outputs, train, TrainSpec};
use crate::report;
use crate::stats::promise::SIM_SEED;
use crate::stats::threshold::Method;

/// Covariance estimator.
#[derive(Debug, Clone, Copy, PartialEq, clap::ValueEnum)]
pub enum ShrinkArg {
    /// The plain sample covariance.
    None,
    /// Ledoit–Wolf (2004) shrinkage towards a scaled identity.
    LedoitWolf,
    /// Add `--loading` times the mean variance to the diagonal.
    Diagonal,
}

/// Options of `fit`.
#[derive(Debug, Clone, Args)]
pub struct FitArgs {
    /// Baseline of healthy operation, one reading a row: a CSV, or a Parquet file (told by the
    /// `PAR1` magic number at both ends of the file, whatever its name).
    pub baseline: PathBuf,
    /// Where to write the model blob; its model card goes beside it (`.json`). With `--by`, an
    /// existing folder for every machine's blob and card and the fleet summary.
    #[arg(long, short, value_name = "FILE")]
    pub out: PathBuf,
    /// Fit one model per value of this column (the machine's id) from one long log: a blob and
    /// card per machine, `fleet.csv` and `fleet.html`, in the `--out` folder.
    #[arg(long, value_name = "COLUMN")]
    pub by: Option<String>,
    /// With `--by`: if any machine's fit fails, write nothing (by default the others are written,
    /// the failure is listed in the fleet summary, and the exit status is 3).
    #[arg(long, requires = "by")]
    pub stop_on_bad_machine: bool,
    #[command(flatten)]
    pub csv: CsvArgs,
    /// Take the natural log of this positive, right-skewed column first (repeatable).
    #[arg(long = "log", value_name = "COLUMN")]
    pub log_columns: Vec<String>,
    /// Covariance estimator.
    #[arg(long, value_enum, default_value = "none")]
    pub shrinkage: ShrinkArg,
    /// Diagonal loading, relative to the mean variance (with `--shrinkage diagonal`).
    #[arg(long, default_value_t = 0.01, value_name = "LAMBDA")]
    pub loading: f64,
    /// FAST-MCD robust fit for a baseline with some bad data; the rows it sets aside are reported.
    #[arg(long)]
    pub robust: bool,
    /// Hold out this fraction of the baseline, from its end (time order), to check the threshold.
    #[arg(long, default_value_t = 0.2, value_name = "FRACTION")]
    pub holdout: f64,
    /// How to choose the alarm threshold. `hotelling` (default): the finite-sample limit whose
    /// expected false-alarm rate is the target; `confidence`: the limit this baseline keeps with
    /// `--confidence`; `chi-square`: the known-parameter quantile; `empirical`: the hold-out's
    /// quantile; `f1`: the F1 optimum on `--validation`.
    #[arg(long, value_enum, default_value = "hotelling")]
    pub threshold: Method,
    /// Confidence of the "at most … a day" figure and of `--threshold confidence`.
    #[arg(long, default_value_t = 0.9, value_name = "LEVEL")]
    pub confidence: f64,
    /// Simulated baselines for the limits (default: 2000 for a plain fit, 400 with shrinkage,
    /// 20 with --robust).
    #[arg(long, value_name = "N")]
    pub simulations: Option<usize>,
    /// Seed of those simulations.
    #[arg(long, value_name = "SEED")]
    pub simulation_seed: Option<u64>,
    /// Treat consecutive readings as independent (no effective sample size from their lag-1
    /// autocorrelation).
    #[arg(long)]
    pub independent_rows: bool,
    /// Refuse a baseline too short for the false-alarm promise to hold within 2× with the stated
    /// confidence, instead of warning (for pipelines).
    #[arg(long)]
    pub strict_baseline: bool,
    /// Target false alarms a day, per reading (before the raise-after debounce).
    #[arg(
        long,
        default_value_t = 1.0,
        value_name = "COUNT",
        conflicts_with = "alpha"
    )]
    pub alarms_per_day: f64,
    /// Readings a second, for the per-day figures.
    #[arg(long, default_value_t = 1.0, value_name = "HZ")]
    pub rate_hz: f64,
    /// Target false-alarm probability per reading, instead of `--alarms-per-day`.
    #[arg(long, value_name = "P")]
    pub alpha: Option<f64>,
    /// Labelled CSV with faults, for `--threshold f1` (and reported with the others).
    #[arg(long, value_name = "FILE")]
    pub validation: Option<PathBuf>,
    /// Label column of the validation file (1 = anomaly).
    #[arg(long, default_value = "label", value_name = "NAME")]
    pub label_column: String,
    /// Raise after this many consecutive readings above the threshold.
    #[arg(long, default_value_t = 3, value_name = "K")]
    pub raise_after: u16,
    /// Clear after this many consecutive readings below the clear threshold.
    #[arg(long, default_value_t = 10, value_name = "M")]
    pub clear_after: u16,
    /// The clear threshold as a fraction of the alarm threshold (hysteresis).
    #[arg(long, default_value_t = 0.75, value_name = "FRACTION")]
    pub clear_fraction: f64,
    /// Latch the alarm: only an explicit reset on the device clears it.
    #[arg(long)]
    pub latch: bool,
    /// Model identifier stored in the blob (default: derived from the fitted statistics).
    #[arg(long, value_name = "ID")]
    pub model_id: Option<u32>,
    /// Sequence number: of two valid slots the device takes the higher.
    #[arg(long, default_value_t = 1, value_name = "N")]
    pub sequence: u32,
    /// Training time stored in the blob, Unix seconds (default: now).
    #[arg(long, value_name = "SECONDS")]
    pub trained_at: Option<u64>,
    /// Worker threads for the fit (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Also write an HTML report here.
    #[arg(long, value_name = "FILE")]
    pub report: Option<PathBuf>,
    /// Print the summary as JSON.
    #[arg(long)]
    pub json: bool,
    /// For a part without an FPU: quantise the model and write a fixed-point blob, scored with
    /// integer arithmetic (core/FORMAT.md). Refused if it would move a verdict on the baseline;
    /// the worst d² difference from the f32 model is printed. Not for log-transformed features.
    #[arg(long)]
    pub no_fpu: bool,
    /// Operating modes: a bank of this many Gaussians (1 to 8), the device scoring each reading
    /// against the nearest (in d² over each mode's alarm limit); `auto` chooses the count by BIC.
    /// The modes are found by EM (a Gaussian mixture) on the standardised baseline. `auto` skips
    /// a count whose modes could not be fitted one by one (a mode with fewer samples than its
    /// parameters, or a feature constant inside it) and says which and why; `K` is refused then.
    #[arg(long, default_value = "1", value_name = "K|auto")]
    pub modes: ModeCount,
    /// With `--modes auto`: the most modes tried.
    #[arg(long, default_value_t = DEFAULT_MAX_MODES, value_name = "K")]
    pub max_modes: usize,
    /// Known modes: this column holds the mode the device will be told with each reading (an
    /// integer 0 to 7, e.g. a speed setpoint); one Gaussian is fitted per value. Not a feature.
    #[arg(long, value_name = "COLUMN", conflicts_with = "modes")]
    pub mode_column: Option<String>,
    /// Score the mean of the last W readings (1 to 16); a window restarts after a reading that
    /// cannot be scored and at a change of mode, and scores nothing until it is full again.
    #[arg(long, default_value_t = 1, value_name = "W")]
    pub window: u8,
    /// Also score the first differences of the readings (x now − x before) beside the mean.
    #[arg(long)]
    pub differences: bool,
    /// Follow slow drift: the centre moves towards normal readings with this half-life, in
    /// readings (frozen while an alarm is raised or a reading faulted).
    #[arg(long, value_name = "READINGS")]
    pub drift_half_life: Option<f64>,
    /// With `--drift-half-life`: the most the centre may move, per scored value, in pooled
    /// within-mode standard deviations; reaching it is a `drift` event.
    #[arg(long, default_value_t = DEFAULT_DRIFT_BOUND, value_name = "SIGMA", requires = "drift_half_life")]
    pub drift_bound: f64,
}

impl FitArgs {
    /// The bank settings these arguments give.
    pub fn bank(&self) -> BankSpec {
        BankSpec {
            modes: self.modes,
            max_modes: self.max_modes,
            mode_column: self.mode_column.clone(),
            window: self.window,
            differences: self.differences,
            drift_half_life: self.drift_half_life,
            drift_bound: self.drift_bound,
            mixture: MixtureOptions::default(),
        }
    }

    /// The training settings these arguments give.
    pub fn spec(&self) -> TrainSpec {
        TrainSpec {
            no_fpu: self.no_fpu,
            baseline: self.baseline.clone(),
            csv: self.csv.options(None, false),
            log_columns: self.log_columns.clone(),
            shrinkage: match self.shrinkage {
                ShrinkArg::None => Shrinkage::None,
                ShrinkArg::LedoitWolf => Shrinkage::LedoitWolf,
                ShrinkArg::Diagonal => Shrinkage::Diagonal(self.loading),
            },
            robust: self.robust,
            holdout: self.holdout,
            threshold: self.threshold,
            alarms_per_day: self.alarms_per_day,
            rate_hz: self.rate_hz,
            alpha: self.alpha,
            validation: self.validation.clone(),
            label_column: self.label_column.clone(),
            policy: AlarmPolicy {
                raise_after: self.raise_after,
                clear_after: self.clear_after,
                latch: self.latch,
            },
            clear_fraction: self.clear_fraction,
            model_id: self.model_id,
            sequence: self.sequence,
            trained_at: self.trained_at,
            threads: self.threads,
            limits: LimitSpec {
                confidence: self.confidence,
                sims: self.simulations,
                seed: self.simulation_seed.unwrap_or(SIM_SEED),
                independent_rows: self.independent_rows,
            },
            strict_baseline: self.strict_baseline,
        }
    }
}

/// Run `fit`.
pub fn run(a: &FitArgs) -> Result<()> {
    let bank = a.bank();
    if let Some(by) = &a.by {
        anyhow::ensure!(
            bank.is_plain(),
            "--by cannot be combined with --modes, --mode-column, --window, --differences or \
             --drift-half-life yet: fit a bank per machine from its own baseline file"
        );
        return run_fleet(a, by);
    }
    let mut inputs = vec![Role::new("the baseline", &a.baseline)];
    if let Some(v) = &a.validation {
        inputs.push(Role::new("the --validation file", v));
    }
    check_output_paths(&a.out, a.report.as_deref(), &inputs)?;
    if !bank.is_plain() {
        return run_bank(a, &bank);
    }
    let t = train(&a.spec())?;
    // Blob, card and report are replaced together or not at all.
    let mut outputs = Outputs::new();
    stage_outputs(&t, &a.out, &mut outputs)?;
    if let Some(path) = &a.report {
        let html = report::render(&report_data(&t))?;
        outputs.stage_bytes(path, html.as_bytes())?;
    }
    outputs.commit()?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&summary_json(&t))?);
    } else {
        print!("{}", summary_text(&t));
        for w in t.quantised.iter().flatten() {
            println!(
                "Fixed point (--no-fpu): {}: {} rows, worst |d² fixed − d² f32| = {:.3e} (line {}); no verdict moved on the baseline.",
                w.rows, w.scored, w.worst, w.line
            );
        }
        println!(
            "Wrote {} and {}{}.",
            a.out.display(),
            ModelCard::path_for(&a.out).display(),
            a.report
                .as_ref()
                .map_or(String::new(), |r| format!(" and {}", r.display()))
        );
    }
    Ok(())
}

/// Run `fit` for a bank (blob version 2).
fn run_bank(a: &FitArgs, bank: &BankSpec) -> Result<()> {
    anyhow::ensure!(
        a.report.is_none(),
        "--report is not available for a bank yet (--modes, --mode-column, --window, \
         --differences, --drift-half-life); the summary lists every mode"
    );
    let t = train_bank(&a.spec(), bank)?;
    let mut outputs = Outputs::new();
    outputs.stage_bytes(&a.out, &t.blob)?;
    outputs.stage(&ModelCard::path_for(&a.out), |w| t.card.write_to(w))?;
    outputs.commit()?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&bank_summary_json(&t))?);
    } else {
        print!("{}", bank_summary_text(&t));
        println!(
            "Wrote {} and {}.",
            a.out.display(),
            ModelCard::path_for(&a.out).display()
        );
    }
    Ok(())
}

/// Run `fit --by`: one model per machine.
fn run_fleet(a: &FitArgs, by: &str) -> Result<()> {
    anyhow::ensure!(
        a.report.is_none(),
        "--report cannot be used with --by: the fleet overview is written as fleet.html in the --out folder"
    );
    let spec = FleetSpec {
        log: a.baseline.clone(),
        by: by.to_string(),
        out_dir: a.out.clone(),
        train: a.spec(),
        stop_on_bad_machine: a.stop_on_bad_machine,
        workers: None,
    };
    let run = fit_fleet(&spec)?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&run)?);
    } else {
        println!(
            "Fitted {} of {} machines from {} (by `{}`){}.",
            run.machines.len() - run.failed(),
            run.machines.len(),
            run.log,
            run.by,
            if run.rows_without_machine > 0 {
                format!(
                    "; {} rows without a machine id skipped",
                    run.rows_without_machine
                )
            } else {
                String::new()
            }
        );
        for m in run.machines.iter().filter(|m| m.error.is_some()) {
            println!(
                "  FAILED {}: {}",
                m.machine,
                m.error.as_deref().unwrap_or("")
            );
        }
        println!(
            "Wrote a blob and card per fitted machine, fleet.csv and fleet.html in {}.",
            a.out.display()
        );
    }
    match run.failed() {
        0 => Ok(()),
        n if n == run.machines.len() => anyhow::bail!(
            "none of the {n} machines could be fitted (fleet.csv lists why); no model was written"
        ),
        n => Err(super::common::Partial(format!(
            "{n} of {} machines could not be fitted (listed in fleet.csv); the others were written",
            run.machines.len()
        ))
        .into()),
    }
}
