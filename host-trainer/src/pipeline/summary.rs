//! What `fit` tells: the text summary, the JSON summary and the data of the HTML report.

use std::fmt::Write as _;

use crate::pipeline::train::{method_name, Trained, ROBUST_SHARE_WARN};
use crate::stats::threshold::{self, Method, SECONDS_PER_DAY};

/// A square matrix with numbered columns (the rows carry the names), so wide names stay readable.
fn fmt_matrix(s: &mut String, names: &[String], m: &[f64], digits: usize) {
    let n = names.len();
    let name_w = names.iter().map(|x| x.len()).max().unwrap_or(4) + 5;
    let w = digits + 4;
    let _ = write!(s, "    {:name_w$}", "");
    for j in 1..=n {
        let _ = write!(s, " {:>w$}", format!("[{j}]"));
    }
    s.push('\n');
    for (i, (name, row)) in names.iter().zip(m.chunks(n.max(1))).enumerate() {
        let label = format!("[{}] {name}", i + 1);
        let _ = write!(s, "    {label:name_w$}");
        for v in row {
            let _ = write!(s, " {v:>w$.digits$}");
        }
        s.push('\n');
    }
}

/// A p-value for people: below what f64 can resolve next to 1, say so instead of printing 0.
fn fmt_p(p: f64) -> String {
    if p < 1e-16 {
        "p < 1e-16".into()
    } else {
        format!("p = {p:.2e}")
    }
}

/// The human-readable summary of a fit, section by section.
pub fn summary_text(t: &Trained) -> String {
    let mut s = String::new();
    rows_section(&mut s, t);
    features_section(&mut s, t);
    diagnostics_section(&mut s, t);
    threshold_section(&mut s, t);
    holdout_section(&mut s, t);
    blob_section(&mut s, t);
    s
}

/// The summary of one mode of a bank: [`summary_text`] without the blob (the bank has one).
pub fn mode_summary_text(t: &Trained) -> String {
    let mut s = String::new();
    rows_section(&mut s, t);
    features_section(&mut s, t);
    diagnostics_section(&mut s, t);
    threshold_section(&mut s, t);
    holdout_section(&mut s, t);
    s
}

/// Rows used, skipped and held out; warnings; the estimator.
fn rows_section(s: &mut String, t: &Trained) {
    let f = &t.fitted;
    let n = f.features.len();
    let _ = writeln!(
        s,
        "Fitted {} features from {}: {} rows used, {} skipped, {} held out.",
        n, t.baseline, f.rows_used, f.rows_skipped, f.rows_holdout
    );
    for r in &f.skipped_reasons {
        let _ = writeln!(s, "  skipped: {r}");
    }
    for w in &f.warnings {
        let _ = writeln!(s, "  warning: {w}");
    }
    if let Some((method, intensity)) = &f.shrinkage {
        let _ = writeln!(s, "  covariance: {method}, intensity {intensity:.4}");
    }
    if let Some(r) = &f.robust {
        let _ = writeln!(
            s,
            "  robust fit (FAST-MCD): {} rows set aside as outliers{}",
            r.set_aside_lines.len(),
            if r.set_aside_lines.is_empty() {
                String::new()
            } else {
                let shown: Vec<String> = r
                    .set_aside_lines
                    .iter()
                    .take(12)
                    .map(|l| l.to_string())
                    .collect();
                format!(
                    " (lines {}{})",
                    shown.join(", "),
                    if r.set_aside_lines.len() > 12 {
                        ", …"
                    } else {
                        ""
                    }
                )
            }
        );
        let total = r.rows_kept + r.set_aside_lines.len() as u64;
        let share = r.set_aside_lines.len() as f64 / total.max(1) as f64;
        // On clean Gaussian data the 0.975 reweighting sets aside about 2.5 % of the rows.
        if share > ROBUST_SHARE_WARN {
            let _ = writeln!(
                s,
                "    that is {:.0} % of the rows, far more than the ~2.5 % a clean Gaussian baseline loses: \
                 the baseline is probably not elliptical (several operating modes?), and a robust fit \
                 of it may not describe healthy operation",
                100.0 * share
            );
        }
    }
}

