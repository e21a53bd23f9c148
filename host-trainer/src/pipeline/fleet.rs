//! One model per machine from one long log: `fit --by COLUMN`.
//!
//! # How it works
//!
//! 1. **One pass over the log** ([`crate::data::ingest::split_by`]): every row goes, without the
//!    machine column, to its machine's CSV part in a private folder inside the output folder.
//!    Memory is one write buffer per machine (32 KiB) and, for Parquet, one row group.
//! 2. **Names**: each machine id becomes a file name by [`safe_name`]; ids whose names collide
//!    (compared without case, for case-insensitive file systems) stop the run before any fit.
//! 3. **One fit per machine**, machines taken by a pool of threads (one per core), each fitted by
//!    [`train`] from its part exactly as `ellipsoid fit PART` would: every limit and check of a
//!    single fit (hold-out tail, gross outliers, robust fit, Ledoit–Wolf, the simulated limits,
//!    `--strict-baseline`) applies per machine, and the blob is byte for byte the plain fit's of
//!    that machine's rows. Each fit's memory is a single fit's (the moments, a 10 000-row sample,
//!    the hold-out's d²; the rows themselves only with `--robust` or Ledoit–Wolf), and it is
//!    freed once its blob and card are staged, so the run holds at most one fit per thread and
//!    a summary line per machine: memory grows with machines × moments, not with rows.
//! 4. **Outputs**: a blob and a card per machine, `fleet.csv` and `fleet.html`, staged and put in
//!    place together or not at all ([`crate::data::output`]). A machine whose fit fails is listed
//!    with its error and the others go on, unless `stop_on_bad_machine` asks that any failure
//!    write nothing.
//!
//! The parts cost disk space about the size of the log as text; they are removed at the end.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::Mutex;

use anyhow::{bail, Context, Result};
use serde::Serialize;

use crate::data::ingest::{split_by, Part, SplitLog};
use crate::data::output::Outputs;
use crate::data::paths::{refuse_clashes, Role};
use crate::pipeline::train::{stage_outputs, train, TrainSpec};
use crate::report::fleet::{render_fleet, FleetLine};

/// What `fit --by` does.
#[derive(Clone, Debug)]
pub struct FleetSpec {
    /// The log of every machine (CSV or Parquet).
    pub log: PathBuf,
    /// The column that names the machine.
    pub by: String,
    /// The folder the blobs, cards and fleet summary go into (must exist).
    pub out_dir: PathBuf,
    /// The settings of each machine's fit (`baseline` is replaced by the machine's part).
    pub train: TrainSpec,
    /// Write nothing if any machine's fit fails.
    pub stop_on_bad_machine: bool,
    /// Machines fitted at once (default: one per core).
    pub workers: Option<usize>,
}

/// One machine's line of the fleet summary.
#[derive(Clone, Debug, Serialize)]
pub struct MachineLine {
    /// The machine id, as in the log.
    pub machine: String,
    /// The blob's file name in the output folder (the card is the same with `.json`); `None` when
    /// the fit failed and no blob was written.
    pub blob: Option<String>,
    /// Rows of this machine in the log.
    pub rows: u64,
    /// Rows fitted (the rest is the held-out tail, or skipped).
    pub rows_fitted: u64,
    /// The alarm threshold on d², if the fit succeeded.
    pub threshold: Option<f32>,
    /// False alarms a day in the held-out tail, replayed through the alarm state machine.
    pub holdout_alarms_per_day: Option<f64>,
    /// The 95 % upper bound on that rate.
    pub holdout_alarms_per_day_upper95: Option<f64>,
    /// What the fit warned about.
    pub warnings: Vec<String>,
    /// Why the fit failed, if it did.
    pub error: Option<String>,
}

/// What a fleet fit did.
#[derive(Clone, Debug, Serialize)]
pub struct FleetRun {
    /// The log.
    pub log: String,
    /// The machine column.
    pub by: String,
    /// Every machine, in the order of its first row in the log.
    pub machines: Vec<MachineLine>,
    /// Rows of the log with no machine id, skipped under `--skip-bad-rows`.
    pub rows_without_machine: u64,
    /// Why the first few were skipped.
    pub skipped_reasons: Vec<String>,
}

