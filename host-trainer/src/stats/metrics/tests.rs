//! Tests of [`super`].

use super::*;

const F: bool = false;
const T: bool = true;

fn flags(v: &[u8]) -> Vec<bool> {
    v.iter().map(|&x| x == 1).collect()
}

// Reference vectors. The expected values were produced once with scikit-learn 1.9.1 (numpy
// 2.4.6), by `roc_auc_score(t, s)`, `average_precision_score(t, s)` and
// `precision_recall_fscore_support(t, p, average="binary")`; the vectors t2, s2, p2 were drawn
// with `numpy.random.default_rng(20240501)` and s2 rounded to one decimal, so it has ties.
const S1: [f64; 10] = [0.1, 0.4, 0.35, 0.8, 0.35, 0.9, 0.2, 0.6, 0.6, 0.05];
const T1: [u8; 10] = [0, 0, 1, 1, 0, 1, 0, 1, 0, 0];
const T2: [u8; 40] = [
    1, 0, 1, 1, 0, 0, 0, 1, 0, 1, 1, 1, 1, 0, 0, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 0, 0, 0, 0, 0, 1, 1,
    0, 0, 1, 0, 0, 0, 1, 0,
];
const S2: [f64; 40] = [
    1.9, -0.1, 2.7, 2.2, 1.4, -0.4, 0.5, 2.5, -1.0, 1.1, 0.7, 1.4, 1.1, -0.3, 0.8, 0.5, 2.0, 0.7,
    -1.3, 1.4, 0.5, 1.6, -0.1, 1.1, 1.9, 0.1, -1.3, -0.3, 0.4, 1.0, 2.9, 1.7, 2.1, -0.4, 1.5, -0.4,
    -0.7, -1.7, -0.7, 1.4,
];
const P2: [u8; 40] = [
    0, 1, 0, 1, 1, 0, 0, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 1, 0, 1,
    1, 0, 0, 0, 0, 1, 0, 0,
];

fn close(a: f64, b: f64) {
    assert!((a - b).abs() < 1e-12, "{a} vs {b}");
}

#[test]
fn confusion_by_hand_and_against_scikit_learn() {
    let c = Confusion::from_flags(&[T, T, F, F, T], &[T, F, F, T, T]);
    assert_eq!(
        c,
        Confusion {
            tp: 2,
            fp: 1,
            tn: 1,
            fn_: 1
        }
    );
    close(c.precision().unwrap(), 2.0 / 3.0);
    close(c.recall().unwrap(), 2.0 / 3.0);
    close(c.f1().unwrap(), 2.0 / 3.0);
    assert_eq!(c.total(), 5);
    // Nothing predicted, nothing labelled: every ratio is undefined, not 0 or 1.
    let empty = Confusion::from_flags(&[F, F], &[F, F]);
    assert_eq!(
        (empty.precision(), empty.recall(), empty.f1()),
        (None, None, None)
    );
    // scikit-learn precision_recall_fscore_support(t2, p2, average="binary").
    let c = Confusion::from_flags(&flags(&P2), &flags(&T2));
    close(c.precision().unwrap(), 0.42857142857142855);
    close(c.recall().unwrap(), 0.375);
    close(c.f1().unwrap(), 0.4);
}

#[test]
fn roc_auc_with_ties_matches_hand_count_and_scikit_learn() {
    // By hand: positives 0.35, 0.8, 0.9, 0.6 beat 3.5, 6, 6 and 5.5 of the 6 negatives
    // (a tie counts one half): 21 / 24. scikit-learn roc_auc_score gives 0.875.
    close(roc_auc(&S1, &flags(&T1)).unwrap(), 0.875);
    // scikit-learn roc_auc_score(t2, s2).
    close(roc_auc(&S2, &flags(&T2)).unwrap(), 0.8515625);
    // The same with the first (positive) score replaced by a fault: scikit-learn was given
    // 1e300 there, which ranks the same as +∞.
    let mut s3 = S2;
    s3[0] = f64::INFINITY;
    close(roc_auc(&s3, &flags(&T2)).unwrap(), 0.8541666666666667);
    s3[0] = f64::NAN;
    close(roc_auc(&s3, &flags(&T2)).unwrap(), 0.8541666666666667);
    // Exact cases.
    assert_eq!(roc_auc(&[1.0, 2.0, 3.0], &[F, T, T]), Some(1.0));
    assert_eq!(roc_auc(&[3.0, 2.0, 1.0], &[F, T, T]), Some(0.0));
    assert_eq!(roc_auc(&[5.0; 4], &[F, T, F, T]), Some(0.5));
    assert_eq!(roc_auc(&[1.0, 2.0], &[T, T]), None);
    assert_eq!(roc_auc(&[], &[]), None);
}

