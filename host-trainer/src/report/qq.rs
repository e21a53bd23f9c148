//! The chi-square QQ plot of the baseline.

use anyhow::Result;
use plotters::prelude::*;

use super::style::*;

pub(super) fn qq_svg(qq: &[(f64, f64)]) -> Result<String> {
    let pts: Vec<(f64, f64)> = qq
        .iter()
        .copied()
        .filter(|(a, b)| a.is_finite() && b.is_finite())
        .collect();
    // At most about 1 500 points: every k-th, plus the 50 largest where the tail is read.
    let k = pts.len().div_ceil(1450).max(1);
    let tail = pts.len().saturating_sub(50);
    let shown: Vec<(f64, f64)> = pts
        .iter()
        .enumerate()
        .filter(|(i, _)| i % k == 0 || *i >= tail)
        .map(|(_, p)| *p)
        .collect();
    let top = shown.iter().map(|p| p.0.max(p.1)).fold(1.0, f64::max) * 1.05;
    svg(560, 380, |root| {
        let mut chart = ChartBuilder::on(root)
            .caption("Chi-square QQ plot of the baseline", font(15))
            .margin(12)
            .x_label_area_size(42)
            .y_label_area_size(58)
            .build_cartesian_2d(0f64..top, 0f64..top)
            .map_err(io_err)?;
        chart
            .configure_mesh()
            .light_line_style(FINE_GRID)
            .bold_line_style(GRID)
            .x_desc("chi-square quantile")
            .y_desc("observed d²")
            .label_style(font(12))
            .axis_desc_style(font(13))
            .draw()
            .map_err(io_err)?;
        chart
            .draw_series(DashedLineSeries::new(
                vec![(0.0, 0.0), (top, top)],
                6,
                4,
                CLEAR_LINE.stroke_width(1),
            ))
            .map_err(io_err)?;
        chart
            .draw_series(
                shown
                    .iter()
                    .map(|&p| Circle::new(p, 2, SCORE.mix(0.7).filled())),
            )
            .map_err(io_err)?;
        Ok(())
    })
}