impl FleetRun {
    /// Machines whose fit failed.
    pub fn failed(&self) -> usize {
        self.machines.iter().filter(|m| m.error.is_some()).count()
    }
}

/// Longest file name stem made from a machine id (longer ids are cut and get a hash suffix).
pub const MAX_STEM: usize = 96;

/// A file name stem for a machine id: ASCII letters, digits, `-` and `_` are kept, every other
/// character (a `.`, a space, `/`, `\\`, a non-ASCII letter) becomes `_`, so that no name is
/// hidden, climbs out of the folder or depends on the file system's encoding; an empty id is
/// `_`; an id longer than [`MAX_STEM`] is cut to `MAX_STEM − 9` characters followed by `-` and
/// 8 hex digits of the CRC-32 of the whole id. The rule is not one-to-one: ids whose names
/// collide (without case) are refused by the caller.
pub fn safe_name(id: &str) -> String {
    let mut s: String = id
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '_'
            }
        })
        .collect();
    if s.is_empty() {
        s.push('_');
    }
    if s.len() > MAX_STEM {
        let crc = ellipsoid_core::blob::checksum(id.as_bytes());
        s.truncate(MAX_STEM - 9);
        s.push_str(&format!("-{crc:08x}"));
    }
    s
}

/// Names the fleet files take in the output folder besides the machines'.
const SUMMARY_CSV: &str = "fleet.csv";
const OVERVIEW_HTML: &str = "fleet.html";

/// Refuse machine ids whose file names collide (without case), or take a summary's name.
fn names_for(parts: &[Part]) -> Result<Vec<String>> {
    let mut seen: HashMap<String, &str> = HashMap::new();
    let mut out = Vec::with_capacity(parts.len());
    for p in parts {
        let stem = safe_name(&p.id);
        let key = stem.to_ascii_lowercase();
        if let Some(other) = seen.get(&key) {
            bail!(
                "machines `{other}` and `{}` would both be written as {stem}.blob (a machine id keeps \
                 ASCII letters, digits, - and _, every other character becomes _, and names are \
                 compared without case); rename one of them in the log",
                p.id
            );
        }
        seen.insert(key, &p.id);
        out.push(stem);
    }
    Ok(out)
}

/// Put the log's name and line (or row) for the part's in a message.
fn reword(message: &str, part: &Part, split: &SplitLog) -> String {
    let copy = part.path.display().to_string();
    let mut out = String::with_capacity(message.len());
    let mut rest = message;
    while let Some(at) = rest.find(&copy) {
        out.push_str(&rest[..at]);
        out.push_str(&split.file);
        rest = &rest[at + copy.len()..];
        if let Some(tail) = rest.strip_prefix(':') {
            let digits = tail.bytes().take_while(u8::is_ascii_digit).count();
            if digits > 0 && tail[digits..].starts_with(':') {
                let line: u64 = tail[..digits].parse().unwrap_or(0);
                match part.log_line(line) {
                    Some(l) if split.parquet => out.push_str(&format!(": row {l}:")),
                    Some(l) => out.push_str(&format!(":{l}:")),
                    None => out.push(':'),
                }
                rest = &tail[digits + 1..];
            }
        }
    }
    out.push_str(rest);
    out.replace(
        "`` is not a number (the cell is empty)",
        "the cell is empty",
    )
}

