//! The fit from rows already in memory, and from partial statistics merged across partitions.
//!
//! [`fit_file`](super::fit_file) reads a file. A caller whose data is already in memory (the
//! Python package, an engine that holds a partition as an array) has two entry points here:
//!
//! * [`fit_rows`]: rows in time order, the whole fit. It walks the rows as one reader thread of
//!   `fit_file` walks its range (blocks of [`BLOCK_ROWS`](super::BLOCK_ROWS) rows into the moments, the
//!   same sample keys, the same hold-out split), so its result is the bits of `ellipsoid fit
//!   --threads 1` on the same rows written as CSV. Where the file fit names a file line, this
//!   names the 0-based row index.
//! * [`Partial`] and [`fit_partial`]: each worker pushes its partition's rows into a `Partial`
//!   (moments, lag-1 co-moments, extremes and a bounded row sample), the partials travel as bytes
//!   ([`Partial::to_bytes`]) and merge in any order ([`Partial::merge`]), and the merged partial is
//!   fitted. The mean and covariance are those of all the rows to rounding error (Chan et al.'s
//!   merge). The lag-1 autocorrelation misses the one pair of consecutive rows across each seam
//!   between partials, as `fit_file` misses it across its reader threads.
//!
//! What a partial cannot give, because it keeps no rows, is refused by [`fit_partial`] with the
//! reason: FAST-MCD (`robust`) and Ledoit–Wolf shrinkage work on every row, a hold-out is a tail of
//! rows scored one by one (and the `empirical` threshold is a quantile of it), and a gross outlier
//! found in a partial cannot be skipped or set aside without its row. Diagonal loading, every other
//! threshold and the time-correlation correction come from the partial alone.
//!
//! # The byte form of a partial
//!
//! Little-endian throughout. Version 1:
//!
//! ```text
//! magic  b"ELPM"                4 bytes
//! version u16 = 1, p u16, log_mask u32
//! p names: u32 length + UTF-8 bytes each
//! moments: n u64, then p f64 shift, p f64 mean (of x − shift), p(p+1)/2 f64 co-moment
//!          (lower triangle, row by row)
//! extremes: p f64 minimum, p f64 maximum
//! skipped u64
//! lag-1 parts: count u32, then each: pairs u64, has_shift u8, p f64 shift and p f64 previous row
//!          (only when has_shift = 1), p f64 Σ now, p f64 Σ previous, p f64 Σ now·previous
//! sample: count u32, then each: key u64, p f64 raw values
//! ```
//!
//! A reader refuses another magic, a version it does not know, a truncated or overlong input, and
//! values that could not have come from a writer (a non-finite mean, a sample larger than
//! [`SAMPLE_ROWS`](super::SAMPLE_ROWS)).

use anyhow::{bail, ensure, Result};
use ellipsoid_core::MAX_FEATURES;

use super::check::HoldoutOut;
use super::outliers::{any_gross, drop_gross, short, Extremes, Gate};
use super::read::Gathered;
use super::sample::{mix, Sample};
use super::standardise::Standardise;
use super::{transform_rows, FitOptions, Fitted, Shrinkage, BLOCK_ROWS, SAMPLE_ROWS, SAMPLE_SEED};
use crate::data::ingest::KEEP_REASONS;
use crate::stats::autocorr::{Lag1, Lag1Set};
use crate::stats::moments::Moments;

/// Rows in memory: `values` is row-major, `rows × features.len()`, in time order.
#[derive(Clone, Copy, Debug)]
pub struct Table<'a> {
    /// What the rows are called in messages and in the model card (a file name, a table name).
    pub name: &'a str,
    /// Feature names, in model order.
    pub features: &'a [String],
    /// The values.
    pub values: &'a [f64],
}

impl Table<'_> {
    fn p(&self) -> usize {
        self.features.len()
    }
}

/// The bit of each feature named in `log_columns`, or an error naming the one that is not a feature.
fn log_mask_of(name: &str, features: &[String], log_columns: &[String]) -> Result<u32> {
    let p = features.len();
    ensure!(p > 0, "{name}: no feature columns");
    if p > MAX_FEATURES {
        bail!("{name}: {p} feature columns, but a model takes at most {MAX_FEATURES}; choose some");
    }
    for (i, f) in features.iter().enumerate() {
        if features[..i].contains(f) {
            bail!("{name}: the feature name `{f}` appears twice");
        }
    }
    let mut mask = 0u32;
    for c in log_columns {
        match features.iter().position(|f| f == c) {
            Some(i) => mask |= 1 << i,
            None => bail!(
                "{name}: the log option names `{c}`, which is not a feature (features: {})",
                features.join(", ")
            ),
        }
    }
    Ok(mask)
}

