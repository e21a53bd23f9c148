//! The alarm state machine: pure logic, no hardware.
//!
//! It turns a stream of scores into two logical outputs, the **alarm** and the **fault** line,
//! and the events that changed them. The caller maps logical levels to pins (active-high or low).
//!
//! # States and transitions
//!
//! The machine holds an alarm status (`Quiet`, `Raised` or `Latched`), an optional fault, and two
//! run counters. `k` = [`AlarmPolicy::raise_after`], `m` = [`AlarmPolicy::clear_after`]. "Above" means
//! `d² > alarm threshold`; "below" means `d² < clear threshold`; between the two is the hysteresis band.
//!
//! | # | from | input | to | counters | event |
//! |---|------|-------|----|----------|-------|
//! | 1 | `Quiet` | above, run + 1 < k | `Quiet` | above run + 1 | — |
//! | 2 | `Quiet` | above, run + 1 = k | `Raised` (or `Latched` if latch) | both 0 | `Raised` |
//! | 3 | `Quiet` | not above | `Quiet` | above run 0 | — |
//! | 4 | `Raised` | below, run + 1 < m | `Raised` | below run + 1 | — |
//! | 5 | `Raised` | below, run + 1 = m | `Quiet` | both 0 | `Cleared` |
//! | 6 | `Raised` | not below | `Raised` | below run 0 | — |
//! | 7 | `Latched` | any score | `Latched` | — | — |
//! | 8 | any | reading fault, or a `Scored` whose d² is not finite | same status, fault set | both 0 | `Fault` (only when the fault starts or its cause changes; a filling window's `missing` count falling is the same cause) |
//! | 9 | fault set | a scored reading | fault cleared, then rows 1–7 | — | `FaultCleared`, then any of the above |
//! | 10 | `Raised`, `Latched` | [`AlarmMachine::reset`] | `Quiet` | both 0 | `Reset` |
//! | 11 | no model ([`AlarmMachine::without_model`]) | anything, reset too | unchanged: fault line on, alarm off | — | `Fault(NoModel)` on the first reading only |
//!
//! A reading fault never clears an alarm (nothing was learnt about the machine) and never raises one;
//! it breaks both runs, so `k` and `m` count *consecutive scored* readings.
//! The fault line is on while the latest reading could not be scored, or always without a model.

use crate::model::{ReadingFault, Scored};
use crate::params::{AlarmPolicy, Thresholds};

/// Why the fault line is on.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum FaultCause {
    /// The latest reading could not be scored.
    Reading(ReadingFault),
    /// There is no valid model: nothing is scored.
    NoModel,
}

impl FaultCause {
    /// Whether `other` is the same cause for the fault line's events (row 8): equal, or both a
    /// filling window whatever their `missing` counts. The count falls by one on every reading
    /// while a window fills; each reading still reports its own count, but only the first of the
    /// run is an event.
    pub fn same_cause(&self, other: &FaultCause) -> bool {
        let filling =
            |c: &FaultCause| matches!(c, FaultCause::Reading(ReadingFault::WindowFilling { .. }));
        self == other || (filling(self) && filling(other))
    }
}

/// The alarm status.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Status {
    /// No alarm.
    Quiet,
    /// Alarm raised; clears after `clear_after` readings below the clear threshold.
    Raised,
    /// Alarm raised and latched; only [`AlarmMachine::reset`] clears it.
    Latched,
}

/// What happened on a reading.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum EventKind {
    /// The alarm line went on.
    Raised,
    /// The alarm line went off after enough readings below the clear threshold.
    Cleared,
    /// The alarm line went off by an explicit reset.
    Reset,
    /// The fault line went on, or its cause changed ([`FaultCause::same_cause`]: a filling
    /// window whose `missing` count fell is not a new cause).
    Fault(FaultCause),
    /// The fault line went off: a reading was scored again.
    FaultCleared,
    /// The drift shift of a model bank reached its bound on this feature, the first time since
    /// the model was loaded (see [`crate::track`]). Not an alarm: the alarm line does not change.
    Drift {
        /// The first feature (index into the scored vector) at its bound.
        feature: u8,
    },
}

impl EventKind {
    /// The event's name in reports, the device's log and the host's replay alike:
    /// `raised`, `cleared`, `reset`, `fault`, `fault-cleared`, `drift`.
    pub const fn name(&self) -> &'static str {
        match self {
            EventKind::Raised => "raised",
            EventKind::Cleared => "cleared",
            EventKind::Reset => "reset",
            EventKind::Fault(_) => "fault",
            EventKind::FaultCleared => "fault-cleared",
            EventKind::Drift { .. } => "drift",
        }
    }
}

/// An event and the index of the reading that caused it (0-based; a reset carries the index of
/// the next reading).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Event {
    /// Index of the reading.
    pub index: u32,
    /// What happened.
    pub kind: EventKind,
}

