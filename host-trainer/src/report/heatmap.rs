//! The correlation matrix as a heat map.

use anyhow::Result;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::style::*;

/// Diverging colour for a correlation in [−1, 1].
pub(super) fn corr_colour(r: f64) -> RGBColor {
    let t = r.abs().min(1.0);
    let end = if r < 0.0 { NEGATIVE } else { POSITIVE };
    let mix = |a: u8, b: u8| (f64::from(a) + (f64::from(b) - f64::from(a)) * t).round() as u8;
    RGBColor(mix(247, end.0), mix(247, end.1), mix(247, end.2))
}

pub(super) fn heatmap_svg(features: &[String], corr: &[f64]) -> Result<String> {
    let p = features.len();
    let longest = features
        .iter()
        .map(|f| f.chars().count())
        .max()
        .unwrap_or(0);
    let left = 40 + 7 * longest as u32;
    let cell = (600u32.saturating_sub(left) / p.max(1) as u32).clamp(14, 72);
    let top = 56u32;
    let w = left + cell * p as u32 + 20;
    let h = top + cell * p as u32 + 20;
    let value_size = (cell / 4).clamp(7, 14);
    svg(w, h, |root| {
        root.draw(&Text::new(
            "Correlation of the baseline (Pearson, raw units)",
            (12, 10),
            font(15).pos(Pos::new(HPos::Left, VPos::Top)),
        ))
        .map_err(io_err)?;
        for (j, _) in features.iter().enumerate() {
            let x = (left + cell * j as u32 + cell / 2) as i32;
            root.draw(&Text::new(
                format!("{}", j + 1),
                (x, top as i32 - 6),
                font(12).pos(Pos::new(HPos::Center, VPos::Bottom)),
            ))
            .map_err(io_err)?;
        }
        for (i, name) in features.iter().enumerate() {
            let y = (top + cell * i as u32) as i32;
            root.draw(&Text::new(
                format!("{}  {}", i + 1, name),
                (left as i32 - 8, y + cell as i32 / 2),
                font(12).pos(Pos::new(HPos::Right, VPos::Center)),
            ))
            .map_err(io_err)?;
            for j in 0..p {
                let r = corr.get(i * p + j).copied().unwrap_or(f64::NAN);
                let x = (left + cell * j as u32) as i32;
                let fill = if r.is_finite() {
                    corr_colour(r)
                } else {
                    RGBColor(200, 200, 200)
                };
                root.draw(&Rectangle::new(
                    [(x, y), (x + cell as i32, y + cell as i32)],
                    fill.filled(),
                ))
                .map_err(io_err)?;
                root.draw(&Rectangle::new(
                    [(x, y), (x + cell as i32, y + cell as i32)],
                    WHITE.stroke_width(1),
                ))
                .map_err(io_err)?;
                let ink = if r.abs() > 0.6 { WHITE } else { INK };
                let text = if r.is_finite() {
                    format!("{r:.2}")
                } else {
                    "n/a".into()
                };
                root.draw(&Text::new(
                    text,
                    (x + cell as i32 / 2, y + cell as i32 / 2),
                    (FONT, value_size)
                        .into_font()
                        .color(&ink)
                        .pos(Pos::new(HPos::Center, VPos::Center)),
                ))
                .map_err(io_err)?;
            }
        }
        Ok(())
    })
}
