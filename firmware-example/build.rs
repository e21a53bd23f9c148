//! Chooses the memory map of the board being built and links the images with cortex-m-rt's
//! `link.x`. Only for bare-metal targets; host builds (the library and its tests) are untouched.
//!
//! A board is a cargo feature with a folder of the same name (`-` written `_`) under `boards/`,
//! holding its `memory.x`: the feature `mps2-an386` selects `boards/mps2_an386/memory.x`. At most
//! one board feature may be on; with none, only the library is built and no map is needed.

use std::{env, fs, path::PathBuf};

fn main() {
    println!("cargo:rerun-if-changed=build.rs");
    println!("cargo:rerun-if-changed=boards");
    if env::var("CARGO_CFG_TARGET_OS").as_deref() != Ok("none") {
        return;
    }
    let mut boards: Vec<String> = fs::read_dir("boards")
        .expect("read the folder boards/")
        .filter_map(|entry| entry.ok()?.file_name().into_string().ok())
        .filter(|dir| {
            let feature = format!("CARGO_FEATURE_{}", dir.to_ascii_uppercase());
            env::var_os(feature).is_some()
        })
        .collect();
    boards.sort();
    let board = match boards.as_slice() {
        [] => return,
        [one] => one,
        many => panic!(
            "more than one board feature is on ({}): an image is for one board; build it with \
             --no-default-features --features <board>",
            many.join(", ").replace('_', "-"),
        ),
    };
    let map = PathBuf::from("boards").join(board).join("memory.x");
    let out = PathBuf::from(env::var_os("OUT_DIR").expect("cargo sets OUT_DIR"));
    if let Err(e) = fs::copy(&map, out.join("memory.x")) {
        panic!("board feature {board}: cannot copy {}: {e}", map.display());
    }
    println!("cargo:rustc-link-search={}", out.display());
    println!("cargo:rustc-link-arg-bins=-Tlink.x");
}
