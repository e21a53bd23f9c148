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
const MACROS: &[(&str, &str)] = &[("with_dim", "device")];

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

/// The top-level modules a source text names through `crate::` (plain and grouped `use`).
fn uses(text: &str) -> Vec<String> {
    let mut found = Vec::new();
    let ident = |s: &str| -> String {
        s.chars()
            .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
            .collect()
    };
    for (i, _) in text.match_indices("crate::") {
        let rest = &text[i + "crate::".len()..];
        if let Some(group) = rest.strip_prefix('{') {
            let end = group.find('}').unwrap_or(group.len());
            for item in group[..end].split(',') {
                let name = ident(item.trim());
                if !name.is_empty() {
                    found.push(name);
                }
            }
        } else {
            let name = ident(rest);
            if !name.is_empty() {
                found.push(name);
            }
        }
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
        for name in uses(&text) {
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
    let text = "use crate::stats::metrics;\nuse crate::{data, report::render};\nlet x = crate::with_dim!(n, N => 1);";
    assert_eq!(uses(text), ["stats", "data", "report", "with_dim"]);
}
