//! After the fit: the core's `f32` score against the `f64` reference, and the held-out tail
//! scored through the core.

use std::path::Path;

use anyhow::Result;

use super::read::non_positive_log;
use super::standardise::Standardise;
use super::FitOptions;
use crate::data::ingest::{Layout, Reader};

/// Worst `|d²_f32 − d²_f64| / max(d²_f64, 1)` over `rows` (raw, row-major).
pub(super) fn f32_check(st: Standardise<'_>, rows: &[f64]) -> Result<f64> {
    let p = st.mean.len();
    crate::with_dim!(p, N => {
        let model = st.model::<N>()?;
        let mut worst = 0.0f64;
        let mut x = [0.0f32; N];
        for r in rows.chunks_exact(p) {
            for (xi, v) in x.iter_mut().zip(r) {
                *xi = *v as f32;
            }
            let reference = st.d2_f64(r);
            let rel = match model.score(&x) {
                Ok(s) => (f64::from(s.d2) - reference).abs() / reference.max(1.0),
                Err(_) => f64::INFINITY,
            };
            worst = worst.max(rel);
        }
        Ok(worst)
    })
    .expect("dimension checked before")
}

/// `ln` of the log features of a raw row.
pub(super) fn transform(raw: &[f64], log_mask: u32) -> Vec<f64> {
    raw.iter()
        .enumerate()
        .map(|(i, v)| if (log_mask >> i) & 1 == 1 { v.ln() } else { *v })
        .collect()
}

/// The held-out tail, scored.
pub(super) struct HoldoutOut {
    pub(super) d2: Vec<f32>,
    pub(super) lines: Vec<u64>,
    pub(super) skipped: u64,
    pub(super) reasons: Vec<String>,
    pub(super) faults: u64,
}

/// Score the held-out tail through the core, in time order.
pub(super) fn score_holdout(
    path: &Path,
    layout: &Layout,
    opts: &FitOptions,
    at: u64,
    first_line: u64,
    st: Standardise<'_>,
) -> Result<HoldoutOut> {
    let p = st.mean.len();
    let mut reader = Reader::range(path, layout, &opts.csv, at, u64::MAX, first_line)?;
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
        loop {
            let (line, bad) = match reader.next_row()? {
                None => break,
                Some(row) => {
                    for (xi, v) in x.iter_mut().zip(row.values) {
                        *xi = *v as f32;
                    }
                    (row.line, non_positive_log(layout, row.line, row.values, st.log_mask))
                }
            };
            if let Some(e) = bad {
                reader.skip_or_fail(e)?;
                continue;
            }
            // An unscorable held-out row stays in the stream as NaN, so that replaying the
            // hold-out through the alarm state machine sees the fault where the device would.
            match model.score(&x) {
                Ok(s) => out.d2.push(s.d2),
                Err(_) => {
                    out.d2.push(f32::NAN);
                    out.faults += 1;
                }
            }
            out.lines.push(line);
        }
        Ok::<(), anyhow::Error>(())
    })
    .expect("dimension checked before")?;
    out.skipped = reader.skipped();
    out.reasons = reader
        .skipped_reasons()
        .iter()
        .map(|e| e.to_string())
        .collect();
    Ok(out)
}
