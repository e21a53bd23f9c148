//! The emulated Arm MPS2 AN386 (Cortex-M4F), as `qemu-system-arm -machine mps2-an386`. Feature
//! `mps2-an386`; memory map `boards/mps2_an386/memory.x`.
//!
//! Everything that is specific to this board lives in this file and its memory map:
//!
//! * the two output pins: bits 0 and 1 of the FPGA I/O block's LED register (`0x4002_8000`),
//!   alarm and fault, both active-high; the register is read back at the end of a run;
//! * where the model slots and the reading table are (linker symbols from the memory map); the
//!   readings are a [`Table`] that the emulator's loader puts in memory;
//! * the console and the end of a run: semihosting ([`super::semihosting`], shared with the
//!   other emulated board);
//! * its measurements: the stack painter of [`crate::measure`] around the scoring loop, and the
//!   SysTick counter for the `score-cost` image.
//!
//! A port to another board writes a file like this one (see the README, "Porting to another
//! board").

use core::convert::Infallible;
use core::fmt::Write as _;
use core::ptr::{addr_of, read_volatile, write_volatile};

use cortex_m_semihosting::hio;
use embedded_hal::digital::{ErrorType, OutputPin};

use crate::board::{Board, Parts};
use crate::measure::{self, Ticks};
use crate::pins::{ActiveLevel, Line};
use crate::slots::Slot;
use crate::source::{Table, TableError};

pub use crate::board::semihosting::{exit, Console};

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
fn model_slots() -> [Slot<'static>; 2] {
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
fn reading_region() -> &'static [u8] {
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
fn leds() -> u32 {
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

/// The board, apart from its two output lines.
pub struct Mps2An386 {
    /// The console.
    pub console: Console,
    /// The tick counter.
    pub ticks: Ticks,
}

/// Take the board, once, at reset: LED 0 is the alarm line and LED 1 the fault line, both
/// active-high. A second call reports it and ends the run.
///
/// Inlined into the image's entry, like [`crate::app::run`], and the console is built in place:
/// the image keeps a single console on its stack.
#[inline(always)]
pub fn take() -> Parts<Mps2An386, Led, Led> {
    let Some(p) = cortex_m::Peripherals::take() else {
        // Straight to the host: the console is built in place below, and only once.
        if let Ok(mut s) = hio::hstdout() {
            let _ = s.write_all(b"peripherals already taken\n");
        }
        exit(false)
    };
    guard_stack(&p.MPU);
    Parts {
        board: Mps2An386 {
            console: Console::new(),
            ticks: Ticks::new(p.SYST),
        },
        alarm: Line::new(Led { mask: 1 << 0 }, ActiveLevel::High),
        fault: Line::new(Led { mask: 1 << 1 }, ActiveLevel::High),
    }
}

/// Only the console and the tick counter, for an image that drives no line (`score-cost`).
#[inline(always)]
pub fn measuring() -> (Console, Ticks) {
    let b = take().board;
    (b.console, b.ticks)
}

impl<const N: usize> Board<N> for Mps2An386 {
    type Console = Console;
    type Source = Table<'static, N>;
    type SourceError = TableError;

    fn console(&mut self) -> &mut Console {
        &mut self.console
    }

    fn model_slots(&self) -> [Slot<'static>; 2] {
        model_slots()
    }

    fn readings(&mut self) -> Result<Table<'static, N>, TableError> {
        Table::new(reading_region())
    }

    fn start_measuring(&mut self) {
        measure::paint_stack();
    }

    fn stack_peak(&self) -> Option<usize> {
        Some(measure::stack_peak())
    }

    fn output_levels(&self) -> Option<u32> {
        Some(leds())
    }

    fn finish(self, ok: bool) -> ! {
        exit(ok)
    }
}

/// Bytes of the guard at the bottom of the stack region (`_stack_guard_len` in the memory map).
const GUARD_LEN: u32 = 256;

/// The stack guard: MPU region 0 makes the lowest 256 bytes of the stack region (the bottom of
/// RAM, see the memory map) inaccessible, so the first push of an overflowing stack faults
/// instead of writing over anything. (Below RAM this board has no bus error: the emulator reads
/// zeros there and ignores writes, so the guard has to be the MPU's.) The rest of memory keeps
/// the default map (`PRIVDEFENA`), and the firmware runs privileged.
fn guard_stack(mpu: &cortex_m::peripheral::MPU) {
    extern "C" {
        static _stack_guard_start: u32;
    }
    // MPU_TYPE.DREGION: no regions, no MPU (a Cortex-M0 build of this board's images, used for
    // measurements, runs on a part without one).
    if (mpu._type.read() >> 8) & 0xFF == 0 {
        return;
    }
    let base = addr_of!(_stack_guard_start) as u32;
    // RASR: ENABLE, SIZE = log2(256) − 1 = 7, AP = 0b000 (no access), XN.
    let rasr = 1 | (7 << 1) | (1 << 28);
    // SAFETY: configuring the MPU before anything runs that the guard could affect; the guard is
    // a region the memory map reserves for it and nothing else uses.
    unsafe {
        mpu.rnr.write(0);
        mpu.rbar.write(base & !(GUARD_LEN - 1));
        mpu.rasr.write(rasr);
        // CTRL: ENABLE, PRIVDEFENA.
        mpu.ctrl.write(1 | (1 << 2));
    }
    cortex_m::asm::dsb();
    cortex_m::asm::isb();
}

// The HardFault handler. A stack overflow faults on the first push into the guard, and the
// exception entry's own push of the frame fails too, so the handler cannot trust the stack
// pointer: it first moves it back to the top of the stack region (nothing returns from here),
// then reports the fault and ends the run. A field board would record the fault and reset instead.
core::arch::global_asm!(
    ".section .HardFault.user, \"ax\"",
    ".global HardFault",
    ".type HardFault, %function",
    ".thumb_func",
    "HardFault:",
    "ldr r0, ={top}",
    "msr msp, r0",
    // A long branch (`bx`): `b` reaches only ±2 KiB on thumbv6m, whose image is built too.
    "ldr r1, ={report}",
    "bx r1",
    ".ltorg",
    top = sym _stack_start,
    report = sym hard_fault_report,
);

extern "C" {
    static _stack_start: u32;
}

/// Configurable and HardFault status and the MemManage fault address (System Control Block).
const SCB_CFSR: usize = 0xE000_ED28;
const SCB_HFSR: usize = 0xE000_ED2C;
const SCB_MMFAR: usize = 0xE000_ED34;

/// Report a HardFault on a fresh stack and end the run with a failure: `fault hard cfsr=...
/// hfsr=... mmfar=...`. On a stack overflow CFSR shows a data access violation (bit 1, DACCVIOL)
/// at an address in the guard, and a failed stacking of the exception frame (bit 4, MSTKERR).
extern "C" fn hard_fault_report() -> ! {
    // SAFETY: reading the System Control Block's fault registers has no side effect.
    let (cfsr, hfsr, mmfar) = unsafe {
        (
            read_volatile(SCB_CFSR as *const u32),
            read_volatile(SCB_HFSR as *const u32),
            read_volatile(SCB_MMFAR as *const u32),
        )
    };
    let mut out = Console::new();
    let _ = writeln!(
        out,
        "fault hard cfsr={cfsr:#010x} hfsr={hfsr:#010x} mmfar={mmfar:#010x}"
    );
    exit(false)
}
