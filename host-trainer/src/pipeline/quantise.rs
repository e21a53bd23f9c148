//! `fit --no-fpu`: the fitted `f32` model quantised for the core's integer scoring path
//! (`ellipsoid_core::fixed`), checked against the `f32` model on the data it was fitted from.
//!
//! Both models score every row of the baseline file (the rows the fit used and its hold-out rows,
//! told apart by their lines) and of the `--validation` file if there is one; the worst difference
//! in d² is reported for each, and a quantisation that moves any verdict on the baseline file is
//! refused with the line of the first such row. Nothing here scores by itself: the core's
//! integer code is the one the device runs, and `replay` and `evaluate` run it too.

use std::collections::BTreeSet;
use std::path::Path;

use anyhow::{anyhow, bail, Result};
use ellipsoid_core::{fixed, AlarmPolicy, ModelMeta, Thresholds};

use crate::data::ingest::{CsvOptions, Reader};
use crate::device::dims::{decode_any, AnyModel};
use crate::device::replay::to_device;
use crate::fit::Fitted;

/// The worst d² difference on one set of rows.
#[derive(Clone, Debug, PartialEq)]
pub struct Worst {
    /// Which rows ("baseline, fit rows", ...).
    pub rows: String,
    /// How many were scored by both.
    pub scored: u64,
    /// The largest `|d²_fixed − d²_f32|`, and the line where it was.
    pub worst: f64,
    /// Line of the worst row (0 when nothing was scored).
    pub line: u64,
}

/// The quantised model and its check.
pub struct Quantised {
    /// The fixed-point blob.
    pub blob: Vec<u8>,
    /// It, decoded by the core.
    pub model: Box<dyn AnyModel>,
    /// Worst differences, one entry per set of rows.
    pub worst: Vec<Worst>,
}

/// Quantise the fitted model and check it (see the module docs).
pub fn quantise(
    fitted: &Fitted,
    f32_model: &dyn AnyModel,
    thresholds: Thresholds,
    policy: AlarmPolicy,
    meta: ModelMeta,
    baseline: &Path,
    validation: Option<&Path>,
) -> Result<Quantised> {
    let n = fitted.features.len();
    let bytes = crate::with_dim!(n, N => {
        let params = fitted.params::<N>(thresholds, policy, meta);
        let q = fixed::quantise::<N, { ellipsoid_core::tri(N) }>(&params)
            .map_err(|e| anyhow!("--no-fpu: the model cannot be quantised: {e}"))?;
        let mut buf = vec![0u8; fixed::max_len(N)];
        let len = fixed::encode(&q, &mut buf)
            .map_err(|e| anyhow!("--no-fpu: the quantised model cannot be encoded: {e}"))?;
        buf.truncate(len);
        buf
    })
    .ok_or_else(|| anyhow!("{n} features: a model holds 1 to 32 features"))?;
    let model = decode_any(&bytes)
        .map_err(|e| anyhow!("the core refused the fixed-point blob it was given: {e}"))?;
    let holdout: BTreeSet<u64> = fitted.holdout_lines.iter().copied().collect();
    let mut worst = vec![
        Worst {
            rows: "baseline, rows fitted".into(),
            scored: 0,
            worst: 0.0,
            line: 0,
        },
        Worst {
            rows: "baseline, hold-out rows".into(),
            scored: 0,
            worst: 0.0,
            line: 0,
        },
    ];
    compare(
        f32_model,
        model.as_ref(),
        &fitted.features,
        baseline,
        true,
        |line| usize::from(holdout.contains(&line)),
        &mut worst,
    )?;
    if let Some(v) = validation {
        let at = worst.len();
        worst.push(Worst {
            rows: format!("validation file {}", v.display()),
            scored: 0,
            worst: 0.0,
            line: 0,
        });
        compare(
            f32_model,
            model.as_ref(),
            &fitted.features,
            v,
            false,
            |_| at,
            &mut worst,
        )?;
    }
    Ok(Quantised {
        blob: bytes,
        model,
        worst,
    })
}

/// Score every row of `path` with both models; with `refuse`, a row whose verdict differs is an
/// error naming its line.
fn compare(
    f: &dyn AnyModel,
    q: &dyn AnyModel,
    features: &[String],
    path: &Path,
    refuse: bool,
    which: impl Fn(u64) -> usize,
    worst: &mut [Worst],
) -> Result<()> {
    let opts = CsvOptions {
        delimiter: None,
        columns: Some(features.to_vec()),
        timestamp: None,
        label: None,
        skip_bad_rows: false,
        allow_missing: true,
        quiet: true,
    };
    let mut reader = Reader::open(path, &opts)?;
    let mut x = vec![0.0f32; features.len()];
    while let Some(row) = reader.next_row()? {
        for (d, s) in x.iter_mut().zip(row.values) {
            *d = to_device(*s);
        }
        let (Ok(a), Ok(b)) = (f.score(&x), q.score(&x)) else {
            continue;
        };
        if refuse && a.verdict != b.verdict {
            bail!(
                "--no-fpu: quantisation moves the verdict of {} line {}: f32 d² {} and fixed-point \
                 d² {} lie on either side of the threshold; this model cannot be scored in fixed \
                 point without changing what it says about its own baseline",
                path.display(),
                row.line,
                a.d2,
                b.d2
            );
        }
        if let Some(w) = worst.get_mut(which(row.line)) {
            let diff = (f64::from(b.d2) - f64::from(a.d2)).abs();
            w.scored += 1;
            if diff > w.worst || w.line == 0 {
                w.worst = w.worst.max(diff);
                w.line = row.line;
            }
        }
    }
    Ok(())
}
