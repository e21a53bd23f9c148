//! The application: choose a model at boot, then score every reading and drive the two lines.
//!
//! Board-independent: it takes the pins as embedded-hal [`OutputPin`]s, the readings from a
//! [`ReadingSource`], and writes its report to any [`fmt::Write`] (semihosting on the emulator, a
//! UART on a board, a `String` in the tests).
//!
//! # The report
//!
//! One line per fact, words separated by single spaces, so that a host tool can check it:
//!
//! ```text
//! slot A valid seq=3 id=0x00000abc            (or: slot B unusable: <reason>)
//! model slot=A seq=3 id=0x00000abc            (or: model none)
//! pin fault off level=low at=boot             (every change of a pin: line, logical, electrical, reading)
//! r 12 d2=40490fdb v=above alarm=1 fault=0 event=raised top=3
//! r 13 d2=- v=fault alarm=1 fault=1 event=fault cause=not-finite:2
//! end scored=1440 faults=9
//! ```
//!
//! `d2` is the bit pattern of the f32 d² as 8 hex digits, `alarm` and `fault` the logical levels
//! after the reading, `event` the state machine's events joined with `+` (`-` for none), and `top`
//! (on a raised alarm only) the feature with the largest contribution to d².

use core::fmt::{self, Write};

use ellipsoid_core::{
    AlarmMachine, EventKind, Explained, FlashModel, ReadingFault, Scored, Step, Verdict,
};
use embedded_hal::digital::OutputPin;

use crate::pins::{Line, PinChange};
use crate::slots::{self, Slot, SlotReport};
use crate::source::ReadingSource;

/// Score one reading. Kept out of line so that the image check for panic machinery (see the
/// README) can find the scoring path by its symbol.
#[inline(never)]
pub fn score<const N: usize>(
    model: &FlashModel<'_, N>,
    x: &[f32; N],
) -> Result<Scored, ReadingFault> {
    model.score(x)
}

/// Score a reading and split d² per feature (only on a raised alarm). Out of line, as [`score`].
#[inline(never)]
pub fn explain<const N: usize>(
    model: &FlashModel<'_, N>,
    x: &[f32; N],
) -> Result<Explained<N>, ReadingFault> {
    model.explain(x)
}

/// Feed one score to the alarm state machine. Out of line, as [`score`], so that the image's
/// flash per function group (see the README) can find the alarm logic by its symbol.
#[inline(never)]
pub fn alarm_update(machine: &mut AlarmMachine, scored: &Result<Scored, ReadingFault>) -> Step {
    machine.update(scored)
}

/// What a run did.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub struct Summary {
    /// Readings that were scored.
    pub scored: u32,
    /// Readings that could not be scored.
    pub faults: u32,
}

/// A sensor node: a model (or none), the alarm state machine and the two lines.
///
/// The model is a [`FlashModel`]: a checked view of the blob in its slot (lifetime `'m`), so the
/// node holds `4 N + 48` bytes of it (at N = 5, 72 bytes on thumbv7em), never a decoded copy.
#[derive(Debug)]
pub struct Node<'m, A, F, const N: usize> {
    model: Option<FlashModel<'m, N>>,
    machine: AlarmMachine,
    alarm: Line<A>,
    fault: Line<F>,
}

struct Cause(ReadingFault);

impl fmt::Display for Cause {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.0 {
            ReadingFault::NotFinite { feature } => write!(f, "not-finite:{feature}"),
            ReadingFault::LogDomain { feature } => write!(f, "log-domain:{feature}"),
            ReadingFault::Overflow => f.write_str("overflow"),
            _ => f.write_str("other"),
        }
    }
}

