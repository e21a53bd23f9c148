//! `ellipsoid-node`: the sensor node image. It only hands the board chosen by the board feature to
//! the board-independent application ([`ellipsoid_firmware_example::app`]).
#![cfg_attr(target_os = "none", no_std, no_main)]

/// Features per reading: the demo booster pump's five sensors. A blob for another N is refused
/// at boot (and reported), like any other invalid slot.
#[cfg(target_os = "none")]
const N: usize = 5;

#[cfg(target_os = "none")]
#[cortex_m_rt::entry]
fn main() -> ! {
    use ellipsoid_firmware_example::{app, board::selected};
    app::run::<N>(selected::take())
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