/// Why row `r` (0-based) of `t` cannot be fitted, if it cannot: a value that is not finite, or a
/// log feature that is not positive.
fn bad_row(name: &str, features: &[String], r: u64, row: &[f64], log_mask: u32) -> Option<String> {
    row.iter().enumerate().find_map(|(j, v)| {
        if !v.is_finite() {
            Some(format!(
                "{name}: row {r}, column `{}`: {v} is not a number a baseline may hold (a baseline \
                 must be complete; skip such rows with the skip-bad-rows option)",
                features[j]
            ))
        } else if (log_mask >> j) & 1 == 1 && *v <= 0.0 {
            Some(format!(
                "{name}: row {r}, column `{}`: {} is not positive, so it has no logarithm (the column \
                 is log-transformed)",
                features[j],
                short(*v)
            ))
        } else {
            None
        }
    })
}

/// Walk `rows` (0-based index `first + k`) as one reader thread of `fit_file` walks its range.
fn walk(
    t: &Table<'_>,
    rows: std::ops::Range<usize>,
    log_mask: u32,
    opts: &FitOptions,
    gate: Option<&Gate>,
) -> Result<Gathered> {
    let p = t.p();
    let keep_rows = opts.robust || opts.shrinkage == Shrinkage::LedoitWolf;
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
    let mut lag = Lag1::new(p);
    let mut moments = Moments::new(p);
    let mut block = Vec::with_capacity(BLOCK_ROWS * p);
    for r in rows {
        let raw = &t.values[r * p..(r + 1) * p];
        let mut bad = bad_row(t.name, t.features, r as u64, raw, log_mask);
        if bad.is_none() {
            let at = block.len();
            block.extend_from_slice(raw);
            let v = &mut block[at..];
            if log_mask != 0 {
                for (i, x) in v.iter_mut().enumerate() {
                    if (log_mask >> i) & 1 == 1 {
                        *x = x.ln();
                    }
                }
            }
            match gate.and_then(|gt| gt.first_gross(v).map(|j| (gt, j))) {
                Some((gt, j)) => {
                    bad = Some(format!(
                        "{}: row {r}, column `{}`: the value {} {}",
                        t.name,
                        t.features[j],
                        short(raw[j]),
                        gt.detail(j, v[j], (log_mask >> j) & 1 == 1)
                    ));
                    block.truncate(at);
                }
                None => {
                    lag.push(v);
                    // The CLI keys its sample by the row's byte offset; the row index plays
                    // that part here (both keep every row of a baseline up to SAMPLE_ROWS).
                    g.sample.offer(r as u64, raw);
                    if keep_rows {
                        g.rows.extend_from_slice(v);
                        g.lines.push(r as u64);
                    }
                }
            }
        }
        if let Some(e) = bad {
            if !opts.csv.skip_bad_rows {
                bail!(e);
            }
            g.skipped += 1;
            if g.reasons.len() < KEEP_REASONS {
                g.reasons.push(e);
            }
            continue;
        }
        if block.len() == BLOCK_ROWS * p {
            g.extremes.offer_block(&block);
            moments.push_block(&block);
            block.clear();
        }
    }
    g.extremes.offer_block(&block);
    moments.push_block(&block);
    // `fit_file` merges each reader thread's moments into empty ones: a copy.
    g.moments.merge(&moments);
    g.lag.add(lag);
    Ok(g)
}

/// Fit rows in memory (time order). The same steps and checks as [`super::fit_file`], on one
/// thread: the result has the bits of `ellipsoid fit --threads 1` on the same rows written as
/// CSV (with a header line and nothing else). Row indices (0-based) stand where the file fit
/// gives file lines: in messages, in the robust fit's rows set aside and in the hold-out.
pub fn fit_rows(t: &Table<'_>, opts: &FitOptions) -> Result<Fitted> {
    let p = t.p();
    let log_mask = log_mask_of(t.name, t.features, &opts.log_columns)?;
    ensure!(
        t.values.len().is_multiple_of(p),
        "{}: {} values do not make whole rows of {p} features",
        t.name,
        t.values.len()
    );
    ensure!(
        (0.0..1.0).contains(&opts.holdout),
        "the held-out share must lie in 0 ≤ holdout < 1, not {}",
        opts.holdout
    );
    let n = t.values.len() / p;
    // The same split as `split_holdout`: the last `round(holdout · n)` rows, at least one.
    let train_end = if opts.holdout > 0.0 {
        let hold = ((opts.holdout * n as f64).round() as usize).max(1).min(n);
        n - hold
    } else {
        n
    };
    let mut walked = walk(t, 0..train_end, log_mask, opts, None)?;
    let mut sample_rows = std::mem::replace(&mut walked.sample, Sample::new(p)).into_rows();
    let gate = Gate::from_rows(&transform_rows(&sample_rows, p, log_mask), p);
    let mut gross_lines = Vec::new();
    if any_gross(&gate, &walked.extremes) {
        if opts.robust && !opts.csv.skip_bad_rows {
            gross_lines = drop_gross(&gate, &mut walked.rows, &mut walked.lines, p);
            super::outliers::sample_without_gross(&gate, &mut sample_rows, p, log_mask);
            let mut m = Moments::new(p);
            m.push_block(&walked.rows);
            walked.moments = m;
        } else {
            walked = walk(t, 0..train_end, log_mask, opts, Some(&gate))?;
            sample_rows = std::mem::replace(&mut walked.sample, Sample::new(p)).into_rows();
        }
    }
    let holdout = (train_end < n).then_some(train_end..n);
    finish(
        t,
        log_mask,
        opts,
        walked,
        sample_rows,
        gross_lines,
        holdout.map(|h| (t, h)),
    )
}

