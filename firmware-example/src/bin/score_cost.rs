//! `score-cost`: instructions per score on the board's core (the Cortex-M4F of `mps2-an386`, the
//! Cortex-M0 of `microbit`) for N = 4, 8 and 16, and the stack a score uses. Run under `qemu-system-arm ... -icount shift=0`, where every instruction advances
//! the virtual clock by the same amount, so SysTick counts instructions (the calibration below
//! measures how many per tick).
//!
//! The models have no log-transformed features, so a score costs the floor
//! `F(N) = N(N+1)/2 + 2N` floating-point operations (the factor's multiply-adds, the `N`
//! subtractions of preprocessing and the `N` squares) plus its control.
#![cfg_attr(target_os = "none", no_std, no_main)]

/// The image itself: only for the board's bare-metal target.
#[cfg(target_os = "none")]
mod image {
    use core::fmt::Write;
    use core::hint::black_box;

    use cortex_m_rt::entry;
    use ellipsoid_core::{AlarmPolicy, Model, ModelMeta, ModelParams, Preprocess, Thresholds};
    use ellipsoid_firmware_example::board::selected::{self, Console};
    use ellipsoid_firmware_example::measure::{paint_stack, spin, stack_depth, stack_peak, Ticks};
    use ellipsoid_firmware_example::node;

    /// Scores per timed loop.
    const REPS: u32 = 4000;
    /// Iterations of the calibration loop: 2 · 1 000 001 = 2 000 002 instructions.
    const SPIN: u32 = 1_000_001;

    /// A small deterministic generator (a 32-bit LCG, constants from Numerical Recipes), in [-1, 1).
    struct Lcg(u32);

    impl Lcg {
        fn next(&mut self) -> f32 {
            self.0 = self.0.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
            (self.0 >> 8) as f32 / (1u32 << 23) as f32 - 1.0
        }
    }

    fn params<const N: usize>(rng: &mut Lcg) -> ModelParams<N> {
        let mut p = ModelParams::<N> {
            meta: ModelMeta::default(),
            preprocess: Preprocess::identity(),
            mean: [0.0; N],
            w: [[0.0; N]; N],
            thresholds: Thresholds {
                alarm: 2.0 * N as f32,
                clear: N as f32,
            },
            policy: AlarmPolicy::default(),
        };
        for i in 0..N {
            p.preprocess.offset[i] = 10.0 * rng.next();
            p.preprocess.scale[i] = 1.5 + rng.next();
            p.mean[i] = 0.1 * rng.next();
            for j in 0..i {
                p.w[i][j] = 0.3 * rng.next();
            }
            p.w[i][i] = 1.5 + rng.next();
        }
        p
    }

    fn measure<const N: usize>(ticks: &Ticks, per_tick: f32, out: &mut Console) -> bool {
        let mut rng = Lcg(0x2545_F491 ^ N as u32);
        let model = match Model::<N>::new(params::<N>(&mut rng)) {
            Ok(m) => m,
            Err(e) => {
                let _ = writeln!(out, "cost n={N} model refused: {e}");
                return false;
            }
        };
        let mut xs = [[0.0f32; N]; 4];
        for x in xs.iter_mut() {
            for (xi, c) in x.iter_mut().zip(model.center()) {
                *xi = c + rng.next();
            }
        }
        let mut sum = 0.0f32;
        let t0 = ticks.now();
        for k in 0..REPS {
            let x = black_box(&xs[(k & 3) as usize]);
            if let Ok(s) = node::score(black_box(&model), x) {
                sum += s.d2;
            }
        }
        let t1 = ticks.now();
        // The same loop around an out-of-line function that only reads one input: the loop's and
        // the call's own cost, for reference.
        let t2 = ticks.now();
        for k in 0..REPS {
            let x = black_box(&xs[(k & 3) as usize]);
            sum += empty(black_box(&model), x);
        }
        let t3 = ticks.now();
        black_box(sum);
        let depth = stack_depth();
        paint_stack();
        black_box(node::score(black_box(&model), black_box(&xs[0])).ok());
        let stack = stack_peak().saturating_sub(depth);
        let per_score = Ticks::elapsed(t0, t1) as f32 * per_tick / REPS as f32;
        let overhead = Ticks::elapsed(t2, t3) as f32 * per_tick / REPS as f32;
        let floor = N * (N + 1) / 2 + 2 * N;
        let _ = writeln!(
            out,
            "cost n={N} reps={REPS} ticks={} instr_per_score={per_score:.1} loop_overhead={overhead:.1} floor_ops={floor} instr_per_op={:.2}",
            Ticks::elapsed(t0, t1),
            per_score / floor as f32,
        );
        // Stack of one score below its caller's frame (the painter's and the reader's own small
        // frames sit in the same place, so this is an upper bound).
        let _ = writeln!(out, "stack n={N} score_bytes={stack}");
        true
    }

    #[inline(never)]
    fn empty<const N: usize>(_: &Model<N>, x: &[f32; N]) -> f32 {
        x[0]
    }

    #[entry]
    fn main() -> ! {
        // Only the console and the tick counter: this image drives no line.
        let (mut out, ticks) = selected::measuring();
        let t0 = ticks.now();
        spin(SPIN);
        let t1 = ticks.now();
        let cal = Ticks::elapsed(t0, t1);
        let per_tick = (2 * SPIN) as f32 / cal as f32;
        let _ = writeln!(
            out,
            "calibrate instructions={} ticks={cal} instr_per_tick={per_tick:.3}",
            2 * SPIN
        );
        let ok = measure::<4>(&ticks, per_tick, &mut out)
            & measure::<8>(&ticks, per_tick, &mut out)
            & measure::<16>(&ticks, per_tick, &mut out);
        selected::exit(ok)
    }
}

/// The default board feature is on in host builds too (`cargo build --workspace`), where there is
/// no board: the host binary only says how to build the image.
#[cfg(not(target_os = "none"))]
fn main() {
    eprintln!(
        "score-cost: this is a board image; build it with \
         --target thumbv7em-none-eabihf or thumbv6m-none-eabi (see firmware-example/README.md)"
    );
    std::process::exit(2);
}
