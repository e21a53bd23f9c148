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
