//! `score-cost`: instructions per score on the board's core (the Cortex-M4F of `mps2-an386`, the
//! Cortex-M0 of `microbit`) for N = 4, 8 and 16, and the stack a
//! score uses, for the three forms of a model: the compact folded form in RAM (`cost` lines, the
//! one the target is for), the flash-resident view of a blob that the node uses (`cost_flash`),
//! and the full decoded `Model` (`cost_model`). Run under `qemu-system-arm ... -icount shift=0`, where every instruction advances
//! the virtual clock by the same amount, so SysTick counts instructions (the calibration below
//! measures how many per tick).
//!
//! The models have no log-transformed features, so a score costs the floor
//! `F(N) = N(N+1)/2 + 2N` floating-point operations (the factor's multiply-adds, the `N`
//! subtractions of preprocessing and the `N` squares) plus its control.
//!
//! On the Cortex-M4F board it also measures model banks (format version 2) through the core's
//! `Tracker`, for K = 1, 2, 4 modes at N = 8 and 16 (`cost_bank` lines): without a window, with
//! a window of 4 readings and drift, and with the window, drift and the first differences
//! (`M = 2 N` scored values). Each line gives the instructions of `Tracker::step` (window, the
//! nearest-mode rule over all K modes, alarm machine, drift), those of the node's `node::track`
//! (the step, with a copy of the tracker kept while the alarm is quiet, for `top` on a raise),
//! those of `Tracker::step_explained` (the step and the chosen mode's contributions, in `f64`),
//! `size_of` the tracker, and the blob's length. `cost_v1` lines compare a single model's node path
//! (`node::score` and `node::alarm_update`) with the same blob run through a `Tracker`.
#![cfg_attr(target_os = "none", no_std, no_main)]

/// The image itself: only for the board's bare-metal target.
#[cfg(target_os = "none")]
mod image {
    use core::fmt::Write;
    use core::hint::black_box;

    use cortex_m_rt::entry;
    #[cfg(feature = "mps2-an386")]
    use ellipsoid_core::{
        bank::{BankParams, DriftSpec, ModeParams, ModeSelect},
        track::Tracker,
        window::WindowSpec,
    };
    use ellipsoid_core::{
        blob, fixed, tri, AlarmPolicy, CompactModel, FixedModel, FlashModel, Model, ModelMeta,
        ModelParams, Preprocess, ReadingFault, Scored, Thresholds,
    };
    use ellipsoid_firmware_example::board::selected::{self, Console};
    use ellipsoid_firmware_example::measure::{paint_stack, spin, stack_depth, stack_peak, Ticks};
    use ellipsoid_firmware_example::node;
    use ellipsoid_firmware_example::slots::SlotModel;

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

    /// The compact form's score, out of line as `node::score` is for the flash form.
    #[inline(never)]
    fn score_compact<const N: usize, const T: usize>(
        m: &CompactModel<N, T>,
        x: &[f32; N],
    ) -> Result<Scored, ReadingFault> {
        m.score(x)
    }

    /// The fixed-point model's score of an integer reading, out of line.
    #[inline(never)]
    fn score_fixed<const N: usize, const T: usize>(m: &FixedModel<N, T>, r: &[i32; N]) -> Scored {
        m.score(r)
    }

    /// The full model's score, out of line.
    #[inline(never)]
    fn score_model<const N: usize>(m: &Model<N>, x: &[f32; N]) -> Result<Scored, ReadingFault> {
        m.score(x)
    }

    /// Time `REPS` scores of four rotating readings through `score`, and one score's stack.
    /// Returns (ticks, instructions per score, stack bytes).
    fn time<const N: usize, M>(
        ticks: &Ticks,
        per_tick: f32,
        model: &M,
        xs: &[[f32; N]; 4],
        score: impl Fn(&M, &[f32; N]) -> Result<Scored, ReadingFault>,
    ) -> (u32, f32, usize) {
        let mut sum = 0.0f32;
        let t0 = ticks.now();
        for k in 0..REPS {
            let x = black_box(&xs[(k & 3) as usize]);
            if let Ok(s) = score(black_box(model), x) {
                sum += s.d2;
            }
        }
        let t1 = ticks.now();
        black_box(sum);
        let depth = stack_depth();
        paint_stack();
        black_box(score(black_box(model), black_box(&xs[0])).ok());
        let stack = stack_peak().saturating_sub(depth);
        let per_score = Ticks::elapsed(t0, t1) as f32 * per_tick / REPS as f32;
        (Ticks::elapsed(t0, t1), per_score, stack)
    }

