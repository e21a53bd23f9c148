//! One self-contained HTML report with inline SVG plots: no scripts, no external files.
//!
//! [`render`] turns a [`ReportData`] into the whole document. The plots are drawn with plotters'
//! SVG backend (text is left to the browser's fonts, so no font files are needed):
//!
//! * the timeline of d² on a log axis, with alarm spans shaded, labelled events marked along the
//!   bottom and unscored readings (faults) ticked along the top;
//! * the histogram of the baseline's d² on a log-scaled x axis, with the chi-square expectation
//!   for as many degrees of freedom as there are features, and the thresholds marked;
//! * the chi-square QQ plot of the baseline;
//! * the correlation matrix as a heat map with the values printed in the cells;
//! * per-feature contributions to d² for the top alarms;
//! * the full-covariance model against the per-feature (diagonal) model on the same readings.
//!
//! Every string that comes from the caller is HTML-escaped here, and plotters escapes the text it
//! puts into the SVG.

use std::fmt::Write as _;

use anyhow::Result;
use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use statrs::distribution::{ChiSquared, ContinuousCDF};

/// Everything the report shows. Empty fields leave their section out (or say that nothing was
/// given); nothing here can make [`render`] panic.
#[derive(Clone, Debug, Default)]
pub struct ReportData {
    /// Page title.
    pub title: String,
    /// One line under the title.
    pub subtitle: String,
    /// Feature names, in model order.
    pub features: Vec<String>,
    /// Key/value rows at the top.
    pub summary: Vec<(String, String)>,
    /// The scored stream; `None` = a reading that could not be scored (a fault).
    pub d2: Vec<Option<f32>>,
    /// Readings per second (`0` or less: the time axis counts readings).
    pub rate_hz: f64,
    /// The alarm threshold on d².
    pub alarm_threshold: f64,
    /// The clear threshold on d².
    pub clear_threshold: f64,
    /// Other thresholds worth marking (name, d²), such as a chi-square quantile.
    pub other_thresholds: Vec<(String, f64)>,
    /// The alarm line after each reading.
    pub alarm: Vec<bool>,
    /// Labels of the stream (true = anomalous), if known.
    pub labels: Option<Vec<bool>>,
    /// Named episodes: (name, first reading, one past the last reading).
    pub episodes: Vec<(String, usize, usize)>,
    /// The baseline's own d², for the histogram.
    pub baseline_d2: Vec<f64>,
    /// Chi-square QQ points of the baseline: (theoretical quantile, observed d²).
    pub qq: Vec<(f64, f64)>,
    /// The baseline's correlation matrix, row-major, `p × p` for `p` features.
    pub corr: Vec<f64>,
    /// The largest alarms: (reading index, d², per-feature contributions to d²).
    pub top_alarms: Vec<(usize, f32, Vec<f32>)>,
    /// The per-feature model on the same readings, if it was run.
    pub diagonal: Option<DiagonalComparison>,
    /// Extra tables: (title, header, rows).
    pub tables: Vec<(String, Vec<String>, Vec<Vec<String>>)>,
}

/// The per-feature (diagonal covariance) model run on the same stream.
#[derive(Clone, Debug, Default)]
pub struct DiagonalComparison {
    /// Its d² per reading; `None` = not scored.
    pub d2_diag: Vec<Option<f32>>,
    /// Its alarm threshold.
    pub threshold_diag: f64,
    /// Its alarm line.
    pub alarm_diag: Vec<bool>,
    /// Remarks shown under the comparison.
    pub notes: Vec<String>,
}

/// Escape `&`, `<`, `>`, `"` and `'` for HTML text and attribute values.
pub fn escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

// A neutral palette: slate for data, muted orange for alarms, muted blue for labels.
const INK: RGBColor = RGBColor(40, 40, 40);
const GRID: RGBColor = RGBColor(222, 222, 222);
const FINE_GRID: RGBColor = RGBColor(244, 244, 244);
const SCORE: RGBColor = RGBColor(38, 70, 83);
const ALARM_LINE: RGBColor = RGBColor(170, 70, 40);
const CLEAR_LINE: RGBColor = RGBColor(120, 120, 120);
const OTHER_LINE: RGBColor = RGBColor(95, 95, 150);
const ALARM_SHADE: RGBColor = RGBColor(224, 150, 80);
const LABEL_SHADE: RGBColor = RGBColor(70, 110, 160);
const FAULT: RGBColor = RGBColor(150, 30, 30);
const BARS: RGBColor = RGBColor(125, 145, 160);
const NEGATIVE: RGBColor = RGBColor(49, 104, 142);
const POSITIVE: RGBColor = RGBColor(178, 88, 64);
const FONT: &str = "sans-serif";