/// Per-feature statistics and the correlation matrix.
fn features_section(s: &mut String, t: &Trained) {
    let f = &t.fitted;
    let n = f.features.len();
    s.push('\n');
    let w = f.features.iter().map(|x| x.len()).max().unwrap_or(8).max(8);
    let _ = writeln!(
        s,
        "  {:<w$}  {:>5}  {:>14}  {:>12}  {:>9}  {:>9}",
        "feature", "log", "mean", "sd", "skewness", "ex.kurt"
    );
    for i in 0..n {
        let _ = writeln!(
            s,
            "  {:<w$}  {:>5}  {:>14.6}  {:>12.6}  {:>9.3}  {:>9.3}",
            f.features[i],
            if (f.log_mask >> i) & 1 == 1 {
                "yes"
            } else {
                "no"
            },
            f.mean[i],
            f.sd[i],
            f.diagnostics.skewness.get(i).copied().unwrap_or(f64::NAN),
            f.diagnostics
                .excess_kurtosis
                .get(i)
                .copied()
                .unwrap_or(f64::NAN),
        );
    }
    let _ = writeln!(s, "\n  correlation matrix:");
    fmt_matrix(s, &f.features, &f.corr, 3);
    let _ = writeln!(
        s,
        "  condition number of the correlation matrix: {:.1}",
        f.condition_number
    );
}

/// Gaussianity checks, log suggestions and the f32-against-f64 check.
fn diagnostics_section(s: &mut String, t: &Trained) {
    let f = &t.fitted;
    let d = &f.diagnostics;
    let _ = writeln!(
        s,
        "  Mardia's tests: skewness statistic {:.1} over {} rows, {}; kurtosis z = {:.2} over {} rows, {}",
        d.mardia_skewness.statistic,
        d.mardia_skewness_rows,
        fmt_p(d.mardia_skewness.p_value),
        d.mardia_kurtosis.df_or_z,
        d.rows,
        fmt_p(d.mardia_kurtosis.p_value)
    );
    if d.mardia_skewness.p_value < 0.01 || d.mardia_kurtosis.p_value < 0.01 {
        let _ = writeln!(
            s,
            "    the baseline is not multivariate normal, so the Gaussian false-alarm figures below \
             are approximate: check them against the hold-out"
        );
    }
    for name in &d.log_suggestions {
        let _ = writeln!(
            s,
            "  suggestion: `{name}` is positive and right-skewed; try --log {name}"
        );
    }
    let _ = writeln!(
        s,
        "  worst relative difference, core f32 d² vs f64 d², over the baseline rows checked: {:.2e}",
        f.f32_vs_f64_worst_rel
    );
}

/// Every candidate threshold, the chosen one, the policy and the promised rates.
fn threshold_section(s: &mut String, t: &Trained) {
    let n = t.fitted.features.len();
    s.push('\n');
    let c = &t.candidates;
    let pr = &t.promise;
    let _ = writeln!(
        s,
        "Threshold on d² (target: α = {:.3e} per reading = {:.3} false readings a day at {} Hz):",
        c.alpha,
        c.alpha * SECONDS_PER_DAY * t.rate_hz,
        threshold::hz(t.rate_hz)
    );
    sizes_lines(s, t);
    let level = 100.0 * pr.confidence;
    let _ = writeln!(
        s,
        "  {:<34} {:>10}  {:>16}  {:>20}",
        "candidate",
        "d²",
        "expected a day",
        format!("at most a day ({level:.0} %)")
    );
    for (name, value, expected, at_most) in &pr.candidates {
        let method = match name.as_str() {
            "hotelling" => Method::Hotelling,
            "confidence" => Method::Confidence,
            "chi-square" => Method::ChiSquare,
            "empirical" => Method::Empirical,
            _ => Method::F1,
        };
        let label = match method {
            Method::Hotelling
                if t.promise
                    .simulation
                    .as_ref()
                    .is_some_and(|m| m.kind == "simulated-refits") =>
            {
                "hotelling (simulated refits)".to_string()
            }
            Method::Hotelling => "hotelling (Phase II, F limit)".to_string(),
            Method::Confidence => format!("confidence ({level:.0} % of baselines)"),
            Method::ChiSquare => format!("chi-square({n}) (known mean, cov.)"),
            Method::Empirical => "empirical hold-out quantile".to_string(),
            Method::F1 => format!("F1-optimal (F1 {:.3})", c.f1.map_or(f64::NAN, |f| f.1)),
        };
        let _ = writeln!(
            s,
            "  {label:<34} {value:>10.4}  {expected:>16.3}  {at_most:>20.3}{}",
            if method == t.method {
                "  <- chosen"
            } else {
                ""
            }
        );
    }
    if let Some(why) = &c.hotelling_problem {
        let _ = writeln!(s, "  finite-sample limit: none: {why}");
    }
    match &c.empirical {
        Some(e) if e.value.is_none() => {
            let _ = writeln!(
                s,
                "  empirical hold-out quantile: none: at α = {:.2e} it needs at least {} held-out rows ({} at {} Hz), the hold-out has {}",
                c.alpha,
                e.needed,
                threshold::duration_words(e.needed as f64 / t.rate_hz),
                threshold::hz(t.rate_hz),
                e.n
            );
        }
        Some(_) => {}
        None => {
            let _ = writeln!(s, "  empirical hold-out quantile: (no hold-out)");
        }
    }
    if c.f1.is_none() {
        let _ = writeln!(s, "  F1-optimal on validation: (no --validation file)");
    }
    let chosen = f64::from(t.thresholds.alarm);
    let _ = writeln!(
        s,
        "  alarm when d² > {:.4} for {} reading(s) in a row; clear below {:.4} for {}{}",
        chosen,
        t.policy.raise_after,
        t.thresholds.clear,
        t.policy.clear_after,
        if t.policy.latch { "; latched" } else { "" }
    );
    let _ = writeln!(
        s,
        "  false readings a day above it at {} Hz (before the raise-after debounce): expected {:.3} (the mean over \
         baselines like this one); at most {:.3} a day with {level:.0} % confidence for this baseline",
        threshold::hz(t.rate_hz),
        pr.expected_per_day,
        pr.at_most_per_day
    );
    length_lines(s, t);
}

