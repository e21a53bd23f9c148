//! `stack-guard`: shows that a stack overflow faults instead of corrupting memory. It recurses,
//! each level with a 1 KiB frame, until the stack runs out; the memory map puts the stack at the
//! bottom of RAM, so the first push below it is a bus error, and the board's HardFault handler
//! reports `fault hard ...` and ends the run with a failure status. A `.bss` canary is reported on
//! every level: it must never change. If the recursion ever returned, the image would report
//! `guard missed` and fail too; e2e.sh wants the fault line.
#![cfg_attr(target_os = "none", no_std, no_main)]

#[cfg(target_os = "none")]
mod image {
    use core::fmt::Write;
    use core::hint::black_box;
    use core::sync::atomic::{AtomicU32, Ordering};

    use cortex_m_rt::entry;
    use ellipsoid_firmware_example::board::mps2_an386::{self, Console};
    use ellipsoid_firmware_example::measure::stack_depth;

    /// A word in `.bss`, just above the stack: an overflow without the guard would overwrite it.
    static CANARY: AtomicU32 = AtomicU32::new(0);

    #[inline(never)]
    #[allow(unconditional_recursion)]
    fn dive(level: u32, out: &mut Console) -> u32 {
        let frame = black_box([level as u8; 1024]);
        if level.is_multiple_of(8) {
            let _ = writeln!(
                out,
                "level {level} depth={} canary={:#010x}",
                stack_depth(),
                CANARY.load(Ordering::Relaxed)
            );
        }
        let below = dive(level + 1, out);
        below.wrapping_add(u32::from(frame[(level % 1024) as usize]))
    }

    #[entry]
    fn main() -> ! {
        CANARY.store(0xC0FF_EE00, Ordering::Relaxed);
        let mut out = mps2_an386::take().board.console;
        let _ = writeln!(out, "stack-guard: recursing until the stack runs out");
        let r = dive(0, &mut out);
        let _ = writeln!(out, "guard missed {r}");
        mps2_an386::exit(false)
    }
}

#[cfg(not(target_os = "none"))]
fn main() {
    eprintln!(
        "stack-guard: this is a board image; build it with \
         --target thumbv7em-none-eabihf (see firmware-example/README.md)"
    );
    std::process::exit(2);
}