/// Fit one model per machine and write them with the fleet summary (see the module docs).
/// Returns the summary; an error means nothing was written.
pub fn fit_fleet(spec: &FleetSpec) -> Result<FleetRun> {
    let dir = &spec.out_dir;
    anyhow::ensure!(
        dir.is_dir(),
        "the output folder {} does not exist (with --by, --out names a folder; create it first)",
        dir.display()
    );
    anyhow::ensure!(
        spec.train.validation.is_none(),
        "--validation cannot be used with --by: one labelled file cannot check every machine"
    );
    let parts_dir = tempfile::Builder::new()
        .prefix(".fleet-parts-")
        .tempdir_in(dir)
        .with_context(|| format!("cannot make a working folder in {}", dir.display()))?;
    let split = split_by(&spec.log, &spec.by, &spec.train.csv, parts_dir.path())?;
    anyhow::ensure!(
        !split.parts.is_empty(),
        "{}: no rows with a machine id in column `{}`",
        split.file,
        spec.by
    );
    let stems = names_for(&split.parts)?;
    let mut outputs_roles: Vec<PathBuf> = Vec::new();
    for s in &stems {
        outputs_roles.push(dir.join(format!("{s}.blob")));
        outputs_roles.push(dir.join(format!("{s}.json")));
    }
    outputs_roles.push(dir.join(SUMMARY_CSV));
    outputs_roles.push(dir.join(OVERVIEW_HTML));
    let outs: Vec<Role<'_>> = outputs_roles
        .iter()
        .map(|p| Role::new("a fleet output", p))
        .collect();
    refuse_clashes(&[Role::new("the log", &spec.log)], &outs)?;

    let mut csv = spec.train.csv.clone();
    csv.delimiter = Some(split.delimiter);
    if let Some(features) = &split.features {
        csv.columns = Some(features.clone());
        csv.timestamp = None;
        csv.label = None;
    }
    csv.quiet = true;

    let outputs = Mutex::new(Outputs::new());
    let lines: Vec<Mutex<Option<MachineLine>>> =
        split.parts.iter().map(|_| Mutex::new(None)).collect();
    let next = AtomicUsize::new(0);
    let stop = AtomicBool::new(false);
    let workers = spec
        .workers
        .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()))
        .clamp(1, split.parts.len());
    let stage_error: Mutex<Option<anyhow::Error>> = Mutex::new(None);
    std::thread::scope(|s| {
        for _ in 0..workers {
            s.spawn(|| loop {
                if stop.load(Ordering::Relaxed) {
                    break;
                }
                let k = next.fetch_add(1, Ordering::Relaxed);
                let Some(part) = split.parts.get(k) else {
                    break;
                };
                let blob = dir.join(format!("{}.blob", stems[k]));
                let mut one = spec.train.clone();
                one.baseline = part.path.clone();
                one.csv = csv.clone();
                let mut line = MachineLine {
                    machine: part.id.clone(),
                    blob: None,
                    rows: part.rows,
                    rows_fitted: 0,
                    threshold: None,
                    holdout_alarms_per_day: None,
                    holdout_alarms_per_day_upper95: None,
                    warnings: Vec::new(),
                    error: None,
                };
                match train(&one) {
                    Ok(mut t) => {
                        t.card.trained_on = format!("{} ({} = {})", split.file, spec.by, part.id);
                        t.baseline = t.card.trained_on.clone();
                        line.blob = Some(format!("{}.blob", stems[k]));
                        line.rows_fitted = t.fitted.rows_used;
                        line.threshold = Some(t.thresholds.alarm);
                        line.holdout_alarms_per_day =
                            t.holdout.as_ref().map(|h| h.false_alarms_per_day);
                        line.holdout_alarms_per_day_upper95 =
                            t.holdout.as_ref().map(|h| h.false_alarms_per_day_upper95);
                        line.warnings = t
                            .fitted
                            .warnings
                            .iter()
                            .map(|w| reword(w, part, &split))
                            .collect();
                        let staged = {
                            let mut o = outputs.lock().expect("outputs lock");
                            stage_outputs(&t, &blob, &mut o)
                        };
                        if let Err(e) = staged {
                            *stage_error.lock().expect("error lock") = Some(e);
                            stop.store(true, Ordering::Relaxed);
                        }
                    }
                    Err(e) => {
                        line.error = Some(reword(&format!("{e:#}"), part, &split));
                        if spec.stop_on_bad_machine {
                            stop.store(true, Ordering::Relaxed);
                        }
                    }
                }
                *lines[k].lock().expect("line lock") = Some(line);
            });
        }
    });
    if let Some(e) = stage_error.into_inner().expect("error lock") {
        return Err(e);
    }
    let machines: Vec<MachineLine> = lines
        .into_iter()
        .filter_map(|l| l.into_inner().expect("line lock"))
        .collect();
    let run = FleetRun {
        log: split.file.clone(),
        by: spec.by.clone(),
        rows_without_machine: split.skipped,
        skipped_reasons: split.reasons.clone(),
        machines,
    };
    if spec.stop_on_bad_machine {
        if let Some(bad) = run.machines.iter().find(|m| m.error.is_some()) {
            bail!(
                "machine `{}`: {}\nnothing was written (--stop-on-bad-machine)",
                bad.machine,
                bad.error.as_deref().unwrap_or("")
            );
        }
    }
    let mut run = run;
    set_aside_stale(&mut run, dir, &stems);
    let mut outputs = outputs.into_inner().expect("outputs lock");
    outputs.stage(&dir.join(SUMMARY_CSV), |w| summary_csv(&run, w))?;
    let html = render_fleet(
        &format!("Fleet fit of {} by {}", run.log, run.by),
        &overview_lines(&run),
    );
    outputs.stage_bytes(&dir.join(OVERVIEW_HTML), html.as_bytes())?;
    drop(parts_dir);
    outputs.commit()?;
    Ok(run)
}

