//! Reading the training part of the file: byte ranges on line boundaries, a thread each, each into
//! its own moments and sample, merged in file order with absolute line numbers.

use std::io;
use std::path::Path;
use std::sync::atomic::{AtomicUsize, Ordering};

use anyhow::Result;

use super::outliers::{short, Extremes, Gate};
use super::sample::Sample;
use super::{FitOptions, Shrinkage, BLOCK_ROWS};
use crate::data::ingest::{self, CsvOptions, IngestError, Layout, Reader};
use crate::stats::autocorr::{Lag1, Lag1Set};
use crate::stats::moments::Moments;

/// Where the training part ends and the held-out tail starts.
pub(super) struct Split {
    /// Byte offset where the training part ends.
    pub(super) train_end: u64,
    /// Byte offset and file line of the first held-out row, if any is held out.
    pub(super) holdout_at: Option<(u64, u64)>,
}

/// Set the last `opts.holdout` share of the data lines aside, in time order.
pub(super) fn split_holdout(path: &Path, layout: &Layout, holdout: f64) -> Result<Split> {
    let io = |e: io::Error| anyhow::Error::new(e).context(format!("while reading {}", layout.file));
    if holdout > 0.0 {
        let lines = ingest::count_lines(path, layout.data_start, layout.file_len).map_err(io)?;
        let mut hold = (holdout * lines as f64).round() as u64;
        hold = hold.max(1).min(lines);
        let train_lines = lines - hold;
        let at = ingest::nth_line_start(path, layout.data_start, train_lines).map_err(io)?;
        Ok(Split {
            train_end: at,
            holdout_at: Some((at, 2 + train_lines)),
        })
    } else {
        Ok(Split {
            train_end: layout.file_len,
            holdout_at: None,
        })
    }
}

/// Everything the reader threads gathered from the training part, merged.
pub(super) struct Gathered {
    /// Moments of the (log-transformed) training rows.
    pub(super) moments: Moments,
    /// The diagnostics sample (raw values).
    pub(super) sample: Sample,
    /// The smallest and largest (log-transformed) value of each feature.
    pub(super) extremes: Extremes,
    /// Every (log-transformed) training row, when the estimator needs them.
    pub(super) rows: Vec<f64>,
    /// The file line of each row in `rows`.
    pub(super) lines: Vec<u64>,
    /// Rows skipped under `skip_bad_rows`.
    pub(super) skipped: u64,
    /// Why the first few were skipped.
    pub(super) reasons: Vec<String>,
    /// Lag-1 co-moments of consecutive rows, one part a reader thread.
    pub(super) lag: Lag1Set,
}

