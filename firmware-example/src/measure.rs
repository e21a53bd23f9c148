//! Measurement on any Cortex-M with cortex-m-rt: a SysTick tick counter and a stack painter, for
//! the figures in the README. Nothing here is specific to one board, and the application (the
//! [`crate::node`]) does not use it: a board calls it from its measurement hooks, and the
//! `score-cost` image from its loops.
//!
//! Built with the feature `cortex-m`, which every Cortex-M board feature turns on, and only for
//! bare-metal targets.

use core::ptr::{addr_of, read_volatile, write_volatile};

use cortex_m::peripheral::{syst::SystClkSource, SYST};

extern "C" {
    // The stack's top and its lowest possible end, from cortex-m-rt's `link.x`.
    static _stack_start: u32;
    static _stack_end: u32;
}

/// SysTick on the core clock, free-running over its full 24 bits.
pub struct Ticks {
    _syst: SYST,
}

impl Ticks {
    /// Start SysTick counting down from 2²⁴ − 1 on the core clock, and keep it.
    pub fn new(mut syst: SYST) -> Self {
        syst.set_clock_source(SystClkSource::Core);
        syst.set_reload(0x00FF_FFFF);
        syst.clear_current();
        syst.enable_counter();
        Self { _syst: syst }
    }

    /// The counter now. It counts down.
    #[inline(always)]
    pub fn now(&self) -> u32 {
        SYST::get_current()
    }

    /// Ticks from `start` to `end` (two values of [`Ticks::now`]), for spans under 2²⁴ ticks.
    pub const fn elapsed(start: u32, end: u32) -> u32 {
        start.wrapping_sub(end) & 0x00FF_FFFF
    }
}

/// A busy loop of exactly `2 · iterations` instructions (`subs`, `bne`), to calibrate [`Ticks`].
#[inline(always)]
pub fn spin(iterations: u32) {
    if iterations == 0 {
        return;
    }
    // SAFETY: a register-only loop; no memory, no stack.
    unsafe {
        core::arch::asm!(
            "1:",
            "subs {0}, #1",
            "bne 1b",
            inout(reg) iterations => _,
            options(nomem, nostack),
        );
    }
}

const PAINT: u32 = 0x5EE5_5EE5;
/// How far below the current stack pointer the painter goes (the stack's lowest possible use).
const PAINT_WINDOW: usize = 64 * 1024;

fn stack_bounds() -> (usize, usize) {
    let (top, end) = (
        addr_of!(_stack_start) as usize,
        addr_of!(_stack_end) as usize,
    );
    let low = top.saturating_sub(PAINT_WINDOW).max(end);
    (low, top)
}

/// How deep the stack is now, in bytes from its top.
#[inline(always)]
pub fn stack_depth() -> usize {
    let (_, top) = stack_bounds();
    top.saturating_sub(cortex_m::register::msp::read() as usize)
}

/// Fill the unused stack below the current stack pointer (down to 64 KiB below its top) with a
/// pattern, so that [`stack_peak`] can tell how deep the stack went afterwards.
#[inline(never)]
pub fn paint_stack() {
    let (low, _) = stack_bounds();
    // Stay clear of this function's own frame.
    let sp = (cortex_m::register::msp::read() as usize).saturating_sub(32) & !3;
    let mut p = low;
    while p < sp {
        // SAFETY: [low, sp) is stack memory below the stack pointer, which nothing uses now
        // (there are no interrupts).
        unsafe { write_volatile(p as *mut u32, PAINT) };
        p += 4;
    }
}

/// The deepest the stack has gone since [`paint_stack`], in bytes from its top. A value of
/// 64 KiB means the painted window was used up (the true peak may be higher).
#[inline(never)]
pub fn stack_peak() -> usize {
    let (low, top) = stack_bounds();
    let mut p = low;
    // SAFETY: [low, top) is the stack region; reading it is harmless.
    while p < top && unsafe { read_volatile(p as *const u32) } == PAINT {
        p += 4;
    }
    top - p
}
