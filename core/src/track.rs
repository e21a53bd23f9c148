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
        let before = self.alarm.status();
        let mut step = self.alarm.update_judged(scored.map(|(_, j, _)| j));
        let mut contributions = None;
        if let Ok((s, _, t)) = &scored {
            let k = usize::from(s.mode);
            if explain {
                contributions = self.bank.contributions(k, t).ok();
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
}
