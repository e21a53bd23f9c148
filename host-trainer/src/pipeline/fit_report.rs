//! The data of the fit's HTML report: the held-out baseline through the alarm state machine, the
//! thresholds, and the summary table.

use ellipsoid_core::{AlarmMachine, Scored, Verdict};

use crate::pipeline::train::{method_name, Trained};
use crate::report;
use crate::stats::threshold::Method;

/// The fit's HTML report.
pub fn report_data(t: &Trained) -> report::ReportData {
    let f = &t.fitted;
    let c = &t.candidates;
    let mut others = vec![("chi-square".to_string(), c.chi_square)];
    if let Some(v) = c.hotelling.filter(|_| t.method != Method::Hotelling) {
        others.push(("hotelling".to_string(), v));
    }
    if let Some(v) = c.confidence.filter(|_| t.method != Method::Confidence) {
        others.push((format!("{:.0} % confidence", 100.0 * c.confidence_level), v));
    }
    if let Some(v) = c.empirical.and_then(|e| e.value) {
        others.push(("empirical".to_string(), v));
    }
    if let Some((thr, _)) = &c.f1 {
        others.push(("F1-optimal".to_string(), *thr));
    }
    let mut machine = AlarmMachine::new(t.thresholds, t.policy);
    let alarm: Vec<bool> = f
        .holdout_d2
        .iter()
        .map(|v| {
            machine
                .update(&Ok(Scored {
                    d2: *v,
                    verdict: if *v > t.thresholds.alarm {
                        Verdict::Above
                    } else {
                        Verdict::Below
                    },
                }))
                .alarm
        })
        .collect();
    report::ReportData {
        title: format!("Ellipsoid model of {}", t.baseline),
        subtitle: format!(
            "{} features, {} rows used, threshold by {}",
            f.features.len(),
            f.rows_used,
            method_name(t.method)
        ),
        features: f.features.clone(),
        summary: vec![
            ("rows used".into(), f.rows_used.to_string()),
            ("rows skipped".into(), f.rows_skipped.to_string()),
            ("rows held out".into(), f.rows_holdout.to_string()),
            (
                "condition number".into(),
                format!("{:.1}", f.condition_number),
            ),
            (
                "alarm threshold (d²)".into(),
                format!("{:.4} ({})", t.thresholds.alarm, method_name(t.method)),
            ),
            (
                "m (effective m: mean, covariance)".into(),
                format!(
                    "{} ({:.0}, {:.0})",
                    t.promise.m,
                    t.promise.sizes.m_mean,
                    t.promise.sizes.m_cov()
                ),
            ),
            (
                "expected false readings a day".into(),
                format!("{:.3}", t.promise.expected_per_day),
            ),
            (
                format!(
                    "at most, with {:.0} % confidence",
                    100.0 * t.promise.confidence
                ),
                format!("{:.3} a day", t.promise.at_most_per_day),
            ),
            (
                "baseline length check".into(),
                t.promise
                    .lengths
                    .iter()
                    .map(|l| {
                        format!(
                            "within {}×: {:.0} rows fitted needed, {}",
                            l.within,
                            l.rows_fitted,
                            if l.met { "met" } else { "not met" }
                        )
                    })
                    .collect::<Vec<_>>()
                    .join("; "),
            ),
            (
                "clear threshold (d²)".into(),
                format!("{:.4}", t.thresholds.clear),
            ),
            (
                "policy".into(),
                format!(
                    "raise after {}, clear after {}{}",
                    t.policy.raise_after,
                    t.policy.clear_after,
                    if t.policy.latch { ", latched" } else { "" }
                ),
            ),
            (
                "held-out false alarms a day".into(),
                t.holdout.as_ref().map_or("(no hold-out)".into(), |h| {
                    format!("{:.2}", h.false_alarms_per_day)
                }),
            ),
            ("blob".into(), format!("{} bytes", t.blob.len())),
        ],
        d2: f
            .holdout_d2
            .iter()
            .map(|v| v.is_finite().then_some(*v))
            .collect(),
        rate_hz: t.rate_hz,
        alarm_threshold: f64::from(t.thresholds.alarm),
        clear_threshold: f64::from(t.thresholds.clear),
        other_thresholds: others,
        alarm,
        baseline_d2: f
            .holdout_d2
            .iter()
            .filter(|v| v.is_finite())
            .map(|v| f64::from(*v))
            .collect(),
        qq: f.diagnostics.qq.clone(),
        corr: f.corr.clone(),
        ..Default::default()
    }
}
