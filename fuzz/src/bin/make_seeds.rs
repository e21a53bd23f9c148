//! Writes the seed inputs of `decode_score` into the folder given (default `fuzz/seeds/decode_score`):
//! valid blobs of every fuzzed dimension, sealed and to be resealed, with readings; the same
//! models on the parameter path; and the golden blobs of `tests/golden/`.
//!
//! `cargo run --manifest-path fuzz/Cargo.toml --bin make-seeds` (stable Rust is enough).

use std::fs;
use std::path::{Path, PathBuf};

use ellipsoid_core::blob;
use ellipsoid_fuzz::{
    blob_input, dim_index, params_bytes, seed_params, seed_readings, PARAMS, RESEAL,
};

fn write(dir: &Path, name: &str, bytes: &[u8]) {
    let path = dir.join(name);
    fs::write(&path, bytes).unwrap_or_else(|e| panic!("writing {}: {e}", path.display()));
}

fn seeds_for<const N: usize>(dir: &Path) {
    let p = seed_params::<N>();
    let mut buf = vec![0u8; blob::max_len(N)];
    let len = blob::encode(&p, &mut buf).expect("seed parameters are valid");
    let readings = seed_readings(&p);
    let d = dim_index(N);
    write(
        dir,
        &format!("blob-n{N}"),
        &blob_input(d, &buf[..len], &readings),
    );
    write(
        dir,
        &format!("blob-n{N}-reseal"),
        &blob_input(d | RESEAL, &buf[..len], &readings),
    );
    let mut params = vec![d | PARAMS];
    params.extend_from_slice(&params_bytes(&p));
    params.extend_from_slice(&readings);
    write(dir, &format!("params-n{N}"), &params);
}

/// The blob of a `tests/golden/*.pins` file (its `blob` line).
fn golden_blob(path: &Path) -> Vec<u8> {
    let text = fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let hex = text
        .lines()
        .find_map(|l| l.strip_prefix("blob "))
        .unwrap_or_else(|| panic!("{}: no blob line", path.display()))
        .trim();
    (0..hex.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(&hex[i..i + 2], 16).expect("hex"))
        .collect()
}

fn main() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let dir = std::env::args()
        .nth(1)
        .map(PathBuf::from)
        .unwrap_or_else(|| root.join("seeds/decode_score"));
    fs::create_dir_all(&dir).expect("creating the seed folder");
    seeds_for::<1>(&dir);
    seeds_for::<2>(&dir);
    seeds_for::<3>(&dir);
    seeds_for::<4>(&dir);
    seeds_for::<5>(&dir);
    seeds_for::<8>(&dir);
    seeds_for::<16>(&dir);
    seeds_for::<32>(&dir);
    for (name, n) in [("golden-n2", 2), ("golden-n5", 5)] {
        let b = golden_blob(&root.join(format!("../tests/golden/{name}.pins")));
        write(&dir, name, &blob_input(dim_index(n), &b, &[]));
    }
    println!("seeds written to {}", dir.display());
}
