//! No output ever replaces an input: every output path of a command is checked against every
//! input path, and against the other outputs, as the same FILE, not only the same spelling.
//!
//! Two paths name the same file when both exist and have the same device and inode (after
//! symbolic links: a hard link, a symbolic link or `./x` against `x` are all caught), or when
//! neither exists and their folders resolve to the same folder and their names are equal.

use std::path::{Path, PathBuf};

use anyhow::{bail, Result};

/// One file a command reads or writes, with what it is for messages (`the baseline`, `--out`).
pub struct Role<'a> {
    /// What the file is, as the user knows it.
    pub what: String,
    /// Its path as given.
    pub path: &'a Path,
}

impl<'a> Role<'a> {
    /// A role.
    pub fn new(what: impl Into<String>, path: &'a Path) -> Self {
        Self {
            what: what.into(),
            path,
        }
    }
}

#[derive(PartialEq, Debug)]
enum Identity {
    /// An existing file: device and inode (or, off Unix, its canonical path).
    Existing(u64, u64, PathBuf),
    /// A file that does not exist yet: its folder, resolved, and its name.
    New(PathBuf),
}

fn identity(path: &Path) -> Identity {
    if let Ok(m) = std::fs::metadata(path) {
        #[cfg(unix)]
        {
            use std::os::unix::fs::MetadataExt;
            return Identity::Existing(m.dev(), m.ino(), PathBuf::new());
        }
        #[cfg(not(unix))]
        {
            let _ = m;
            let c = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_path_buf());
            return Identity::Existing(0, 0, c);
        }
    }
    let parent = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    let dir = std::fs::canonicalize(parent)
        .or_else(|_| std::path::absolute(parent))
        .unwrap_or_else(|_| parent.to_path_buf());
    Identity::New(dir.join(path.file_name().unwrap_or_default()))
}

/// Refuse, before any work is done, an output that is the same file as an input or as another
/// output. The error names both files and their roles.
pub fn refuse_clashes(inputs: &[Role<'_>], outputs: &[Role<'_>]) -> Result<()> {
    let ins: Vec<Identity> = inputs.iter().map(|r| identity(r.path)).collect();
    let outs: Vec<Identity> = outputs.iter().map(|r| identity(r.path)).collect();
    for (o, oid) in outputs.iter().zip(&outs) {
        for (i, iid) in inputs.iter().zip(&ins) {
            if oid == iid {
                bail!(
                    "{} {} is the same file as {} {}: writing it would destroy that input; \
                     choose another output path",
                    o.what,
                    o.path.display(),
                    i.what,
                    i.path.display()
                );
            }
        }
    }
    // An output into a folder that does not exist would fail only after all the work.
    for o in outputs {
        let dir = match o.path.parent() {
            Some(d) if !d.as_os_str().is_empty() => d,
            _ => Path::new("."),
        };
        if !dir.is_dir() {
            bail!(
                "{} {}: the folder {} does not exist",
                o.what,
                o.path.display(),
                dir.display()
            );
        }
    }
    for (k, (o, oid)) in outputs.iter().zip(&outs).enumerate() {
        for (p, pid) in outputs[..k].iter().zip(&outs) {
            if oid == pid {
                bail!(
                    "{} {} is the same file as {} {}: one would overwrite the other; choose \
                     another output path",
                    o.what,
                    o.path.display(),
                    p.what,
                    p.path.display()
                );
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_same_file_under_other_names_is_caught() {
        let dir = tempfile::tempdir().unwrap();
        let base = dir.path().join("base.csv");
        std::fs::write(&base, "a\n1\n").unwrap();
        let dotted = dir.path().join(".").join("base.csv");
        let hard = dir.path().join("hard.csv");
        std::fs::hard_link(&base, &hard).unwrap();
        for other in [&base, &dotted, &hard] {
            let e = refuse_clashes(
                &[Role::new("the baseline", &base)],
                &[Role::new("--out", other)],
            )
            .unwrap_err()
            .to_string();
            assert!(e.contains("--out") && e.contains("the baseline"), "{e}");
            assert!(e.contains(&base.display().to_string()), "{e}");
        }
        #[cfg(unix)]
        {
            let link = dir.path().join("link.csv");
            std::os::unix::fs::symlink(&base, &link).unwrap();
            assert!(refuse_clashes(
                &[Role::new("the baseline", &base)],
                &[Role::new("--out", &link)]
            )
            .is_err());
        }
        // Two new files in one folder, spelled differently.
        let a = dir.path().join("new.blob");
        let b = dir.path().join("sub/../new.blob");
        std::fs::create_dir(dir.path().join("sub")).unwrap();
        assert!(refuse_clashes(&[], &[Role::new("--out", &a), Role::new("--report", &b)]).is_err());
        // Different files pass.
        refuse_clashes(
            &[Role::new("the baseline", &base)],
            &[
                Role::new("--out", &a),
                Role::new("--report", &dir.path().join("r.html")),
            ],
        )
        .unwrap();
    }
}
