//! The look shared by every figure and the page: colours, the style sheet, and small helpers for
//! axes, numbers and times.

use anyhow::Result;
use plotters::coord::Shift;
use plotters::prelude::*;

pub(super) const INK: RGBColor = RGBColor(40, 40, 40);
pub(super) const GRID: RGBColor = RGBColor(222, 222, 222);
pub(super) const FINE_GRID: RGBColor = RGBColor(244, 244, 244);
pub(super) const SCORE: RGBColor = RGBColor(38, 70, 83);
pub(super) const ALARM_LINE: RGBColor = RGBColor(170, 70, 40);
pub(super) const CLEAR_LINE: RGBColor = RGBColor(120, 120, 120);
pub(super) const OTHER_LINE: RGBColor = RGBColor(95, 95, 150);
pub(super) const ALARM_SHADE: RGBColor = RGBColor(224, 150, 80);
pub(super) const LABEL_SHADE: RGBColor = RGBColor(70, 110, 160);
pub(super) const FAULT: RGBColor = RGBColor(150, 30, 30);
pub(super) const BARS: RGBColor = RGBColor(125, 145, 160);
pub(super) const NEGATIVE: RGBColor = RGBColor(49, 104, 142);
pub(super) const POSITIVE: RGBColor = RGBColor(178, 88, 64);
pub(super) const FONT: &str = "sans-serif";

pub(super) const CSS: &str = "
body { font-family: system-ui, -apple-system, 'Segoe UI', sans-serif; color: #282828; background: #fafafa;
       margin: 0 auto; max-width: 1180px; padding: 1.5rem 2rem 3rem; line-height: 1.45; }
h1 { font-size: 1.6rem; margin: 0 0 .2rem; font-weight: 600; }
h2 { font-size: 1.15rem; margin: 2.2rem 0 .6rem; padding-bottom: .25rem; border-bottom: 1px solid #d8d8d8; font-weight: 600; }
h3 { font-size: 1rem; margin: 1.2rem 0 .4rem; font-weight: 600; }
p.sub { color: #5a5a5a; margin: 0 0 1rem; }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .9rem; background: #fff; }
th, td { border: 1px solid #dcdcdc; padding: .25rem .6rem; text-align: left; vertical-align: top; }
th { background: #f0f0f0; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
table.kv th { width: 16rem; }
figure { margin: .6rem 0 1.2rem; background: #fff; border: 1px solid #e2e2e2; padding: .5rem; }
figure svg { display: block; max-width: 100%; height: auto; }
figcaption { font-size: .85rem; color: #505050; margin-top: .35rem; }
.row { display: flex; flex-wrap: wrap; gap: 1rem; }
.row figure { flex: 1 1 520px; }
.small figure { flex: 1 1 360px; }
.key { display: inline-block; width: .9em; height: .9em; vertical-align: -.1em; margin: 0 .3em 0 .9em; border: 1px solid #999; }
.key.line { height: 0; border-width: 2px 0 0 0; border-style: solid; vertical-align: .25em; }
.key.dash { height: 0; border-width: 2px 0 0 0; border-style: dashed; vertical-align: .25em; }
p.empty { color: #777; font-style: italic; }
footer { margin-top: 3rem; font-size: .8rem; color: #777; }
";

pub(super) fn io_err<E: std::fmt::Display>(e: E) -> anyhow::Error {
    anyhow::anyhow!("drawing a plot: {e}")
}

/// Draw into an SVG string of `w × h` pixels.
pub(super) fn svg<F>(w: u32, h: u32, draw: F) -> Result<String>
where
    F: FnOnce(&DrawingArea<SVGBackend, Shift>) -> Result<()>,
{
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, (w, h)).into_drawing_area();
        root.fill(&WHITE).map_err(io_err)?;
        draw(&root)?;
        root.present().map_err(io_err)?;
    }
    Ok(out)
}

/// A usable reading rate: positive (and so not NaN).
pub(super) fn has_rate(rate_hz: f64) -> bool {
    rate_hz > 0.0
}

pub(super) fn font(size: u32) -> TextStyle<'static> {
    (FONT, size).into_font().color(&INK)
}

/// `h:mm:ss` of a reading index.
pub(super) fn clock(i: usize, rate_hz: f64) -> String {
    if !has_rate(rate_hz) {
        return format!("reading {i}");
    }
    let s = (i as f64 / rate_hz).round() as u64;
    format!("{}:{:02}:{:02}", s / 3600, s / 60 % 60, s % 60)
}

/// Significant figures that read well for d² values.
pub(super) fn num(x: f64) -> String {
    if !x.is_finite() {
        return if x.is_nan() {
            "n/a".into()
        } else {
            "∞".into()
        };
    }
    let a = x.abs();
    if a == 0.0 {
        "0".into()
    } else if a >= 1000.0 {
        format!("{x:.0}")
    } else if a >= 100.0 {
        format!("{x:.1}")
    } else if a >= 1.0 {
        format!("{x:.2}")
    } else {
        format!("{x:.3}")
    }
}

/// Runs of `true` as `[start, end)`.
pub(super) fn runs(flags: &[bool]) -> Vec<(usize, usize)> {
    crate::stats::metrics::label_events(flags)
}

/// Lower and upper ends of a log axis that show `values` and `marks`, as powers of ten. The lower
/// end sits at or below the `1 / low_frac`-th smallest value (the lowest few are clipped).
pub(super) fn log_range(
    values: impl Iterator<Item = f64>,
    marks: &[f64],
    low_frac: usize,
) -> (f64, f64) {
    let mut v: Vec<f64> = values.filter(|x| x.is_finite() && *x > 0.0).collect();
    v.sort_by(f64::total_cmp);
    let low = if v.is_empty() {
        1.0
    } else {
        v[v.len() / low_frac]
    };
    let mut high = v.last().copied().unwrap_or(10.0);
    for &m in marks {
        if m.is_finite() && m > 0.0 {
            high = high.max(m);
        }
    }
    let lo = 10f64.powf(low.max(1e-4).log10().floor());
    let hi = 10f64.powf((high * 1.5).log10().ceil()).max(lo * 100.0);
    (lo, hi)
}

pub(super) fn log_tick(v: &f64) -> String {
    let e = v.log10().round();
    if (v.log10() - e).abs() > 1e-6 {
        return String::new();
    }
    if (0.0..=6.0).contains(&e) {
        format!("{:.0}", 10f64.powf(e))
    } else if (-4.0..0.0).contains(&e) {
        format!("{:.*}", (-e) as usize, 10f64.powf(e))
    } else {
        format!("1e{e}")
    }
}

pub(super) struct Axis {
    pub(super) scale: f64,
    pub(super) name: &'static str,
}

/// The time axis: minutes for up to two hours, hours beyond, readings without a rate.
pub(super) fn time_axis(n: usize, rate_hz: f64) -> Axis {
    if !has_rate(rate_hz) {
        return Axis {
            scale: 1.0,
            name: "reading",
        };
    }
    let seconds = n as f64 / rate_hz;
    if seconds <= 7200.0 {
        Axis {
            scale: 1.0 / (60.0 * rate_hz),
            name: "time since the first reading (min)",
        }
    } else {
        Axis {
            scale: 1.0 / (3600.0 * rate_hz),
            name: "time since the first reading (h)",
        }
    }
}

/// A threshold line: name, d², colour, dashed.
pub(super) type Line = (String, f64, RGBColor, bool);

pub(super) fn hex(c: RGBColor) -> String {
    format!("#{:02x}{:02x}{:02x}", c.0, c.1, c.2)
}