    /// `D` is `2 N`, as the node image builds its slot model (a bank with differences).
    fn measure<const N: usize, const T: usize, const D: usize>(
        ticks: &Ticks,
        per_tick: f32,
        out: &mut Console,
    ) -> bool {
        let mut rng = Lcg(0x2545_F491 ^ N as u32);
        let params = params::<N>(&mut rng);
        let mut buf = [0u8; blob::max_len(16)];
        let blob = match blob::encode(&params, &mut buf) {
            Ok(len) => &buf[..len],
            Err(e) => {
                let _ = writeln!(out, "cost n={N} model refused: {e}");
                return false;
            }
        };
        let (Ok(model), Ok(flash)) = (Model::<N>::new(params), FlashModel::<N>::from_blob(blob))
        else {
            let _ = writeln!(out, "cost n={N} model refused");
            return false;
        };
        let compact = flash.compact::<T>();
        let mut xs = [[0.0f32; N]; 4];
        for x in xs.iter_mut() {
            for (xi, c) in x.iter_mut().zip(model.center()) {
                *xi = c + rng.next();
            }
        }
        // The same loop around an out-of-line function that only reads one input: the loop's and
        // the call's own cost, for reference.
        let mut sum = 0.0f32;
        let t2 = ticks.now();
        for k in 0..REPS {
            let x = black_box(&xs[(k & 3) as usize]);
            sum += empty(black_box(&model), x);
        }
        let t3 = ticks.now();
        black_box(sum);
        let overhead = Ticks::elapsed(t2, t3) as f32 * per_tick / REPS as f32;
        let floor = N * (N + 1) / 2 + 2 * N;
        let (c_ticks, c_per, c_stack) = time(ticks, per_tick, &compact, &xs, score_compact);
        // The node's own path: `node::score` on the slot's model, an `f32` view in flash here.
        let slot_flash = SlotModel::<N, T, D>::Float(flash);
        let (f_ticks, f_per, f_stack) = time(ticks, per_tick, &slot_flash, &xs, node::score);
        let (m_ticks, m_per, m_stack) = time(ticks, per_tick, &model, &xs, score_model);
        // The fixed-point model of the same parameters, on the same readings as integers.
        let fixed_ok = match fixed::quantise::<N, T>(&params).map(FixedModel::new) {
            Ok(Ok(fm)) => {
                let mut rs = [[0i32; N]; 4];
                for (r, x) in rs.iter_mut().zip(&xs) {
                    *r = fm.reading(x).unwrap_or([0; N]);
                }
                let t0 = ticks.now();
                let mut acc = 0u32;
                for k in 0..REPS {
                    let r = black_box(&rs[(k & 3) as usize]);
                    acc ^= score_fixed(black_box(&fm), r).d2.to_bits();
                }
                let t1 = ticks.now();
                black_box(acc);
                let per = Ticks::elapsed(t0, t1) as f32 * per_tick / REPS as f32;
                // The node's path for a fixed-point slot: `node::score` on readings in
                // engineering units, each converted by `FixedModel::reading` (f64) first.
                let (n_ticks, n_per, n_stack) = time(
                    ticks,
                    per_tick,
                    &SlotModel::<N, T, D>::Fixed(fm),
                    &xs,
                    node::score,
                );
                let _ = writeln!(
                    out,
                    "cost_node_fixed n={N} reps={REPS} ticks={n_ticks} instr_per_score={n_per:.1} stack_bytes={n_stack} ram_bytes={}",
                    core::mem::size_of::<SlotModel<'_, N, T, D>>(),
                );
                let _ = writeln!(
                    out,
                    "cost_fixed n={N} reps={REPS} ticks={} instr_per_score={per:.1} loop_overhead={overhead:.1} floor_ops={floor} instr_per_op={:.2} ram_bytes={}",
                    Ticks::elapsed(t0, t1),
                    per / floor as f32,
                    core::mem::size_of::<FixedModel<N, T>>(),
                );
                true
            }
            _ => {
                let _ = writeln!(out, "cost_fixed n={N} model could not be quantised");
                false
            }
        };
        // The three forms must agree to the bit, here on the device too.
        let same = xs.iter().all(|x| {
            let bits = |r: Result<Scored, ReadingFault>| r.map(|s| s.d2.to_bits());
            let want = bits(model.score(x));
            bits(flash.score(x)) == want && bits(compact.score(x)) == want
        });
        for (tag, t, per, stack, ram) in [
            (
                "cost",
                c_ticks,
                c_per,
                c_stack,
                core::mem::size_of::<CompactModel<N, T>>(),
            ),
            (
                "cost_flash",
                f_ticks,
                f_per,
                f_stack,
                core::mem::size_of::<FlashModel<'_, N>>(),
            ),
            (
                "cost_model",
                m_ticks,
                m_per,
                m_stack,
                core::mem::size_of::<Model<N>>(),
            ),
        ] {
            let _ = writeln!(
                out,
                "{tag} n={N} reps={REPS} ticks={t} instr_per_score={per:.1} loop_overhead={overhead:.1} floor_ops={floor} instr_per_op={:.2} ram_bytes={ram} stack_bytes={stack}",
                per / floor as f32,
            );
        }
        // Stack of one score below its caller's frame (the painter's and the reader's own small
        // frames sit in the same place, so this is an upper bound).
        let _ = writeln!(out, "stack n={N} score_bytes={c_stack}");
        if !same {
            let _ = writeln!(out, "cost n={N} the three forms disagree");
        }
        same && fixed_ok
    }

