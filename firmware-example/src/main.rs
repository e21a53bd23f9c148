//! `ellipsoid-node`: the sensor node image. It only hands the board chosen by the board feature to
//! the board-independent application ([`ellipsoid_firmware_example::app`]).
#![cfg_attr(target_os = "none", no_std, no_main)]

/// Features per reading: the demo booster pump's five sensors. A blob for another N is refused
/// at boot (and reported), like any other invalid slot. `ELLIPSOID_NODE_N=8` at build time builds
/// the image for another N (e2e.sh measures the flash of an N = 8 image that way).
#[cfg(target_os = "none")]
const N: usize = match option_env!("ELLIPSOID_NODE_N") {
    Some(n) => parse_n(n),
    None => 5,
};

/// A decimal `N` in 1..=32, at compile time (a bad value fails the build).
#[cfg(target_os = "none")]
const fn parse_n(s: &str) -> usize {
    let b = s.as_bytes();
    let mut n = 0;
    let mut i = 0;
    assert!(!b.is_empty(), "ELLIPSOID_NODE_N is empty");
    while i < b.len() {
        assert!(b[i].is_ascii_digit(), "ELLIPSOID_NODE_N must be a number");
        n = n * 10 + (b[i] - b'0') as usize;
        i += 1;
    }
    assert!(n >= 1 && n <= 32, "ELLIPSOID_NODE_N must be in 1..=32");
    n
}

#[cfg(target_os = "none")]
#[cortex_m_rt::entry]
fn main() -> ! {
    use ellipsoid_firmware_example::{app, board::selected};
    // A model bank that scores the first differences too holds 2 N values a sample.
    app::run::<N, { ellipsoid_core::tri(N) }, { 2 * N }>(selected::take())
}

/// The default board feature is on in host builds too (`cargo build --workspace`), where there is
/// no board: the host binary only says how to build the image.
#[cfg(not(target_os = "none"))]
fn main() {
    eprintln!(
        "ellipsoid-node: this is a board image; build it with \
         --target thumbv7em-none-eabihf (see firmware-example/README.md)"
    );
    std::process::exit(2);
}
