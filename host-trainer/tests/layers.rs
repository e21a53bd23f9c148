//! The trainer's layers point one way (see the crate docs in `src/lib.rs`): a file may use its own
//! layer and the layers below it, never one above it or a peer beside it. This reads every source
//! file and checks each `crate::…` path against that order.

use std::fs;
use std::path::{Path, PathBuf};

/// Each top-level module and its height; a module may use only its own layer and lower ones.
const LAYERS: &[(&str, u8)] = &[
    ("cli", 5),
    ("commands", 4),
    ("pipeline", 3),
    ("fit", 2),
    ("report", 2),
    ("stats", 1),
    ("data", 1),
    ("device", 1),
];

/// Exported macros live at the crate root but belong to the layer that defines them.
const MACROS: &[(&str, &str)] = &[
    ("with_dim", "device"),
    ("with_bank_dims", "device"),
    ("__dim_arms", "device"),
    ("__bank_dim_arms", "device"),
];

fn height(module: &str) -> Option<u8> {
    LAYERS.iter().find(|(m, _)| *m == module).map(|(_, h)| *h)
}

fn sources(dir: &Path, out: &mut Vec<PathBuf>) {
    for entry in fs::read_dir(dir).expect("read src") {
        let path = entry.expect("dir entry").path();
        if path.is_dir() {
            sources(&path, out);
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
}

/// The source without comments, and without the white space around `::`, braces and commas, so
/// that `crate :: x`, a path broken over lines or a brace in a comment cannot hide a path.
fn squeeze(text: &str) -> String {
    let mut bare = String::with_capacity(text.len());
    let mut chars = text.chars().peekable();
    while let Some(c) = chars.next() {
        match (c, chars.peek()) {
            ('/', Some('/')) => {
                for d in chars.by_ref() {
                    if d == '\n' {
                        break;
                    }
                }
                bare.push(' ');
            }
            ('/', Some('*')) => {
                chars.next();
                let mut prev = ' ';
                for d in chars.by_ref() {
                    if prev == '*' && d == '/' {
                        break;
                    }
                    prev = d;
                }
                bare.push(' ');
            }
            (c, _) if c.is_whitespace() => bare.push(' '),
            (c, _) => bare.push(c),
        }
    }
    let tight = |c: char| matches!(c, ':' | '{' | '}' | ',');
    let chars: Vec<char> = bare.chars().collect();
    let mut out = String::with_capacity(bare.len());
    for (i, &c) in chars.iter().enumerate() {
        if c == ' ' {
            let prev = out.chars().last();
            let next = chars[i + 1..].iter().find(|d| **d != ' ');
            if prev.is_none_or(|p| p == ' ' || tight(p)) || next.is_none_or(|n| tight(*n)) {
                continue;
            }
        }
        out.push(c);
    }
    out
}

fn ident(s: &str) -> String {
    s.chars()
        .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
        .collect()
}

/// The first names of a path or of a (nested) group: `a::b` gives `a`, `{a,b::{c},d}` gives a, b, d.
fn heads(rest: &str, found: &mut Vec<String>) {
    let Some(group) = rest.strip_prefix('{') else {
        let name = ident(rest);
        if !name.is_empty() {
            found.push(name);
        }
        return;
    };
    let mut depth = 0usize;
    let mut at_item = true;
    for (i, c) in group.char_indices() {
        match c {
            '{' => depth += 1,
            '}' if depth == 0 => break,
            '}' => depth -= 1,
            ',' if depth == 0 => at_item = true,
            _ if at_item && depth == 0 => {
                let name = ident(&group[i..]);
                if !name.is_empty() {
                    found.push(name);
                }
                at_item = false;
            }
            _ => {}
        }
    }
}

/// The top-level modules a source file names, through `crate::` paths and through `super::`
/// chains that climb to the crate root. `module` is the file's module path (`["stats", "mcd"]`
/// for `stats/mcd/mod.rs`).
fn uses(text: &str, module: &[String]) -> Vec<String> {
    let text = squeeze(text);
    let mut found = Vec::new();
    for (i, _) in text.match_indices("crate::") {
        heads(&text[i + "crate::".len()..], &mut found);
    }
    let mut i = 0;
    while let Some(k) = text[i..].find("super::") {
        let start = i + k;
        // Only the first `super::` of a chain (not one preceded by another).
        let preceded = text[..start].ends_with("super::");
        let mut end = start;
        let mut climbs = 0;
        while text[end..].starts_with("super::") {
            end += "super::".len();
            climbs += 1;
        }
        if !preceded && climbs >= module.len() {
            // At the crate root only a top-level module counts; another name means the chain
            // started inside an inline module (`mod tests`) and stayed in this layer.
            let mut names = Vec::new();
            heads(&text[end..], &mut names);
            found.extend(names.into_iter().filter(|n| height(n).is_some()));
        }
        i = end;
    }
    found
}

#[test]
fn layers_point_down() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    sources(&src, &mut files);
    assert!(
        files.len() > 20,
        "expected the trainer's sources in {src:?}"
    );
    let mut wrong = Vec::new();
    let mut checked = 0;
    for file in &files {
        let rel = file.strip_prefix(&src).expect("under src");
        let first = rel.components().next().expect("a path");
        let own = first.as_os_str().to_string_lossy();
        let own = own.trim_end_matches(".rs");
        if own == "lib" || own == "main" {
            continue;
        }
        let own_h = height(own).unwrap_or_else(|| panic!("{rel:?}: module `{own}` is in no layer"));
        let text = fs::read_to_string(file).expect("read source");
        let module: Vec<String> = rel
            .with_extension("")
            .components()
            .map(|c| c.as_os_str().to_string_lossy().into_owned())
            .filter(|c| c != "mod")
            .collect();
        for name in uses(&text, &module) {
            let target = MACROS
                .iter()
                .find(|(m, _)| *m == name)
                .map_or(name.as_str(), |(_, layer)| layer);
            checked += 1;
            if target == own {
                continue;
            }
            match height(target) {
                Some(h) if h < own_h => {}
                Some(_) => wrong.push(format!("{rel:?} ({own}) uses crate::{name}")),
                None => wrong.push(format!("{rel:?} uses crate::{name}, which is in no layer")),
            }
        }
    }
    assert!(
        checked > 50,
        "only {checked} crate paths found: is the scan broken?"
    );
    assert!(
        wrong.is_empty(),
        "imports that point up or sideways:\n{}",
        wrong.join("\n")
    );
}

#[test]
fn the_scan_sees_plain_and_grouped_paths() {
    let here = ["stats".to_string(), "threshold".to_string()];
    let text = "use crate::stats::metrics;\nuse crate::{data, report::render};\nlet x = crate::with_dim!(n, N => 1);";
    assert_eq!(uses(text, &here), ["stats", "data", "report", "with_dim"]);
}

/// Paths that a plain text search misses: spaced, broken over lines, nested groups, braces in
/// comments, and `super::` chains that climb to the crate root.
#[test]
fn the_scan_sees_through_spacing_nesting_and_super_chains() {
    let here = ["stats".to_string(), "threshold".to_string()];
    let cases = [
        ("use crate :: cli as up;", vec!["cli"]),
        ("use crate::\n    commands::fit;", vec!["commands"]),
        (
            "use crate::{stats::{moments as m}, pipeline::train};",
            vec!["stats", "pipeline"],
        ),
        (
            "use crate::{ /* { */ data, // }\n commands};",
            vec!["data", "commands"],
        ),
        ("use super::super::commands::fit as up;", vec!["commands"]),
        ("use super::moments::Moments;", vec![]),
        ("use super::{super::cli, x};", vec![]),
    ];
    for (text, want) in cases {
        assert_eq!(uses(text, &here), want, "{text}");
    }
    // From a file one level deeper, two `super::` stay inside the layer.
    let deeper = ["stats".to_string(), "mcd".to_string(), "tests".to_string()];
    assert!(uses("use super::super::moments;", &deeper).is_empty());
    assert_eq!(uses("use super::super::super::cli;", &deeper), ["cli"]);
}