/// m, the time correlation and the effective sizes; how the limit was worked out.
fn sizes_lines(s: &mut String, t: &Trained) {
    let pr = &t.promise;
    let lag = &pr.lag1;
    if lag.is_empty() || !pr.time_correlation_used {
        let _ = writeln!(
            s,
            "  m = {} rows fitted{}",
            pr.m,
            if pr.time_correlation_used {
                ""
            } else {
                ", treated as independent (--independent-rows)"
            }
        );
    } else {
        let lo = lag.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = lag.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let _ = writeln!(
            s,
            "  m = {} rows fitted; lag-1 autocorrelation of the features {:.2} to {:.2}, so they count as {:.0} \
             independent rows for the mean and {:.0} for the covariance (effective m, Bayley–Hammersley)",
            pr.m,
            lo,
            hi,
            pr.sizes.m_mean,
            pr.sizes.m_cov()
        );
    }
    if let Some(sim) = &pr.simulation {
        if sim.kind == "simulated-refits" {
            let _ = writeln!(
                s,
                "  limits calibrated by {} simulated baselines of {} rows drawn from the fitted Gaussian and refitted \
                 with {} (seed {:#x}; Monte-Carlo standard error of the expected rate {:.1} %)",
                sim.baselines,
                sim.rows_each,
                sim.estimator,
                sim.seed,
                100.0 * sim.relative_standard_error
            );
        } else {
            let _ = writeln!(
                s,
                "  expected rates from the Phase II Hotelling (F) distribution; the {:.0} % figures from {} simulated \
                 baselines (seed {:#x})",
                100.0 * pr.confidence,
                sim.baselines,
                sim.seed
            );
        }
    }
}

/// The baseline-length check.
fn length_lines(s: &mut String, t: &Trained) {
    let pr = &t.promise;
    let parts: Vec<String> = pr
        .lengths
        .iter()
        .map(|l| {
            if l.rows_fitted.is_finite() {
                format!(
                    "within {}× from {:.0} rows fitted ({:.0} logged with the {:.0} % hold-out, {} at {} Hz): {}",
                    l.within,
                    l.rows_fitted,
                    pr.rows_logged(l),
                    100.0 * pr.holdout,
                    threshold::duration_words(pr.rows_logged(l) / t.rate_hz),
                    threshold::hz(t.rate_hz),
                    if l.met { "met" } else { "not met" }
                )
            } else {
                format!("within {}×: beyond 10⁹ rows", l.within)
            }
        })
        .collect();
    if !parts.is_empty() {
        let _ = writeln!(
            s,
            "  baseline length for the {:.0} % figure to stay {}",
            100.0 * pr.confidence,
            parts.join("; ")
        );
    }
    if let Some(l) = pr.lengths.first().filter(|l| !l.met) {
        let _ = writeln!(
            s,
            "  warning: this baseline is short: with {} rows fitted, one baseline in {:.0} gives a model that alarms \
             more than {}× as often as the expected figure; log at least {:.0} rows ({}) for the promise to hold \
             within {}× (--strict-baseline refuses such a fit)",
            pr.m,
            1.0 / (1.0 - pr.confidence),
            l.within,
            pr.rows_logged(l),
            threshold::duration_words(pr.rows_logged(l) / t.rate_hz),
            l.within
        );
    }
}

