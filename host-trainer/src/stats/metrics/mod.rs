//! Evaluation against labels: the confusion matrix, ROC and PR areas, the F1-optimal threshold,
//! detection delays and false alarms per day.
//!
//! Two views of the same stream are measured:
//!
//! * **per reading**: a reading is predicted anomalous when its verdict is above the alarm
//!   threshold *or* it could not be scored (a fault is never "normal");
//! * **after the policy**: a reading is predicted anomalous while the alarm line *or* the fault
//!   line of the alarm state machine is on. This is what an operator sees.
//!
//! Labelled events are the maximal runs of anomalous labels. False alarms after the policy are
//! rises of the (alarm or fault) line that start outside every labelled event, so an alarm that is
//! raised during an event and stays on a little after it is not counted twice.
//!
//! All slices passed together must have the same length; the functions panic otherwise (see each
//! `# Panics`), because a length mismatch is a bug in the caller, not a property of the data.

use std::fmt;

/// Counts of a binary prediction against the truth (positive = anomalous).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize)]
pub struct Confusion {
    /// Predicted anomalous, labelled anomalous.
    pub tp: u64,
    /// Predicted anomalous, labelled normal.
    pub fp: u64,
    /// Predicted normal, labelled normal.
    pub tn: u64,
    /// Predicted normal, labelled anomalous.
    pub fn_: u64,
}

fn ratio(num: u64, den: u64) -> Option<f64> {
    (den > 0).then(|| num as f64 / den as f64)
}

impl Confusion {
    /// Count `pred` against `truth`, element by element.
    ///
    /// # Panics
    /// If the slices differ in length.
    pub fn from_flags(pred: &[bool], truth: &[bool]) -> Self {
        assert_eq!(pred.len(), truth.len(), "prediction and truth lengths");
        let mut c = Confusion::default();
        for (&p, &t) in pred.iter().zip(truth) {
            match (p, t) {
                (true, true) => c.tp += 1,
                (true, false) => c.fp += 1,
                (false, false) => c.tn += 1,
                (false, true) => c.fn_ += 1,
            }
        }
        c
    }

    /// `tp / (tp + fp)`; `None` when nothing was predicted anomalous.
    pub fn precision(&self) -> Option<f64> {
        ratio(self.tp, self.tp + self.fp)
    }

    /// `tp / (tp + fn)`; `None` when nothing is labelled anomalous.
    pub fn recall(&self) -> Option<f64> {
        ratio(self.tp, self.tp + self.fn_)
    }

    /// `2 tp / (2 tp + fp + fn)`, the harmonic mean of precision and recall; `None` when there
    /// are no predicted and no labelled anomalies.
    pub fn f1(&self) -> Option<f64> {
        ratio(2 * self.tp, 2 * self.tp + self.fp + self.fn_)
    }

    /// Number of readings counted.
    pub fn total(&self) -> u64 {
        self.tp + self.fp + self.tn + self.fn_
    }
}

/// NaN ranks as the highest score (like a reading that could not be scored).
fn rank_key(x: f64) -> f64 {
    if x.is_nan() {
        f64::INFINITY
    } else {
        x
    }
}

/// `(score, positives, negatives)` for each distinct score, highest score first.
fn distinct_desc(scores: &[f64], truth: &[bool]) -> Vec<(f64, u64, u64)> {
    assert_eq!(scores.len(), truth.len(), "score and truth lengths");
    let mut pairs: Vec<(f64, bool)> = scores
        .iter()
        .map(|&s| rank_key(s))
        .zip(truth.iter().copied())
        .collect();
    pairs.sort_by(|a, b| b.0.total_cmp(&a.0));
    let mut out: Vec<(f64, u64, u64)> = Vec::new();
    for (s, t) in pairs {
        match out.last_mut() {
            // `==` also joins -0.0 and 0.0, which `total_cmp` keeps apart.
            Some(last) if last.0 == s => {
                if t {
                    last.1 += 1
                } else {
                    last.2 += 1
                }
            }
            _ => out.push((s, u64::from(t), u64::from(!t))),
        }
    }
    out
}

/// Area under the ROC curve, computed as the Mann–Whitney statistic with midranks for ties:
/// the probability that a random anomalous reading scores higher than a random normal one, ties
/// counting one half. Higher score = more anomalous; NaN ranks highest, `+∞` is allowed.
///
/// `None` when either class is empty.
///
/// # Panics
/// If the slices differ in length.
pub fn roc_auc(scores: &[f64], truth: &[bool]) -> Option<f64> {
    let groups = distinct_desc(scores, truth);
    let pos: u64 = groups.iter().map(|g| g.1).sum();
    let neg: u64 = groups.iter().map(|g| g.2).sum();
    if pos == 0 || neg == 0 {
        return None;
    }
    // Walk from the highest score: each positive beats the negatives below its group and ties
    // with those inside it.
    let mut neg_above = 0u64;
    let mut wins = 0.0f64;
    for &(_, p, n) in &groups {
        let neg_below = neg - neg_above - n;
        wins += p as f64 * (neg_below as f64 + 0.5 * n as f64);
        neg_above += n;
    }
    Some(wins / (pos as f64 * neg as f64))
}

