//! The histogram of the baseline's d² against the chi-square expectation.

use anyhow::Result;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use statrs::distribution::{ChiSquared, ContinuousCDF};

use super::style::*;
use super::ReportData;

pub(super) fn histogram_svg(data: &ReportData) -> Result<String> {
    let values: Vec<f64> = data
        .baseline_d2
        .iter()
        .copied()
        .filter(|x| x.is_finite())
        .collect();
    let marks = [data.alarm_threshold, data.clear_threshold];
    let (lo, hi) = log_range(values.iter().copied(), &marks, 1000);
    let bins = 48usize;
    let edges: Vec<f64> = (0..=bins)
        .map(|k| lo * (hi / lo).powf(k as f64 / bins as f64))
        .collect();
    let mut counts = vec![0u64; bins];
    for &v in &values {
        let pos = ((v.max(lo) / lo).ln() / (hi / lo).ln() * bins as f64).floor();
        counts[(pos.max(0.0) as usize).min(bins - 1)] += 1;
    }
    // Expected counts under chi-square with p degrees of freedom.
    let p = data.features.len().max(1) as f64;
    let expected: Vec<(f64, f64)> = match ChiSquared::new(p) {
        Ok(chi) => (0..bins)
            .map(|k| {
                let mass = chi.cdf(edges[k + 1]) - if k == 0 { 0.0 } else { chi.cdf(edges[k]) };
                ((edges[k] * edges[k + 1]).sqrt(), mass * values.len() as f64)
            })
            .collect(),
        Err(_) => Vec::new(),
    };
    let top = counts
        .iter()
        .map(|&c| c as f64)
        .chain(expected.iter().map(|e| e.1))
        .fold(1.0, f64::max)
        * 1.1;
    let mut lines = vec![
        ("alarm".to_owned(), data.alarm_threshold, ALARM_LINE, false),
        ("clear".to_owned(), data.clear_threshold, CLEAR_LINE, true),
    ];
    for (name, v) in &data.other_thresholds {
        lines.push((name.clone(), *v, OTHER_LINE, true));
    }
    svg(560, 380, |root| {
        let mut chart = ChartBuilder::on(root)
            .caption("Baseline d²", font(15))
            .margin(12)
            .x_label_area_size(42)
            .y_label_area_size(58)
            .build_cartesian_2d((lo..hi).log_scale(), 0f64..top)
            .map_err(io_err)?;
        chart
            .configure_mesh()
            .light_line_style(FINE_GRID)
            .bold_line_style(GRID)
            .x_label_formatter(&log_tick)
            .x_desc("d² (log scale)")
            .y_desc("readings per bin")
            .y_label_formatter(&|v| format!("{v:.0}"))
            .label_style(font(12))
            .axis_desc_style(font(13))
            .draw()
            .map_err(io_err)?;
        chart
            .draw_series((0..bins).filter(|&k| counts[k] > 0).map(|k| {
                Rectangle::new(
                    [(edges[k], 0.0), (edges[k + 1], counts[k] as f64)],
                    BARS.filled(),
                )
            }))
            .map_err(io_err)?;
        chart
            .draw_series(LineSeries::new(expected.clone(), INK.stroke_width(1)))
            .map_err(io_err)?;
        for (k, (name, v, colour, dashed)) in lines.iter().enumerate() {
            if !(v.is_finite() && *v > lo && *v < hi) {
                continue;
            }
            let pts = vec![(*v, 0.0), (*v, top)];
            if *dashed {
                chart
                    .draw_series(DashedLineSeries::new(pts, 5, 4, colour.stroke_width(1)))
                    .map_err(io_err)?;
            } else {
                chart
                    .draw_series(LineSeries::new(pts, colour.stroke_width(2)))
                    .map_err(io_err)?;
            }
            chart
                .draw_series(std::iter::once(Text::new(
                    name.clone(),
                    (*v, top * (0.97 - 0.06 * k as f64)),
                    font(11).color(colour).pos(Pos::new(HPos::Left, VPos::Top)),
                )))
                .map_err(io_err)?;
        }
        Ok(())
    })
}
