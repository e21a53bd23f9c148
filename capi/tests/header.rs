//! The committed C header is the one cbindgen makes from the source today.

use std::path::Path;

#[test]
fn the_committed_header_is_current() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"));
    let config =
        cbindgen::Config::from_file(dir.join("cbindgen.toml")).expect("read cbindgen.toml");
    let mut fresh = Vec::new();
    cbindgen::Builder::new()
        .with_config(config)
        .with_src(dir.join("src/lib.rs"))
        .generate()
        .expect("cbindgen parses src/lib.rs")
        .write(&mut fresh);
    let path = dir.join("include/ellipsoid.h");
    if std::env::var_os("ELLIPSOID_WRITE_HEADER").is_some() {
        std::fs::write(&path, &fresh).expect("write include/ellipsoid.h");
    }
    let committed = std::fs::read(&path).unwrap_or_default();
    assert!(
        committed == fresh,
        "{} is stale (or missing): regenerate it with \
         `ELLIPSOID_WRITE_HEADER=1 cargo test -p ellipsoid-capi --test header` and commit it",
        path.display()
    );
}

/// The README's "From C" lines are lines of the example firmware, so that they compile.
#[test]
fn the_readme_c_lines_are_in_the_example() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"));
    let readme = std::fs::read_to_string(dir.join("../README.md")).expect("read README.md");
    let example = std::fs::read_to_string(dir.join("example/main.c")).expect("read main.c");
    let section = readme
        .split("### From C")
        .nth(1)
        .expect("README.md has a section \"### From C\"");
    let block = section
        .split("```c\n")
        .nth(1)
        .and_then(|b| b.split("```").next())
        .expect("the section has a ```c block");
    let lines: Vec<&str> = block
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty())
        .collect();
    assert!(
        lines.len() >= 10,
        "only {} lines in the C block",
        lines.len()
    );
    let have: Vec<&str> = example.lines().map(str::trim).collect();
    for l in lines {
        assert!(
            have.contains(&l),
            "README.md's C line {l:?} is not a line of capi/example/main.c"
        );
    }
}