/// Area under the precision–recall curve as **average precision**:
/// `AP = Σₖ (Rₖ − Rₖ₋₁) · Pₖ`, where `k` runs over the distinct scores from the highest down,
/// `Pₖ` and `Rₖ` are the precision and recall of predicting "score ≥ kth distinct score", and
/// `R₀ = 0`. No interpolation (a step function, not the trapezoid rule). Ties are one step.
///
/// `None` when nothing is labelled anomalous.
///
/// # Panics
/// If the slices differ in length.
pub fn pr_auc(scores: &[f64], truth: &[bool]) -> Option<f64> {
    let groups = distinct_desc(scores, truth);
    let pos: u64 = groups.iter().map(|g| g.1).sum();
    if pos == 0 {
        return None;
    }
    let (mut tp, mut fp) = (0u64, 0u64);
    let mut ap = 0.0;
    for &(_, p, n) in &groups {
        tp += p;
        fp += n;
        if p > 0 {
            ap += (p as f64 / pos as f64) * (tp as f64 / (tp + fp) as f64);
        }
    }
    Some(ap)
}

/// The threshold that maximises F1 when a reading is predicted anomalous if `score > threshold`,
/// and that F1.
///
/// Every cut between two distinct scores is tried. The returned threshold is the highest score
/// still predicted normal at the best cut (so the rule `score > threshold` reproduces the cut
/// exactly), or `-∞` when the best cut predicts every reading anomalous. Among equal F1 the highest
/// threshold (fewest alarms) wins.
///
/// `None` when nothing is labelled anomalous.
///
/// # Panics
/// If the slices differ in length.
pub fn f1_optimal_threshold(scores: &[f64], truth: &[bool]) -> Option<(f64, f64)> {
    let groups = distinct_desc(scores, truth);
    let pos: u64 = groups.iter().map(|g| g.1).sum();
    if pos == 0 {
        return None;
    }
    let (mut tp, mut fp) = (0u64, 0u64);
    let mut best: Option<(f64, f64)> = None;
    for (k, &(_, p, n)) in groups.iter().enumerate() {
        tp += p;
        fp += n;
        let f1 = 2.0 * tp as f64 / (2 * tp + fp + (pos - tp)) as f64;
        let thr = groups.get(k + 1).map_or(f64::NEG_INFINITY, |g| g.0);
        if best.is_none_or(|(_, b)| f1 > b) {
            best = Some((thr, f1));
        }
    }
    best
}

/// One labelled event and when the alarm first caught it.
#[derive(Clone, Debug, PartialEq, Eq, serde::Serialize)]
pub struct EventDetection {
    /// First reading of the event.
    pub start: usize,
    /// One past its last reading.
    pub end: usize,
    /// First reading inside the event with the alarm on, if any.
    pub detected_at: Option<usize>,
    /// `detected_at − start`, in readings.
    pub delay: Option<usize>,
}

/// The maximal runs of `true`, as `[start, end)` pairs in order.
pub fn label_events(truth: &[bool]) -> Vec<(usize, usize)> {
    let mut events = Vec::new();
    let mut start = None;
    for (i, &t) in truth.iter().enumerate() {
        match (t, start) {
            (true, None) => start = Some(i),
            (false, Some(s)) => {
                events.push((s, i));
                start = None;
            }
            _ => {}
        }
    }
    if let Some(s) = start {
        events.push((s, truth.len()));
    }
    events
}

/// For each labelled event, the first reading inside it with `alarm` on. An alarm that was
/// already on when the event began detects it at its first reading (delay 0).
///
/// # Panics
/// If the slices differ in length.
pub fn detection_delays(alarm: &[bool], truth: &[bool]) -> Vec<EventDetection> {
    assert_eq!(alarm.len(), truth.len(), "alarm and truth lengths");
    label_events(truth)
        .into_iter()
        .map(|(start, end)| {
            let detected_at = (start..end).find(|&i| alarm[i]);
            EventDetection {
                start,
                end,
                detected_at,
                delay: detected_at.map(|d| d - start),
            }
        })
        .collect()
}