impl<'m, A: OutputPin, F: OutputPin, const N: usize> Node<'m, A, F, N> {
    /// Check the slots, take the newest valid model, and drive both lines to their first levels:
    /// alarm off, and fault on if no slot holds a valid model. Reports every slot and pin.
    pub fn boot(slots: &[Slot<'m>], alarm: Line<A>, fault: Line<F>, out: &mut impl Write) -> Self {
        let chosen = slots::choose::<N>(slots, |slot, report| {
            let _ = match report {
                SlotReport::Valid { sequence, model_id } => writeln!(
                    out,
                    "slot {} valid seq={sequence} id={model_id:#010x}",
                    slot.name
                ),
                SlotReport::Unusable(e) => writeln!(out, "slot {} unusable: {e}", slot.name),
            };
        });
        let (model, machine) = match chosen {
            Some(c) => {
                let meta = c.model.meta();
                let name = slots.get(c.slot).map_or("?", |s| s.name);
                let _ = writeln!(
                    out,
                    "model slot={name} seq={} id={:#010x}",
                    meta.sequence, meta.model_id
                );
                let machine = AlarmMachine::new(c.model.thresholds(), c.model.policy());
                (Some(c.model), machine)
            }
            None => {
                let _ = writeln!(out, "model none");
                (None, AlarmMachine::without_model())
            }
        };
        let mut node = Self {
            model,
            machine,
            alarm,
            fault,
        };
        let (a, f) = (node.machine.alarm_active(), node.machine.fault().is_some());
        node.drive(a, f, None, out);
        node
    }

    /// The model in use, if any.
    pub const fn model(&self) -> Option<&FlashModel<'m, N>> {
        self.model.as_ref()
    }

    /// The reading source cannot deliver readings (an unusable table, a dead sensor bus): nothing
    /// can be scored, so the fault line goes on. The alarm line keeps its level.
    pub fn source_failed(&mut self, out: &mut impl Write) {
        let alarm = self.machine.alarm_active();
        self.drive(alarm, true, None, out);
    }

    /// The logical levels last driven: (alarm, fault).
    pub fn lines(&self) -> (Option<bool>, Option<bool>) {
        (self.alarm.is_active(), self.fault.is_active())
    }

    fn drive(&mut self, alarm: bool, fault: bool, at: Option<u32>, out: &mut impl Write) {
        // The fault line first: when both change, the alarm is never seen without its context.
        let f = self.fault.set(fault).map_err(|_| ());
        report_pin(out, "fault", f, at);
        let a = self.alarm.set(alarm).map_err(|_| ());
        report_pin(out, "alarm", a, at);
    }

    /// Score one reading, update the state machine and the lines, and report it. Returns `None`
    /// (and scores nothing) when there is no valid model.
    pub fn step(&mut self, x: &[f32; N], out: &mut impl Write) -> Option<Step> {
        let model = self.model.as_ref()?;
        let index = self.machine.next_index();
        let scored = score(model, x);
        let step = alarm_update(&mut self.machine, &scored);
        let raised = step.events.iter().any(|e| e.kind == EventKind::Raised);
        let top = if raised {
            explain(model, x).ok().map(|e| e.top().0)
        } else {
            None
        };
        let _ = write!(out, "r {index} ");
        let _ = match &scored {
            Ok(s) => write!(
                out,
                "d2={:08x} v={}",
                s.d2.to_bits(),
                match s.verdict {
                    Verdict::Above => "above",
                    Verdict::Below => "below",
                }
            ),
            Err(_) => write!(out, "d2=- v=fault"),
        };
        let _ = write!(
            out,
            " alarm={} fault={} event=",
            u8::from(step.alarm),
            u8::from(step.fault)
        );
        if step.events.is_empty() {
            let _ = out.write_char('-');
        }
        for (k, e) in step.events.iter().enumerate() {
            if k > 0 {
                let _ = out.write_char('+');
            }
            let _ = out.write_str(EventKind::name(&e.kind));
        }
        if let Some(t) = top {
            let _ = write!(out, " top={t}");
        }
        if let Err(fault) = scored {
            let _ = write!(out, " cause={}", Cause(fault));
        }
        let _ = writeln!(out);
        self.drive(step.alarm, step.fault, Some(index), out);
        Some(step)
    }