/// Score the held-out rows through the core, as `score_holdout` scores the file's tail.
fn score_rows(
    t: &Table<'_>,
    rows: std::ops::Range<usize>,
    opts: &FitOptions,
    st: Standardise<'_>,
) -> Result<HoldoutOut> {
    let p = t.p();
    let mut out = HoldoutOut {
        d2: Vec::new(),
        lines: Vec::new(),
        skipped: 0,
        reasons: Vec::new(),
        faults: 0,
    };
    crate::with_dim!(p, N => {
        let model = st.model::<N>()?;
        let mut x = [0.0f32; N];
        for r in rows {
            let raw = &t.values[r * p..(r + 1) * p];
            if let Some(e) = bad_row(t.name, t.features, r as u64, raw, st.log_mask) {
                if !opts.csv.skip_bad_rows {
                    bail!(e);
                }
                out.skipped += 1;
                if out.reasons.len() < KEEP_REASONS {
                    out.reasons.push(e);
                }
                continue;
            }
            for (xi, v) in x.iter_mut().zip(raw) {
                *xi = *v as f32;
            }
            match model.score(&x) {
                Ok(s) => out.d2.push(s.d2),
                Err(_) => {
                    out.d2.push(f32::NAN);
                    out.faults += 1;
                }
            }
            out.lines.push(r as u64);
        }
        Ok::<(), anyhow::Error>(())
    })
    .expect("dimension checked before")?;
    Ok(out)
}