#[test]
fn average_precision_matches_hand_count_and_scikit_learn() {
    // By hand for s1: distinct scores from the top 0.9 (T), 0.8 (T), 0.6 (T, F), 0.4 (F),
    // 0.35 (T, F): AP = ¼·1 + ¼·1 + ¼·(3/4) + ¼·(4/7) = 0.830357142857…
    // scikit-learn average_precision_score gives 0.8303571428571428.
    close(pr_auc(&S1, &flags(&T1)).unwrap(), 0.8303571428571428);
    close(pr_auc(&S2, &flags(&T2)).unwrap(), 0.805145202020202);
    let mut s3 = S2;
    s3[0] = f64::INFINITY;
    close(pr_auc(&s3, &flags(&T2)).unwrap(), 0.8144457972582972);
    assert_eq!(pr_auc(&[1.0, 2.0, 3.0], &[F, T, T]), Some(1.0));
    // All tied: one step to recall 1 at precision = prevalence.
    assert_eq!(pr_auc(&[1.0; 4], &[T, F, F, F]), Some(0.25));
    assert_eq!(pr_auc(&[1.0, 2.0], &[F, F]), None);
}

#[test]
fn f1_optimal_threshold_reproduces_its_cut() {
    // scikit-learn precision_recall_curve(t2, s2) has its best F1, 0.7647058823529411, at
    // "score >= 1.1"; the next lower distinct score is 1.0, so "score > 1.0" is the same cut.
    let (thr, f1) = f1_optimal_threshold(&S2, &flags(&T2)).unwrap();
    assert_eq!(thr, 1.0);
    close(f1, 0.7647058823529411);
    let pred: Vec<bool> = S2.iter().map(|&s| s > thr).collect();
    close(Confusion::from_flags(&pred, &flags(&T2)).f1().unwrap(), f1);
    // Separable by hand: the cut sits at the highest normal score.
    assert_eq!(
        f1_optimal_threshold(&[0.1, 0.7, 3.0, 5.0, 0.2], &[F, F, T, T, F]),
        Some((0.7, 1.0))
    );
    // Every reading anomalous: predict all, threshold −∞.
    assert_eq!(
        f1_optimal_threshold(&[1.0, 2.0], &[T, T]),
        Some((f64::NEG_INFINITY, 1.0))
    );
    assert_eq!(f1_optimal_threshold(&[1.0, 2.0], &[F, F]), None);
}

#[test]
fn events_delays_and_false_alarms_by_hand() {
    let truth = flags(&[0, 1, 1, 0, 0, 1, 1, 1, 0, 1]);
    assert_eq!(label_events(&truth), vec![(1, 3), (5, 8), (9, 10)]);
    assert_eq!(label_events(&[]), vec![]);
    assert_eq!(label_events(&[T, T]), vec![(0, 2)]);
    //                       0  1  2  3  4  5  6  7  8  9
    let alarm = flags(&[1, 1, 0, 0, 0, 0, 1, 1, 1, 0]);
    let d = detection_delays(&alarm, &truth);
    assert_eq!(d[0].detected_at, Some(1));
    assert_eq!(d[0].delay, Some(0));
    assert_eq!(d[1].detected_at, Some(6));
    assert_eq!(d[1].delay, Some(1));
    assert_eq!((d[2].detected_at, d[2].delay), (None, None));
    // Rise at 0 (normal): counted. Rise at 6 (inside an event) and the tail at 8: not.
    assert_eq!(false_alarms(&alarm, &truth), 1);
    assert_eq!(false_alarms(&flags(&[0, 1, 0, 1, 1]), &[F; 5]), 2);
    assert_eq!(false_alarms(&[F; 3], &[F; 3]), 0);
    // Two false alarms in 12 hours of normal readings at 1 Hz is 4 a day; at 2 Hz it is 8.
    assert_eq!(per_day(2, 43_200, 1.0), 4.0);
    assert_eq!(per_day(2, 43_200, 2.0), 8.0);
    assert!(per_day(1, 0, 1.0).is_nan());
}