    #[inline(never)]
    fn empty<const N: usize>(_: &Model<N>, x: &[f32; N]) -> f32 {
        x[0]
    }

    /// A bank's step without contributions, out of line as `node::track` is.
    #[cfg(feature = "mps2-an386")]
    #[inline(never)]
    fn track_step<const N: usize, const M: usize>(
        t: &mut Tracker<'_, N, M>,
        x: &[f32; N],
    ) -> Option<f32> {
        t.step(x, None).score.ok().map(|s| s.d2)
    }

    /// A single model's whole step on the node: score, then the alarm machine.
    #[cfg(feature = "mps2-an386")]
    #[inline(never)]
    fn single_step<const N: usize, const T: usize>(
        m: &SlotModel<'_, N, T, N>,
        machine: &mut ellipsoid_core::AlarmMachine,
        x: &[f32; N],
    ) -> Option<f32> {
        let s = node::score(m, x);
        node::alarm_update(machine, &s);
        s.ok().map(|s| s.d2)
    }

    /// Instructions per call of `f` on four rotating readings, over `reps` calls.
    #[cfg(feature = "mps2-an386")]
    fn per_call<const N: usize>(
        ticks: &Ticks,
        per_tick: f32,
        reps: u32,
        xs: &[[f32; N]; 4],
        mut f: impl FnMut(&[f32; N]) -> Option<f32>,
    ) -> f32 {
        let mut sum = 0.0f32;
        let t0 = ticks.now();
        for k in 0..reps {
            if let Some(d2) = f(black_box(&xs[(k & 3) as usize])) {
                sum += d2;
            }
        }
        let t1 = ticks.now();
        black_box(sum);
        Ticks::elapsed(t0, t1) as f32 * per_tick / reps as f32
    }

    /// Blob bytes of the largest bank measured: K = 4, N = 16, M = 32, with drift.
    #[cfg(feature = "mps2-an386")]
    const BANK_BUF: usize = blob::max_bank_len(16, 32, 4, true);

