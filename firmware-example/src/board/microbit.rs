//! The emulated BBC micro:bit (nRF51822, Cortex-M0, 16 KiB of RAM), as `qemu-system-arm -machine
//! microbit`. Feature `microbit`; memory map `boards/microbit/memory.x`; target
//! `thumbv6m-none-eabi` (no FPU: every f32 operation is a call into the compiler's software float).
//!
//! Everything that is specific to this board lives in this file and its memory map:
//!
//! * the two output pins: GPIO P0.13 (alarm) and P0.14 (fault), the micro:bit's LED matrix rows 1
//!   and 2, both active-high, driven through the nRF51's `OUTSET`/`OUTCLR` registers and read back
//!   from `OUT` at the end of a run;
//! * the model slots, from the memory map's linker symbols (the top 32 KiB of flash);
//! * the readings: the demo's table does not fit in this part's flash, so it is read from a host
//!   file over semihosting, [`CHUNK_READINGS`](crate::source::CHUNK_READINGS) readings at a time
//!   into a fixed buffer ([`Chunked`]). The file is the first argument on the semihosting command
//!   line: `-semihosting-config enable=on,target=native,arg=ellipsoid-node,arg=<table>`;
//! * the console and the end of a run: semihosting ([`super::semihosting`]);
//! * its measurements: the stack painter and SysTick of [`crate::measure`].

use core::convert::Infallible;
use core::fmt;
use core::ptr::{addr_of, read_volatile, write_volatile};

use embedded_hal::digital::{ErrorType, OutputPin};

use crate::board::semihosting::{self, ArgError, FileName, HostFile};
use crate::board::{Board, Parts};
use crate::measure::{self, Ticks};
use crate::pins::{ActiveLevel, Line};
use crate::slots::Slot;
use crate::source::{Chunked, TableError};

pub use crate::board::semihosting::{exit, Console};

/// The nRF51's GPIO port 0 registers.
const GPIO_OUT: usize = 0x5000_0504;
const GPIO_OUTSET: usize = 0x5000_0508;
const GPIO_OUTCLR: usize = 0x5000_050C;
const GPIO_DIRSET: usize = 0x5000_0518;
/// The pins of the two lines.
const ALARM_PIN: u32 = 13;
const FAULT_PIN: u32 = 14;

extern "C" {
    static _model_a_start: u8;
    static _model_a_len: u8;
    static _model_b_start: u8;
    static _model_b_len: u8;
}

fn region(start: *const u8, len: *const u8) -> &'static [u8] {
    // SAFETY: the memory map reserves these regions of flash for the model slots, apart from
    // every section of the image; a flash programmer (or the emulator's loader) writes them before
    // the core starts, and nothing writes them while the firmware runs.
    unsafe { core::slice::from_raw_parts(start, len as usize) }
}

/// One GPIO output of port 0.
#[derive(Debug)]
pub struct Pin {
    mask: u32,
}

impl Pin {
    fn output(pin: u32) -> Self {
        let mask = 1 << pin;
        // SAFETY: DIRSET is a write-one-to-set register of this part: it makes this pin an output
        // and touches no other.
        unsafe { write_volatile(GPIO_DIRSET as *mut u32, mask) };
        Self { mask }
    }
}

impl ErrorType for Pin {
    type Error = Infallible;
}

impl OutputPin for Pin {
    fn set_high(&mut self) -> Result<(), Infallible> {
        // SAFETY: OUTSET sets the pins of the bits written, and only those.
        unsafe { write_volatile(GPIO_OUTSET as *mut u32, self.mask) };
        Ok(())
    }

    fn set_low(&mut self) -> Result<(), Infallible> {
        // SAFETY: OUTCLR clears the pins of the bits written, and only those.
        unsafe { write_volatile(GPIO_OUTCLR as *mut u32, self.mask) };
        Ok(())
    }
}

/// The board, apart from its two output lines.
pub struct Microbit {
    /// The console.
    pub console: Console,
    /// The tick counter.
    pub ticks: Ticks,
}

/// Take the board, once, at reset: P0.13 is the alarm line and P0.14 the fault line, both
/// active-high. A second call reports it and ends the run.
#[inline(always)]
pub fn take() -> Parts<Microbit, Pin, Pin> {
    let (console, ticks) = measuring();
    Parts {
        board: Microbit { console, ticks },
        alarm: Line::new(Pin::output(ALARM_PIN), ActiveLevel::High),
        fault: Line::new(Pin::output(FAULT_PIN), ActiveLevel::High),
    }
}

/// Only the console and the tick counter, for an image that drives no line (`score-cost`).
#[inline(always)]
pub fn measuring() -> (Console, Ticks) {
    let Some(p) = cortex_m::Peripherals::take() else {
        let _ = fmt::Write::write_str(&mut Console::new(), "peripherals already taken\n");
        exit(false)
    };
    (Console::new(), Ticks::new(p.SYST))
}

/// Why the reading file could not be opened.
#[derive(Clone, Copy)]
pub enum SourceError {
    /// The command line names no file.
    Argument(ArgError),
    /// The host could not open the file.
    Open(FileName),
    /// The file is not a reading table for this node.
    Table(FileName, TableError),
}

impl fmt::Display for SourceError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            SourceError::Argument(e) => write!(f, "{e}"),
            SourceError::Open(name) => write!(f, "{name}: the host cannot open it"),
            SourceError::Table(name, e) => write!(f, "{name}: {e}"),
        }
    }
}

impl<const N: usize> Board<N> for Microbit {
    type Console = Console;
    type Source = Chunked<HostFile, N>;
    type SourceError = SourceError;

    fn console(&mut self) -> &mut Console {
        &mut self.console
    }

    fn model_slots(&self) -> [Slot<'static>; 2] {
        let (a, al) = (addr_of!(_model_a_start), addr_of!(_model_a_len));
        let (b, bl) = (addr_of!(_model_b_start), addr_of!(_model_b_len));
        [
            Slot {
                name: "A",
                bytes: region(a, al),
            },
            Slot {
                name: "B",
                bytes: region(b, bl),
            },
        ]
    }

    fn readings(&mut self) -> Result<Chunked<HostFile, N>, SourceError> {
        let name = semihosting::first_argument().map_err(SourceError::Argument)?;
        let file = HostFile::open(&name).ok_or(SourceError::Open(name))?;
        Chunked::open(file).map_err(|e| SourceError::Table(name, e))
    }

    fn start_measuring(&mut self) {
        measure::paint_stack();
    }

    fn stack_peak(&self) -> Option<usize> {
        Some(measure::stack_peak())
    }

    fn output_levels(&self) -> Option<u32> {
        // SAFETY: reading OUT has no side effect.
        let out = unsafe { read_volatile(GPIO_OUT as *const u32) };
        Some(((out >> ALARM_PIN) & 1) | (((out >> FAULT_PIN) & 1) << 1))
    }

    fn finish(self, ok: bool) -> ! {
        exit(ok)
    }
}