#[test]
fn evaluate_counts_a_fault_as_anomalous_in_both_views() {
    // 10 readings at 1 Hz. Reading 7 could not be scored (labelled anomalous), reading 2 is a
    // fault on a normal-labelled reading, and one alarm rises at 4 outside any event.
    let d2 = [
        Some(1.0),
        Some(2.0),
        None,
        Some(1.5),
        Some(30.0),
        Some(3.0),
        Some(40.0),
        None,
        Some(50.0),
        Some(1.0),
    ];
    let truth = flags(&[0, 0, 0, 0, 0, 0, 1, 1, 1, 0]);
    let above: Vec<bool> = d2.iter().map(|d| d.is_some_and(|x| x > 20.0)).collect();
    let fault: Vec<bool> = d2.iter().map(|d| d.is_none()).collect();
    let alarm = flags(&[0, 0, 0, 0, 1, 0, 1, 1, 1, 1]);
    let e = evaluate(&d2, &above, &alarm, &fault, &truth, 1.0);
    assert_eq!(
        (e.readings, e.normal_readings, e.anomalous_readings),
        (10, 7, 3)
    );
    assert_eq!((e.unscored, e.unscored_labelled_normal), (2, 1));
    // Per reading: predicted 2, 4, 6, 7, 8.
    assert_eq!(
        e.per_reading.confusion,
        Confusion {
            tp: 3,
            fp: 2,
            tn: 5,
            fn_: 0
        }
    );
    close(e.per_reading.false_positives_per_day, 2.0 * 86_400.0 / 7.0);
    // Faults score +∞: the anomalies rank above every normal reading except the fault at 2.
    // Positives 40, ∞, 50 against normals 1, 2, ∞, 1.5, 30, 3, 1: 6 + 6.5 + 6 = 18.5 of 21.
    close(e.per_reading.roc_auc.unwrap(), 18.5 / 21.0);
    // After the policy: line = alarm or fault = 2, 4, 6, 7, 8, 9.
    let a = &e.after_policy;
    assert_eq!(
        a.confusion,
        Confusion {
            tp: 3,
            fp: 3,
            tn: 4,
            fn_: 0
        }
    );
    assert_eq!(a.events.len(), 1);
    assert_eq!(a.events[0].delay, Some(0));
    assert_eq!(a.events_detected, 1);
    assert_eq!(a.median_delay_s, Some(0.0));
    // Rises at 2 (fault) and 4; the tail at 9 continues the event's alarm.
    assert_eq!(a.false_alarms, 2);
    let text = e.to_string();
    assert!(text.contains("TP 3  FP 2  TN 5  FN 0"), "{text}");
    assert!(text.contains("events caught 1 of 1"), "{text}");
    assert!(
        text.contains("false alarms (rises outside labelled events): 2"),
        "{text}"
    );
    // The whole evaluation serialises (the report and the CLI write it as JSON).
    let json = serde_json::to_string(&e).unwrap();
    assert!(json.contains("\"false_alarms\":2"));
}

#[test]
fn evaluate_an_empty_stream_gives_undefined_ratios_not_a_panic() {
    let e = evaluate(&[], &[], &[], &[], &[], 1.0);
    assert_eq!(e.readings, 0);
    assert_eq!(e.per_reading.roc_auc, None);
    assert_eq!(e.after_policy.median_delay_s, None);
    assert!(e.to_string().contains("n/a"));
}

#[test]
#[should_panic(expected = "alarm has 1 entries for 2 labels")]
fn evaluate_refuses_mismatched_lengths() {
    evaluate(&[None, None], &[F, F], &[F], &[F, F], &[F, F], 1.0);
}