    /// Score every reading of `source` until it ends. Without a model nothing is read or scored:
    /// the fault line stays on.
    pub fn run<S: ReadingSource<N>>(&mut self, source: &mut S, out: &mut impl Write) -> Summary {
        let mut summary = Summary::default();
        if self.model.is_none() {
            let _ = writeln!(out, "not scoring: no valid model");
            return summary;
        }
        while let Some(x) = source.next_reading() {
            match self.step(&x, out) {
                Some(s) if s.fault => summary.faults += 1,
                Some(_) => summary.scored += 1,
                None => break,
            }
        }
        let _ = writeln!(
            out,
            "end scored={} faults={}",
            summary.scored, summary.faults
        );
        summary
    }

    /// Give the pins back.
    pub fn release(self) -> (A, F) {
        (self.alarm.release(), self.fault.release())
    }
}

fn report_pin(
    out: &mut impl Write,
    name: &str,
    change: Result<Option<PinChange>, ()>,
    at: Option<u32>,
) {
    let _ = match change {
        Ok(None) => return,
        Ok(Some(c)) => write!(
            out,
            "pin {name} {} level={}",
            if c.active { "on" } else { "off" },
            if c.high { "high" } else { "low" }
        ),
        Err(()) => write!(out, "pin {name} write-error"),
    };
    let _ = match at {
        Some(i) => writeln!(out, " at={i}"),
        None => writeln!(out, " at=boot"),
    };
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fixtures::{slot_image, slots_ab, table};
    use crate::pins::ActiveLevel;
    use crate::source::Table;
    use embedded_hal_mock::eh1::digital::{Mock, State, Transaction};

    fn blob_bytes(sequence: u32, raise_after: u16) -> Vec<u8> {
        slot_image(sequence, raise_after).0
    }

    #[test]
    fn alarm_and_fault_lines_follow_the_readings_on_active_low_and_high_pins() {
        // Alarm active-low: off = high. Fault active-high: off = low.
        let mut alarm = Mock::new(&[
            Transaction::set(State::High), // boot: off
            Transaction::set(State::Low),  // reading 1 raises
            Transaction::set(State::High), // reading 3 clears
        ]);
        let mut fault = Mock::new(&[
            Transaction::set(State::Low),  // boot: off
            Transaction::set(State::High), // reading 2 is a dropout
            Transaction::set(State::Low),  // reading 3 scores again
        ]);
        let a = blob_bytes(1, 1);
        let slots = [Slot {
            name: "A",
            bytes: &a,
        }];
        let mut out = String::new();
        let mut node = Node::<_, _, 2>::boot(
            &slots,
            Line::new(alarm.clone(), ActiveLevel::Low),
            Line::new(fault.clone(), ActiveLevel::High),
            &mut out,
        );
        // d² = 0, 16 (above 9, raise on 1), NaN fault, 1 (below 4, clears).
        let rows = table(&[[0.0, 0.0], [4.0, 0.0], [f32::NAN, 0.0], [1.0, 0.0]]);
        let mut src = Table::<2>::new(&rows).unwrap();
        let summary = node.run(&mut src, &mut out);
        assert_eq!(
            summary,
            Summary {
                scored: 3,
                faults: 1
            }
        );
        let lines: Vec<&str> = out.lines().collect();
        let expected = [
            "slot A valid seq=1 id=0x00000007",
            "model slot=A seq=1 id=0x00000007",
            "pin fault off level=low at=boot",
            "pin alarm off level=high at=boot",
            "r 0 d2=00000000 v=below alarm=0 fault=0 event=-",
            // 16.0f32 = 0x41800000 (IEEE-754 single: exponent 131, mantissa 0).
            "r 1 d2=41800000 v=above alarm=1 fault=0 event=raised top=0",
            "pin alarm on level=low at=1",
            "r 2 d2=- v=fault alarm=1 fault=1 event=fault cause=not-finite:0",
            "pin fault on level=high at=2",
            "r 3 d2=3f800000 v=below alarm=0 fault=0 event=fault-cleared+cleared",
            "pin fault off level=low at=3",
            "pin alarm off level=high at=3",
            "end scored=3 faults=1",
        ];
        assert_eq!(lines, expected);
        alarm.done();
        fault.done();
    }

    #[test]
    fn no_valid_slot_raises_fault_and_scores_nothing() {
        let mut alarm = Mock::new(&[Transaction::set(State::Low)]);
        let mut fault = Mock::new(&[Transaction::set(State::High)]);
        let mut torn = blob_bytes(5, 1);
        torn[20] ^= 0x40;
        let erased = vec![0xFF; 64];
        let slots = slots_ab(&torn, &erased);
        let mut out = String::new();
        let mut node = Node::<_, _, 2>::boot(
            &slots,
            Line::new(alarm.clone(), ActiveLevel::High),
            Line::new(fault.clone(), ActiveLevel::High),
            &mut out,
        );
        assert!(node.model().is_none());
        assert_eq!(node.lines(), (Some(false), Some(true)));
        let rows = table(&[[100.0, 100.0]]);
        let mut src = Table::<2>::new(&rows).unwrap();
        assert_eq!(node.run(&mut src, &mut out), Summary::default());
        assert_eq!(node.step(&[100.0, 100.0], &mut out), None);
        assert!(!out.contains("\nr "), "{out}");
        assert!(out.starts_with("slot A unusable: CRC mismatch"), "{out}");
        assert!(
            out.contains("slot B unusable: empty\nmodel none\n"),
            "{out}"
        );
        assert!(out.contains("pin fault on level=high at=boot"), "{out}");
        alarm.done();
        fault.done();
    }

    #[test]
    fn a_failed_source_turns_the_fault_line_on() {
        let mut alarm = Mock::new(&[Transaction::set(State::Low)]);
        let mut fault = Mock::new(&[Transaction::set(State::Low), Transaction::set(State::High)]);
        let a = blob_bytes(1, 1);
        let slots = [Slot {
            name: "A",
            bytes: &a,
        }];
        let mut out = String::new();
        let mut node = Node::<_, _, 2>::boot(
            &slots,
            Line::new(alarm.clone(), ActiveLevel::High),
            Line::new(fault.clone(), ActiveLevel::High),
            &mut out,
        );
        assert_eq!(node.lines(), (Some(false), Some(false)));
        node.source_failed(&mut out);
        assert_eq!(node.lines(), (Some(false), Some(true)));
        alarm.done();
        fault.done();
    }

    #[test]
    fn the_newer_slot_is_used_and_its_policy_applies() {
        // A: sequence 2, raise after 1. B: sequence 3, raise after 2. B must be used.
        let a = blob_bytes(2, 1);
        let b = blob_bytes(3, 2);
        let slots = slots_ab(&a, &b);
        let mut alarm = Mock::new(&[Transaction::set(State::Low), Transaction::set(State::High)]);
        let mut fault = Mock::new(&[Transaction::set(State::Low)]);
        let mut out = String::new();
        let mut node = Node::<_, _, 2>::boot(
            &slots,
            Line::new(alarm.clone(), ActiveLevel::High),
            Line::new(fault.clone(), ActiveLevel::High),
            &mut out,
        );
        assert_eq!(node.model().map(|m| m.meta().sequence), Some(3));
        assert!(!node.step(&[4.0, 0.0], &mut out).unwrap().alarm);
        assert!(node.step(&[0.0, 4.0], &mut out).unwrap().alarm);
        assert!(out.contains("model slot=B seq=3"), "{out}");
        assert!(out.contains("event=raised top=1\n"), "{out}");
        alarm.done();
        fault.done();
    }
}