/// The steps of a fit after the training rows are gathered: the file fit's own
/// ([`super::finish_fit`]), with the held-out rows scored from memory.
fn finish(
    t: &Table<'_>,
    log_mask: u32,
    opts: &FitOptions,
    gathered: Gathered,
    sample_rows: Vec<f64>,
    gross_lines: Vec<u64>,
    holdout: Option<(&Table<'_>, std::ops::Range<usize>)>,
) -> Result<Fitted> {
    super::finish_fit(
        t.name.to_string(),
        t.features,
        log_mask,
        opts,
        gathered,
        sample_rows,
        gross_lines,
        |st| holdout.map(|(ht, rows)| score_rows(ht, rows, opts, st)),
    )
}

/// The statistics of a set of rows that a fit needs and that merge: count, mean and co-moment
/// ([`Moments`]), lag-1 co-moments of each stretch of consecutive rows, each feature's extremes,
/// and a bottom-k sample of at most [`SAMPLE_ROWS`] rows keyed by a hash of the row's values (so
/// that the merged sample does not depend on how the rows were partitioned).
#[derive(Clone, Debug)]
pub struct Partial {
    features: Vec<String>,
    log_mask: u32,
    moments: Moments,
    /// Finished stretches (from merges) and, last, the stretch that pushes extend.
    lag: Vec<Lag1>,
    extremes: Extremes,
    /// `(hash of the raw values, raw values)`, at most `2 · SAMPLE_ROWS` before a compaction.
    sample: Vec<(u64, Vec<f64>)>,
    /// Keys at or above this cannot be among the smallest `SAMPLE_ROWS` (as in [`Sample`]).
    top: u64,
    skipped: u64,
}

/// The hash of a row's bits that keys the sample of a [`Partial`]: a multiply-rotate fold of the
/// values' bits, finished by SplitMix64's mixer (part of byte-form version 1: partials hashed
/// another way would not sample the same rows).
fn row_hash(raw: &[f64]) -> u64 {
    let h = raw.iter().fold(0x243f_6a88_85a3_08d3u64, |h, v| {
        (h ^ v.to_bits())
            .wrapping_mul(0x9e37_79b9_7f4a_7c15)
            .rotate_left(29)
    });
    mix(h)
}

/// The sample key of a hash, as [`Sample`] computes it.
fn sample_key(h: u64) -> u64 {
    mix(h ^ SAMPLE_SEED)
}

/// The version of [`Partial::to_bytes`].
pub const PARTIAL_VERSION: u16 = 1;
const PARTIAL_MAGIC: &[u8; 4] = b"ELPM";

impl Partial {
    /// No rows yet. `log_columns` are taken as their natural log before anything else, as the
    /// fit's log option does.
    pub fn new(features: Vec<String>, log_columns: &[String]) -> Result<Self> {
        let log_mask = log_mask_of("the partial moments", &features, log_columns)?;
        let p = features.len();
        Ok(Partial {
            features,
            log_mask,
            moments: Moments::new(p),
            lag: vec![Lag1::new(p)],
            extremes: Extremes::new(p),
            sample: Vec::new(),
            top: u64::MAX,
            skipped: 0,
        })
    }

    /// The feature names.
    pub fn features(&self) -> &[String] {
        &self.features
    }

    /// The names of the log-transformed features.
    pub fn log_features(&self) -> Vec<String> {
        self.features
            .iter()
            .enumerate()
            .filter(|(i, _)| (self.log_mask >> i) & 1 == 1)
            .map(|(_, f)| f.clone())
            .collect()
    }

    /// The moments of the (log-transformed) rows pushed.
    pub fn moments(&self) -> &Moments {
        &self.moments
    }

    /// Rows skipped by [`Partial::push_rows`] with `skip_bad_rows`.
    pub fn skipped(&self) -> u64 {
        self.skipped
    }

    /// Add rows (row-major, in time order, following the rows pushed before). A row with a value
    /// that is not finite, or a log feature that is not positive, stops with its index within
    /// `values` and nothing of this call is kept, unless `skip_bad_rows` (then it is counted).
    /// `name` names the rows in messages.
    pub fn push_rows(&mut self, name: &str, values: &[f64], skip_bad_rows: bool) -> Result<()> {
        let p = self.features.len();
        ensure!(
            values.len().is_multiple_of(p),
            "{name}: {} values do not make whole rows of {p} features",
            values.len()
        );
        if !skip_bad_rows {
            for (r, raw) in values.chunks_exact(p).enumerate() {
                if let Some(e) = bad_row(name, &self.features, r as u64, raw, self.log_mask) {
                    bail!(e);
                }
            }
        }
        let mut block = Vec::with_capacity(BLOCK_ROWS * p);
        let mut lag = self.lag.pop().expect("a current stretch");
        for (r, raw) in values.chunks_exact(p).enumerate() {
            // Without `skip_bad_rows` every row was checked above.
            if skip_bad_rows
                && bad_row(name, &self.features, r as u64, raw, self.log_mask).is_some()
            {
                self.skipped += 1;
                continue;
            }
            let at = block.len();
            block.extend_from_slice(raw);
            for (i, x) in block[at..].iter_mut().enumerate() {
                if (self.log_mask >> i) & 1 == 1 {
                    *x = x.ln();
                }
            }
            lag.push(&block[at..]);
            let h = row_hash(raw);
            if sample_key(h) < self.top {
                self.sample.push((h, raw.to_vec()));
                if self.sample.len() >= 2 * SAMPLE_ROWS {
                    self.compact(SAMPLE_ROWS);
                }
            }
            if block.len() == BLOCK_ROWS * p {
                self.extremes.offer_block(&block);
                self.moments.push_block(&block);
                block.clear();
            }
        }
        self.lag.push(lag);
        self.extremes.offer_block(&block);
        self.moments.push_block(&block);
        Ok(())
    }

    /// Keep the `SAMPLE_ROWS` smallest keys once more than `limit` candidates have gathered, and
    /// lower the cut-off to the largest key kept.
    fn compact(&mut self, limit: usize) {
        if self.sample.len() > limit {
            self.sample.sort_unstable_by_key(|(h, v)| {
                (sample_key(*h), *h, v.first().map(|x| x.to_bits()))
            });
            self.sample.truncate(SAMPLE_ROWS);
        }
        if self.sample.len() >= SAMPLE_ROWS {
            self.top = self
                .sample
                .iter()
                .map(|(h, _)| sample_key(*h))
                .max()
                .unwrap_or(u64::MAX);
        }
    }

    /// Fold in the statistics of other rows (any order, any tree of merges). The rows pushed
    /// into `self` afterwards start a new stretch of consecutive rows.
    pub fn merge(&mut self, other: &Partial) -> Result<()> {
        ensure!(
            self.features == other.features,
            "cannot merge partial moments of other features: [{}] and [{}]",
            self.features.join(", "),
            other.features.join(", ")
        );
        ensure!(
            self.log_mask == other.log_mask,
            "cannot merge partial moments with other log features: [{}] and [{}]",
            self.log_features().join(", "),
            other.log_features().join(", ")
        );
        self.moments.merge(&other.moments);
        let p = self.features.len();
        self.lag.pop_if(|l| l.is_empty());
        self.lag
            .extend(other.lag.iter().filter(|l| !l.is_empty()).cloned());
        self.lag.push(Lag1::new(p));
        self.extremes.merge(&other.extremes);
        for (h, row) in &other.sample {
            if sample_key(*h) < self.top {
                self.sample.push((*h, row.clone()));
                if self.sample.len() >= 2 * SAMPLE_ROWS {
                    self.compact(SAMPLE_ROWS);
                }
            }
        }
        self.skipped += other.skipped;
        Ok(())
    }

    /// The versioned byte form (module documentation), which [`Partial::from_bytes`] reads back to
    /// the same statistics, bit for bit.
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut s = self.clone();
        s.compact(SAMPLE_ROWS);
        let p = self.features.len();
        let mut b = Vec::new();
        b.extend_from_slice(PARTIAL_MAGIC);
        b.extend_from_slice(&PARTIAL_VERSION.to_le_bytes());
        b.extend_from_slice(&(p as u16).to_le_bytes());
        b.extend_from_slice(&self.log_mask.to_le_bytes());
        for f in &self.features {
            b.extend_from_slice(&(f.len() as u32).to_le_bytes());
            b.extend_from_slice(f.as_bytes());
        }
        let f64s = |b: &mut Vec<u8>, v: &[f64]| v.iter().for_each(|x| b.extend(x.to_le_bytes()));
        let (n, shift, mean, comoment) = self.moments.parts();
        b.extend_from_slice(&n.to_le_bytes());
        f64s(&mut b, shift);
        f64s(&mut b, mean);
        for i in 0..p {
            f64s(&mut b, &comoment[i * p..i * p + i + 1]);
        }
        f64s(&mut b, &self.extremes.min);
        f64s(&mut b, &self.extremes.max);
        b.extend_from_slice(&self.skipped.to_le_bytes());
        b.extend_from_slice(&(self.lag.len() as u32).to_le_bytes());
        for l in &self.lag {
            let parts = l.parts();
            b.extend_from_slice(&parts.pairs.to_le_bytes());
            match parts.shift_prev {
                Some((shift, prev)) => {
                    b.push(1);
                    f64s(&mut b, shift);
                    f64s(&mut b, prev);
                }
                None => b.push(0),
            }
            f64s(&mut b, parts.sum_now);
            f64s(&mut b, parts.sum_prev);
            f64s(&mut b, parts.sum_cross);
        }
        b.extend_from_slice(&(s.sample.len() as u32).to_le_bytes());
        for (h, row) in &s.sample {
            b.extend_from_slice(&h.to_le_bytes());
            f64s(&mut b, row);
        }
        b
    }

    /// Read the byte form of [`Partial::to_bytes`].
    pub fn from_bytes(bytes: &[u8]) -> Result<Self> {
        let mut r = ByteReader { b: bytes, at: 0 };
        ensure!(
            r.take(4)? == PARTIAL_MAGIC,
            "not the byte form of Ellipsoid partial moments (its first bytes are not `ELPM`)"
        );
        let version = r.u16()?;
        ensure!(
            version == PARTIAL_VERSION,
            "partial moments of byte-form version {version}; this build reads version {PARTIAL_VERSION}"
        );
        let p = usize::from(r.u16()?);
        ensure!(
            (1..=MAX_FEATURES).contains(&p),
            "partial moments of {p} features; a model takes 1 to {MAX_FEATURES}"
        );
        let log_mask = r.u32()?;
        let mut features = Vec::with_capacity(p);
        for _ in 0..p {
            let len = r.u32()? as usize;
            let name = std::str::from_utf8(r.take(len)?).map_err(|_| {
                anyhow::anyhow!("a feature name of the partial moments is not UTF-8")
            })?;
            features.push(name.to_string());
        }
        let n = r.u64()?;
        let shift = r.f64s(p)?;
        let mean = r.f64s(p)?;
        let mut comoment = vec![0.0; p * p];
        for i in 0..p {
            for j in 0..=i {
                comoment[i * p + j] = r.f64()?;
            }
        }
        ensure!(
            mean.iter()
                .chain(&shift)
                .chain(&comoment)
                .all(|v| v.is_finite()),
            "the partial moments hold a value that is not finite"
        );
        let moments = Moments::from_parts(n, shift, mean, comoment);
        let extremes = Extremes {
            min: r.f64s(p)?,
            max: r.f64s(p)?,
        };
        let skipped = r.u64()?;
        let parts = r.u32()? as usize;
        ensure!(
            parts <= bytes.len(),
            "the partial moments are damaged (a count runs past their end)"
        );
        let mut lag = Vec::with_capacity(parts);
        for _ in 0..parts {
            let pairs = r.u64()?;
            let shift_prev = match r.take(1)?[0] {
                0 => None,
                1 => Some((r.f64s(p)?, r.f64s(p)?)),
                k => bail!("the partial moments are damaged (a flag byte is {k})"),
            };
            let (now, prev, cross) = (r.f64s(p)?, r.f64s(p)?, r.f64s(p)?);
            lag.push(Lag1::from_parts(p, pairs, shift_prev, now, prev, cross));
        }
        if lag.is_empty() {
            lag.push(Lag1::new(p));
        }
        let count = r.u32()? as usize;
        ensure!(
            count <= SAMPLE_ROWS,
            "the partial moments hold a sample of {count} rows, more than the {SAMPLE_ROWS} a writer keeps"
        );
        let mut sample = Vec::with_capacity(count);
        for _ in 0..count {
            let h = r.u64()?;
            sample.push((h, r.f64s(p)?));
        }
        ensure!(
            r.at == bytes.len(),
            "the partial moments are followed by {} unexpected bytes",
            bytes.len() - r.at
        );
        let mut s = Partial {
            features: Vec::new(),
            log_mask: 0,
            moments,
            lag,
            extremes,
            sample,
            top: u64::MAX,
            skipped,
        };
        s.compact(SAMPLE_ROWS);
        // The names and the log mask go through the same checks as a new partial's.
        let check = Partial::new(features.clone(), &[])?;
        ensure!(
            log_mask >> p == 0,
            "the partial moments mark a log feature beyond their {p} features"
        );
        s.features = check.features;
        s.log_mask = log_mask;
        Ok(s)
    }
}

