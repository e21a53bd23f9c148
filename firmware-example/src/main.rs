//! `ellipsoid-node`: the sensor node image. It only hands the board chosen by the board feature to
//! the board-independent application ([`ellipsoid_firmware_example::app`]).
#![no_std]
#![no_main]

use cortex_m_rt::entry;
use ellipsoid_firmware_example::{app, board::selected};

/// Features per reading: the demo booster pump's five sensors. A blob for another N is refused
/// at boot (and reported), like any other invalid slot.
const N: usize = 5;

#[entry]
fn main() -> ! {
    app::run::<N>(selected::take())
}
