//! What the application needs from a board, and the board this image is built for.
//!
//! A board gives the application four things, and nothing else in the library knows which board
//! it runs on:
//!
//! * the two output pins, alarm and fault, as embedded-hal 1.0 `OutputPin`s wrapped in
//!   [`Line`]s (the board knows which level means "on"): [`Parts`];
//! * the console the report is written to ([`Board::Console`]);
//! * the model slots and the reading source ([`Board::model_slots`], [`Board::readings`]);
//! * the end of a run ([`Board::finish`]), and optionally measurements of it.
//!
//! Each board is one file in `src/board/`, compiled when its cargo feature is on, with its memory
//! map in `boards/<board>/memory.x`. The file implements [`Board`] for its board type and provides
//! `pub fn take() -> Parts<...>`, called once at reset. The board chosen by the feature is
//! re-exported as `board::selected` (on bare-metal targets only), which is all `src/main.rs` names.

use core::fmt;

use crate::pins::Line;
use crate::slots::Slot;
use crate::source::ReadingSource;

// One pair of lines per board: its file, and its re-export as the selected board.
#[cfg(all(feature = "mps2-an386", target_os = "none"))]
pub mod mps2_an386;
/// The board this image is built for.
#[cfg(all(feature = "mps2-an386", target_os = "none"))]
pub use mps2_an386 as selected;
#[cfg(all(feature = "microbit", target_os = "none"))]
pub mod microbit;
/// The board this image is built for.
#[cfg(all(feature = "microbit", target_os = "none"))]
pub use microbit as selected;

// What the emulated boards share: the semihosting console, exit, panic handler and host files.
#[cfg(all(feature = "semihosting", target_os = "none"))]
pub mod semihosting;

/// A board as taken at reset: the two output lines, and the rest of the board.
#[derive(Debug)]
pub struct Parts<B, A, F> {
    /// Everything else the application uses: console, slots, readings, the end of the run.
    pub board: B,
    /// The alarm line.
    pub alarm: Line<A>,
    /// The fault line.
    pub fault: Line<F>,
}

/// A board for a node that scores readings of `N` features.
///
/// The measurement hooks have defaults that measure nothing, so a port only writes them if it
/// wants the figures.
pub trait Board<const N: usize> {
    /// Where the report goes (semihosting, a UART, RTT...). The application writes whole lines.
    type Console: fmt::Write;
    /// Where the readings come from.
    type Source: ReadingSource<N>;
    /// Why the reading source could not be opened.
    type SourceError: fmt::Display;

    /// The console.
    fn console(&mut self) -> &mut Self::Console;

    /// The two model slots, A and B, as mapped in memory.
    fn model_slots(&self) -> [Slot<'static>; 2];

    /// Open the reading source. Called once, after boot. An error is reported and turns the
    /// fault line on; nothing is scored then.
    fn readings(&mut self) -> Result<Self::Source, Self::SourceError>;

    /// Called just before the scoring loop: a board that measures its stack paints it here.
    fn start_measuring(&mut self) {}

    /// The deepest the stack went since [`Board::start_measuring`], in bytes, if the board
    /// measures it. Reported after the scoring loop.
    fn stack_peak(&self) -> Option<usize> {
        None
    }

    /// The output pins as the hardware holds them at the end of the run (bit 0 alarm, bit 1
    /// fault, 1 = high), if the board can read them back. Reported last.
    fn output_levels(&self) -> Option<u32> {
        None
    }

    /// The end of the run: `ok` is `false` when the readings could not be read. On the emulator
    /// this ends the run with a status; a board in the field keeps its lines and waits.
    fn finish(self, ok: bool) -> !;
}