    /// The cost of one bank shape: `k` modes of random models of `M` scored values, the nearest
    /// rule, the window `w` and, if `drift`, drift at rate 0.01 with a bound of 3 on every value.
    #[cfg(feature = "mps2-an386")]
    fn measure_bank<const N: usize, const M: usize>(
        ticks: &Ticks,
        per_tick: f32,
        out: &mut Console,
        k: usize,
        w: u8,
        drift: bool,
    ) -> bool {
        let mut rng = Lcg(0x9E37_79B9 ^ (N as u32) ^ ((k as u32) << 8) ^ ((M as u32) << 16));
        let mut modes = [ModeParams::<M> {
            offset: [0.0; M],
            scale: [1.0; M],
            mean: [0.0; M],
            w: [[0.0; M]; M],
            thresholds: Thresholds {
                alarm: 1.0,
                clear: 0.5,
            },
        }; 4];
        for m in modes.iter_mut().take(k) {
            let p = params::<M>(&mut rng);
            *m = ModeParams {
                offset: p.preprocess.offset,
                scale: p.preprocess.scale,
                mean: p.mean,
                w: p.w,
                thresholds: p.thresholds,
            };
            // A difference is centred at 0: a machine running normally changes little.
            for i in N..M {
                m.offset[i] = 0.0;
                m.mean[i] = 0.0;
            }
        }
        let spec = WindowSpec {
            length: w,
            differences: M == 2 * N,
        };
        let bank = BankParams::<N, M> {
            meta: ModelMeta::default(),
            log_mask: 0,
            select: ModeSelect::Nearest,
            modes: &modes[..k],
            window: spec,
            drift: drift.then_some(DriftSpec {
                rate: 0.01,
                bound: [3.0; M],
            }),
            policy: AlarmPolicy::default(),
            names_digest: 0,
        };
        let mut buf = [0u8; BANK_BUF];
        let Ok(len) = blob::encode_bank(&bank, &mut buf) else {
            let _ = writeln!(out, "cost_bank n={N} m={M} k={k} bank refused");
            return false;
        };
        let Ok(mut tracker) = Tracker::<N, M>::from_blob(&buf[..len]) else {
            let _ = writeln!(out, "cost_bank n={N} m={M} k={k} blob refused");
            return false;
        };
        // Readings close to mode 0's centre (raw units: the window's mean of the first N
        // values), and to each other (their differences are small), so that the alarm stays
        // quiet and drift follows on every timed step, as on a machine running normally.
        let mut xs = [[0.0f32; N]; 4];
        if let Some(c) = tracker.bank().center(0) {
            for x in xs.iter_mut() {
                for (xi, ci) in x.iter_mut().zip(c) {
                    *xi = ci + 0.02 * rng.next();
                }
            }
        }
        // Fill the window first, so that every timed step scores.
        for x in &xs {
            track_step(&mut tracker, x);
        }
        let step = per_call(ticks, per_tick, REPS, &xs, |x| {
            track_step(black_box(&mut tracker), x)
        });
        let scored = xs.iter().all(|x| track_step(&mut tracker, x).is_some());
        let node_track = per_call(ticks, per_tick, REPS, &xs, |x| {
            node::track(black_box(&mut tracker), x, None)
                .0
                .score
                .ok()
                .map(|s| s.d2)
        });
        let explained = per_call(ticks, per_tick, REPS / 10, &xs, |x| {
            black_box(&mut tracker)
                .step_explained(x, None)
                .score
                .ok()
                .map(|s| s.d2)
        });
        let quiet = tracker.alarm().status() == ellipsoid_core::Status::Quiet;
        let mads = k * M * (M + 1) / 2;
        let _ = writeln!(
            out,
            "cost_bank n={N} m={M} k={k} w={w} differences={} drift={} reps={REPS} instr_per_score={step:.1} \
             instr_node_track={node_track:.1} instr_explained={explained:.1} multiply_adds={mads} instr_per_mad={:.2} ram_bytes={} blob_bytes={len} alarm_quiet={}",
            u8::from(M == 2 * N),
            u8::from(drift),
            step / mads as f32,
            core::mem::size_of::<Tracker<'_, N, M>>(),
            u8::from(quiet),
        );
        if !scored {
            let _ = writeln!(
                out,
                "cost_bank n={N} m={M} k={k} a timed step did not score"
            );
        }
        scored
    }

