//! Tests of [`super`].

use super::*;

fn small() -> ReportData {
    let n = 600;
    let d2: Vec<Option<f32>> = (0..n)
        .map(|i| match i {
            300..=309 => None,
            200..=260 => Some(40.0 + (i % 7) as f32),
            _ => Some(1.0 + ((i * 37) % 11) as f32 * 0.7),
        })
        .collect();
    let alarm: Vec<bool> = (0..n).map(|i| (202..=262).contains(&i)).collect();
    let labels: Vec<bool> = (0..n)
        .map(|i| (200..=260).contains(&i) || (300..=309).contains(&i))
        .collect();
    ReportData {
        title: "Pump <skid> & \"test\"".into(),
        subtitle: "a small report".into(),
        features: vec!["flow <lpm>".into(), "pressure_bar".into(), "temp_c".into()],
        summary: vec![("model".into(), "full <covariance>".into())],
        d2,
        rate_hz: 1.0,
        alarm_threshold: 16.27,
        clear_threshold: 11.3,
        other_thresholds: vec![("chi² 99.9 %".into(), 16.27)],
        alarm: alarm.clone(),
        labels: Some(labels),
        episodes: vec![("clog".into(), 200, 261), ("dropout".into(), 300, 310)],
        baseline_d2: (1..500).map(|i| f64::from(i) * 0.02).collect(),
        qq: (1..100)
            .map(|i| (f64::from(i) * 0.1, f64::from(i) * 0.11))
            .collect(),
        corr: vec![1.0, -0.9, 0.3, -0.9, 1.0, -0.2, 0.3, -0.2, 1.0],
        top_alarms: vec![(230, 46.0, vec![30.0, -4.0, 20.0])],
        diagonal: Some(DiagonalComparison {
            d2_diag: (0..n).map(|i| Some((i % 5) as f32)).collect(),
            threshold_diag: 16.27,
            alarm_diag: vec![false; n],
            notes: vec!["the clog <stays> inside every channel's range".into()],
        }),
        tables: vec![(
            "Thresholds".into(),
            vec!["name".into(), "d²".into()],
            vec![vec!["alarm".into(), "16.27".into()]],
        )],
        bank: None,
        drift: None,
    }
}

#[test]
fn a_small_report_is_well_formed_and_escaped() {
    let html = render(&small()).unwrap();
    assert!(html.starts_with("<!DOCTYPE html>"));
    assert!(html.trim_end().ends_with("</html>"));
    // Plots: timeline, histogram, QQ, heat map, one contribution chart, two comparison
    // timelines.
    assert_eq!(html.matches("<svg").count(), 7);
    assert_eq!(html.matches("</svg>").count(), 7);
    // The feature name with `<` is escaped wherever it appears (heat map rows, bars).
    assert!(!html.contains("flow <lpm>"));
    assert!(html.contains("flow &lt;lpm&gt;"));
    assert!(html.contains("Pump &lt;skid&gt; &amp; &quot;test&quot;"));
    assert!(html.contains("full &lt;covariance&gt;"));
    assert!(html.contains("the clog &lt;stays&gt; inside"));
    // No scripts and no external assets.
    assert!(!html.contains("<script"));
    // The only address is the SVG namespace, which nothing fetches.
    let ns = html.matches("xmlns=\"http://www.w3.org/2000/svg\"").count();
    assert_eq!(ns, 7);
    assert_eq!(html.matches("http").count(), ns);
    assert!(!html.contains("src=\""));
    assert!(!html.contains("href=\""));
    // The episode table says which model caught what.
    assert!(html.contains("alarm after 2 s"));
    assert!(html.contains("fault after 0 s"));
    assert!(html.contains("missed"));
    // Every element the page opens, it closes (a coarse balance check on the HTML part).
    for tag in ["section", "table", "figure", "figcaption", "tr", "ul"] {
        let open =
            html.matches(&format!("<{tag}>")).count() + html.matches(&format!("<{tag} ")).count();
        let close = html.matches(&format!("</{tag}>")).count();
        assert_eq!(open, close, "<{tag}> opened {open}, closed {close}");
    }
}

#[test]
fn an_empty_report_renders_without_panicking() {
    let html = render(&ReportData::default()).unwrap();
    assert!(html.starts_with("<!DOCTYPE html>"));
    assert!(html.contains("No readings were scored."));
    assert_eq!(html.matches("<svg").count(), 0);
    // An empty stream with a comparison, thresholds of zero and no rate.
    let data = ReportData {
        features: vec!["a".into()],
        diagonal: Some(DiagonalComparison::default()),
        top_alarms: vec![(0, f32::NAN, vec![])],
        corr: vec![f64::NAN],
        ..Default::default()
    };
    let html = render(&data).unwrap();
    assert!(html.contains("</html>"));
    // All readings unscored: the timeline still draws.
    let data = ReportData {
        d2: vec![None; 5],
        alarm: vec![false; 5],
        ..Default::default()
    };
    let html = render(&data).unwrap();
    assert_eq!(html.matches("<svg").count(), 1);
}

#[test]
fn a_bank_gets_a_panel_per_mode_and_its_drift_a_plot() {
    use super::modes::{DriftPlot, ModePanel};
    let panel = |mode: usize| ModePanel {
        mode,
        share: 0.5,
        alarm: 10.0,
        centre: vec![("a".into(), 1.0)],
        d2: vec![(mode, 2.0), (mode + 2, 30.0)],
        stream_len: 4,
    };
    let data = ReportData {
        bank: Some(("bank <2 modes>".into(), vec![panel(0), panel(1)])),
        drift: Some(DriftPlot {
            features: vec!["a".into()],
            shifts: vec![(0, vec![0.0]), (3, vec![1.0])],
            bound: 1.0,
            events: vec![3],
            stream_len: 4,
        }),
        ..Default::default()
    };
    let html = render(&data).unwrap();
    assert!(html.contains("<h3>Mode 0</h3>") && html.contains("<h3>Mode 1</h3>"));
    assert!(html.contains("bank &lt;2 modes&gt;"));
    assert!(html.contains("Drift of the centre"));
    // Two mode panels and the drift plot.
    assert_eq!(html.matches("<svg").count(), 3);
}

#[test]
fn escape_covers_the_five_characters() {
    assert_eq!(
        escape("<a href='x'>&\"</a>"),
        "&lt;a href=&#39;x&#39;&gt;&amp;&quot;&lt;/a&gt;"
    );
    assert_eq!(escape("plain"), "plain");
}
