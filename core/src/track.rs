//! The [`Tracker`]: window → bank → alarm machine → drift, the whole device-side path of a model
//! bank, one reading at a time. The host's replay runs this same code, so the two agree to the
//! bit.
//!
//! # One reading
//!
//! 1. **Mode change** (known-mode banks only): a valid mode different from the last valid one
//!    restarts the window (a window across a change of duty point mixes two of them).
//! 2. **Window** ([`crate::window`]): a bad reading is its fault and restarts the window;
//!    while the window fills, the fault is [`ReadingFault::WindowFilling`].
//! 3. **Mode** (known-mode banks): no mode, or one the bank does not have, is the fault
//!    [`ReadingFault::UnknownMode`] (it does not restart the window; it takes precedence over
//!    `WindowFilling`, never over a bad reading's own fault).
//! 4. **Score**: `t = ln y` on log features, else `y`; `t' = t − s` with the drift shift `s`;
//!    the bank's mode rule and score ([`crate::bank`]).
//! 5. **Alarm machine**, on the chosen mode's judgement ([`AlarmMachine::update_judged`]).
//! 6. **Drift**, if the bank has it, only when the reading was scored, its verdict is `Below`,
//!    and the alarm status was `Quiet` both before and after the update (so not on the reading
//!    that clears an alarm, which belongs to the alarm episode): `sᵢ ← sᵢ + rate · (t'ᵢ − c_{k*,i})`
//!    (plain `f32`, a multiply then an add, no fused multiply-add), then each `sᵢ` with
//!    `|sᵢ| ≥ boundᵢ` is set to `±boundᵢ`. The first time any feature reaches its bound since the
//!    model was loaded, the reading carries the event [`EventKind::Drift`] and
//!    [`Tracker::drift_at_bound`] stays true until a new model is loaded. While the alarm is
//!    raised or latched, or the reading is a fault, the shift is frozen.
//!
//! With drift, the centre of every mode moves by `s` (the score uses `t − s`), so the bank
//! follows a slow change of the machine while it looks normal. That is what it can mask: a fault
//! that develops slower than the drift's half-life, inside the bound, is learnt as the new
//! normal. The bound caps it, and reaching the bound is reported, never silent.

use crate::alarm::{AlarmMachine, Event, EventKind, Status, Step};
use crate::bank::{BankError, BankScore, FlashBank, ModeSelect};
use crate::blob::DecodeError;
use crate::model::{ReadingFault, Verdict};
use crate::window::Window;

/// What one reading did.
#[derive(Clone, Debug, PartialEq)]
pub struct TrackStep<const M: usize> {
    /// The chosen mode, its d² and verdict, or why the reading could not be scored.
    pub score: Result<BankScore, ReadingFault>,
    /// The alarm and fault lines after the reading, and its events (a drift event last).
    pub step: Step,
    /// The per-feature contributions to d² of the chosen mode (they sum to d²; the largest names
    /// the feature that drove the score). Only from [`Tracker::step_explained`], on a scored
    /// reading whose split fits in `f32`; `None` otherwise.
    pub contributions: Option<[f32; M]>,
    /// Whether the drift has reached its bound on some feature since the model was loaded.
    pub drift_at_bound: bool,
}

impl<const M: usize> TrackStep<M> {
    /// The feature with the largest contribution, by [`crate::Explained::top`]'s rule, when the
    /// reading was scored and explained ([`Tracker::step_explained`]).
    pub fn top(&self) -> Option<usize> {
        match (&self.score, &self.contributions) {
            (Ok(_), Some(c)) => Some(crate::model::top_of(c).0),
            _ => None,
        }
    }
}

/// The device-side state of a model bank: window, alarm machine and drift shift over a
/// [`FlashBank`]. `N` raw features a reading, `M` scored (`N`, or `2 N` with differences).
#[derive(Clone, Debug, PartialEq)]
pub struct Tracker<'a, const N: usize, const M: usize> {
    bank: FlashBank<'a, N, M>,
    window: Window<N, M>,
    alarm: AlarmMachine,
    shift: [f32; M],
    drift_at_bound: bool,
    /// The last valid mode a known-mode bank was told.
    last_mode: Option<u8>,
    /// The scored vector `t'` of the last reading, and its chosen mode (`None`: the last
    /// reading was not scored): what [`Tracker::explain_last`] splits.
    last_t: [f32; M],
    last_k: Option<u8>,
}

impl<'a, const N: usize, const M: usize> Tracker<'a, N, M> {
    /// Check a blob (version 2, or a version 1 single model, see [`FlashBank::from_blob`]) and
    /// start tracking: an empty window, a quiet alarm, no shift.
    pub fn from_blob(bytes: &'a [u8]) -> Result<Self, DecodeError> {
        Self::new(FlashBank::from_blob(bytes)?)
    }