    /// A single model (format version 1): the node's path, and the same blob through a tracker.
    #[cfg(feature = "mps2-an386")]
    fn measure_v1<const N: usize, const T: usize>(
        ticks: &Ticks,
        per_tick: f32,
        out: &mut Console,
    ) -> bool {
        let mut rng = Lcg(0x2545_F491 ^ N as u32);
        let p = params::<N>(&mut rng);
        let mut buf = [0u8; blob::max_len(16)];
        let Ok(len) = blob::encode(&p, &mut buf) else {
            return false;
        };
        let (Ok(flash), Ok(mut tracker)) = (
            FlashModel::<N>::from_blob(&buf[..len]),
            Tracker::<N, N>::from_blob(&buf[..len]),
        ) else {
            let _ = writeln!(out, "cost_v1 n={N} blob refused");
            return false;
        };
        let mut xs = [[0.0f32; N]; 4];
        for x in xs.iter_mut() {
            for (xi, c) in x.iter_mut().zip(flash.center()) {
                *xi = c + rng.next();
            }
        }
        let slot = SlotModel::<N, T, N>::Float(flash);
        let mut machine = ellipsoid_core::AlarmMachine::new(flash.thresholds(), flash.policy());
        let node_path = per_call(ticks, per_tick, REPS, &xs, |x| {
            single_step(black_box(&slot), black_box(&mut machine), x)
        });
        let tracked = per_call(ticks, per_tick, REPS, &xs, |x| {
            track_step(black_box(&mut tracker), x)
        });
        // The same bits both ways, on a fresh tracker.
        let same = Tracker::<N, N>::from_blob(&buf[..len]).is_ok_and(|mut t| {
            xs.iter().all(|x| {
                let a = t.step(x, None).score.map(|s| s.d2.to_bits()).ok();
                a == flash.score(x).map(|s| s.d2.to_bits()).ok()
            })
        });
        let _ = writeln!(
            out,
            "cost_v1 n={N} reps={REPS} node_score_and_alarm={node_path:.1} tracker_step={tracked:.1} ratio={:.3} same_bits={}",
            tracked / node_path,
            u8::from(same),
        );
        same
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
        let ok = measure::<4, { tri(4) }, 8>(&ticks, per_tick, &mut out)
            & measure::<8, { tri(8) }, 16>(&ticks, per_tick, &mut out)
            & measure::<16, { tri(16) }, 32>(&ticks, per_tick, &mut out);
        // Banks on the Cortex-M4F only: the micro:bit's 16 KiB of RAM does not hold the largest
        // bank's blob buffer beside the rest.
        #[cfg(feature = "mps2-an386")]
        let ok = ok & {
            let mut all = measure_v1::<4, { tri(4) }>(&ticks, per_tick, &mut out)
                & measure_v1::<8, { tri(8) }>(&ticks, per_tick, &mut out)
                & measure_v1::<16, { tri(16) }>(&ticks, per_tick, &mut out);
            for k in [1, 2, 4] {
                all &= measure_bank::<8, 8>(&ticks, per_tick, &mut out, k, 1, false);
                all &= measure_bank::<8, 8>(&ticks, per_tick, &mut out, k, 4, true);
                all &= measure_bank::<8, 16>(&ticks, per_tick, &mut out, k, 4, true);
                all &= measure_bank::<16, 16>(&ticks, per_tick, &mut out, k, 1, false);
                all &= measure_bank::<16, 16>(&ticks, per_tick, &mut out, k, 4, true);
                all &= measure_bank::<16, 32>(&ticks, per_tick, &mut out, k, 4, true);
            }
            all
        };
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
