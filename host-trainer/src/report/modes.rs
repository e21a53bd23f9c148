//! A bank in the report: a panel per mode (its share of the baseline, its limit, its centre, and
//! the d² of the readings the device assigned to it over time), and the drift shift of the
//! centre over time per feature, in standard deviations, with the bound and the drift events.

use std::fmt::Write as _;

use anyhow::Result;
use plotters::prelude::*;

use super::escape;
use super::html::figure;
use super::style::*;

/// One mode of a bank, as the report shows it.
#[derive(Clone, Debug, Default)]
pub struct ModePanel {
    /// The mode's number in the bank.
    pub mode: usize,
    /// Its share of the baseline's samples (0 to 1).
    pub share: f64,
    /// Its alarm limit on d².
    pub alarm: f64,
    /// Its centre, per scored feature (name, value in the reading's units).
    pub centre: Vec<(String, f64)>,
    /// The readings of the stream assigned to this mode: (reading index, d²).
    pub d2: Vec<(usize, f32)>,
    /// Readings in the whole stream (the time axis).
    pub stream_len: usize,
}

/// The drift shift of a bank's centre over a stream.
#[derive(Clone, Debug, Default)]
pub struct DriftPlot {
    /// The scored features' names.
    pub features: Vec<String>,
    /// (reading index, shift per feature in standard deviations).
    pub shifts: Vec<(usize, Vec<f64>)>,
    /// The bound, in standard deviations (the same for every feature).
    pub bound: f64,
    /// Readings at which a `drift` event was raised.
    pub events: Vec<usize>,
    /// Readings in the whole stream (the time axis).
    pub stream_len: usize,
}

/// Colours of the feature lines in the drift plot, in turn.
const SERIES: [RGBColor; 6] = [
    RGBColor(38, 70, 83),
    RGBColor(178, 88, 64),
    RGBColor(70, 110, 160),
    RGBColor(120, 150, 60),
    RGBColor(150, 90, 150),
    RGBColor(200, 150, 40),
];

fn series(k: usize) -> RGBColor {
    SERIES[k % SERIES.len()]
}

/// The HTML of one mode's panel: a small table, then the d² of its readings over time on a log
/// axis with its alarm limit, readings above the limit drawn in the alarm colour.
pub(super) fn mode_panel_html(p: &ModePanel, rate_hz: f64) -> Result<String> {
    let mut out = String::new();
    let above = p.d2.iter().filter(|(_, d)| f64::from(*d) > p.alarm).count();
    let _ = writeln!(
        out,
        "<h3>Mode {}</h3>\n<table class=\"kv\"><tr><th>share of the baseline</th><td class=\"num\">{:.1} %</td></tr>\
         <tr><th>alarm limit (d²)</th><td class=\"num\">{}</td></tr>\
         <tr><th>readings of the stream assigned to it</th><td class=\"num\">{}</td></tr>\
         <tr><th>of them above its limit</th><td class=\"num\">{}</td></tr>",
        p.mode,
        100.0 * p.share,
        num(p.alarm),
        p.d2.len(),
        above
    );
    for (name, c) in &p.centre {
        let _ = writeln!(
            out,
            "<tr><th>centre: {}</th><td class=\"num\">{}</td></tr>",
            escape(name),
            num(*c)
        );
    }
    out.push_str("</table>\n");
    if p.d2.is_empty() {
        out.push_str(
            "<p class=\"empty\">No reading of the stream was assigned to this mode.</p>\n",
        );
        return Ok(out);
    }
    let n = p
        .stream_len
        .max(p.d2.iter().map(|(i, _)| i + 1).max().unwrap_or(1));
    let axis = time_axis(n, rate_hz);
    let x_end = n as f64 * axis.scale;
    let positive = p.d2.iter().map(|(_, d)| f64::from(*d)).filter(|d| *d > 0.0);
    let lo = positive
        .clone()
        .fold(f64::INFINITY, f64::min)
        .min(p.alarm)
        .max(1e-3)
        / 2.0;
    let hi = positive.fold(0.0, f64::max).max(p.alarm) * 2.0;
    let step = n.div_ceil(2200).max(1);
    let svg_text = svg(560, 260, |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(format!("mode {}: d² of its readings", p.mode), font(14))
            .margin(10)
            .x_label_area_size(36)
            .y_label_area_size(54)
            .build_cartesian_2d(0f64..x_end, (lo..hi).log_scale())
            .map_err(io_err)?;
        chart
            .configure_mesh()
            .light_line_style(FINE_GRID)
            .bold_line_style(GRID)
            .y_label_formatter(&log_tick)
            .x_desc(axis.name)
            .y_desc("d² (log scale)")
            .label_style(font(11))
            .axis_desc_style(font(12))
            .draw()
            .map_err(io_err)?;
        // At most one point per `step` readings of the stream, the largest d² among them.
        let mut kept: Vec<(usize, f32)> = Vec::new();
        for &(i, d) in &p.d2 {
            match kept.last_mut() {
                Some(last) if last.0 / step == i / step => {
                    if d > last.1 {
                        *last = (i, d);
                    }
                }
                _ => kept.push((i, d)),
            }
        }
        chart
            .draw_series(kept.iter().filter(|(_, d)| *d > 0.0).map(|&(i, d)| {
                let colour = if f64::from(d) > p.alarm {
                    ALARM_LINE
                } else {
                    SCORE
                };
                Circle::new((i as f64 * axis.scale, f64::from(d)), 1, colour.filled())
            }))
            .map_err(io_err)?;
        chart
            .draw_series(LineSeries::new(
                vec![(0.0, p.alarm), (x_end, p.alarm)],
                ALARM_LINE.stroke_width(1),
            ))
            .map_err(io_err)?;
        Ok(())
    })?;
    figure(
        &mut out,
        &svg_text,
        &format!(
            "Readings the device assigned to mode {} (the nearest mode's d², or the mode it was told); \
             the line is this mode's alarm limit, {}.",
            p.mode,
            num(p.alarm)
        ),
    );
    Ok(out)
}