/// Up to two events can happen on one reading (a fault clears and the alarm rises; or, in a model
/// bank, a fault clears and the drift reaches its bound: drift moves only on a reading that finds
/// and leaves the alarm quiet, so it never meets `Raised` or `Cleared` on one reading).
pub type Events = heapless::Vec<Event, 2>;

/// The logical levels after a reading, and what changed.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Step {
    /// Alarm line active.
    pub alarm: bool,
    /// Fault line active.
    pub fault: bool,
    /// Events on this reading, in the order they happened.
    pub events: Events,
}

/// What the alarm machine needs to know about a scored reading: the two comparisons of its d²
/// against the thresholds of the model (or, in a bank, of the mode) that scored it.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Judgement {
    /// `d² > alarm`.
    pub above: bool,
    /// `d² < clear`.
    pub below: bool,
}

/// The alarm state machine. See the module docs for the transition table.
#[derive(Clone, Debug, PartialEq)]
pub struct AlarmMachine {
    thresholds: Thresholds,
    policy: AlarmPolicy,
    status: Status,
    fault: Option<FaultCause>,
    above_run: u16,
    below_run: u16,
    next_index: u32,
    has_model: bool,
}

impl AlarmMachine {
    /// A machine for a valid model's thresholds and policy (see [`crate::Model::thresholds`]).
    pub const fn new(thresholds: Thresholds, policy: AlarmPolicy) -> Self {
        Self {
            thresholds,
            policy,
            status: Status::Quiet,
            fault: None,
            above_run: 0,
            below_run: 0,
            next_index: 0,
            has_model: true,
        }
    }

    /// A machine with no valid model: the fault line is on for good and nothing is scored.
    pub const fn without_model() -> Self {
        Self {
            thresholds: Thresholds {
                alarm: 0.0,
                clear: 0.0,
            },
            policy: AlarmPolicy {
                raise_after: 1,
                clear_after: 1,
                latch: false,
            },
            status: Status::Quiet,
            fault: Some(FaultCause::NoModel),
            above_run: 0,
            below_run: 0,
            next_index: 0,
            has_model: false,
        }
    }

    /// The alarm status.
    pub const fn status(&self) -> Status {
        self.status
    }

    /// The current fault, if the fault line is on.
    pub const fn fault(&self) -> Option<FaultCause> {
        self.fault
    }

    /// Whether the alarm line is on.
    pub const fn alarm_active(&self) -> bool {
        !matches!(self.status, Status::Quiet)
    }

    /// Index the next reading will get.
    pub const fn next_index(&self) -> u32 {
        self.next_index
    }

    fn levels(&self, events: Events) -> Step {
        Step {
            alarm: self.alarm_active(),
            fault: self.fault.is_some(),
            events,
        }
    }

    /// Feed one reading's score (the result of [`crate::Model::score`]), judged against this
    /// machine's own thresholds. The same table as [`Self::update_judged`], which it calls.
    pub fn update(&mut self, score: &Result<Scored, ReadingFault>) -> Step {
        let judged = match score {
            Err(fault) => Err(*fault),
            // A `Scored` is plain data; one built by hand with a NaN or infinite d² is not a score.
            Ok(s) if !s.d2.is_finite() => Err(ReadingFault::Overflow),
            Ok(s) => Ok(Judgement {
                above: s.d2 > self.thresholds.alarm,
                below: s.d2 < self.thresholds.clear,
            }),
        };
        self.update_judged(judged)
    }

    /// Feed one reading already judged against its thresholds (a model bank judges each reading
    /// against the limits of the mode that scored it), or the fault that kept it from being
    /// scored. The thresholds given to [`Self::new`] are not used here.
    pub fn update_judged(&mut self, judged: Result<Judgement, ReadingFault>) -> Step {
        let index = self.next_index;
        self.next_index = self.next_index.wrapping_add(1);
        let mut events = Events::new();
        let mut push = |kind| {
            // Capacity 2 is enough: at most one fault event plus one alarm event per reading.
            let _ = events.push(Event { index, kind });
        };
        if !self.has_model {
            if index == 0 {
                push(EventKind::Fault(FaultCause::NoModel));
            }
            return self.levels(events);
        }
        match judged {
            Err(fault) => {
                let cause = FaultCause::Reading(fault);
                if !self.fault.is_some_and(|f| f.same_cause(&cause)) {
                    push(EventKind::Fault(cause));
                }
                self.fault = Some(cause);
                self.above_run = 0;
                self.below_run = 0;
            }
            Ok(Judgement { above, below }) => {
                if self.fault.take().is_some() {
                    push(EventKind::FaultCleared);
                }
                match self.status {
                    Status::Quiet if above => {
                        self.above_run = self.above_run.saturating_add(1);
                        if self.above_run >= self.policy.raise_after {
                            self.status = if self.policy.latch {
                                Status::Latched
                            } else {
                                Status::Raised
                            };
                            self.above_run = 0;
                            self.below_run = 0;
                            push(EventKind::Raised);
                        }
                    }
                    Status::Quiet => self.above_run = 0,
                    Status::Raised if below => {
                        self.below_run = self.below_run.saturating_add(1);
                        if self.below_run >= self.policy.clear_after {
                            self.status = Status::Quiet;
                            self.above_run = 0;
                            self.below_run = 0;
                            push(EventKind::Cleared);
                        }
                    }
                    Status::Raised => self.below_run = 0,
                    Status::Latched => {}
                }
            }
        }
        self.levels(events)
    }