const CSS: &str = "
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

fn io_err<E: std::fmt::Display>(e: E) -> anyhow::Error {
    anyhow::anyhow!("drawing a plot: {e}")
}

/// Draw into an SVG string of `w × h` pixels.
fn svg<F>(w: u32, h: u32, draw: F) -> Result<String>
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
fn has_rate(rate_hz: f64) -> bool {
    rate_hz > 0.0
}

fn font(size: u32) -> TextStyle<'static> {
    (FONT, size).into_font().color(&INK)
}

/// `h:mm:ss` of a reading index.
fn clock(i: usize, rate_hz: f64) -> String {
    if !has_rate(rate_hz) {
        return format!("reading {i}");
    }
    let s = (i as f64 / rate_hz).round() as u64;
    format!("{}:{:02}:{:02}", s / 3600, s / 60 % 60, s % 60)
}

/// Significant figures that read well for d² values.
fn num(x: f64) -> String {
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
fn runs(flags: &[bool]) -> Vec<(usize, usize)> {
    crate::stats::metrics::label_events(flags)
}

/// Lower and upper ends of a log axis that show `values` and `marks`, as powers of ten. The lower
/// end sits at or below the `1 / low_frac`-th smallest value (the lowest few are clipped).
fn log_range(values: impl Iterator<Item = f64>, marks: &[f64], low_frac: usize) -> (f64, f64) {
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

fn log_tick(v: &f64) -> String {
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

struct Axis {
    scale: f64,
    name: &'static str,
}

/// The time axis: minutes for up to two hours, hours beyond, readings without a rate.
fn time_axis(n: usize, rate_hz: f64) -> Axis {
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
type Line = (String, f64, RGBColor, bool);

/// What a timeline shows.
struct Timeline<'a> {
    d2: &'a [Option<f32>],
    rate_hz: f64,
    alarm: &'a [bool],
    labels: Option<&'a [bool]>,
    episodes: &'a [(String, usize, usize)],
    lines: Vec<Line>,
    y_range: (f64, f64),
    caption: String,
    height: u32,
}

/// Readings per plotted point so that a timeline has at most about one point per pixel.
fn bucket_size(n: usize) -> usize {
    n.div_ceil(1100).max(1)
}

fn timeline_svg(t: &Timeline) -> Result<String> {
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
fn timeline_legend(has_labels: bool, has_faults: bool, lines: &[Line]) -> String {
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

fn hex(c: RGBColor) -> String {
    format!("#{:02x}{:02x}{:02x}", c.0, c.1, c.2)
}

fn histogram_svg(data: &ReportData) -> Result<String> {
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

fn qq_svg(qq: &[(f64, f64)]) -> Result<String> {
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

/// Diverging colour for a correlation in [−1, 1].
fn corr_colour(r: f64) -> RGBColor {
    let t = r.abs().min(1.0);
    let end = if r < 0.0 { NEGATIVE } else { POSITIVE };
    let mix = |a: u8, b: u8| (f64::from(a) + (f64::from(b) - f64::from(a)) * t).round() as u8;
    RGBColor(mix(247, end.0), mix(247, end.1), mix(247, end.2))
}

fn heatmap_svg(features: &[String], corr: &[f64]) -> Result<String> {
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

fn contributions_svg(
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

/// The first reading inside `[a, b)` with the alarm line on or a fault (not scored), if any,
/// and whether it was the fault line.
fn caught(alarm: &[bool], d2: &[Option<f32>], a: usize, b: usize) -> Option<(usize, bool)> {
    (a..b).find_map(|i| {
        let fault = d2.get(i).is_some_and(|d| d.is_none());
        let on = alarm.get(i).copied().unwrap_or(false);
        (on || fault).then_some((i, !on))
    })
}

fn caught_cell(alarm: &[bool], d2: &[Option<f32>], a: usize, b: usize, rate_hz: f64) -> String {
    match caught(alarm, d2, a, b) {
        Some((i, by_fault)) => {
            let delay = if has_rate(rate_hz) {
                format!("{:.0} s", (i - a) as f64 / rate_hz)
            } else {
                format!("{} readings", i - a)
            };
            let line = if by_fault { "fault" } else { "alarm" };
            format!("{line} after {delay}")
        }
        None => "missed".into(),
    }
}

fn duration(a: usize, b: usize, rate_hz: f64) -> String {
    let n = b.saturating_sub(a);
    if !has_rate(rate_hz) {
        return format!("{n} readings");
    }
    let s = n as f64 / rate_hz;
    if s >= 120.0 {
        format!("{:.0} min", s / 60.0)
    } else {
        format!("{s:.0} s")
    }
}

fn table(out: &mut String, header: &[String], rows: &[Vec<String>]) {
    out.push_str("<table><thead><tr>");
    for h in header {
        let _ = write!(out, "<th>{}</th>", escape(h));
    }
    out.push_str("</tr></thead><tbody>");
    for r in rows {
        out.push_str("<tr>");
        for c in r {
            let numeric = !c.is_empty()
                && c.chars()
                    .all(|ch| ch.is_ascii_digit() || "+-.,eE %∞".contains(ch));
            let class = if numeric { " class=\"num\"" } else { "" };
            let _ = write!(out, "<td{class}>{}</td>", escape(c));
        }
        out.push_str("</tr>");
    }
    out.push_str("</tbody></table>\n");
}

fn figure(out: &mut String, svg: &str, caption: &str) {
    let _ = writeln!(
        out,
        "<figure>{svg}<figcaption>{caption}</figcaption></figure>"
    );
}

/// Common y range of the timelines (so that the full and the diagonal model compare by eye).
fn timeline_range(streams: &[&[Option<f32>]], marks: &[f64]) -> (f64, f64) {
    log_range(
        streams
            .iter()
            .flat_map(|s| s.iter().filter_map(|d| d.map(f64::from))),
        marks,
        50,
    )
}

/// Render the whole HTML document.
///
/// # Errors
/// Only if plotters fails to draw into its string buffer.
pub fn render(data: &ReportData) -> Result<String> {
    let mut out = String::with_capacity(1 << 20);
    let title = if data.title.is_empty() {
        "Ellipsoid report"
    } else {
        &data.title
    };
    let _ = write!(
        out,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>{}</title>\n<style>{CSS}</style>\n</head>\n<body>\n<header><h1>{}</h1>",
        escape(title),
        escape(title)
    );
    if !data.subtitle.is_empty() {
        let _ = write!(out, "<p class=\"sub\">{}</p>", escape(&data.subtitle));
    }
    out.push_str("</header>\n");

    if !data.summary.is_empty() {
        out.push_str("<section><h2>Summary</h2><table class=\"kv\"><tbody>");
        for (k, v) in &data.summary {
            let _ = write!(out, "<tr><th>{}</th><td>{}</td></tr>", escape(k), escape(v));
        }
        out.push_str("</tbody></table></section>\n");
    }

    // The timeline.
    let labels = data.labels.as_deref().filter(|l| l.len() == data.d2.len());
    let mut marks = vec![data.alarm_threshold, data.clear_threshold];
    marks.extend(data.other_thresholds.iter().map(|t| t.1));
    let mut lines = vec![
        ("alarm".to_owned(), data.alarm_threshold, ALARM_LINE, false),
        ("clear".to_owned(), data.clear_threshold, CLEAR_LINE, true),
    ];
    for (name, v) in &data.other_thresholds {
        lines.push((name.clone(), *v, OTHER_LINE, true));
    }
    out.push_str("<section><h2>Score over time</h2>\n");
    if data.d2.is_empty() {
        out.push_str("<p class=\"empty\">No readings were scored.</p>\n");
    } else {
        let diag_stream: Vec<&[Option<f32>]> = match &data.diagonal {
            Some(d) => vec![&data.d2, &d.d2_diag],
            None => vec![&data.d2],
        };
        let mut all_marks = marks.clone();
        if let Some(d) = &data.diagonal {
            all_marks.push(d.threshold_diag);
        }
        let y_range = timeline_range(&diag_stream, &all_marks);
        let unscored = data.d2.iter().filter(|d| d.is_none()).count();
        let t = Timeline {
            d2: &data.d2,
            rate_hz: data.rate_hz,
            alarm: &data.alarm,
            labels,
            episodes: &data.episodes,
            lines: lines.clone(),
            y_range,
            caption: "d² of every reading".into(),
            height: 430,
        };
        let k = bucket_size(data.d2.len());
        let mut caption = timeline_legend(labels.is_some(), unscored > 0, &lines);
        let _ = write!(
            caption,
            "<br>{} readings, {} not scored.",
            data.d2.len(),
            unscored
        );
        if k > 1 {
            let _ = write!(
                caption,
                " Each point is the largest d² of {k} consecutive readings, so short peaks stay visible."
            );
        }
        let _ = write!(
            caption,
            " Values below {} are drawn at the bottom edge.",
            num(y_range.0)
        );
        figure(&mut out, &timeline_svg(&t)?, &caption);
        if !data.episodes.is_empty() {
            let rows: Vec<Vec<String>> = data
                .episodes
                .iter()
                .enumerate()
                .map(|(k, (name, a, b))| {
                    vec![
                        format!("{}", k + 1),
                        name.clone(),
                        clock(*a, data.rate_hz),
                        duration(*a, *b, data.rate_hz),
                        caught_cell(&data.alarm, &data.d2, *a, *b, data.rate_hz),
                    ]
                })
                .collect();
            let header: Vec<String> =
                ["#", "episode", "starts at", "lasts", "first alarm or fault"]
                    .iter()
                    .map(|s| s.to_string())
                    .collect();
            table(&mut out, &header, &rows);
        }
    }
    out.push_str("</section>\n");

    // The baseline.
    out.push_str("<section><h2>The baseline against the model</h2><div class=\"row\">\n");
    if data.baseline_d2.is_empty() {
        out.push_str("<p class=\"empty\">No baseline scores were given.</p>");
    } else {
        let caption = format!(
            "{} baseline readings in 48 bins of equal width on the log axis (values below the \
             left edge are counted in the first bin). The black line is the count expected if d² \
             followed a chi-square distribution with {} degrees of freedom (one per feature).",
            data.baseline_d2.len(),
            data.features.len().max(1)
        );
        figure(&mut out, &histogram_svg(data)?, &escape(&caption));
    }
    if data.qq.is_empty() {
        out.push_str("<p class=\"empty\">No QQ points were given.</p>");
    } else {
        figure(
            &mut out,
            &qq_svg(&data.qq)?,
            "Sorted baseline d² against chi-square quantiles. Points on the dashed line mean the \
             Gaussian model fits; points above it at the right mean heavier tails than the model \
             expects, so a chi-square threshold would alarm more often than it promises.",
        );
    }
    out.push_str("</div></section>\n");

    let p = data.features.len();
    if p > 0 && data.corr.len() == p * p {
        out.push_str("<section><h2>Correlation</h2>\n");
        figure(
            &mut out,
            &heatmap_svg(&data.features, &data.corr)?,
            "Brown: rising together; blue: one rises as the other falls. Columns are numbered as \
             the rows. Strong correlations are what the full-covariance model uses to catch a \
             reading whose channels are each normal but do not fit together.",
        );
        out.push_str("</section>\n");
    }

    if !data.top_alarms.is_empty() {
        out.push_str("<section><h2>What drove the largest alarms</h2><div class=\"row small\">\n");
        for (index, d2, contrib) in data.top_alarms.iter().take(8) {
            let svg = contributions_svg(&data.features, *index, *d2, contrib, data.rate_hz)?;
            figure(&mut out, &svg, "");
        }
        out.push_str(
            "</div><p>Each bar is the feature's share cᵢ = (x − μ)ᵢ · (Wᵀz)ᵢ of d²; the shares \
             sum to d². A negative share means the feature, given the others, pulls the reading \
             back towards the usual pattern.</p></section>\n",
        );
    }

    if let Some(diag) = &data.diagonal {
        out.push_str(
            "<section><h2>Full covariance against one feature at a time</h2>\n\
             <p>The same readings scored by the per-feature model (a diagonal covariance: each \
             channel against its own mean and spread, correlations ignored).</p>\n",
        );
        if data.d2.is_empty() && diag.d2_diag.is_empty() {
            out.push_str("<p class=\"empty\">No readings were scored.</p>\n");
        } else {
            let y_range = timeline_range(&[&data.d2, &diag.d2_diag], &{
                let mut m = marks.clone();
                m.push(diag.threshold_diag);
                m
            });
            let full = Timeline {
                d2: &data.d2,
                rate_hz: data.rate_hz,
                alarm: &data.alarm,
                labels,
                episodes: &data.episodes,
                lines: vec![("alarm".into(), data.alarm_threshold, ALARM_LINE, false)],
                y_range,
                caption: "full covariance".into(),
                height: 320,
            };
            let diag_labels = data
                .labels
                .as_deref()
                .filter(|l| l.len() == diag.d2_diag.len());
            let per = Timeline {
                d2: &diag.d2_diag,
                rate_hz: data.rate_hz,
                alarm: &diag.alarm_diag,
                labels: diag_labels,
                episodes: &data.episodes,
                lines: vec![("alarm".into(), diag.threshold_diag, ALARM_LINE, false)],
                y_range,
                caption: "per feature (diagonal covariance)".into(),
                height: 320,
            };
            let full_legend = timeline_legend(
                labels.is_some(),
                data.d2.iter().any(|d| d.is_none()),
                &full.lines,
            );
            figure(&mut out, &timeline_svg(&full)?, &full_legend);
            let per_legend = timeline_legend(
                diag_labels.is_some(),
                diag.d2_diag.iter().any(|d| d.is_none()),
                &per.lines,
            );
            figure(
                &mut out,
                &timeline_svg(&per)?,
                &format!(
                    "{per_legend}<br>The same y axis as above, so the two models compare by eye."
                ),
            );
            if !data.episodes.is_empty() {
                let rows: Vec<Vec<String>> = data
                    .episodes
                    .iter()
                    .enumerate()
                    .map(|(k, (name, a, b))| {
                        vec![
                            format!("{}", k + 1),
                            name.clone(),
                            duration(*a, *b, data.rate_hz),
                            caught_cell(&data.alarm, &data.d2, *a, *b, data.rate_hz),
                            caught_cell(&diag.alarm_diag, &diag.d2_diag, *a, *b, data.rate_hz),
                        ]
                    })
                    .collect();
                let header: Vec<String> =
                    ["#", "episode", "lasts", "full covariance", "per feature"]
                        .iter()
                        .map(|s| s.to_string())
                        .collect();
                table(&mut out, &header, &rows);
            }
            if let Some(l) = labels {
                if diag.alarm_diag.len() == l.len() && data.alarm.len() == l.len() {
                    let _ = writeln!(
                        out,
                        "<p>Alarms raised outside labelled events: full covariance {}, per \
                         feature {}.</p>",
                        crate::stats::metrics::false_alarms(&data.alarm, l),
                        crate::stats::metrics::false_alarms(&diag.alarm_diag, l)
                    );
                }
            }
        }
        if !diag.notes.is_empty() {
            out.push_str("<ul>");
            for n in &diag.notes {
                let _ = write!(out, "<li>{}</li>", escape(n));
            }
            out.push_str("</ul>\n");
        }
        out.push_str("</section>\n");
    }

    for (title, header, rows) in &data.tables {
        let _ = writeln!(out, "<section><h2>{}</h2>", escape(title));
        table(&mut out, header, rows);
        out.push_str("</section>\n");
    }

    let _ = write!(
        out,
        "<footer>Written by ellipsoid-trainer {}. Self-contained: no scripts, no external \
         files.</footer>\n</body>\n</html>\n",
        env!("CARGO_PKG_VERSION")
    );
    Ok(out)
}

#[cfg(test)]
mod tests {
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
            let open = html.matches(&format!("<{tag}>")).count()
                + html.matches(&format!("<{tag} ")).count();
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
    fn escape_covers_the_five_characters() {
        assert_eq!(
            escape("<a href='x'>&\"</a>"),
            "&lt;a href=&#39;x&#39;&gt;&amp;&quot;&lt;/a&gt;"
        );
        assert_eq!(escape("plain"), "plain");
    }
}