/// The HTML of the drift plot: each feature's shift in standard deviations over time, the bound
/// (±) dashed, drift events as vertical lines.
pub(super) fn drift_html(d: &DriftPlot, rate_hz: f64) -> Result<String> {
    let mut out = String::new();
    if d.shifts.is_empty() {
        out.push_str("<p class=\"empty\">No drift shift was recorded.</p>\n");
        return Ok(out);
    }
    let n = d.stream_len.max(d.shifts.last().map_or(1, |(i, _)| i + 1));
    let axis = time_axis(n, rate_hz);
    let x_end = n as f64 * axis.scale;
    let peak = d
        .shifts
        .iter()
        .flat_map(|(_, s)| s.iter().map(|x| x.abs()))
        .filter(|x| x.is_finite())
        .fold(0.0, f64::max);
    let top = peak.max(d.bound) * 1.15 + 1e-6;
    let svg_text = svg(1120, 320, |root| {
        let mut chart = ChartBuilder::on(root)
            .caption("drift shift of the centre, per feature", font(15))
            .margin(12)
            .margin_right(24)
            .x_label_area_size(42)
            .y_label_area_size(58)
            .build_cartesian_2d(0f64..x_end, -top..top)
            .map_err(io_err)?;
        chart
            .configure_mesh()
            .light_line_style(FINE_GRID)
            .bold_line_style(GRID)
            .x_desc(axis.name)
            .y_desc("shift (standard deviations)")
            .label_style(font(12))
            .axis_desc_style(font(13))
            .draw()
            .map_err(io_err)?;
        for b in [d.bound, -d.bound] {
            chart
                .draw_series(DashedLineSeries::new(
                    vec![(0.0, b), (x_end, b)],
                    6,
                    4,
                    ALARM_LINE.stroke_width(1),
                ))
                .map_err(io_err)?;
        }
        for &e in &d.events {
            let x = e as f64 * axis.scale;
            chart
                .draw_series(LineSeries::new(
                    vec![(x, -top), (x, top)],
                    FAULT.stroke_width(2),
                ))
                .map_err(io_err)?;
        }
        for (k, _) in d.features.iter().enumerate() {
            let pts: Vec<(f64, f64)> = d
                .shifts
                .iter()
                .filter_map(|(i, s)| {
                    let v = *s.get(k)?;
                    v.is_finite().then_some((*i as f64 * axis.scale, v))
                })
                .collect();
            chart
                .draw_series(LineSeries::new(pts, series(k).stroke_width(2)))
                .map_err(io_err)?;
        }
        Ok(())
    })?;
    let mut legend = String::new();
    for (k, f) in d.features.iter().enumerate() {
        let c = series(k);
        let _ = write!(
            legend,
            "<span class=\"key line\" style=\"border-color: rgb({},{},{})\"></span>{}",
            c.0,
            c.1,
            c.2,
            escape(f)
        );
    }
    let events = if d.events.is_empty() {
        "no drift event".to_string()
    } else {
        let at: Vec<String> = d.events.iter().map(|i| clock(*i, rate_hz)).collect();
        format!("drift event at {} (solid vertical line)", at.join(", "))
    };
    figure(
        &mut out,
        &svg_text,
        &format!(
            "{legend}<br>The shift the device adds to every mode's centre, per feature, in pooled \
             within-mode standard deviations; dashed: the bound ±{}; {events}.",
            num(d.bound)
        ),
    );
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    // The colours as plotters writes them into the SVG.
    const ALARM_HEX: &str = "#AA4628"; // ALARM_LINE, RGB(170, 70, 40)
    const SCORE_HEX: &str = "#264653"; // SCORE, RGB(38, 70, 83)

    fn panel() -> ModePanel {
        ModePanel {
            mode: 1,
            share: 0.375,
            alarm: 20.0,
            centre: vec![("flow_lpm".into(), 101.5), ("a<b".into(), 2.0)],
            // Readings 0, 3, 6, …, 27; three of them (9, 18, 27) above the limit.
            d2: (0..10)
                .map(|k| (3 * k, if k % 3 == 0 && k > 0 { 50.0 } else { 4.0 }))
                .collect(),
            stream_len: 30,
        }
    }

    #[test]
    fn a_mode_panel_states_its_share_limit_centre_and_draws_each_reading_in_its_colour() {
        let html = mode_panel_html(&panel(), 1.0).unwrap();
        assert!(html.contains("<h3>Mode 1</h3>"));
        assert!(html.contains("37.5 %"), "{html}");
        assert!(html.contains("centre: flow_lpm</th><td class=\"num\">101.5"));
        // Names are escaped.
        assert!(html.contains("centre: a&lt;b"));
        assert!(!html.contains("a<b"));
        // Ten readings, three above the limit: counted in the table and drawn as such.
        assert!(html.contains("assigned to it</th><td class=\"num\">10</td>"));
        assert!(html.contains("above its limit</th><td class=\"num\">3</td>"));
        let circles = |hex: &str| {
            html.matches("<circle")
                .zip(html.split("<circle").skip(1))
                .filter(|(_, rest)| rest.split('/').next().unwrap_or("").contains(hex))
                .count()
        };
        assert_eq!(circles(ALARM_HEX), 3);
        assert_eq!(circles(SCORE_HEX), 7);
    }

    #[test]
    fn a_mode_without_readings_says_so_and_draws_nothing() {
        let mut p = panel();
        p.d2.clear();
        let html = mode_panel_html(&p, 1.0).unwrap();
        assert!(html.contains("No reading of the stream was assigned to this mode"));
        assert!(!html.contains("<svg"));
    }

    #[test]
    fn the_drift_plot_names_each_feature_marks_the_bound_and_the_events() {
        let d = DriftPlot {
            features: vec!["bearing_temp_c".into(), "vibration_mm_s".into()],
            shifts: (0..50)
                .map(|i| (30 * i, vec![i as f64 * 0.05, -(i as f64) * 0.07]))
                .collect(),
            bound: 3.0,
            events: vec![1290],
            stream_len: 1500,
        };
        let html = drift_html(&d, 1.0).unwrap();
        assert!(html.contains("bearing_temp_c") && html.contains("vibration_mm_s"));
        assert!(html.contains("the bound ±3"), "{html}");
        // The event's time as the report writes times: reading 1290 at 1 Hz is 0:21:30.
        assert!(html.contains("drift event at 0:21:30"));
        // One line per feature in its own colour (the first two of the series).
        for c in [SERIES[0], SERIES[1]] {
            let hex = format!("#{:02X}{:02X}{:02X}", c.0, c.1, c.2);
            assert!(html.contains(&hex), "no line in {hex}");
        }
        // Without events it says so.
        let quiet = DriftPlot {
            events: Vec::new(),
            ..d.clone()
        };
        assert!(drift_html(&quiet, 1.0).unwrap().contains("no drift event"));
        let empty = DriftPlot::default();
        assert!(drift_html(&empty, 1.0)
            .unwrap()
            .contains("No drift shift was recorded"));
    }
}