/// Rises of `alarm` (off → on; a stream that starts with the alarm on rises at reading 0) at a
/// reading labelled normal, that is, alarms that start outside every labelled event.
///
/// # Panics
/// If the slices differ in length.
pub fn false_alarms(alarm: &[bool], truth: &[bool]) -> u64 {
    assert_eq!(alarm.len(), truth.len(), "alarm and truth lengths");
    let mut prev = false;
    let mut count = 0;
    for (&a, &t) in alarm.iter().zip(truth) {
        if a && !prev && !t {
            count += 1;
        }
        prev = a;
    }
    count
}

/// `count` scaled to one day of normal operation: `count · 86 400 · rate_hz / normal_readings`.
/// NaN when there were no normal readings (no rate can be given).
pub fn per_day(count: u64, normal_readings: u64, rate_hz: f64) -> f64 {
    if normal_readings == 0 {
        return f64::NAN;
    }
    count as f64 * 86_400.0 * rate_hz / normal_readings as f64
}

/// The per-reading view: every reading judged on its own.
#[derive(Clone, Debug, serde::Serialize)]
pub struct PerReading {
    /// Predicted = verdict above the alarm threshold or not scored.
    pub confusion: Confusion,
    /// See [`Confusion::precision`].
    pub precision: Option<f64>,
    /// See [`Confusion::recall`].
    pub recall: Option<f64>,
    /// See [`Confusion::f1`].
    pub f1: Option<f64>,
    /// [`roc_auc`] of d², with unscored readings as `+∞`.
    pub roc_auc: Option<f64>,
    /// [`pr_auc`] (average precision) of d², with unscored readings as `+∞`.
    pub pr_auc: Option<f64>,
    /// False-positive readings scaled to a day of normal readings ([`per_day`]).
    pub false_positives_per_day: f64,
}

/// The view after the alarm policy: the alarm and fault lines an operator sees.
#[derive(Clone, Debug, serde::Serialize)]
pub struct AfterPolicy {
    /// Predicted = alarm line or fault line on.
    pub confusion: Confusion,
    /// See [`Confusion::precision`].
    pub precision: Option<f64>,
    /// See [`Confusion::recall`].
    pub recall: Option<f64>,
    /// See [`Confusion::f1`].
    pub f1: Option<f64>,
    /// Each labelled event and when the (alarm or fault) line first caught it.
    pub events: Vec<EventDetection>,
    /// Events caught at all.
    pub events_detected: usize,
    /// Median delay of the caught events, in seconds.
    pub median_delay_s: Option<f64>,
    /// Longest delay of the caught events, in seconds.
    pub max_delay_s: Option<f64>,
    /// Rises of the (alarm or fault) line that start outside every labelled event.
    pub false_alarms: u64,
    /// [`Self::false_alarms`] scaled to a day of normal readings.
    pub false_alarms_per_day: f64,
}

/// Everything [`evaluate`] measures.
#[derive(Clone, Debug, serde::Serialize)]
pub struct Evaluation {
    /// Readings in the stream.
    pub readings: u64,
    /// Readings labelled normal.
    pub normal_readings: u64,
    /// Readings labelled anomalous.
    pub anomalous_readings: u64,
    /// Readings that could not be scored (faults).
    pub unscored: u64,
    /// Unscored readings labelled normal (each also counts as a false positive).
    pub unscored_labelled_normal: u64,
    /// Readings per second.
    pub rate_hz: f64,
    /// Every reading judged on its own.
    pub per_reading: PerReading,
    /// After the alarm policy.
    pub after_policy: AfterPolicy,
}

