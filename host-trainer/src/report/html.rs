//! Pieces of the page: tables, figures, and the cells that say when an episode was caught.

use std::fmt::Write as _;

use super::escape;
use super::style::*;

/// The first reading inside `[a, b)` with the alarm line on or a fault (not scored), if any,
/// and whether it was the fault line.
pub(super) fn caught(
    alarm: &[bool],
    d2: &[Option<f32>],
    a: usize,
    b: usize,
) -> Option<(usize, bool)> {
    (a..b).find_map(|i| {
        let fault = d2.get(i).is_some_and(|d| d.is_none());
        let on = alarm.get(i).copied().unwrap_or(false);
        (on || fault).then_some((i, !on))
    })
}

pub(super) fn caught_cell(
    alarm: &[bool],
    d2: &[Option<f32>],
    a: usize,
    b: usize,
    rate_hz: f64,
) -> String {
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

pub(super) fn duration(a: usize, b: usize, rate_hz: f64) -> String {
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

pub(super) fn table(out: &mut String, header: &[String], rows: &[Vec<String>]) {
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

pub(super) fn figure(out: &mut String, svg: &str, caption: &str) {
    let _ = writeln!(
        out,
        "<figure>{svg}<figcaption>{caption}</figcaption></figure>"
    );
}