/// Read the training part `[data_start, train_end)` on `opts.threads` threads. The first error in
/// file order stops the fit. With a `gate`, rows with a gross outlier are bad rows: a second
/// pass, which skips them under `skip_bad_rows` and otherwise stops at the first one.
pub(super) fn read_training(
    path: &Path,
    layout: &Layout,
    opts: &FitOptions,
    log_mask: u32,
    train_end: u64,
    gate: Option<&Gate>,
) -> Result<Gathered> {
    let io = |e: io::Error| anyhow::Error::new(e).context(format!("while reading {}", layout.file));
    let p = layout.features.len();
    let threads = match opts.threads {
        0 if train_end - layout.data_start < 1 << 20 => 1,
        0 => std::thread::available_parallelism().map_or(1, |n| n.get()),
        t => t,
    };
    let bounds = ingest::split_ranges(path, layout.data_start, train_end, threads).map_err(io)?;
    let keep_rows = opts.robust || opts.shrinkage == Shrinkage::LedoitWolf;
    let progress = ingest::progress_bar(train_end - layout.data_start, opts.csv.quiet);

    let first_error = AtomicUsize::new(usize::MAX);
    let outs: Vec<WorkerOut> = std::thread::scope(|s| {
        let handles: Vec<_> = bounds
            .windows(2)
            .enumerate()
            .map(|(k, b)| {
                let (start, end) = (b[0], b[1]);
                let first_error = &first_error;
                let progress = progress.clone();
                s.spawn(move || {
                    let job = Job {
                        path,
                        layout,
                        csv: &opts.csv,
                        log_mask,
                        keep_rows,
                        gate,
                        index: k,
                        first_error,
                    };
                    job.run(start, end, progress)
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("a reader thread panicked"))
            .collect()
    });

    // Put absolute line numbers on everything, stop at the first error in file order.
    let mut g = Gathered {
        moments: Moments::new(p),
        sample: Sample::new(p),
        extremes: Extremes::new(p),
        rows: Vec::new(),
        lines: Vec::new(),
        skipped: 0,
        reasons: Vec::new(),
        lag: Lag1Set::default(),
    };
    let mut base = 2u64; // the first data line
    for mut out in outs {
        let shift = base - 1;
        if let Some(mut e) = out.error.take() {
            e.shift_line(shift);
            return Err(e.into());
        }
        g.moments.merge(&out.moments);
        g.lag.add(out.lag);
        g.sample.absorb(out.sample);
        g.extremes.merge(&out.extremes);
        g.rows.append(&mut out.rows);
        g.lines.extend(out.lines.iter().map(|l| l + shift));
        g.skipped += out.skipped;
        for mut r in out.reasons {
            if g.reasons.len() < ingest::KEEP_REASONS {
                r.shift_line(shift);
                g.reasons.push(r.to_string());
            }
        }
        base += out.lines_read;
    }
    if let Some(pb) = &progress {
        pb.finish_and_clear();
    }
    Ok(g)
}

/// One reader thread's share of the file.
struct Job<'a> {
    path: &'a Path,
    layout: &'a Layout,
    csv: &'a CsvOptions,
    log_mask: u32,
    keep_rows: bool,
    /// Rows with a gross outlier are bad rows.
    gate: Option<&'a Gate>,
    /// Position of this range in the file.
    index: usize,
    /// The lowest index of a range that failed: ranges after it stop early.
    first_error: &'a AtomicUsize,
}

/// What a reader thread found. Lines are relative to its range (the first is 1).
struct WorkerOut {
    moments: Moments,
    lag: Lag1,
    sample: Sample,
    extremes: Extremes,
    rows: Vec<f64>,
    lines: Vec<u64>,
    lines_read: u64,
    skipped: u64,
    reasons: Vec<IngestError>,
    error: Option<IngestError>,
}

impl Job<'_> {
    fn run(&self, start: u64, end: u64, progress: Option<indicatif::ProgressBar>) -> WorkerOut {
        let p = self.layout.features.len();
        let mut out = WorkerOut {
            moments: Moments::new(p),
            lag: Lag1::new(p),
            sample: Sample::new(p),
            extremes: Extremes::new(p),
            rows: Vec::new(),
            lines: Vec::new(),
            lines_read: 0,
            skipped: 0,
            reasons: Vec::new(),
            error: None,
        };
        let mut reader = match Reader::range(self.path, self.layout, self.csv, start, end, 1) {
            Ok(r) => r,
            Err(e) => {
                out.error = Some(e);
                self.first_error.fetch_min(self.index, Ordering::Relaxed);
                return out;
            }
        };
        reader.set_progress(progress);
        let mut block = Vec::with_capacity(BLOCK_ROWS * p);
        let mut count = 0u64;
        loop {
            count += 1;
            if count.is_multiple_of(4096) && self.first_error.load(Ordering::Relaxed) < self.index {
                break; // an earlier range failed: its error is the one reported
            }
            let bad = match reader.next_row() {
                Ok(Some(row)) => {
                    match non_positive_log(self.layout, row.line, row.values, self.log_mask) {
                        Some(e) => Some(e),
                        None => {
                            let at = block.len();
                            block.extend_from_slice(row.values);
                            let t = &mut block[at..];
                            if self.log_mask != 0 {
                                for (i, v) in t.iter_mut().enumerate() {
                                    if (self.log_mask >> i) & 1 == 1 {
                                        *v = v.ln();
                                    }
                                }
                            }
                            match self.gate.and_then(|g| g.first_gross(t).map(|j| (g, j))) {
                                Some((g, j)) => {
                                    let e = IngestError::GrossOutlier {
                                        file: self.layout.file.clone(),
                                        line: row.line,
                                        column: self.layout.features[j].clone(),
                                        value: short(row.values[j]),
                                        detail: g.detail(j, t[j], (self.log_mask >> j) & 1 == 1),
                                    };
                                    block.truncate(at);
                                    Some(e)
                                }
                                None => {
                                    out.lag.push(t);
                                    out.sample.offer(row.byte, row.values);
                                    if self.keep_rows {
                                        out.rows.extend_from_slice(t);
                                        out.lines.push(row.line);
                                    }
                                    None
                                }
                            }
                        }
                    }
                }
                Ok(None) => break,
                Err(e) => Some(e),
            };
            if let Some(e) = bad {
                // A row error stops the range unless `skip_bad_rows` (for the log check) says not.
                let fatal = match e {
                    IngestError::NotPositive { .. } | IngestError::GrossOutlier { .. } => {
                        reader.skip_or_fail(e).err()
                    }
                    e => Some(e),
                };
                if let Some(e) = fatal {
                    out.error = Some(e);
                    self.first_error.fetch_min(self.index, Ordering::Relaxed);
                    break;
                }
                continue;
            }
            if block.len() == BLOCK_ROWS * p {
                out.extremes.offer_block(&block);
                out.moments.push_block(&block);
                block.clear();
            }
        }
        out.extremes.offer_block(&block);
        out.moments.push_block(&block);
        out.lines_read = reader.lines_read();
        out.skipped = reader.skipped();
        out.reasons = reader.take_skipped_reasons();
        out
    }
}

/// The error for the first log feature of `raw` that is not positive, if any.
pub(super) fn non_positive_log(
    layout: &Layout,
    line: u64,
    raw: &[f64],
    log_mask: u32,
) -> Option<IngestError> {
    if log_mask == 0 {
        return None;
    }
    raw.iter().enumerate().find_map(|(i, v)| {
        ((log_mask >> i) & 1 == 1 && (v.is_nan() || *v <= 0.0)).then(|| IngestError::NotPositive {
            file: layout.file.clone(),
            line,
            column: layout.features[i].clone(),
            value: v.to_string(),
        })
    })
}
