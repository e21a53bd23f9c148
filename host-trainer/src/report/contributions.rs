//! Per-feature contributions to d² of one alarm, as bars.

use anyhow::Result;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::style::*;

pub(super) fn contributions_svg(
    features: &[String],
    index: usize,
    d2: f32,
    contrib: &[f32],
    rate_hz: f64,
) -> Result<String> {
    let p = contrib.len().min(features.len().max(contrib.len()));
    let name = |i: usize| {
        features
            .get(i)
            .cloned()
            .unwrap_or_else(|| format!("feature {}", i + 1))
    };
    let longest = (0..p).map(|i| name(i).chars().count()).max().unwrap_or(4);
    let lo = contrib
        .iter()
        .map(|&c| f64::from(c))
        .filter(|c| c.is_finite())
        .fold(0.0, f64::min);
    let hi = contrib
        .iter()
        .map(|&c| f64::from(c))
        .filter(|c| c.is_finite())
        .fold(0.0, f64::max);
    let span = (hi - lo).max(1e-6);
    let (lo, hi) = (lo - 0.05 * span, hi + 0.12 * span);
    let h = 70 + 26 * p.max(1) as u32;
    let caption = format!(
        "reading {index} ({}), d² = {}",
        clock(index, rate_hz),
        num(f64::from(d2))
    );
    svg(560, h, |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(&caption, font(13))
            .margin(10)
            .margin_right(24)
            .x_label_area_size(36)
            .y_label_area_size(16 + 7 * longest as u32)
            .build_cartesian_2d(lo..hi, (0..p.max(1)).into_segmented())
            .map_err(io_err)?;
        let label = |v: &SegmentValue<usize>| match v {
            SegmentValue::CenterOf(i) if *i < p => name(p - 1 - *i),
            _ => String::new(),
        };
        chart
            .configure_mesh()
            .disable_y_mesh()
            .light_line_style(FINE_GRID)
            .bold_line_style(GRID)
            .y_labels(p.max(1))
            .y_label_formatter(&label)
            .x_labels(6)
            .x_label_formatter(&|v| num(*v))
            .x_desc("contribution to d² (the bars sum to d²)")
            .label_style(font(11))
            .axis_desc_style(font(12))
            .draw()
            .map_err(io_err)?;
        chart
            .draw_series((0..p).map(|i| {
                let c = f64::from(contrib[i]);
                let c = if c.is_finite() { c } else { 0.0 };
                let row = p - 1 - i; // first feature at the top
                let colour = if c < 0.0 { NEGATIVE } else { POSITIVE };
                let mut bar = Rectangle::new(
                    [
                        (0.0, SegmentValue::Exact(row)),
                        (c, SegmentValue::Exact(row + 1)),
                    ],
                    colour.mix(0.85).filled(),
                );
                bar.set_margin(4, 4, 0, 0);
                bar
            }))
            .map_err(io_err)?;
        chart
            .draw_series((0..p).map(|i| {
                let c = f64::from(contrib[i]);
                let row = p - 1 - i;
                Text::new(
                    num(c),
                    (c.max(0.0), SegmentValue::CenterOf(row)),
                    font(11).pos(Pos::new(HPos::Left, VPos::Center)),
                )
            }))
            .map_err(io_err)?;
        Ok(())
    })
}