/// Evaluate a scored stream against its labels.
///
/// * `d2`: the core's score of each reading, `None` when it could not be scored (a fault);
/// * `verdict_above`: the core's per-reading verdict (d² above the alarm threshold);
/// * `alarm`, `fault`: the alarm state machine's two lines after each reading;
/// * `truth`: the labels (true = anomalous); `rate_hz`: readings per second.
///
/// # Panics
/// If the slices differ in length.
pub fn evaluate(
    d2: &[Option<f32>],
    verdict_above: &[bool],
    alarm: &[bool],
    fault: &[bool],
    truth: &[bool],
    rate_hz: f64,
) -> Evaluation {
    let n = truth.len();
    for (name, len) in [
        ("d2", d2.len()),
        ("verdict_above", verdict_above.len()),
        ("alarm", alarm.len()),
        ("fault", fault.len()),
    ] {
        assert_eq!(len, n, "{name} has {len} entries for {n} labels");
    }
    let normal = truth.iter().filter(|&&t| !t).count() as u64;
    let unscored = d2.iter().filter(|d| d.is_none()).count() as u64;
    let unscored_normal = d2
        .iter()
        .zip(truth)
        .filter(|(d, &t)| d.is_none() && !t)
        .count() as u64;

    let pred: Vec<bool> = d2
        .iter()
        .zip(verdict_above)
        .map(|(d, &above)| above || d.is_none())
        .collect();
    let scores: Vec<f64> = d2
        .iter()
        .map(|d| d.map_or(f64::INFINITY, f64::from))
        .collect();
    let c = Confusion::from_flags(&pred, truth);
    let per_reading = PerReading {
        confusion: c,
        precision: c.precision(),
        recall: c.recall(),
        f1: c.f1(),
        roc_auc: roc_auc(&scores, truth),
        pr_auc: pr_auc(&scores, truth),
        false_positives_per_day: per_day(c.fp, normal, rate_hz),
    };

    let line: Vec<bool> = alarm.iter().zip(fault).map(|(&a, &f)| a || f).collect();
    let c = Confusion::from_flags(&line, truth);
    let events = detection_delays(&line, truth);
    let mut delays: Vec<f64> = events
        .iter()
        .filter_map(|e| e.delay)
        .map(|d| d as f64 / rate_hz)
        .collect();
    delays.sort_by(f64::total_cmp);
    let median_delay_s = (!delays.is_empty()).then(|| {
        let m = delays.len() / 2;
        if delays.len() % 2 == 1 {
            delays[m]
        } else {
            0.5 * (delays[m - 1] + delays[m])
        }
    });
    let fa = false_alarms(&line, truth);
    let after_policy = AfterPolicy {
        confusion: c,
        precision: c.precision(),
        recall: c.recall(),
        f1: c.f1(),
        events_detected: delays.len(),
        median_delay_s,
        max_delay_s: delays.last().copied(),
        events,
        false_alarms: fa,
        false_alarms_per_day: per_day(fa, normal, rate_hz),
    };
    Evaluation {
        readings: n as u64,
        normal_readings: normal,
        anomalous_readings: n as u64 - normal,
        unscored,
        unscored_labelled_normal: unscored_normal,
        rate_hz,
        per_reading,
        after_policy,
    }
}

/// `Some(x)` as a number with `digits` decimals, `None` as "n/a".
fn opt(x: Option<f64>, digits: usize) -> String {
    x.map_or_else(|| "n/a".to_owned(), |v| format!("{v:.digits$}"))
}

fn confusion_line(c: &Confusion) -> String {
    format!("TP {}  FP {}  TN {}  FN {}", c.tp, c.fp, c.tn, c.fn_)
}

impl fmt::Display for Evaluation {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let hours = self.readings as f64 / self.rate_hz / 3600.0;
        writeln!(
            f,
            "{} readings ({hours:.2} h at {} Hz): {} labelled normal, {} anomalous; {} could not be scored ({} of them labelled normal)",
            self.readings,
            crate::stats::threshold::hz(self.rate_hz),
            self.normal_readings,
            self.anomalous_readings,
            self.unscored,
            self.unscored_labelled_normal
        )?;
        let p = &self.per_reading;
        writeln!(f, "per reading (above the alarm threshold, or not scored):")?;
        writeln!(f, "  {}", confusion_line(&p.confusion))?;
        writeln!(
            f,
            "  precision {}  recall {}  F1 {}",
            opt(p.precision, 3),
            opt(p.recall, 3),
            opt(p.f1, 3)
        )?;
        writeln!(
            f,
            "  ROC AUC {}  PR AUC (average precision) {}",
            opt(p.roc_auc, 4),
            opt(p.pr_auc, 4)
        )?;
        writeln!(
            f,
            "  false-positive readings per day of normal operation: {:.1}",
            p.false_positives_per_day
        )?;
        let a = &self.after_policy;
        writeln!(f, "after the alarm policy (alarm or fault line on):")?;
        writeln!(f, "  {}", confusion_line(&a.confusion))?;
        writeln!(
            f,
            "  precision {}  recall {}  F1 {}",
            opt(a.precision, 3),
            opt(a.recall, 3),
            opt(a.f1, 3)
        )?;
        writeln!(
            f,
            "  events caught {} of {}; delay median {} s, longest {} s",
            a.events_detected,
            a.events.len(),
            opt(a.median_delay_s, 0),
            opt(a.max_delay_s, 0)
        )?;
        for e in &a.events {
            let caught = match (e.detected_at, e.delay) {
                (Some(at), Some(d)) => format!(
                    "caught at reading {at} after {:.0} s",
                    d as f64 / self.rate_hz
                ),
                _ => "missed".to_owned(),
            };
            writeln!(
                f,
                "    readings {}..{} ({:.0} s): {caught}",
                e.start,
                e.end,
                (e.end - e.start) as f64 / self.rate_hz
            )?;
        }
        write!(
            f,
            "  false alarms (rises outside labelled events): {} = {:.2} per day",
            a.false_alarms, a.false_alarms_per_day
        )
    }
}

#[cfg(test)]
mod tests;
