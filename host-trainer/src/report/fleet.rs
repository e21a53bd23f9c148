//! The fleet overview of `fit --by`: one self-contained page, a row per machine, worst first.
//!
//! No scripts, no images, no links: the house style sheet inline and one table. "Worst" is, in
//! this order: a machine whose fit failed; then the most false alarms a day in its held-out tail;
//! then the most warnings; ties by machine id.

use std::cmp::Ordering;
use std::fmt::Write as _;

use super::escape;
use super::html::table;
use super::style::{num, CSS};

/// One machine, as the overview shows it.
#[derive(Clone, Debug)]
pub struct FleetLine {
    /// The machine id.
    pub machine: String,
    /// Its blob's file name.
    pub blob: String,
    /// Rows in the log.
    pub rows: u64,
    /// Rows fitted.
    pub rows_fitted: u64,
    /// The alarm threshold on d².
    pub threshold: Option<f64>,
    /// Hold-out false alarms a day.
    pub alarms_per_day: Option<f64>,
    /// Their 95 % upper bound.
    pub alarms_upper95: Option<f64>,
    /// The fit's warnings.
    pub warnings: Vec<String>,
    /// Why the fit failed.
    pub error: Option<String>,
}

/// Worst first (see the module documentation).
pub fn worst_first(a: &FleetLine, b: &FleetLine) -> Ordering {
    b.error
        .is_some()
        .cmp(&a.error.is_some())
        .then_with(|| {
            let r = |l: &FleetLine| l.alarms_per_day.unwrap_or(-1.0);
            r(b).total_cmp(&r(a))
        })
        .then_with(|| b.warnings.len().cmp(&a.warnings.len()))
        .then_with(|| a.machine.cmp(&b.machine))
}

/// The whole page.
pub fn render_fleet(title: &str, lines: &[FleetLine]) -> String {
    let mut sorted: Vec<&FleetLine> = lines.iter().collect();
    sorted.sort_by(|a, b| worst_first(a, b));
    let failed = lines.iter().filter(|l| l.error.is_some()).count();
    let warned = lines
        .iter()
        .filter(|l| l.error.is_none() && !l.warnings.is_empty())
        .count();
    let alarming = lines
        .iter()
        .filter(|l| l.alarms_per_day.is_some_and(|r| r > 0.0))
        .count();
    let mut out = String::new();
    let _ = write!(
        out,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>{t}</title>\n<style>{CSS}</style>\n</head>\n<body>\n<header><h1>{t}</h1>\
         <p class=\"sub\">{n} machines: {ok} fitted, {failed} failed; {warned} with warnings; \
         {alarming} with false alarms in their held-out tail. Worst first: failed fits, then the \
         most hold-out false alarms a day, then the most warnings.</p></header>\n<section>",
        t = escape(title),
        n = lines.len(),
        ok = lines.len() - failed,
    );
    let header: Vec<String> = [
        "machine",
        "blob",
        "rows",
        "fitted",
        "threshold d²",
        "hold-out alarms a day",
        "95 % upper bound",
        "warnings or error",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    let opt = |v: Option<f64>| v.map_or(String::new(), num);
    let rows: Vec<Vec<String>> = sorted
        .iter()
        .map(|l| {
            vec![
                l.machine.clone(),
                if l.error.is_some() {
                    "(none)".into()
                } else {
                    l.blob.clone()
                },
                l.rows.to_string(),
                l.rows_fitted.to_string(),
                opt(l.threshold),
                opt(l.alarms_per_day),
                opt(l.alarms_upper95),
                match &l.error {
                    Some(e) => format!("FAILED: {e}"),
                    None => l.warnings.join("; "),
                },
            ]
        })
        .collect();
    table(&mut out, &header, &rows);
    out.push_str("</section>\n<footer>Written by ellipsoid fit --by.</footer>\n</body>\n</html>\n");
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn line(machine: &str, alarms: Option<f64>, warnings: usize, error: bool) -> FleetLine {
        FleetLine {
            machine: machine.into(),
            blob: format!("{machine}.blob"),
            rows: 10,
            rows_fitted: 8,
            threshold: Some(20.0),
            alarms_per_day: alarms,
            alarms_upper95: alarms.map(|a| a + 3.0),
            warnings: vec!["w".into(); warnings],
            error: error.then(|| "bad <data>".into()),
        }
    }

    #[test]
    fn the_overview_puts_the_worst_first_and_links_nowhere() {
        let lines = vec![
            line("quiet", Some(0.0), 0, false),
            line("noisy", Some(4.0), 0, false),
            line("broken", None, 0, true),
            line("warned", Some(0.0), 2, false),
        ];
        let html = render_fleet("Fleet <x>", &lines);
        let at = |s: &str| html.find(&format!("<td>{s}</td>")).unwrap();
        assert!(at("broken") < at("noisy"));
        assert!(at("noisy") < at("warned"));
        assert!(at("warned") < at("quiet"));
        assert!(html.contains("FAILED: bad &lt;data&gt;"));
        assert!(html.contains("Fleet &lt;x&gt;"));
        for outside in ["href", "src=", "http", "<script", "@import", "url("] {
            assert!(!html.contains(outside), "{outside}");
        }
    }
}
