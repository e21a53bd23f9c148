//! `ellipsoid-node`: the sensor node image. Joins the board to the board-independent application.
#![no_std]
#![no_main]

use core::fmt::Write;

use cortex_m_rt::entry;
use ellipsoid_firmware_example::node::Node;
use ellipsoid_firmware_example::pins::{ActiveLevel, Line};
use ellipsoid_firmware_example::source::Table;
use ellipsoid_firmware_example::{board, measure};

/// Features per reading: the demo booster pump's five sensors. A blob for another N is refused
/// at boot (and reported), like any other invalid slot.
const N: usize = 5;

#[entry]
fn main() -> ! {
    let mut out = board::Console::new();
    let Some(b) = board::take() else {
        let _ = writeln!(out, "peripherals already taken");
        board::exit(false)
    };
    let _ = writeln!(out, "boot ellipsoid-node n={N}");
    let alarm = Line::new(b.alarm, ActiveLevel::High);
    let fault = Line::new(b.fault, ActiveLevel::High);
    let mut node = Node::<_, _, N>::boot(&board::model_slots(), alarm, fault, &mut out);
    let ok = match Table::<N>::new(board::readings()) {
        Ok(mut table) => {
            let _ = writeln!(out, "readings count={}", table.count());
            measure::paint_stack();
            node.run(&mut table, &mut out);
            let _ = writeln!(out, "stack peak_bytes={}", measure::stack_peak());
            true
        }
        Err(e) => {
            let _ = writeln!(out, "readings unusable: {e}");
            node.source_failed(&mut out);
            false
        }
    };
    let _ = writeln!(out, "leds={:02b}", board::leds() & 0b11);
    board::exit(ok)
}