/// The held-out baseline replayed through the alarm state machine.
fn holdout_section(s: &mut String, t: &Trained) {
    match &t.holdout {
        Some(h) => {
            let _ = writeln!(
                s,
                "  held-out baseline replayed through the alarm state machine: {} readings ({:.1} h), {} above ({:.3e}), {} alarms raised = {:.2} false alarms a day (95 % upper bound {:.1})",
                h.readings, h.hours, h.readings_above, h.fraction_above, h.alarms_raised, h.false_alarms_per_day, h.false_alarms_per_day_upper95
            );
            let target_day = t.candidates.alpha * SECONDS_PER_DAY * t.rate_hz;
            if h.alarms_raised == 0 && h.false_alarms_per_day_upper95 > 2.0 * target_day {
                let _ = writeln!(
                    s,
                    "    no alarm in {:.1} h bounds the rate only below {:.1} a day (95 %), which says little against a target \
                     of {:.3} a day: {} of hold-out with no alarm would be needed to show the target",
                    h.hours,
                    h.false_alarms_per_day_upper95,
                    target_day,
                    threshold::duration_words(3.0 / target_day * SECONDS_PER_DAY)
                );
            }
            if !h.alarm_lines.is_empty() {
                let shown: Vec<String> = h.alarm_lines.iter().map(u64::to_string).collect();
                let _ = writeln!(
                    s,
                    "    false alarms raised at lines {}{} of {}",
                    shown.join(", "),
                    if h.alarms_raised as usize > h.alarm_lines.len() {
                        ", …"
                    } else {
                        ""
                    },
                    t.baseline
                );
            }
        }
        None => {
            let _ = writeln!(
                s,
                "  no hold-out: the policy's real false-alarm rate is not measured (give --holdout)"
            );
        }
    }
    if t.method == Method::Empirical && t.holdout.is_some() {
        let _ = writeln!(
            s,
            "    (the empirical threshold was taken from these same held-out rows, so this check is not \
             independent and flatters the threshold: judge it on a later log with `evaluate`)"
        );
    }
}

/// The blob's size and identity.
fn blob_section(s: &mut String, t: &Trained) {
    let _ = writeln!(
        s,
        "\nBlob: {} bytes (model id {:#010x}, sequence {}); decoded on the device it takes {} bytes of RAM.",
        t.blob.len(),
        t.model.params().meta.model_id,
        t.model.params().meta.sequence,
        t.model.ram_bytes()
    );
}

/// The JSON summary.
pub fn summary_json(t: &Trained) -> serde_json::Value {
    let f = &t.fitted;
    serde_json::json!({
        "baseline": t.baseline,
        "features": f.features,
        "log_features": t.card.log_features,
        "rows_used": f.rows_used,
        "rows_skipped": f.rows_skipped,
        "skipped_reasons": f.skipped_reasons,
        "rows_holdout": f.rows_holdout,
        "mean": f.mean,
        "sd": f.sd,
        "covariance": f.cov,
        "correlation": f.corr,
        "condition_number": f.condition_number,
        "shrinkage": f.shrinkage,
        "robust_set_aside_lines": f.robust.as_ref().map(|r| r.set_aside_lines.clone()),
        "diagnostics": f.diagnostics,
        "f32_vs_f64_worst_relative_difference": f.f32_vs_f64_worst_rel,
        "warnings": f.warnings,
        "threshold": {
            "method": method_name(t.method),
            "alarm": t.thresholds.alarm,
            "clear": t.thresholds.clear,
            "candidates": t.candidates,
            "promise": t.promise,
            "expected_false_readings_per_day": t.promise.expected_per_day,
            "at_most_false_readings_per_day": t.promise.at_most_per_day,
            "confidence": t.promise.confidence,
        },
        "policy": {
            "raise_after": t.policy.raise_after,
            "clear_after": t.policy.clear_after,
            "latch": t.policy.latch,
        },
        "rate_hz": t.rate_hz,
        "holdout_check": t.holdout,
        "blob_bytes": t.blob.len(),
        "model_id": t.model.params().meta.model_id,
        "sequence": t.model.params().meta.sequence,
        "decoded_model_ram_bytes": t.model.ram_bytes(),
    })
}