/// Reads the little-endian fields of [`Partial::from_bytes`].
struct ByteReader<'a> {
    b: &'a [u8],
    at: usize,
}

impl<'a> ByteReader<'a> {
    fn take(&mut self, k: usize) -> Result<&'a [u8]> {
        let end = self.at.checked_add(k).filter(|e| *e <= self.b.len());
        let Some(end) = end else {
            bail!(
                "the partial moments end early: {} bytes, more expected at byte {}",
                self.b.len(),
                self.at
            );
        };
        let s = &self.b[self.at..end];
        self.at = end;
        Ok(s)
    }
    fn u16(&mut self) -> Result<u16> {
        Ok(u16::from_le_bytes(
            self.take(2)?.try_into().expect("2 bytes"),
        ))
    }
    fn u32(&mut self) -> Result<u32> {
        Ok(u32::from_le_bytes(
            self.take(4)?.try_into().expect("4 bytes"),
        ))
    }
    fn u64(&mut self) -> Result<u64> {
        Ok(u64::from_le_bytes(
            self.take(8)?.try_into().expect("8 bytes"),
        ))
    }
    fn f64(&mut self) -> Result<f64> {
        Ok(f64::from_bits(self.u64()?))
    }
    fn f64s(&mut self, k: usize) -> Result<Vec<f64>> {
        (0..k).map(|_| self.f64()).collect()
    }
}