/// A machine that failed in this run may have a blob and card from an earlier run in the folder:
/// rename them to `….previous`, so that nothing that takes `*.blob` from the folder ships a model
/// this run did not make, and say so in the machine's warnings.
fn set_aside_stale(run: &mut FleetRun, dir: &Path, stems: &[String]) {
    for (m, stem) in run.machines.iter_mut().zip(stems) {
        if m.blob.is_some() {
            continue;
        }
        for ext in ["blob", "json"] {
            let old = dir.join(format!("{stem}.{ext}"));
            if !old.exists() {
                continue;
            }
            let aside = dir.join(format!("{stem}.{ext}.previous"));
            match std::fs::rename(&old, &aside) {
                Ok(()) => m.warnings.push(format!(
                    "{} from an earlier run renamed to {}: this run made no model for the machine",
                    old.display(),
                    aside.display()
                )),
                Err(e) => m.warnings.push(format!(
                    "{} from an earlier run could not be renamed ({e}): it is NOT this run's model",
                    old.display()
                )),
            }
        }
    }
}

fn overview_lines(run: &FleetRun) -> Vec<FleetLine> {
    run.machines
        .iter()
        .map(|m| FleetLine {
            machine: m.machine.clone(),
            blob: m.blob.clone().unwrap_or_default(),
            rows: m.rows,
            rows_fitted: m.rows_fitted,
            threshold: m.threshold.map(f64::from),
            alarms_per_day: m.holdout_alarms_per_day,
            alarms_upper95: m.holdout_alarms_per_day_upper95,
            warnings: m.warnings.clone(),
            error: m.error.clone(),
        })
        .collect()
}

/// The fleet summary as CSV: one line a machine, in log order.
pub fn summary_csv(run: &FleetRun, w: &mut dyn std::io::Write) -> Result<()> {
    let mut c = csv::Writer::from_writer(w);
    c.write_record([
        "machine",
        "blob",
        "rows",
        "rows_fitted",
        "threshold",
        "holdout_alarms_per_day",
        "holdout_alarms_per_day_upper95",
        "warnings",
        "error",
    ])?;
    let opt = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x}"));
    for m in &run.machines {
        c.write_record([
            m.machine.clone(),
            m.blob.clone().unwrap_or_default(),
            m.rows.to_string(),
            m.rows_fitted.to_string(),
            m.threshold.map_or(String::new(), |t| t.to_string()),
            opt(m.holdout_alarms_per_day),
            opt(m.holdout_alarms_per_day_upper95),
            m.warnings.join(" | "),
            m.error.clone().unwrap_or_default(),
        ])?;
    }
    c.flush()?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn machine_ids_become_safe_file_names() {
        assert_eq!(safe_name("pump-07_B"), "pump-07_B");
        assert_eq!(safe_name("site 3/pump.2"), "site_3_pump_2");
        assert_eq!(safe_name("../etc"), "___etc");
        assert_eq!(safe_name("Pumpe Nr. ü"), "Pumpe_Nr___");
        assert_eq!(safe_name(""), "_");
        let long = "x".repeat(200);
        let s = safe_name(&long);
        assert_eq!(s.len(), MAX_STEM);
        assert_ne!(
            s,
            safe_name(&"x".repeat(201)),
            "the hash tells long ids apart"
        );
    }
}
