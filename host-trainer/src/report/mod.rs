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

mod contributions;
pub mod fleet;
mod heatmap;
mod histogram;
mod html;
pub mod modes;
mod qq;
mod style;
mod timeline;

use contributions::contributions_svg;
use heatmap::heatmap_svg;
use histogram::histogram_svg;
use html::{caught_cell, duration, figure, table};
use qq::qq_svg;
use style::{clock, num, ALARM_LINE, CLEAR_LINE, CSS, OTHER_LINE};
use timeline::{bucket_size, timeline_legend, timeline_range, timeline_svg, Timeline};

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
    /// A bank on the same stream, if one was run: what it is, and a panel per mode.
    pub bank: Option<(String, Vec<modes::ModePanel>)>,
    /// The drift of a bank's centre over the stream, if it had drift.
    pub drift: Option<modes::DriftPlot>,
}

/// `h:mm:ss` of a reading index at `rate_hz` (`reading i` without a rate), as the report writes
/// times.
pub fn clock_of(i: usize, rate_hz: f64) -> String {
    clock(i, rate_hz)
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

/// Render the whole HTML document.
///
/// # Errors
/// Only if plotters fails to draw into its string buffer.
pub fn render(data: &ReportData) -> Result<String> {
    let mut out = String::with_capacity(1 << 20);
    header_and_summary(&mut out, data);
    timeline_section(&mut out, data)?;
    baseline_section(&mut out, data)?;
    correlation_section(&mut out, data)?;
    top_alarms_section(&mut out, data)?;
    diagonal_section(&mut out, data)?;
    bank_section(&mut out, data)?;
    tables_and_footer(&mut out, data);
    Ok(out)
}

/// The thresholds drawn on the timelines, and the labels when they match the readings.
struct Marks<'a> {
    labels: Option<&'a [bool]>,
    marks: Vec<f64>,
    lines: Vec<style::Line>,
}

impl<'a> Marks<'a> {
    fn of(data: &'a ReportData) -> Self {
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
        Marks {
            labels,
            marks,
            lines,
        }
    }
}

/// The document head, the title and the summary table.
fn header_and_summary(out: &mut String, data: &ReportData) {
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
}

/// The score over time, with the episodes table.
fn timeline_section(out: &mut String, data: &ReportData) -> Result<()> {
    let Marks {
        labels,
        marks,
        lines,
    } = Marks::of(data);
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
        figure(out, &timeline_svg(&t)?, &caption);
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
            table(out, &header, &rows);
        }
    }
    out.push_str("</section>\n");

    Ok(())
}

/// The baseline's histogram and QQ plot.
fn baseline_section(out: &mut String, data: &ReportData) -> Result<()> {
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
        figure(out, &histogram_svg(data)?, &escape(&caption));
    }
    if data.qq.is_empty() {
        out.push_str("<p class=\"empty\">No QQ points were given.</p>");
    } else {
        figure(
            out,
            &qq_svg(&data.qq)?,
            "Sorted baseline d² against chi-square quantiles. Points on the dashed line mean the \
             Gaussian model fits; points above it at the right mean heavier tails than the model \
             expects, so a chi-square threshold would alarm more often than it promises.",
        );
    }
    out.push_str("</div></section>\n");

    Ok(())
}

/// The correlation heat map.
fn correlation_section(out: &mut String, data: &ReportData) -> Result<()> {
    let p = data.features.len();
    if p > 0 && data.corr.len() == p * p {
        out.push_str("<section><h2>Correlation</h2>\n");
        figure(
            out,
            &heatmap_svg(&data.features, &data.corr)?,
            "Brown: rising together; blue: one rises as the other falls. Columns are numbered as \
             the rows. Strong correlations are what the full-covariance model uses to catch a \
             reading whose channels are each normal but do not fit together.",
        );
        out.push_str("</section>\n");
    }

    Ok(())
}

/// The contributions of the largest alarms.
fn top_alarms_section(out: &mut String, data: &ReportData) -> Result<()> {
    if !data.top_alarms.is_empty() {
        out.push_str("<section><h2>What drove the largest alarms</h2><div class=\"row small\">\n");
        for (index, d2, contrib) in data.top_alarms.iter().take(8) {
            let svg = contributions_svg(&data.features, *index, *d2, contrib, data.rate_hz)?;
            figure(out, &svg, "");
        }
        out.push_str(
            "</div><p>Each bar is the feature's share cᵢ = (x − μ)ᵢ · (Wᵀz)ᵢ of d²; the shares \
             sum to d². A negative share means the feature, given the others, pulls the reading \
             back towards the usual pattern.</p></section>\n",
        );
    }

    Ok(())
}

/// The full model beside its per-feature twin, if given.
fn diagonal_section(out: &mut String, data: &ReportData) -> Result<()> {
    let Some(diag) = &data.diagonal else {
        return Ok(());
    };
    let Marks { labels, marks, .. } = Marks::of(data);
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
        figure(out, &timeline_svg(&full)?, &full_legend);
        let per_legend = timeline_legend(
            diag_labels.is_some(),
            diag.d2_diag.iter().any(|d| d.is_none()),
            &per.lines,
        );
        figure(
            out,
            &timeline_svg(&per)?,
            &format!("{per_legend}<br>The same y axis as above, so the two models compare by eye."),
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
            let header: Vec<String> = ["#", "episode", "lasts", "full covariance", "per feature"]
                .iter()
                .map(|s| s.to_string())
                .collect();
            table(out, &header, &rows);
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
    Ok(())
}

/// Extra tables and the footer.
fn bank_section(out: &mut String, data: &ReportData) -> Result<()> {
    if let Some((what, panels)) = &data.bank {
        let _ = writeln!(
            out,
            "<section><h2>The bank's modes</h2>\n<p>{}: a reading is flagged only when it is outside \
             every mode's alarm limit; each reading is shown under the mode the device chose for it.</p>\n\
             <div class=\"row small\">",
            escape(what)
        );
        for p in panels {
            out.push_str("<div>");
            out.push_str(&modes::mode_panel_html(p, data.rate_hz)?);
            out.push_str("</div>");
        }
        out.push_str("</div></section>\n");
    }
    if let Some(d) = &data.drift {
        out.push_str(
            "<section><h2>Drift of the centre</h2>\n<p>The slow shift the device learns while the \
             readings are quiet (frozen otherwise), bounded per feature; at the bound it stops and \
             raises a drift event.</p>\n",
        );
        out.push_str(&modes::drift_html(d, data.rate_hz)?);
        out.push_str("</section>\n");
    }
    Ok(())
}

fn tables_and_footer(out: &mut String, data: &ReportData) {
    for (title, header, rows) in &data.tables {
        let _ = writeln!(out, "<section><h2>{}</h2>", escape(title));
        table(out, header, rows);
        out.push_str("</section>\n");
    }

    let _ = write!(
        out,
        "<footer>Written by ellipsoid-trainer {}. Self-contained: no scripts, no external \
         files.</footer>\n</body>\n</html>\n",
        env!("CARGO_PKG_VERSION")
    );
}

#[cfg(test)]
mod tests;