    /// Start tracking a checked bank.
    pub fn new(bank: FlashBank<'a, N, M>) -> Result<Self, DecodeError> {
        let window = Window::new(bank.window(), bank.log_mask())
            .map_err(|e| DecodeError::Bank(BankError::Window(e)))?;
        // The thresholds given here are not used: the bank judges each reading against its
        // mode's own (`update_judged`).
        let thresholds = bank
            .thresholds(0)
            .ok_or(DecodeError::Bank(BankError::Modes {
                count: bank.modes(),
            }))?;
        Ok(Self {
            alarm: AlarmMachine::new(thresholds, bank.policy()),
            bank,
            window,
            shift: [0.0; M],
            drift_at_bound: false,
            last_mode: None,
            last_t: [0.0; M],
            last_k: None,
        })
    }

    /// The bank.
    pub const fn bank(&self) -> &FlashBank<'a, N, M> {
        &self.bank
    }

    /// The alarm machine.
    pub const fn alarm(&self) -> &AlarmMachine {
        &self.alarm
    }

    /// The window.
    pub const fn window(&self) -> &Window<N, M> {
        &self.window
    }

    /// The drift shift now, in model units (all zero without drift).
    pub const fn shift(&self) -> &[f32; M] {
        &self.shift
    }

    /// Whether the drift has reached its bound since the model was loaded.
    pub const fn drift_at_bound(&self) -> bool {
        self.drift_at_bound
    }

    /// The chosen mode's per-feature contributions to d² on the last reading, the same bits
    /// [`Self::step_explained`] would have given on it, without a copy of the tracker and without
    /// stepping again: the tracker keeps the last scored vector (before the drift moved), and
    /// this splits it. `None` when the last reading was not scored (or none was taken) or the
    /// split does not fit in `f32`.
    pub fn explain_last(&self) -> Option<[f32; M]> {
        let k = self.last_k?;
        self.bank.contributions(usize::from(k), &self.last_t).ok()
    }

    /// The feature with the largest contribution on the last reading ([`Self::explain_last`]),
    /// by [`crate::Explained::top`]'s rule, as [`TrackStep::top`] of [`Self::step_explained`].
    pub fn top_last(&self) -> Option<usize> {
        self.explain_last().map(|c| crate::model::top_of(&c).0)
    }

    /// Clear a raised or latched alarm by hand. The window, the drift shift and the
    /// drift-at-bound flag stay as they are (the flag until a new model is loaded).
    pub fn reset(&mut self) -> Step {
        self.alarm.reset()
    }

    /// Take one raw reading, with the mode the machine's controller gives (used by a known-mode
    /// bank only; a nearest-mode bank ignores it).
    pub fn step(&mut self, reading: &[f32; N], mode: Option<u8>) -> TrackStep<M> {
        self.advance(reading, mode, false)
    }

    /// [`Self::step`], and the chosen mode's per-feature contributions on a scored reading
    /// (computed in `f64`, as [`crate::Model::explain`] does: dearer on a device without a
    /// double-precision unit). Everything else is the same, to the bit.
    pub fn step_explained(&mut self, reading: &[f32; N], mode: Option<u8>) -> TrackStep<M> {
        self.advance(reading, mode, true)
    }

    fn advance(&mut self, x: &[f32; N], mode: Option<u8>, explain: bool) -> TrackStep<M> {
        let known = self.bank.select() == ModeSelect::Known;
        let valid = mode.filter(|k| usize::from(*k) < self.bank.modes());
        if known {
            if let Some(k) = valid {
                if self.last_mode.is_some_and(|last| last != k) {
                    self.window.restart();
                }
                self.last_mode = Some(k);
            }
        }
        let pushed = match self.window.push(x) {
            Err(f @ (ReadingFault::NotFinite { .. } | ReadingFault::LogDomain { .. })) => Err(f),
            _ if known && valid.is_none() => Err(ReadingFault::UnknownMode { given: mode }),
            other => other,
        };
        let drift = self.bank.has_drift();
        let scored = pushed.and_then(|y| {
            let t = self.bank.transform(&y, drift.then_some(&self.shift));
            self.bank.score_t(&t, mode).map(|(s, j)| (s, j, t))
        });
        self.last_k = scored.as_ref().ok().map(|(s, _, t)| {
            self.last_t = *t;
            s.mode
        });
        let before = self.alarm.status();
        let mut step = self.alarm.update_judged(scored.map(|(_, j, _)| j));
        let mut contributions = None;
        if let Ok((s, _, t)) = &scored {
            let k = usize::from(s.mode);
            if explain {
                // `last_t` and `last_k` were set from this reading above.
                contributions = self.explain_last();
            }
            let quiet = before == Status::Quiet && self.alarm.status() == Status::Quiet;
            if drift && s.verdict == Verdict::Below && quiet && !step.fault {
                if let Some(feature) = self.follow(k, t) {
                    if !self.drift_at_bound {
                        self.drift_at_bound = true;
                        let index = self.alarm.next_index().wrapping_sub(1);
                        // Capacity 2 holds it: a quiet reading before and after carries at
                        // most `FaultCleared` from the alarm machine.
                        let _ = step.events.push(Event {
                            index,
                            kind: EventKind::Drift { feature },
                        });
                    }
                }
            }
        }
        TrackStep {
            score: scored.map(|(s, _, _)| s),
            step,
            contributions,
            drift_at_bound: self.drift_at_bound,
        }
    }

    /// Move the shift towards mode `k`'s deviation at `t'` and clamp it; the first feature at
    /// its bound after the move, if any.
    fn follow(&mut self, k: usize, t: &[f32; M]) -> Option<u8> {
        let rate = self.bank.drift_rate()?;
        let d = self.bank.deviation(k, t);
        let mut first = None;
        for (i, (si, di)) in self.shift.iter_mut().zip(&d).enumerate() {
            let bound = self.bank.drift_bound(i);
            let moved = *si + rate * *di;
            *si = if moved >= bound {
                bound
            } else if moved <= -bound {
                -bound
            } else {
                moved
            };
            if first.is_none() && (*si == bound || *si == -bound) {
                first = Some(i as u8);
            }
        }
        first
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{blob, AlarmPolicy, FlashModel, ModelMeta, ModelParams, Preprocess, Thresholds};
    extern crate std;
    use std::{vec, vec::Vec};

    /// A small linear congruential generator (Knuth's MMIX constants), for reproducible readings.
    struct Lcg(u64);

    impl Lcg {
        fn next(&mut self) -> f32 {
            self.0 = self
                .0
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            ((self.0 >> 40) as f32) / ((1u64 << 24) as f32)
        }
    }

    fn v1_params() -> ModelParams<3> {
        ModelParams {
            meta: ModelMeta {
                model_id: 77,
                trained_at: 1_767_225_600,
                sequence: 2,
            },
            preprocess: Preprocess {
                log_mask: 0b010,
                offset: [1.0, 0.5, -2.0],
                scale: [2.0, 3.0, 0.5],
            },
            mean: [0.1, -0.2, 0.05],
            w: [[1.1, 0.0, 0.0], [-0.4, 0.9, 0.0], [0.3, 0.2, 1.3]],
            thresholds: Thresholds {
                alarm: 7.8,
                clear: 4.0,
            },
            policy: AlarmPolicy {
                raise_after: 2,
                clear_after: 3,
                latch: false,
            },
        }
    }

    /// A v1 blob through the Tracker (a bank of one, window of one, no drift) gives the d²,
    /// verdict, alarm and fault lines and events of FlashModel + AlarmMachine, bit for bit, on
    /// readings near and far, bad readings (NaN, infinity, a zero on the log feature) and resets.
    #[test]
    fn a_v1_blob_tracks_exactly_as_flash_model_and_alarm_machine() {
        let p = v1_params();
        let mut buf = [0u8; blob::max_len(3)];
        let n = blob::encode(&p, &mut buf).unwrap();
        let bytes = &buf[..n];
        let fm = FlashModel::<3>::from_blob(bytes).unwrap();
        let mut am = AlarmMachine::new(fm.thresholds(), fm.policy());
        let mut tr = Tracker::<3, 3>::from_blob(bytes).unwrap();
        assert_eq!(tr.bank().version(), 1);
        assert_eq!(tr.bank().names_digest(), None);
        let mut rng = Lcg(12345);
        let (mut faults, mut above, mut events) = (0, 0, 0);
        for i in 0..3000 {
            let spread = if (i / 50) % 3 == 2 { 4.0 } else { 1.0 };
            let mut x = [
                1.0 + spread * (rng.next() - 0.5),
                0.5 + 0.5 * rng.next(),
                -2.0 + spread * (rng.next() - 0.5),
            ];
            match i % 97 {
                13 => x[0] = f32::NAN,
                29 => x[1] = 0.0,
                41 => x[2] = f32::INFINITY,
                53 => x[1] = -1.0,
                _ => {}
            }
            if i % 211 == 0 {
                assert_eq!(tr.reset(), am.reset());
            }
            let want = fm.score(&x);
            let want_step = am.update(&want);
            let got = tr.step(&x, None);
            match (want, got.score) {
                (Ok(w), Ok(g)) => {
                    assert_eq!(g.mode, 0);
                    assert_eq!(g.d2.to_bits(), w.d2.to_bits(), "reading {i}");
                    assert_eq!(g.verdict, w.verdict);
                    above += usize::from(w.verdict == Verdict::Above);
                }
                (Err(w), Err(g)) => {
                    assert_eq!(g, w, "reading {i}");
                    faults += 1;
                }
                (w, g) => panic!("reading {i}: {w:?} against {g:?}"),
            }
            events += want_step.events.len();
            assert_eq!(got.step, want_step, "reading {i}");
            assert!(got.contributions.is_none() && !got.drift_at_bound);
        }
        // The sequence exercised what it claims to.
        assert!(
            faults >= 120 && above >= 100 && events >= 100,
            "{faults} {above} {events}"
        );
    }

    use crate::bank::{BankParams, DriftSpec, ModeParams};
    use crate::window::WindowSpec;
    use crate::Model;

    fn eye2(center: [f32; 2], alarm: f32, clear: f32) -> ModeParams<2> {
        ModeParams {
            offset: center,
            scale: [1.0; 2],
            mean: [0.0; 2],
            w: [[1.0, 0.0], [0.0, 1.0]],
            thresholds: Thresholds { alarm, clear },
        }
    }

    fn bank_blob<const N: usize, const M: usize>(p: &BankParams<'_, N, M>) -> Vec<u8> {
        let mut buf = vec![0u8; blob::max_bank_len(N, M, p.modes.len(), p.drift.is_some())];
        let n = blob::encode_bank(p, &mut buf).unwrap();
        buf.truncate(n);
        buf
    }

    fn params2<'m>(modes: &'m [ModeParams<2>], select: ModeSelect) -> BankParams<'m, 2, 2> {
        BankParams {
            meta: ModelMeta::default(),
            log_mask: 0,
            select,
            modes,
            window: WindowSpec::single(),
            drift: None,
            policy: AlarmPolicy::default(),
            names_digest: 0,
        }
    }

    /// A standard normal pair by the Box–Muller transform.
    fn normal2(rng: &mut Lcg) -> [f32; 2] {
        let u1 = f64::from(rng.next()).max(1e-12);
        let u2 = f64::from(rng.next());
        let r = (-2.0 * u1.ln()).sqrt();
        let a = 2.0 * core::f64::consts::PI * u2;
        [(r * a.cos()) as f32, (r * a.sin()) as f32]
    }

    /// Two modes 20 σ apart: every reading drawn from a mode is scored against it, and the bank's
    /// false-alarm rate on each is the single mode's: the alarm limit 9.2103 is the 0.99 quantile
    /// of χ² with 2 degrees of freedom (closed form: P(χ²₂ > x) = exp(−x/2), so x = −2 ln 0.01).
    #[test]
    fn nearest_mode_on_two_well_separated_modes() {
        let alarm = (-2.0 * 0.01f64.ln()) as f32;
        let modes = [
            eye2([0.0, 0.0], alarm, 6.0),
            eye2([20.0, -20.0], alarm, 6.0),
        ];
        let blob = bank_blob(&params2(&modes, ModeSelect::Nearest));
        let bank = FlashBank::<2, 2>::from_blob(&blob).unwrap();
        let mut rng = Lcg(99);
        let n = 20_000;
        for (k, c) in [[0.0f32, 0.0], [20.0, -20.0]].iter().enumerate() {
            let mut flagged = 0;
            for _ in 0..n {
                let z = normal2(&mut rng);
                let x = [c[0] + z[0], c[1] + z[1]];
                let s = bank.score(&x, None, None).unwrap();
                assert_eq!(usize::from(s.mode), k, "{x:?}");
                // d² against the chosen mode, by hand.
                let d2 = (x[0] - c[0]) * (x[0] - c[0]) + (x[1] - c[1]) * (x[1] - c[1]);
                assert!((s.d2 - d2).abs() <= 1e-5 * d2.max(1.0));
                flagged += usize::from(s.verdict == Verdict::Above);
            }
            // 1 % with a binomial standard deviation of 0.07 %: within ±0.25 % (3.5 σ).
            let rate = flagged as f64 / n as f64;
            assert!((rate - 0.01).abs() < 0.0025, "mode {k}: {rate}");
        }
        // Half way: the same d² to both, a tie, to the lowest mode; above both limits.
        let s = bank.score(&[10.0, -10.0], None, None).unwrap();
        assert_eq!((s.mode, s.d2, s.verdict), (0, 200.0, Verdict::Above));
    }

    /// The rule is d²ₖ / alarmₖ, not d²ₖ: a reading nearer mode 0 in d² but deeper inside
    /// mode 1's wider limit is scored against mode 1, and is not flagged although it is outside
    /// mode 0's ellipsoid.
    #[test]
    fn the_nearest_mode_is_the_one_the_reading_is_deepest_inside() {
        let modes = [eye2([0.0, 0.0], 4.0, 2.0), eye2([5.0, 0.0], 16.0, 8.0)];
        let blob = bank_blob(&params2(&modes, ModeSelect::Nearest));
        let bank = FlashBank::<2, 2>::from_blob(&blob).unwrap();
        // d²₀ = 2.25² = 5.0625 (r = 1.27), d²₁ = 2.75² = 7.5625 (r = 0.47).
        let s = bank.score(&[2.25, 0.0], None, None).unwrap();
        assert_eq!((s.mode, s.d2, s.verdict), (1, 7.5625, Verdict::Below));
        // d²₀ = 1 (r = 0.25), d²₁ = 16 (r = 1): mode 0.
        let s = bank.score(&[1.0, 0.0], None, None).unwrap();
        assert_eq!((s.mode, s.d2), (0, 1.0));
    }

    /// Known mode: the mode given picks the Gaussian; a change of mode restarts the window; no
    /// mode, or one beyond K, is a fault that does not restart it.
    #[test]
    fn known_mode_picks_restarts_and_refuses() {
        let modes = [eye2([0.0, 0.0], 9.0, 4.0), eye2([10.0, 0.0], 9.0, 4.0)];
        let mut p = params2(&modes, ModeSelect::Known);
        p.window = WindowSpec {
            length: 2,
            differences: false,
        };
        let blob = bank_blob(&p);
        let mut t = Tracker::<2, 2>::from_blob(&blob).unwrap();
        let fill = |missing| Err(ReadingFault::WindowFilling { missing });
        assert_eq!(t.step(&[1.0, 0.0], Some(0)).score, fill(1));
        let s = t.step(&[3.0, 0.0], Some(0)).score.unwrap();
        assert_eq!((s.mode, s.d2), (0, 4.0)); // mean (2, 0)
                                              // Mode 1 is told: the window restarts, then scores against mode 1.
        assert_eq!(t.step(&[9.0, 0.0], Some(1)).score, fill(1));
        // No mode: a fault, not a restart (the next reading completes the window).
        assert_eq!(
            t.step(&[9.0, 0.0], None).score,
            Err(ReadingFault::UnknownMode { given: None })
        );
        assert_eq!(
            t.step(&[9.0, 0.0], Some(7)).score,
            Err(ReadingFault::UnknownMode { given: Some(7) })
        );
        let s = t.step(&[13.0, 0.0], Some(1)).score.unwrap();
        assert_eq!((s.mode, s.d2), (1, 1.0)); // mean (11, 0)
                                              // Against mode 0 the same reading would be far: the mode really is the one given.
        assert_eq!(t.step(&[13.0, 0.0], Some(0)).score, fill(1));
        let s = t.step(&[13.0, 0.0], Some(0)).score.unwrap();
        assert_eq!((s.mode, s.d2, s.verdict), (0, 169.0, Verdict::Above));
    }

    fn drift_bank(rate: f32, bound: f32, policy: AlarmPolicy) -> Vec<u8> {
        let modes = [ModeParams::<1> {
            offset: [0.0],
            scale: [1.0],
            mean: [0.0],
            w: [[1.0]],
            thresholds: Thresholds {
                alarm: 100.0,
                clear: 50.0,
            },
        }];
        bank_blob(&BankParams::<1, 1> {
            meta: ModelMeta::default(),
            log_mask: 0,
            select: ModeSelect::Nearest,
            modes: &modes,
            window: WindowSpec::single(),
            drift: Some(DriftSpec {
                rate,
                bound: [bound],
            }),
            policy,
            names_digest: 0,
        })
    }

    /// A constant offset δ: the shift after n readings is δ (1 − (1 − rate)ⁿ) (the closed form
    /// of sₙ = sₙ₋₁ + rate (δ − sₙ₋₁), s₀ = 0), to within f32 rounding; d² falls as (δ − s)².
    #[test]
    fn drift_converges_geometrically_to_a_constant_offset() {
        let (delta, rate) = (2.0f32, 0.1f32);
        let blob = drift_bank(rate, 5.0, AlarmPolicy::default());
        let mut t = Tracker::<1, 1>::from_blob(&blob).unwrap();
        for n in 1..=200 {
            let s = t.step(&[delta], None);
            let d2 = s.score.unwrap().d2;
            let before = f64::from(delta) * (1.0 - f64::from(rate)).powi(n - 1);
            // d = δ − s, so √d² follows the closed form with the shift's own error.
            let tol = 4e-7 * f64::from(n) * f64::from(delta);
            assert!(
                (f64::from(d2).sqrt() - before).abs() <= tol,
                "n = {n}: d² {d2}"
            );
            let want = f64::from(delta) * (1.0 - (1.0 - f64::from(rate)).powi(n));
            let got = f64::from(t.shift()[0]);
            assert!((got - want).abs() <= tol, "n = {n}: {got} against {want}");
            assert!(s.step.events.is_empty() && !s.drift_at_bound);
        }
        assert!((t.shift()[0] - delta).abs() < 1e-5);
    }

    /// With a bound below the offset, the shift stops at the bound, and exactly one drift event
    /// comes, on the reading where the closed form first reaches it: δ (1 − 0.9ⁿ) ≥ 1.5 first
    /// at n = 14 (0.9¹³ = 0.254, 0.9¹⁴ = 0.229), the reading of index 13.
    #[test]
    fn drift_clamps_at_its_bound_with_one_event() {
        let blob = drift_bank(0.1, 1.5, AlarmPolicy::default());
        let mut t = Tracker::<1, 1>::from_blob(&blob).unwrap();
        let mut drift_events = vec![];
        for i in 0..100u32 {
            let s = t.step(&[2.0], None);
            for e in &s.step.events {
                assert_eq!(e.index, i);
                drift_events.push(*e);
            }
            assert_eq!(s.drift_at_bound, i >= 13, "reading {i}");
            assert!(t.shift()[0] <= 1.5);
        }
        assert_eq!(
            drift_events,
            [Event {
                index: 13,
                kind: EventKind::Drift { feature: 0 }
            }]
        );
        assert_eq!(t.shift()[0], 1.5);
        // A reset clears the alarm, not the drift flag.
        t.reset();
        assert!(t.drift_at_bound());
        // The negative side clamps too.
        let mut t = Tracker::<1, 1>::from_blob(&blob).unwrap();
        for _ in 0..100 {
            t.step(&[-3.0], None);
        }
        assert_eq!(t.shift()[0], -1.5);
    }

    /// The shift is frozen while the alarm is raised, on the reading that clears it, on a fault,
    /// and on a reading above the limit that does not yet raise the alarm.
    #[test]
    fn drift_is_frozen_during_an_alarm_and_on_faults() {
        let policy = AlarmPolicy {
            raise_after: 2,
            clear_after: 2,
            latch: false,
        };
        let blob = drift_bank(0.5, 5.0, policy);
        let mut t = Tracker::<1, 1>::from_blob(&blob).unwrap();
        t.step(&[1.0], None);
        assert_eq!(t.shift()[0], 0.5);
        let frozen = 0.5;
        // Above (d² ≈ 400), but not yet raised: frozen.
        let s = t.step(&[20.5], None);
        assert!(!s.step.alarm && t.shift()[0] == frozen);
        // Raised.
        assert!(t.step(&[20.5], None).step.alarm);
        assert_eq!(t.shift()[0], frozen);
        // Below the clear limit but still raised: frozen; the clearing reading: frozen.
        assert!(t.step(&[1.0], None).step.alarm);
        assert_eq!(t.shift()[0], frozen);
        let s = t.step(&[1.0], None);
        assert!(!s.step.alarm && s.step.events[0].kind == EventKind::Cleared);
        assert_eq!(t.shift()[0], frozen);
        // A fault: frozen.
        assert!(t.step(&[f32::NAN], None).step.fault);
        assert_eq!(t.shift()[0], frozen);
        // Quiet again: it moves (0.5 + 0.5 · (1 − 0.5) = 0.75).
        t.step(&[1.0], None);
        assert_eq!(t.shift()[0], 0.75);
    }

    /// The fullest step a bank makes: a fault clears and the drift reaches its bound on the same
    /// reading, two events in the step's capacity of two, in that order. And a reset clears a
    /// latched alarm with its event, leaving the drift flag.
    #[test]
    fn fault_cleared_and_drift_fit_in_one_step() {
        let latch = AlarmPolicy {
            raise_after: 1,
            clear_after: 1,
            latch: true,
        };
        let blob = drift_bank(0.9, 0.5, latch);
        let mut t = Tracker::<1, 1>::from_blob(&blob).unwrap();
        assert!(t.step(&[f32::NAN], None).step.fault);
        let s = t.step(&[2.0], None);
        let kinds: Vec<EventKind> = s.step.events.iter().map(|e| e.kind).collect();
        assert_eq!(
            kinds,
            [EventKind::FaultCleared, EventKind::Drift { feature: 0 }]
        );
        assert!(s.step.events.iter().all(|e| e.index == 1));
        assert_eq!(t.shift()[0], 0.5);
        // Latched by a reading far above (d² = (50 − 0.5)² > 100), then reset by hand.
        assert!(t.step(&[50.0], None).step.alarm);
        assert!(t.step(&[0.5], None).step.alarm);
        let r = t.reset();
        assert!(!r.alarm);
        assert_eq!(r.events[0].kind, EventKind::Reset);
        assert!(t.drift_at_bound() && t.step(&[0.5], None).drift_at_bound);
    }

    /// The chosen mode's contributions are `Model::explain`'s for that mode's single model, bit
    /// for bit, and they sum to d².
    #[test]
    fn contributions_are_the_chosen_modes_explain() {
        let m0 = ModeParams::<2> {
            offset: [1.0, -1.0],
            scale: [0.5, 2.0],
            mean: [0.1, 0.0],
            w: [[1.0, 0.0], [-0.7, 1.3]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
        };
        let m1 = ModeParams::<2> {
            offset: [30.0, 5.0],
            ..m0
        };
        let modes = [m0, m1];
        let p = params2(&modes, ModeSelect::Nearest);
        let blob = bank_blob(&p);
        let mut t = Tracker::<2, 2>::from_blob(&blob).unwrap();
        for (x, k) in [([2.0f32, -0.5], 0usize), ([31.0, 6.0], 1), ([34.0, 2.0], 1)] {
            let mp = modes[k];
            let single = Model::new(ModelParams {
                meta: ModelMeta::default(),
                preprocess: Preprocess {
                    log_mask: 0,
                    offset: mp.offset,
                    scale: mp.scale,
                },
                mean: mp.mean,
                w: mp.w,
                thresholds: mp.thresholds,
                policy: AlarmPolicy::default(),
            })
            .unwrap();
            let want = single.explain(&x).unwrap();
            let s = t.step_explained(&x, None);
            let got = s.score.unwrap();
            assert_eq!(usize::from(got.mode), k);
            assert_eq!(got.d2.to_bits(), want.score.d2.to_bits());
            let c = s.contributions.unwrap();
            assert_eq!(c.map(f32::to_bits), want.contributions.map(f32::to_bits));
            assert!((c.iter().sum::<f32>() - got.d2).abs() <= 1e-4 * got.d2.max(1.0));
        }
        // `step` gives no contributions and otherwise the same.
        let mut u = Tracker::<2, 2>::from_blob(&blob).unwrap();
        let a = u.step(&[2.0, -0.5], None);
        let mut v = Tracker::<2, 2>::from_blob(&blob).unwrap();
        let b = v.step_explained(&[2.0, -0.5], None);
        assert!(a.contributions.is_none() && b.contributions.is_some());
        assert_eq!((a.score, a.step), (b.score, b.step));
    }

    /// `explain_last` after `step` is `step_explained`'s split to the bit, on every reading of a
    /// stream with a window, two modes, drift that moves, faults and a raised alarm; `None` after
    /// a reading that was not scored.
    #[test]
    fn explain_last_is_step_explained_without_the_copy() {
        let m0 = ModeParams::<2> {
            offset: [0.0, 0.0],
            scale: [1.0, 2.0],
            mean: [0.0, 0.0],
            w: [[1.0, 0.0], [-0.7, 1.3]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
        };
        let m1 = ModeParams::<2> {
            offset: [30.0, 5.0],
            ..m0
        };
        let modes = [m0, m1];
        let mut p = params2(&modes, ModeSelect::Nearest);
        p.window = WindowSpec {
            length: 3,
            differences: false,
        };
        p.drift = Some(DriftSpec {
            rate: 0.05,
            bound: [0.5, 0.5],
        });
        let blob = bank_blob(&p);
        let mut plain = Tracker::<2, 2>::from_blob(&blob).unwrap();
        let mut explained = plain.clone();
        assert_eq!(plain.explain_last(), None);
        let mut rng = Lcg(7);
        let (mut split, mut moved, mut raised, mut faults) = (0, 0, 0, 0);
        for i in 0..600 {
            let z = normal2(&mut rng);
            let centre = if (i / 100) % 2 == 0 {
                [0.3, 0.1]
            } else {
                [30.0, 5.0]
            };
            let mut x = [centre[0] + z[0], centre[1] + 0.5 * z[1]];
            if i % 97 == 50 {
                x[1] = f32::NAN;
            }
            if (450..460).contains(&i) {
                x[0] += 8.0;
            }
            let shift_before = *plain.shift();
            let a = plain.step(&x, None);
            let b = explained.step_explained(&x, None);
            assert_eq!((&a.score, &a.step), (&b.score, &b.step), "reading {i}");
            let last = plain.explain_last();
            assert_eq!(
                last.map(|c| c.map(f32::to_bits)),
                b.contributions.map(|c| c.map(f32::to_bits)),
                "reading {i}"
            );
            assert_eq!(plain.top_last(), b.top(), "reading {i}");
            split += usize::from(last.is_some());
            moved += usize::from(*plain.shift() != shift_before);
            faults += usize::from(a.score.is_err());
            assert_eq!(a.score.is_err(), last.is_none(), "reading {i}");
            raised += a
                .step
                .events
                .iter()
                .filter(|e| e.kind == EventKind::Raised)
                .count();
        }
        // The stream reaches what it claims.
        assert!(
            split > 400 && moved > 100 && raised >= 1 && faults >= 6,
            "{split} {moved} {raised} {faults}"
        );
    }

    /// A reading with differences and a window: the mean and the difference are scored, with the
    /// log of the mean on a log feature.
    #[test]
    fn windows_with_differences_and_logs_score_the_transformed_vector() {
        let mode = ModeParams::<2> {
            offset: [0.0, 0.0],
            scale: [1.0, 1.0],
            mean: [0.0, 0.0],
            w: [[1.0, 0.0], [0.0, 1.0]],
            thresholds: Thresholds {
                alarm: 100.0,
                clear: 50.0,
            },
        };
        let modes = [mode];
        let p = BankParams::<1, 2> {
            meta: ModelMeta::default(),
            log_mask: 0b1,
            select: ModeSelect::Nearest,
            modes: &modes,
            window: WindowSpec {
                length: 2,
                differences: true,
            },
            drift: None,
            policy: AlarmPolicy::default(),
            names_digest: 0,
        };
        let blob = bank_blob(&p);
        let mut t = Tracker::<1, 2>::from_blob(&blob).unwrap();
        assert!(t.step(&[1.0], None).score.is_err());
        let s = t.step(&[3.0], None).score.unwrap();
        // y = (mean 2, difference 2), t = (ln 2, 2).
        let ln2 = libm::logf(2.0);
        assert_eq!(s.d2, ln2 * ln2 + 4.0);
        // A zero: the log feature's fault, and a restart (two more readings to fill).
        assert_eq!(
            t.step(&[0.0], None).score,
            Err(ReadingFault::LogDomain { feature: 0 })
        );
        assert_eq!(
            t.step(&[2.0], None).score,
            Err(ReadingFault::WindowFilling { missing: 1 })
        );
        assert!(t.step(&[2.0], None).score.is_ok());
    }
}
// The RAM figures of the table in the crate docs, pinned at compile time on every 32-bit target
// (the firmware's): the image fails to build if they move. On a 64-bit host the two borrowed
// slices of a `FlashBank` are 16 bytes longer (the test `sizes_on_a_64_bit_host`).
#[cfg(target_pointer_width = "32")]
const _: () = {
    use core::mem::size_of;
    assert!(size_of::<Tracker<'static, 8, 8>>() == 936);
    assert!(size_of::<Tracker<'static, 8, 16>>() == 1256);
    assert!(size_of::<Tracker<'static, 16, 16>>() == 1768);
    assert!(size_of::<Tracker<'static, 16, 32>>() == 2408);
    assert!(size_of::<FlashBank<'static, 8, 8>>() == 312);
    assert!(size_of::<FlashBank<'static, 8, 16>>() == 568);
    assert!(size_of::<FlashBank<'static, 16, 16>>() == 568);
    assert!(size_of::<FlashBank<'static, 16, 32>>() == 1080);
    assert!(size_of::<Window<8, 8>>() == 520);
    assert!(size_of::<Window<8, 16>>() == 520);
    assert!(size_of::<Window<16, 16>>() == 1032);
    assert!(size_of::<Window<16, 32>>() == 1032);
    assert!(size_of::<TrackStep<8>>() == 72);
    assert!(size_of::<TrackStep<16>>() == 104);
};

#[cfg(all(test, target_pointer_width = "64"))]
mod sizes {
    use super::*;
    use core::mem::size_of;

    /// The 32-bit figures pinned above, on a 64-bit host: a `FlashBank` (and so a `Tracker`)
    /// carries two borrowed slices, 8 bytes longer each here; the window and steps hold none.
    #[test]
    fn sizes_on_a_64_bit_host() {
        assert_eq!(size_of::<Tracker<'static, 8, 8>>(), 936 + 16);
        assert_eq!(size_of::<Tracker<'static, 16, 32>>(), 2408 + 16);
        assert_eq!(size_of::<FlashBank<'static, 8, 8>>(), 312 + 16);
        assert_eq!(size_of::<FlashBank<'static, 16, 32>>(), 1080 + 16);
        assert_eq!(size_of::<Window<8, 8>>(), 520);
        assert_eq!(size_of::<Window<16, 32>>(), 1032);
        // What each part is: the ring of 16 readings, the centres of 8 modes, the shift.
        assert_eq!(size_of::<Window<8, 8>>(), 4 * 16 * 8 + 8);
        assert_eq!(size_of::<FlashBank<'static, 8, 8>>(), 4 * 8 * 8 + 72);
    }
}
