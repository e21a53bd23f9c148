//! The board: the emulated Arm MPS2 AN386 (Cortex-M4F), as `qemu-system-arm -machine mps2-an386`.
//!
//! Everything that is specific to a board lives in this file (and in its memory map,
//! `boards/mps2_an386/memory.x`):
//!
//! * the two output pins: bits 0 and 1 of the FPGA I/O block's LED register (`0x4002_8000`),
//!   alarm and fault;
//! * where the model slots and the reading table are (linker symbols from the memory map);
//! * the console: ARM semihosting to the host's standard output, a line at a time;
//! * the end of a run: semihosting exit, which ends the emulator with a status;
//!
//! Porting to a real board means writing this file again with that board's HAL: its GPIO pins
//! (they already implement embedded-hal's `OutputPin`), a UART or RTT for the console, an ADC or
//! I²C/SPI sensor as a [`crate::source::ReadingSource`], and its flash in
//! `boards/<board>/memory.x`.

use core::convert::Infallible;
use core::fmt;
use core::ptr::{addr_of, read_volatile, write_volatile};

use cortex_m_semihosting::{debug, hio};
use embedded_hal::digital::{ErrorType, OutputPin};

use crate::measure::Ticks;
use crate::slots::Slot;

/// The FPGA I/O block's LED0 register: two LEDs, bits 0 and 1.
const FPGAIO_LED0: usize = 0x4002_8000;

extern "C" {
    static _model_a_start: u8;
    static _model_a_len: u8;
    static _model_b_start: u8;
    static _model_b_len: u8;
    static _readings_start: u8;
    static _readings_len: u8;
}

fn region(start: *const u8, len: *const u8) -> &'static [u8] {
    // SAFETY: the memory map reserves these regions for data only, apart from every section of the
    // image; the emulator's loader (or a flash programmer) writes them before the core starts,
    // and nothing writes them while the firmware runs.
    unsafe { core::slice::from_raw_parts(start, len as usize) }
}

/// The two model slots, A and B.
pub fn model_slots() -> [Slot<'static>; 2] {
    // Only the addresses of the linker symbols are taken, which needs no `unsafe`.
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

/// The region the reading table is loaded into.
pub fn readings() -> &'static [u8] {
    let (r, rl) = (addr_of!(_readings_start), addr_of!(_readings_len));
    region(r, rl)
}

/// One LED of the FPGA I/O block, used as an output pin.
#[derive(Debug)]
pub struct Led {
    mask: u32,
}

fn modify_leds(f: impl FnOnce(u32) -> u32) {
    // SAFETY: FPGAIO_LED0 is a device register on this board; the firmware is single-threaded and
    // uses no interrupts, so the read-modify-write cannot race.
    unsafe {
        let reg = FPGAIO_LED0 as *mut u32;
        write_volatile(reg, f(read_volatile(reg)));
    }
}

/// The LED register as the hardware holds it (bit 0 alarm, bit 1 fault; 1 = high).
pub fn leds() -> u32 {
    // SAFETY: see `modify_leds`.
    unsafe { read_volatile(FPGAIO_LED0 as *const u32) }
}

impl ErrorType for Led {
    type Error = Infallible;
}

impl OutputPin for Led {
    fn set_high(&mut self) -> Result<(), Infallible> {
        let m = self.mask;
        modify_leds(|v| v | m);
        Ok(())
    }

    fn set_low(&mut self) -> Result<(), Infallible> {
        let m = self.mask;
        modify_leds(|v| v & !m);
        Ok(())
    }
}

/// The board's peripherals that the application uses.
pub struct Board {
    /// The alarm pin: LED 0.
    pub alarm: Led,
    /// The fault pin: LED 1.
    pub fault: Led,
    /// The tick counter.
    pub ticks: Ticks,
}

/// Take the peripherals. Returns `None` if called twice.
pub fn take() -> Option<Board> {
    let p = cortex_m::Peripherals::take()?;
    Some(Board {
        alarm: Led { mask: 1 << 0 },
        fault: Led { mask: 1 << 1 },
        ticks: Ticks::new(p.SYST),
    })
}

/// The console: semihosting standard output, written a line at a time.
pub struct Console {
    stream: Option<hio::HostStream>,
    line: [u8; 160],
    len: usize,
}

impl Console {
    /// Open the host's standard output.
    pub fn new() -> Self {
        Self {
            stream: hio::hstdout().ok(),
            line: [0; 160],
            len: 0,
        }
    }

    fn flush(&mut self) {
        if let (Some(s), Some(bytes)) = (self.stream.as_mut(), self.line.get(..self.len)) {
            let _ = s.write_all(bytes);
        }
        self.len = 0;
    }
}

impl Default for Console {
    fn default() -> Self {
        Self::new()
    }
}

impl fmt::Write for Console {
    fn write_str(&mut self, s: &str) -> fmt::Result {
        for &b in s.as_bytes() {
            if let Some(slot) = self.line.get_mut(self.len) {
                *slot = b;
                self.len += 1;
            }
            if b == b'\n' || self.len == self.line.len() {
                self.flush();
            }
        }
        Ok(())
    }
}

/// End the run: the emulator exits with status 0 (`ok`) or 1.
pub fn exit(ok: bool) -> ! {
    debug::exit(if ok {
        debug::EXIT_SUCCESS
    } else {
        debug::EXIT_FAILURE
    });
    loop {
        cortex_m::asm::wfi();
    }
}

#[panic_handler]
fn on_panic(info: &core::panic::PanicInfo<'_>) -> ! {
    use fmt::Write;
    let mut out = Console::new();
    let _ = writeln!(out, "panic: {info}");
    exit(false)
}
