//! The score over time: d² on a log axis, alarm spans shaded, events and faults marked.

use std::fmt::Write as _;

use anyhow::Result;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::escape;
use super::style::*;

/// What a timeline shows.
pub(super) struct Timeline<'a> {
    pub(super) d2: &'a [Option<f32>],
    pub(super) rate_hz: f64,
    pub(super) alarm: &'a [bool],
    pub(super) labels: Option<&'a [bool]>,
    pub(super) episodes: &'a [(String, usize, usize)],
    pub(super) lines: Vec<Line>,
    pub(super) y_range: (f64, f64),
    pub(super) caption: String,
    pub(super) height: u32,
}

/// Readings per plotted point so that a timeline has at most about one point per pixel.
pub(super) fn bucket_size(n: usize) -> usize {
    n.div_ceil(1100).max(1)
}

pub(super) fn timeline_svg(t: &Timeline) -> Result<String> {
    let n = t.d2.len();
    let axis = time_axis(n, t.rate_hz);
    let x_of = |i: usize| i as f64 * axis.scale;
    let x_end = x_of(n.max(1));
    let (lo, hi) = t.y_range;
    let decades = (hi / lo).log10();
    let up = |frac: f64| lo * 10f64.powf(decades * frac);
    svg(1120, t.height, |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(&t.caption, font(15))
            .margin(12)
            .margin_right(24)
            .x_label_area_size(42)
            .y_label_area_size(58)
            .build_cartesian_2d(0f64..x_end, (lo..hi).log_scale())
            .map_err(io_err)?;
        chart
            .configure_mesh()
            .light_line_style(FINE_GRID)
            .bold_line_style(GRID)
            .y_label_formatter(&log_tick)
            .x_desc(axis.name)
            .y_desc("d² (log scale)")
            .label_style(font(12))
            .axis_desc_style(font(13))
            .draw()
            .map_err(io_err)?;
        // Alarm spans, full height.
        chart
            .draw_series(runs(t.alarm).into_iter().map(|(a, b)| {
                Rectangle::new(
                    [(x_of(a), lo), (x_of(b), hi)],
                    ALARM_SHADE.mix(0.28).filled(),
                )
            }))
            .map_err(io_err)?;
        // Labelled events, a strip along the bottom.
        if let Some(labels) = t.labels {
            chart
                .draw_series(runs(labels).into_iter().map(|(a, b)| {
                    Rectangle::new([(x_of(a), lo), (x_of(b), up(0.05))], LABEL_SHADE.filled())
                }))
                .map_err(io_err)?;
        }
        for (k, (_, a, b)) in t.episodes.iter().enumerate() {
            let (a, b) = ((*a).min(n), (*b).min(n));
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(x_of(a), up(0.05)), (x_of(b), up(0.065))],
                    LABEL_SHADE.mix(0.5).filled(),
                )))
                .map_err(io_err)?;
            chart
                .draw_series(std::iter::once(Text::new(
                    format!("{}", k + 1),
                    (x_of(a), up(0.075)),
                    font(12).pos(Pos::new(HPos::Left, VPos::Bottom)),
                )))
                .map_err(io_err)?;
        }
        // Threshold lines (named, with their values, in the HTML legend under the plot).
        for (name, v, colour, dashed) in &t.lines {
            if !(v.is_finite() && *v > lo && *v < hi) {
                continue;
            }
            let pts = vec![(0.0, *v), (x_end, *v)];
            if *dashed {
                chart
                    .draw_series(DashedLineSeries::new(pts, 6, 4, colour.stroke_width(1)))
                    .map_err(io_err)?;
            } else {
                chart
                    .draw_series(LineSeries::new(pts, colour.stroke_width(1)))
                    .map_err(io_err)?;
            }
            let _ = name; // named in the HTML legend
        }
        // The score: the largest d² of each bucket; a gap where a whole bucket was not scored.
        let k = bucket_size(n);
        let mut segment: Vec<(f64, f64)> = Vec::new();
        let mut segments = Vec::new();
        let mut faults = Vec::new();
        for (b, chunk) in t.d2.chunks(k).enumerate() {
            let start = b * k;
            if chunk.iter().any(|d| d.is_none()) {
                faults.push(start);
            }
            let best = chunk
                .iter()
                .enumerate()
                .filter_map(|(j, d)| d.map(|v| (j, f64::from(v))))
                .max_by(|a, b| a.1.total_cmp(&b.1));
            match best {
                Some((j, v)) => segment.push((x_of(start + j), v.clamp(lo, hi))),
                None => {
                    if !segment.is_empty() {
                        segments.push(std::mem::take(&mut segment));
                    }
                }
            }
        }
        if !segment.is_empty() {
            segments.push(segment);
        }
        for s in segments {
            chart
                .draw_series(LineSeries::new(s, SCORE.stroke_width(1)))
                .map_err(io_err)?;
        }
        chart
            .draw_series(
                faults.into_iter().map(|i| {
                    Rectangle::new([(x_of(i), up(0.93)), (x_of(i + k), hi)], FAULT.filled())
                }),
            )
            .map_err(io_err)?;
        Ok(())
    })
}

/// HTML legend for a timeline, with each threshold line named and valued.
pub(super) fn timeline_legend(has_labels: bool, has_faults: bool, lines: &[Line]) -> String {
    let mut s = String::new();
    let _ = write!(
        s,
        "<span class=\"key line\" style=\"border-color:{}\"></span>d² \
         <span class=\"key\" style=\"background:rgba(224,150,80,.28)\"></span>alarm on",
        hex(SCORE)
    );
    if has_labels {
        s.push_str(
            "<span class=\"key\" style=\"background:rgb(70,110,160)\"></span>labelled anomalous",
        );
    }
    if has_faults {
        s.push_str(
            "<span class=\"key\" style=\"background:rgb(150,30,30)\"></span>not scored (fault)",
        );
    }
    for (name, v, colour, dashed) in lines {
        let class = if *dashed { "key dash" } else { "key line" };
        let _ = write!(
            s,
            "<span class=\"{class}\" style=\"border-color:{}\"></span>{} {}",
            hex(*colour),
            escape(name),
            escape(&num(*v))
        );
    }
    s
}

/// Common y range of the timelines (so that the full and the diagonal model compare by eye).
pub(super) fn timeline_range(streams: &[&[Option<f32>]], marks: &[f64]) -> (f64, f64) {
    log_range(
        streams
            .iter()
            .flat_map(|s| s.iter().filter_map(|d| d.map(f64::from))),
        marks,
        50,
    )
}