    /// Clear a raised or latched alarm by hand (row 10). Does nothing without a model.
    pub fn reset(&mut self) -> Step {
        let mut events = Events::new();
        if self.has_model && self.alarm_active() {
            self.status = Status::Quiet;
            self.above_run = 0;
            self.below_run = 0;
            let _ = events.push(Event {
                index: self.next_index,
                kind: EventKind::Reset,
            });
        }
        self.levels(events)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Verdict;

    const T: Thresholds = Thresholds {
        alarm: 10.0,
        clear: 5.0,
    };

    fn sc(d2: f32) -> Result<Scored, ReadingFault> {
        Ok(Scored {
            d2,
            verdict: if d2 > T.alarm {
                Verdict::Above
            } else {
                Verdict::Below
            },
        })
    }

    const BAD: Result<Scored, ReadingFault> = Err(ReadingFault::NotFinite { feature: 2 });

    fn machine(k: u16, m: u16, latch: bool) -> AlarmMachine {
        AlarmMachine::new(
            T,
            AlarmPolicy {
                raise_after: k,
                clear_after: m,
                latch,
            },
        )
    }

    fn kinds(s: &Step) -> heapless::Vec<EventKind, 2> {
        s.events.iter().map(|e| e.kind).collect()
    }

    #[test]
    fn rows_1_2_3_raise_after_k_consecutive() {
        let mut a = machine(3, 1, false);
        assert!(!a.update(&sc(11.0)).alarm); // row 1
        assert!(!a.update(&sc(11.0)).alarm); // row 1
        assert!(!a.update(&sc(7.0)).alarm); // row 3 resets the run
        assert!(!a.update(&sc(11.0)).alarm);
        assert!(!a.update(&sc(11.0)).alarm);
        let s = a.update(&sc(11.0)); // row 2
        assert!(s.alarm && !s.fault);
        assert_eq!(
            s.events.as_slice(),
            &[Event {
                index: 5,
                kind: EventKind::Raised
            }]
        );
        assert_eq!(a.status(), Status::Raised);
    }

    #[test]
    fn threshold_itself_is_not_above() {
        let mut a = machine(1, 1, false);
        assert!(!a.update(&sc(10.0)).alarm);
        assert!(a.update(&sc(10.000_001)).alarm);
    }

    #[test]
    fn rows_4_5_6_clear_after_m_consecutive_below_clear() {
        let mut a = machine(1, 2, false);
        assert!(a.update(&sc(20.0)).alarm);
        assert!(a.update(&sc(4.0)).alarm); // row 4
        assert!(a.update(&sc(7.0)).alarm); // row 6: in the band, run broken
        assert!(a.update(&sc(4.0)).alarm); // row 4
        let s = a.update(&sc(4.0)); // row 5
        assert!(!s.alarm);
        assert_eq!(kinds(&s).as_slice(), &[EventKind::Cleared]);
        assert_eq!(a.status(), Status::Quiet);
        // The clear threshold itself does not count as below.
        let mut a = machine(1, 1, false);
        a.update(&sc(20.0));
        assert!(a.update(&sc(5.0)).alarm);
    }

    #[test]
    fn row_7_and_10_latch_holds_until_reset() {
        let mut a = machine(1, 1, true);
        assert!(a.update(&sc(20.0)).alarm);
        assert_eq!(a.status(), Status::Latched);
        for _ in 0..5 {
            let s = a.update(&sc(0.0));
            assert!(s.alarm && s.events.is_empty());
        }
        let s = a.reset();
        assert!(!s.alarm);
        assert_eq!(
            s.events.as_slice(),
            &[Event {
                index: 6,
                kind: EventKind::Reset
            }]
        );
        // Reset when quiet does nothing.
        assert!(a.reset().events.is_empty());
        // And it can raise again.
        assert!(a.update(&sc(20.0)).alarm);
    }

    #[test]
    fn row_10_reset_clears_an_unlatched_alarm() {
        let mut a = machine(1, 100, false);
        a.update(&sc(20.0));
        assert_eq!(kinds(&a.reset()).as_slice(), &[EventKind::Reset]);
        assert_eq!(a.status(), Status::Quiet);
    }

    #[test]
    fn rows_8_9_fault_and_recovery() {
        let mut a = machine(2, 2, false);
        let s = a.update(&BAD);
        assert!(s.fault && !s.alarm);
        assert_eq!(
            kinds(&s).as_slice(),
            &[EventKind::Fault(FaultCause::Reading(
                ReadingFault::NotFinite { feature: 2 }
            ))]
        );
        // The same fault again: no new event, line stays on.
        let s = a.update(&BAD);
        assert!(s.fault && s.events.is_empty());
        // A different cause: a new event.
        let s = a.update(&Err(ReadingFault::Overflow));
        assert_eq!(
            kinds(&s).as_slice(),
            &[EventKind::Fault(FaultCause::Reading(
                ReadingFault::Overflow
            ))]
        );
        let s = a.update(&sc(20.0));
        assert!(!s.fault && !s.alarm);
        assert_eq!(kinds(&s).as_slice(), &[EventKind::FaultCleared]);
        // A fault breaks the run of readings above.
        a.update(&BAD);
        let s = a.update(&sc(20.0));
        assert!(!s.alarm);
        let s = a.update(&sc(20.0));
        assert!(s.alarm);
        assert_eq!(kinds(&s).as_slice(), &[EventKind::Raised]);
    }

    #[test]
    fn row_8_a_filling_window_is_one_fault_event_whatever_its_count() {
        let mut a = machine(1, 1, false);
        let filling = |missing| Err(ReadingFault::WindowFilling { missing });
        let s = a.update(&filling(15));
        assert!(s.fault);
        assert_eq!(
            kinds(&s).as_slice(),
            &[EventKind::Fault(FaultCause::Reading(
                ReadingFault::WindowFilling { missing: 15 }
            ))]
        );
        for missing in (1..15).rev() {
            let s = a.update(&filling(missing));
            assert!(s.fault && s.events.is_empty(), "missing {missing}");
            // The machine still knows this reading's own count.
            assert_eq!(
                a.fault(),
                Some(FaultCause::Reading(ReadingFault::WindowFilling { missing }))
            );
        }
        // Another kind of fault is a new cause, and so is a filling window after it.
        let s = a.update(&BAD);
        assert_eq!(s.events.len(), 1);
        let s = a.update(&filling(15));
        assert_eq!(s.events.len(), 1);
        // A scored reading ends the run; the next filling window is a new event.
        assert_eq!(
            kinds(&a.update(&sc(1.0))).as_slice(),
            &[EventKind::FaultCleared]
        );
        assert_eq!(a.update(&filling(3)).events.len(), 1);
        // Other features of the same kind stay distinct causes.
        let nf = |feature| FaultCause::Reading(ReadingFault::NotFinite { feature });
        assert!(!nf(1).same_cause(&nf(2)));
        assert!(nf(1).same_cause(&nf(1)));
    }

    #[test]
    fn row_8_a_non_finite_d2_is_a_fault_not_normal() {
        let mut a = machine(1, 1, false);
        for bad in [f32::NAN, f32::INFINITY] {
            let s = a.update(&Ok(Scored {
                d2: bad,
                verdict: Verdict::Below,
            }));
            assert!(s.fault && !s.alarm, "{bad}");
        }
        assert_eq!(a.fault(), Some(FaultCause::Reading(ReadingFault::Overflow)));
    }

    #[test]
    fn row_8_fault_neither_clears_nor_raises() {
        let mut a = machine(1, 2, false);
        a.update(&sc(20.0));
        a.update(&sc(1.0));
        let s = a.update(&BAD);
        assert!(s.alarm && s.fault);
        // The below run was broken by the fault: one more below is not enough.
        assert!(a.update(&sc(1.0)).alarm);
        assert!(!a.update(&sc(1.0)).alarm);
    }

    #[test]
    fn row_9_fault_clears_and_alarm_rises_on_one_reading() {
        let mut a = machine(1, 1, false);
        a.update(&BAD);
        let s = a.update(&sc(20.0));
        assert_eq!(
            kinds(&s).as_slice(),
            &[EventKind::FaultCleared, EventKind::Raised]
        );
    }

    #[test]
    fn row_11_no_model_is_a_permanent_fault() {
        let mut a = AlarmMachine::without_model();
        let s = a.update(&sc(0.0));
        assert!(s.fault && !s.alarm);
        assert_eq!(
            kinds(&s).as_slice(),
            &[EventKind::Fault(FaultCause::NoModel)]
        );
        for _ in 0..3 {
            let s = a.update(&sc(100.0));
            assert!(s.fault && !s.alarm && s.events.is_empty());
        }
        assert!(a.reset().fault);
        assert_eq!(a.fault(), Some(FaultCause::NoModel));
    }
}