/// Fit merged partial moments. The options that need rows are refused, each with the reason
/// (module documentation); the rest is the fit of [`fit_rows`] with no hold-out. `name` names the
/// data in messages and in the model card.
pub fn fit_partial(name: &str, part: &Partial, opts: &FitOptions) -> Result<Fitted> {
    if opts.robust {
        bail!(
            "{name}: the robust fit (FAST-MCD) needs every row, and partial moments keep none: fit the rows \
             themselves, or clean them before gathering the moments"
        );
    }
    if opts.shrinkage == Shrinkage::LedoitWolf {
        bail!(
            "{name}: Ledoit-Wolf shrinkage needs every row, and partial moments keep none: use diagonal \
             loading, which works from the moments, or fit the rows themselves"
        );
    }
    if opts.holdout != 0.0 {
        bail!(
            "{name}: a hold-out is a tail of rows scored one by one, and partial moments keep no rows: \
             fit the moments with holdout 0 (check the threshold on held-out rows with replay)"
        );
    }
    let p = part.features.len();
    let mut g = Gathered {
        moments: part.moments.clone(),
        sample: Sample::new(p),
        extremes: part.extremes.clone(),
        rows: Vec::new(),
        lines: Vec::new(),
        skipped: part.skipped,
        reasons: Vec::new(),
        lag: Lag1Set::default(),
    };
    for l in part.lag.iter().filter(|l| !l.is_empty()) {
        g.lag.add(l.clone());
    }
    let mut s = part.clone();
    s.compact(SAMPLE_ROWS);
    for (h, row) in &s.sample {
        g.sample.offer(*h, row);
    }
    let sample_rows = std::mem::replace(&mut g.sample, Sample::new(p)).into_rows();
    let gate = Gate::from_rows(&transform_rows(&sample_rows, p, part.log_mask), p);
    if any_gross(&gate, &g.extremes) {
        let j = (0..p)
            .find(|&j| {
                [g.extremes.min[j], g.extremes.max[j]]
                    .iter()
                    .any(|&v| gate.z(j, v) > super::GROSS_Z)
            })
            .expect("a gross feature");
        let v = [g.extremes.min[j], g.extremes.max[j]]
            .into_iter()
            .max_by(|a, b| gate.z(j, *a).total_cmp(&gate.z(j, *b)))
            .expect("two values");
        let log = (part.log_mask >> j) & 1 == 1;
        bail!(
            "{name}: column `{}` holds the value {}{}, which {}. Partial moments keep no rows, so it cannot \
             be skipped or set aside here: drop such rows before gathering the moments",
            part.features[j],
            short(if log { v.exp() } else { v }),
            if log { " (its logarithm is compared)" } else { "" },
            gate.detail(j, v, log)
        );
    }
    let t = Table {
        name,
        features: &part.features,
        values: &[],
    };
    finish(&t, part.log_mask, opts, g, sample_rows, Vec::new(), None)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::data::ingest::CsvOptions;
    use rand::SeedableRng;
    use rand_distr::{Distribution, Normal};

    fn names(p: usize) -> Vec<String> {
        (0..p).map(|i| format!("s{i}")).collect()
    }

    /// Correlated AR(1) rows with an offset, row-major.
    fn rows(n: usize, p: usize, seed: u64) -> Vec<f64> {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let g = Normal::new(0.0, 1.0).unwrap();
        let mut state = vec![0.0; p];
        let mut out = Vec::with_capacity(n * p);
        for _ in 0..n {
            let common: f64 = g.sample(&mut rng);
            for (j, s) in state.iter_mut().enumerate() {
                *s = 0.6 * *s + common + 0.5 * g.sample(&mut rng);
                out.push(100.0 + 10.0 * j as f64 + *s);
            }
        }
        out
    }

    fn quiet(holdout: f64) -> FitOptions {
        FitOptions {
            csv: CsvOptions {
                quiet: true,
                ..Default::default()
            },
            holdout,
            threads: 1,
            ..Default::default()
        }
    }

    fn write_csv(
        dir: &tempfile::TempDir,
        features: &[String],
        values: &[f64],
    ) -> std::path::PathBuf {
        use std::fmt::Write as _;
        let p = features.len();
        let mut s = features.join(",");
        s.push('\n');
        for r in values.chunks_exact(p) {
            let cells: Vec<String> = r.iter().map(|v| format!("{v:?}")).collect();
            writeln!(s, "{}", cells.join(",")).unwrap();
        }
        let path = dir.path().join("rows.csv");
        std::fs::write(&path, s).unwrap();
        path
    }

    #[test]
    fn rows_in_memory_fit_to_the_bits_of_the_file_fit() {
        let dir = tempfile::tempdir().unwrap();
        for (n, holdout) in [(3000, 0.2), (25_000, 0.0), (700, 0.1)] {
            let f = names(5);
            let v = rows(n, 5, n as u64);
            let path = write_csv(&dir, &f, &v);
            let from_file = super::super::fit_file(&path, &quiet(holdout)).unwrap();
            let t = Table {
                name: "rows",
                features: &f,
                values: &v,
            };
            let mem = fit_rows(&t, &quiet(holdout)).unwrap();
            assert_eq!(mem.mean, from_file.mean, "n {n}");
            assert_eq!(mem.cov, from_file.cov);
            assert_eq!(mem.w, from_file.w);
            assert_eq!(mem.lag1, from_file.lag1);
            assert_eq!(mem.rows_used, from_file.rows_used);
            let bits = |d: &[f32]| d.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&mem.holdout_d2), bits(&from_file.holdout_d2));
            assert_eq!(mem.holdout_d2.is_empty(), holdout == 0.0);
        }
    }

    #[test]
    fn bad_values_name_row_and_column_or_are_skipped() {
        let f = names(3);
        let mut v = rows(100, 3, 1);
        v[3 * 17 + 2] = f64::NAN;
        let t = Table {
            name: "pump 4",
            features: &f,
            values: &v,
        };
        let e = fit_rows(&t, &quiet(0.0)).unwrap_err().to_string();
        assert!(e.contains("pump 4: row 17, column `s2`"), "{e}");
        let mut o = quiet(0.0);
        o.csv.skip_bad_rows = true;
        let fitted = fit_rows(&t, &o).unwrap();
        assert_eq!((fitted.rows_used, fitted.rows_skipped), (99, 1));
    }

    #[test]
    fn merged_partials_fit_like_all_rows() {
        let f = names(4);
        let v = rows(40_000, 4, 9);
        let t = Table {
            name: "all",
            features: &f,
            values: &v,
        };
        let whole = fit_rows(&t, &quiet(0.0)).unwrap();
        // Uneven partitions, merged as a tree, one of them through the byte form.
        let cuts = [0, 1, 129, 5000, 17_777, 30_000, 40_000];
        let mut parts: Vec<Partial> = cuts
            .windows(2)
            .map(|c| {
                let mut p = Partial::new(f.clone(), &[]).unwrap();
                p.push_rows("part", &v[c[0] * 4..c[1] * 4], false).unwrap();
                p
            })
            .collect();
        parts[2] = Partial::from_bytes(&parts[2].to_bytes()).unwrap();
        let mut left = parts[3].clone();
        for p in &parts[4..] {
            left.merge(p).unwrap();
        }
        let mut acc = parts[0].clone();
        acc.merge(&parts[1]).unwrap();
        acc.merge(&parts[2]).unwrap();
        acc.merge(&left).unwrap();
        let merged = fit_partial("all", &acc, &quiet(0.0)).unwrap();
        assert_eq!(merged.rows_used, whole.rows_used);
        for (a, b) in merged.cov.iter().zip(&whole.cov) {
            assert!((a - b).abs() <= 1e-12 * b.abs(), "{a} vs {b}");
        }
        for (a, b) in merged.mean.iter().zip(&whole.mean) {
            assert!((a - b).abs() <= 1e-12 * b.abs(), "{a} vs {b}");
        }
        // Five seams lose five of 39 999 lag pairs.
        for (a, b) in merged.lag1.iter().zip(&whole.lag1) {
            assert!((a - b).abs() < 1e-3, "{a} vs {b}");
        }
        // The sample is the same rows whatever the partitioning, and so are the diagnostics.
        let mut one = Partial::new(f.clone(), &[]).unwrap();
        one.push_rows("all", &v, false).unwrap();
        let single = fit_partial("all", &one, &quiet(0.0)).unwrap();
        // (The same rows: equal skewness up to the rounding of the mean and covariance.)
        assert_eq!(single.diagnostics.rows, merged.diagnostics.rows);
        for (a, b) in single
            .diagnostics
            .skewness
            .iter()
            .zip(&merged.diagnostics.skewness)
        {
            assert!((a - b).abs() < 1e-9, "{a} vs {b}");
        }
    }

    #[test]
    fn byte_form_round_trips_and_refuses_damage() {
        let f = names(3);
        let mut p = Partial::new(f.clone(), &["s1".to_string()]).unwrap();
        p.push_rows("x", &rows(500, 3, 2), false).unwrap();
        let b = p.to_bytes();
        let back = Partial::from_bytes(&b).unwrap();
        assert_eq!(back.to_bytes(), b);
        assert_eq!(back.log_features(), ["s1"]);
        for cut in [0, 3, 10, b.len() / 2, b.len() - 1] {
            assert!(Partial::from_bytes(&b[..cut]).is_err(), "cut {cut}");
        }
        let mut longer = b.clone();
        longer.push(0);
        assert!(Partial::from_bytes(&longer).is_err());
        let mut v2 = b.clone();
        v2[4] = 2;
        let e = Partial::from_bytes(&v2).unwrap_err().to_string();
        assert!(e.contains("version 2"), "{e}");
        // Merging other features is refused.
        let mut q = Partial::new(names(2), &[]).unwrap();
        assert!(q.merge(&p).is_err());
    }

    #[test]
    fn options_that_need_rows_are_refused() {
        let f = names(3);
        let mut p = Partial::new(f, &[]).unwrap();
        p.push_rows("x", &rows(500, 3, 3), false).unwrap();
        let mut o = quiet(0.0);
        o.robust = true;
        assert!(fit_partial("m", &p, &o)
            .unwrap_err()
            .to_string()
            .contains("FAST-MCD"));
        let mut o = quiet(0.0);
        o.shrinkage = Shrinkage::LedoitWolf;
        assert!(fit_partial("m", &p, &o)
            .unwrap_err()
            .to_string()
            .contains("Ledoit-Wolf"));
        assert!(fit_partial("m", &p, &quiet(0.2))
            .unwrap_err()
            .to_string()
            .contains("hold-out"));
        let mut o = quiet(0.0);
        o.shrinkage = Shrinkage::Diagonal(0.05);
        assert!(fit_partial("m", &p, &o).is_ok());
    }

    #[test]
    fn a_gross_value_in_a_partial_is_refused_with_its_column() {
        let f = names(3);
        let mut v = rows(2000, 3, 4);
        v[3 * 1500 + 1] = -9999.0;
        let mut p = Partial::new(f, &[]).unwrap();
        p.push_rows("x", &v, false).unwrap();
        let e = fit_partial("m", &p, &quiet(0.0)).unwrap_err().to_string();
        assert!(e.contains("column `s1` holds the value -9999"), "{e}");
    }
}
