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
//! slot A valid seq=3 id=0x00000abc crc=0x1c291ca3 mark=confirmed   (or: slot B unusable: <reason>)
//! slot B tie with A: ...; A used (rule: ...)  (only when two valid slots cannot be ordered)
//! model slot=A seq=3 id=0x00000abc crc=0x1c291ca3 mark=confirmed   (or: model none)
//! probation slot=B readings=60 fallback=A     (an unconfirmed model with another valid slot)
//! pin fault off level=low at=boot             (every change of a pin: line, logical, electrical, reading)
//! r 12 d2=40490fdb v=above alarm=1 fault=0 event=raised top=3
//! r 13 d2=- v=fault alarm=1 fault=1 event=fault cause=not-finite:2
//! r 14 d2=3f800000 v=below mode=1 alarm=0 fault=0 event=- drift=0    (a model bank)
//! probation passed slot=B at=0: ...          (the first scored reading of a model on probation)
//! fallback from=B at=59: ...                 (or: every reading of its probation faulted; then
//! model slot=A ... fallback=1                 the slots again, and the model fallen back to)
//! end scored=1440 faults=9
//! ```
//!
//! `crc` is the blob's CRC-32, the model's identity: two models that differ in any byte differ
//! there, where `id` (the trainer's model id) may not. See [`crate::slots`] for the slot rules.
//!
//! `d2` is the bit pattern of the f32 d² as 8 hex digits, `alarm` and `fault` the logical levels
//! after the reading, `event` the state machine's events joined with `+` (`-` for none), and `top`
//! (on a raised alarm only) the feature with the largest contribution to d².
//!
//! A model bank (format version 2, see [`crate::slots::SlotModel::Bank`]) is scored through the
//! core's `Tracker` (window, mode, alarm machine, drift), and its lines carry two more fields:
//! `mode`, the mode the reading was scored against (`-` on a fault), and `drift`, 1 once the drift
//! shift has reached its bound on some feature since the model was loaded (its first reading at
//! the bound also carries the event `drift`). Its model line adds the bank's shape: `modes=`,
//! `select=` (nearest or known), `window=`, `differences=` and `drift=`. `top` of a bank may name
//! a difference feature: index `N + i` is feature `i`'s first difference. A single model's lines
//! are as they were before banks.

use core::fmt::{self, Write};

use ellipsoid_core::track::{TrackStep, Tracker};
use ellipsoid_core::{AlarmMachine, EventKind, Explained, ReadingFault, Scored, Step, Verdict};
use embedded_hal::digital::OutputPin;

use crate::pins::{Line, PinChange};
use crate::slots::{self, Chosen, Probation, Slot, SlotModel, SlotReport, TieKind, Watch};
use crate::source::ReadingSource;

/// Score one reading. Kept out of line so that the image check for panic machinery (see the
/// README) can find the scoring path by its symbol.
#[inline(never)]
pub fn score<const N: usize, const T: usize, const D: usize>(
    model: &SlotModel<'_, N, T, D>,
    x: &[f32; N],
) -> Result<Scored, ReadingFault> {
    model.score(x)
}

/// Score a reading and split d² per feature (only on a raised alarm). Out of line, as [`score`].
#[inline(never)]
pub fn explain<const N: usize, const T: usize, const D: usize>(
    model: &SlotModel<'_, N, T, D>,
    x: &[f32; N],
) -> Result<Explained<N>, ReadingFault> {
    model.explain(x)
}

/// One reading of a model bank through its tracker: window, mode, score, alarm machine and
/// drift; and, on a reading that raises the alarm, the feature of the chosen mode with the
/// largest contribution to d² (`top`). Out of line, as [`score`], so that the image checks (panic
/// machinery, flash per group) find the bank's path.
///
/// The contributions are computed only when the alarm is raised, as for a single model: the
/// tracker keeps the last scored vector, and `Tracker::top_last` splits it after the step (the
/// same bits `Tracker::step_explained` gives), so neither a copy of the tracker nor a second
/// step is needed. Computing the split (in `f64`) on every reading would cost about ten times
/// the step.
#[inline(never)]
pub fn track<const N: usize, const M: usize>(
    tracker: &mut Tracker<'_, N, M>,
    x: &[f32; N],
    mode: Option<u8>,
) -> (TrackStep<M>, Option<usize>) {
    let step = tracker.step(x, mode);
    let raised = step.step.events.iter().any(|e| e.kind == EventKind::Raised);
    let top = if raised { explain_bank(tracker) } else { None };
    (step, top)
}

/// The chosen mode's largest contribution on the tracker's last reading, by the core's rule
/// (`Explained::top`, as the host's replay picks it). Out of line, as [`explain`].
#[inline(never)]
fn explain_bank<const N: usize, const M: usize>(tracker: &Tracker<'_, N, M>) -> Option<usize> {
    tracker.top_last()
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
/// The model is a [`SlotModel`]: an `f32` model is a checked view of the blob in its slot
/// (lifetime `'m`, `4 N + 48` bytes of it in RAM), never a decoded copy; a fixed-point model has
/// no in-flash form and is a RAM copy of its parameters; a bank is a checked view too, scored
/// through a `Tracker` the node keeps beside it (the window's ring, the alarm machine and the
/// drift shift). The enum takes the largest of them (the fixed model is 88 bytes at N = 5, see
/// `slots::SlotModel`). `T` must be `ellipsoid_core::tri(N)`: the fixed-point model's
/// coefficient count (checked at compile time). `D` is the scored length of a bank with
/// differences the build holds, `2 N`; any other value refuses such banks.
#[derive(Debug)]
pub struct Node<'m, A, F, const N: usize, const T: usize, const D: usize> {
    model: Option<SlotModel<'m, N, T, D>>,
    /// The alarm machine of a single model (a bank's is in its tracker).
    machine: AlarmMachine,
    /// The tracker of a bank.
    tracks: Option<Tracks<'m, N, D>>,
    alarm: Line<A>,
    fault: Line<F>,
    /// The slot in use, its blob's length, and the probation of its model.
    slot: Option<(usize, usize)>,
    probation: Probation,
    /// Readings scored by models before the current one (after a fall-back), so that reading
    /// indices run on.
    index_base: u32,
}

/// Write what [`slots::choose`] found in one slot.
fn report_slot(out: &mut impl Write, slots: &[Slot<'_>], slot: &Slot<'_>, report: &SlotReport) {
    let _ = match report {
        SlotReport::Valid {
            sequence,
            model_id,
            crc,
            mark,
        } => writeln!(
            out,
            "slot {} valid seq={sequence} id={model_id:#010x} crc={crc:#010x} mark={mark}",
            slot.name
        ),
        SlotReport::Unusable(e) => writeln!(out, "slot {} unusable: {e}", slot.name),
        SlotReport::Tie {
            other,
            sequences: (mine, theirs),
            why,
            won,
        } => {
            let other = slots.get(*other).map_or("?", |s| s.name);
            let _ = match why {
                TieKind::EqualSequence => write!(
                    out,
                    "slot {} tie with {other}: both seq={mine}, different models",
                    slot.name
                ),
                TieKind::Undefined => write!(
                    out,
                    "slot {} tie with {other}: seq={mine} and seq={theirs} are 2^31 apart, order undefined (RFC 1982)",
                    slot.name
                ),
            };
            writeln!(
                out,
                "; {} used (rule: a confirmed model first, then the first slot)",
                if *won { slot.name } else { other }
            )
        }
    };
}

/// The tracker of a bank, of either scored length.
#[derive(Debug)]
enum Tracks<'m, const N: usize, const D: usize> {
    /// `M = N`.
    Plain(Tracker<'m, N, N>),
    /// `M = D = 2 N` (differences).
    Diff(Tracker<'m, N, D>),
}

impl<const N: usize, const D: usize> Tracks<'_, N, D> {
    fn alarm(&self) -> &AlarmMachine {
        match self {
            Tracks::Plain(t) => t.alarm(),
            Tracks::Diff(t) => t.alarm(),
        }
    }

    /// One reading: what the log line needs.
    fn step(&mut self, x: &[f32; N], mode: Option<u8>) -> BankLine {
        match self {
            Tracks::Plain(t) => BankLine::of(track(t, x, mode)),
            Tracks::Diff(t) => BankLine::of(track(t, x, mode)),
        }
    }
}

/// A bank's reading, with the dimension `M` erased.
struct BankLine {
    score: Result<(u8, Scored), ReadingFault>,
    step: Step,
    /// The feature (of the scored vector) with the largest contribution, on a raised alarm.
    top: Option<usize>,
    drift_at_bound: bool,
}

impl BankLine {
    fn of<const M: usize>((t, top): (TrackStep<M>, Option<usize>)) -> Self {
        let score = t.score.map(|b| {
            (
                b.mode,
                Scored {
                    d2: b.d2,
                    verdict: b.verdict,
                },
            )
        });
        Self {
            score,
            step: t.step,
            top,
            drift_at_bound: t.drift_at_bound,
        }
    }
}

struct Cause(ReadingFault);

impl fmt::Display for Cause {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.0 {
            ReadingFault::NotFinite { feature } => write!(f, "not-finite:{feature}"),
            ReadingFault::LogDomain { feature } => write!(f, "log-domain:{feature}"),
            ReadingFault::Overflow => f.write_str("overflow"),
            ReadingFault::WindowFilling { missing } => write!(f, "window-filling:{missing}"),
            ReadingFault::UnknownMode { given: Some(k) } => write!(f, "unknown-mode:{k}"),
            ReadingFault::UnknownMode { given: None } => f.write_str("unknown-mode:-"),
            _ => f.write_str("other"),
        }
    }
}

/// Write one reading's line. `mode` and `drift` are `Some` for a bank only (`mode` then holds
/// the chosen mode, `None` on a fault), so a single model's line is as it was before banks.
#[allow(clippy::too_many_arguments)]
fn report_reading(
    out: &mut impl Write,
    index: u32,
    scored: &Result<Scored, ReadingFault>,
    mode: Option<Option<u8>>,
    step: &Step,
    drift: Option<bool>,
    top: Option<usize>,
) {
    let _ = write!(out, "r {index} ");
    let _ = match scored {
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
    let _ = match mode {
        Some(Some(k)) => write!(out, " mode={k}"),
        Some(None) => write!(out, " mode=-"),
        None => Ok(()),
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
    if let Some(d) = drift {
        let _ = write!(out, " drift={}", u8::from(d));
    }
    if let Some(t) = top {
        let _ = write!(out, " top={t}");
    }
    if let Err(fault) = scored {
        let _ = write!(out, " cause={}", Cause(*fault));
    }
    let _ = writeln!(out);
}

impl<'m, A: OutputPin, F: OutputPin, const N: usize, const T: usize, const D: usize>
    Node<'m, A, F, N, T, D>
{
    /// Check the slots, take the newest valid model, and drive both lines to their first levels:
    /// alarm off, and fault on if no slot holds a valid model. Reports every slot and pin.
    ///
    /// Out of line: the slot check's temporaries (the chosen model, the node being built) are
    /// then on the stack only during boot, not in the frame of the scoring loop that follows.
    #[inline(never)]
    pub fn boot(slots: &[Slot<'m>], alarm: Line<A>, fault: Line<F>, out: &mut impl Write) -> Self {
        const { assert!(T == ellipsoid_core::tri(N), "T must be tri(N)") };
        let chosen =
            slots::choose::<N, T, D>(slots, None, |slot, r| report_slot(out, slots, slot, r));
        let mut node = Self {
            model: None,
            machine: AlarmMachine::without_model(),
            tracks: None,
            alarm,
            fault,
            slot: None,
            probation: Probation::none(),
            index_base: 0,
        };
        node.take(chosen, slots, false, out);
        let (a, f) = (node.alarm().alarm_active(), node.alarm().fault().is_some());
        node.drive(a, f, None, out);
        node
    }

    /// Put the chosen model (or none) in use, and report it.
    fn take(
        &mut self,
        chosen: Option<Chosen<'m, N, T, D>>,
        slots: &[Slot<'m>],
        fell_back: bool,
        out: &mut impl Write,
    ) {
        let name = |i: usize| slots.get(i).map_or("?", |s| s.name);
        // A bank's tracker (its check at load built one, so this cannot fail; if it did, the node
        // would take no model rather than score one it cannot track).
        let tracks = match chosen.as_ref().map(|c| &c.model) {
            Some(SlotModel::Bank(b)) => Tracker::new(*b).ok().map(Tracks::Plain),
            Some(SlotModel::BankDiff(b)) => Tracker::new(*b).ok().map(Tracks::Diff),
            _ => None,
        };
        let chosen = chosen.filter(|c| !c.model.is_bank() || tracks.is_some());
        self.tracks = tracks;
        let Some(c) = chosen else {
            let _ = writeln!(out, "model none");
            self.model = None;
            self.machine = AlarmMachine::without_model();
            self.slot = None;
            self.probation = Probation::none();
            return;
        };
        let meta = c.model.meta();
        let _ = write!(
            out,
            "model slot={} seq={} id={:#010x} crc={:#010x} mark={}{}",
            name(c.slot),
            meta.sequence,
            meta.model_id,
            c.crc,
            c.mark,
            if c.model.is_fixed() {
                " arith=fixed"
            } else {
                ""
            },
        );
        let shape = match &c.model {
            SlotModel::Bank(b) => Some((b.modes(), b.select(), b.window(), b.has_drift())),
            SlotModel::BankDiff(b) => Some((b.modes(), b.select(), b.window(), b.has_drift())),
            _ => None,
        };
        if let Some((k, select, window, drift)) = shape {
            let _ = write!(
                out,
                " modes={k} select={} window={} differences={} drift={}",
                select.name(),
                window.length,
                u8::from(window.differences),
                u8::from(drift)
            );
        }
        let _ = writeln!(out, "{}", if fell_back { " fallback=1" } else { "" });
        // A model taken in a fall-back is not put on probation again: the node does not bounce.
        self.probation = if fell_back {
            Probation::none()
        } else {
            Probation::for_chosen(c.mark, c.fallback)
        };
        if let (true, Some(f)) = (self.probation.active(), c.fallback) {
            let _ = writeln!(
                out,
                "probation slot={} readings={} fallback={}",
                name(c.slot),
                slots::PROBATION_READINGS,
                name(f)
            );
        }
        self.machine = AlarmMachine::new(c.model.thresholds(), c.model.policy());
        self.model = Some(c.model);
        self.slot = Some((c.slot, c.blob_len));
    }

    /// The model in use, if any.
    pub const fn model(&self) -> Option<&SlotModel<'m, N, T, D>> {
        self.model.as_ref()
    }

    /// The alarm machine in use: the single model's, or the bank's tracker's.
    fn alarm(&self) -> &AlarmMachine {
        self.tracks.as_ref().map_or(&self.machine, Tracks::alarm)
    }

    /// The reading source cannot deliver readings (an unusable table, a dead sensor bus): nothing
    /// can be scored, so the fault line goes on. The alarm line keeps its level.
    pub fn source_failed(&mut self, out: &mut impl Write) {
        let alarm = self.alarm().alarm_active();
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
        self.step_with_mode(x, None, out)
    }

    /// [`Node::step`] with the mode the machine's controller gave with the reading, for a
    /// known-mode bank (every other model ignores it).
    pub fn step_with_mode(
        &mut self,
        x: &[f32; N],
        mode: Option<u8>,
        out: &mut impl Write,
    ) -> Option<Step> {
        let model = self.model.as_ref()?;
        if let Some(t) = self.tracks.as_mut() {
            let index = self.index_base + t.alarm().next_index();
            let line = t.step(x, mode);
            let scored = line.score.map(|(_, s)| s);
            report_reading(
                out,
                index,
                &scored,
                Some(line.score.ok().map(|(k, _)| k)),
                &line.step,
                Some(line.drift_at_bound),
                line.top,
            );
            self.drive(line.step.alarm, line.step.fault, Some(index), out);
            return Some(line.step);
        }
        let index = self.index_base + self.machine.next_index();
        let scored = score(model, x);
        let step = alarm_update(&mut self.machine, &scored);
        let raised = step.events.iter().any(|e| e.kind == EventKind::Raised);
        let top = if raised {
            explain(model, x).ok().map(|e| e.top().0)
        } else {
            None
        };
        report_reading(out, index, &scored, None, &step, None, top);
        self.drive(step.alarm, step.fault, Some(index), out);
        Some(step)
    }

    /// Score every reading of `source` until it ends. Without a model nothing is read or scored:
    /// the fault line stays on. A model on probation has nothing to fall back to here: use
    /// [`Node::run_with_fallback`] with the slots it was booted from.
    pub fn run<S: ReadingSource<N>>(&mut self, source: &mut S, out: &mut impl Write) -> Summary {
        self.run_with_fallback(&[], source, out)
    }

    /// [`Node::run`], falling back to another of `slots` (those given to [`Node::boot`]) when an
    /// unconfirmed model faults on every reading of its probation.
    pub fn run_with_fallback<S: ReadingSource<N>>(
        &mut self,
        slots: &[Slot<'m>],
        source: &mut S,
        out: &mut impl Write,
    ) -> Summary {
        let mut summary = Summary::default();
        if self.model.is_none() {
            let _ = writeln!(out, "not scoring: no valid model");
            return summary;
        }
        while let Some((x, mode)) = source.next_with_mode() {
            let at = self.index_base + self.alarm().next_index();
            let faulted = match self.step_with_mode(&x, mode, out) {
                Some(s) if s.fault => {
                    summary.faults += 1;
                    true
                }
                Some(_) => {
                    summary.scored += 1;
                    false
                }
                None => break,
            };
            match self.probation.observe(faulted) {
                Watch::Keep => {}
                Watch::Passed => self.passed(slots, at, out),
                Watch::FallBack => self.fall_back(slots, at, out),
            }
        }
        let _ = writeln!(
            out,
            "end scored={} faults={}",
            summary.scored, summary.faults
        );
        summary
    }

    /// The model on probation scored reading `at`: say where its confirmation mark goes. Out of
    /// line, as [`Node::fall_back`], so that the scoring loop's frame does not grow by it.
    #[inline(never)]
    fn passed(&mut self, slots: &[Slot<'_>], at: u32, out: &mut impl Write) {
        let Some((slot, len)) = self.slot else { return };
        let _ = writeln!(
            out,
            "probation passed slot={} at={at}: to confirm it, program the word {:#010x} at offset {} of the slot (this firmware does not write flash)",
            slots.get(slot).map_or("?", |s| s.name),
            slots::CONFIRM_MARK,
            slots::mark_offset(len)
        );
    }

    /// The model on probation faulted on every reading up to `at`: take the best other slot.
    /// Out of line: the slot check's frame (a decoded model among it) is then on the stack only
    /// while it runs, not under every score of the loop.
    #[inline(never)]
    fn fall_back(&mut self, slots: &[Slot<'m>], at: u32, out: &mut impl Write) {
        let from = self.slot.map(|(i, _)| i);
        let _ = writeln!(
            out,
            "fallback from={} at={at}: unconfirmed, it faulted on all {} readings of its probation",
            from.and_then(|i| slots.get(i)).map_or("?", |s| s.name),
            slots::PROBATION_READINGS
        );
        let chosen =
            slots::choose::<N, T, D>(slots, from, |slot, r| report_slot(out, slots, slot, r));
        if chosen.is_none() {
            let _ = writeln!(
                out,
                "fallback impossible: no other valid slot; keeping the model"
            );
            return;
        }
        self.index_base = at + 1;
        self.take(chosen, slots, true, out);
        let (a, f) = (self.alarm().alarm_active(), self.alarm().fault().is_some());
        self.drive(a, f, Some(at), out);
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
    use ellipsoid_core::blob;
    use embedded_hal_mock::eh1::digital::{Mock, State, Transaction};

    fn blob_bytes(sequence: u32, raise_after: u16) -> Vec<u8> {
        slot_image(sequence, raise_after).0
    }

    /// Boot a 2-feature node on `slots` with both lines active-high on (clones of) the mocks.
    fn boot_active_high<'m>(
        slots: &[Slot<'m>],
        alarm: &Mock,
        fault: &Mock,
        out: &mut String,
    ) -> Node<'m, Mock, Mock, 2, 3, 4> {
        Node::boot(
            slots,
            Line::new(alarm.clone(), ActiveLevel::High),
            Line::new(fault.clone(), ActiveLevel::High),
            out,
        )
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
        let mut node = Node::<_, _, 2, 3, 4>::boot(
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
        let crc = crate::fixtures::image_crc(1, 1);
        let slot_line =
            format!("slot A valid seq=1 id=0x00000007 crc={crc:#010x} mark=unconfirmed");
        let model_line =
            format!("model slot=A seq=1 id=0x00000007 crc={crc:#010x} mark=unconfirmed");
        let expected = [
            &slot_line,
            &model_line,
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
        let mut node = boot_active_high(&slots, &alarm, &fault, &mut out);
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
        let mut node = boot_active_high(&slots, &alarm, &fault, &mut out);
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
        let mut node = boot_active_high(&slots, &alarm, &fault, &mut out);
        assert_eq!(node.model().map(|m| m.meta().sequence), Some(3));
        assert!(!node.step(&[4.0, 0.0], &mut out).unwrap().alarm);
        assert!(node.step(&[0.0, 4.0], &mut out).unwrap().alarm);
        assert!(out.contains("model slot=B seq=3"), "{out}");
        assert!(out.contains("event=raised top=1\n"), "{out}");
        alarm.done();
        fault.done();
    }

    /// A slot image of a 2-feature model whose feature 0 is log-transformed: it faults (log
    /// domain) on every reading whose feature 0 is not positive, where `slot_image`'s model scores.
    fn log_image(sequence: u32) -> Vec<u8> {
        let mut p = crate::fixtures::params(sequence, 1);
        p.preprocess.log_mask = 1;
        crate::fixtures::image_of(&p).0
    }

    #[test]
    fn an_unconfirmed_model_that_faults_on_every_reading_falls_back_and_says_so() {
        let n = slots::PROBATION_READINGS as usize;
        let a = blob_bytes(1, 1);
        let b = log_image(2);
        let slots = slots_ab(&a, &b);
        let alarm = Mock::new(&[Transaction::set(State::Low)]);
        let fault = Mock::new(&[
            Transaction::set(State::Low),  // boot
            Transaction::set(State::High), // B faults on reading 0
            Transaction::set(State::Low),  // fallback to A after reading n - 1
        ]);
        let mut out = String::new();
        let mut node = boot_active_high(&slots, &alarm, &fault, &mut out);
        assert_eq!(node.model().map(|m| m.meta().sequence), Some(2));
        // Feature 0 negative: B cannot take its log; A scores d² = 1 + 0.
        let rows = table(&vec![[-1.0, 0.0]; n + 2]);
        let mut src = Table::<2>::new(&rows).unwrap();
        let summary = node.run_with_fallback(&slots, &mut src, &mut out);
        assert_eq!(
            summary,
            Summary {
                scored: 2,
                faults: n as u32
            },
            "{out}"
        );
        assert_eq!(node.model().map(|m| m.meta().sequence), Some(1));
        assert!(
            out.contains(&format!("probation slot=B readings={n} fallback=A\n")),
            "{out}"
        );
        let last = n - 1;
        assert!(
            out.contains(&format!(
                "r {last} d2=- v=fault alarm=0 fault=1 event=- cause=log-domain:0\n\
                 fallback from=B at={last}: unconfirmed, it faulted on all {n} readings of its probation\n\
                 slot A valid seq=1"
            )),
            "{out}"
        );
        assert!(
            out.contains(" fallback=1\npin fault off level=low at="),
            "{out}"
        );
        // The reading indices run on, and A (no probation) scores them.
        assert!(
            out.contains(&format!("\nr {n} d2=3f800000 v=below alarm=0 fault=0")),
            "{out}"
        );
        assert!(!out.contains("probation passed"), "{out}");
        alarm.clone().done();
        fault.clone().done();
    }

    #[test]
    fn an_unconfirmed_model_that_scores_passes_its_probation_and_a_confirmed_one_has_none() {
        let a = blob_bytes(1, 1);
        let (mut b, len) = slot_image(2, 1);
        let at = slots::mark_offset(len);
        for marked in [false, true] {
            if marked {
                b[at..at + 4].copy_from_slice(&slots::CONFIRM_MARK.to_le_bytes());
            }
            let slots = slots_ab(&a, &b);
            let mut alarm = Mock::new(&[Transaction::set(State::Low)]);
            let mut fault = Mock::new(&[Transaction::set(State::Low)]);
            let mut out = String::new();
            let mut node = boot_active_high(&slots, &alarm, &fault, &mut out);
            let rows = table(&[[1.0, 0.0], [0.0, 1.0]]);
            let mut src = Table::<2>::new(&rows).unwrap();
            let _ = node.run_with_fallback(&slots, &mut src, &mut out);
            assert!(out.contains("model slot=B seq=2"), "{out}");
            let passed = format!(
                "probation passed slot=B at=0: to confirm it, program the word 0x464e4f43 at offset {at} of the slot"
            );
            if marked {
                assert!(out.contains("mark=confirmed\n"), "{out}");
                assert!(!out.contains("probation"), "{out}");
            } else {
                assert!(
                    out.contains("mark=unconfirmed\nprobation slot=B readings="),
                    "{out}"
                );
                assert!(out.contains(&passed), "{out}");
                assert_eq!(out.matches("probation passed").count(), 1, "{out}");
            }
            alarm.done();
            fault.done();
        }
        // "CONF" in flash, little-endian.
        assert_eq!(slots::CONFIRM_MARK.to_le_bytes(), *b"CONF");
    }

    #[test]
    fn a_fixed_point_blob_is_scored_in_integers_with_the_same_lines_alarm_and_explain() {
        use ellipsoid_core::{tri, FixedModel};
        let (a, len) = crate::fixtures::fixed_image(1, 1);
        let reference = FixedModel::<2, { tri(2) }>::from_blob(&a[..len]).unwrap();
        let slots = [Slot {
            name: "A",
            bytes: &a,
        }];
        let mut alarm = Mock::new(&[
            Transaction::set(State::Low),  // boot: off
            Transaction::set(State::High), // reading 1 raises
            Transaction::set(State::Low),  // reading 3 clears
            Transaction::set(State::High), // reading 4 (saturated) raises
        ]);
        let mut fault = Mock::new(&[
            Transaction::set(State::Low),  // boot: off
            Transaction::set(State::High), // reading 2 is not finite
            Transaction::set(State::Low),  // reading 3 scores again
        ]);
        let mut out = String::new();
        let mut node = boot_active_high(&slots, &alarm, &fault, &mut out);
        assert!(node.model().is_some_and(|m| m.is_fixed()));
        // Far outside the model: the deviation leaves 16 bits, and saturates into an alarm.
        let readings = [
            [0.0, 0.0],
            [4.0, 0.0],
            [f32::NAN, 0.0],
            [1.0, 0.0],
            [0.0, 1.0e6],
        ];
        let rows = table(&readings);
        let mut src = Table::<2>::new(&rows).unwrap();
        let summary = node.run(&mut src, &mut out);
        assert_eq!(
            summary,
            Summary {
                scored: 4,
                faults: 1
            }
        );
        let bits = |x: &[f32; 2]| reference.score_f32(x).unwrap().d2.to_bits();
        // The identity model quantises exactly (shift 11, exponent 25): 16 and 1 as in f32.
        assert_eq!(bits(&readings[1]), 16.0f32.to_bits());
        assert_eq!(bits(&readings[3]), 1.0f32.to_bits());
        assert_eq!(bits(&readings[4]), f32::MAX.to_bits());
        let crc = blob::checksum(&a[..len - blob::CRC_LEN]);
        let lines: Vec<&str> = out.lines().collect();
        let expected = [
            format!("slot A valid seq=1 id=0x00000007 crc={crc:#010x} mark=unconfirmed"),
            format!(
                "model slot=A seq=1 id=0x00000007 crc={crc:#010x} mark=unconfirmed arith=fixed"
            ),
            "pin fault off level=low at=boot".into(),
            "pin alarm off level=low at=boot".into(),
            format!(
                "r 0 d2={:08x} v=below alarm=0 fault=0 event=-",
                bits(&readings[0])
            ),
            format!(
                "r 1 d2={:08x} v=above alarm=1 fault=0 event=raised top=0",
                bits(&readings[1])
            ),
            "pin alarm on level=high at=1".into(),
            "r 2 d2=- v=fault alarm=1 fault=1 event=fault cause=not-finite:0".into(),
            "pin fault on level=high at=2".into(),
            format!(
                "r 3 d2={:08x} v=below alarm=0 fault=0 event=fault-cleared+cleared",
                bits(&readings[3])
            ),
            "pin fault off level=low at=3".into(),
            "pin alarm off level=low at=3".into(),
            // A saturated reading has no split per feature: the alarm is raised without `top`.
            "r 4 d2=7f7fffff v=above alarm=1 fault=0 event=raised".into(),
            "pin alarm on level=high at=4".into(),
            "end scored=4 faults=1".into(),
        ];
        assert_eq!(lines, expected);
        alarm.done();
        fault.done();
    }

    use ellipsoid_core::bank::ModeSelect;
    use ellipsoid_core::window::WindowSpec;

    /// A pin that takes any level: for runs whose pin changes are checked in the log.
    #[derive(Debug)]
    struct AnyPin;

    impl embedded_hal::digital::ErrorType for AnyPin {
        type Error = core::convert::Infallible;
    }

    impl OutputPin for AnyPin {
        fn set_low(&mut self) -> Result<(), Self::Error> {
            Ok(())
        }
        fn set_high(&mut self) -> Result<(), Self::Error> {
            Ok(())
        }
    }

    /// Boot a 2-feature node whose banks with differences hold `D` values, on free pins.
    fn free_boot<'m, const D: usize>(
        slots: &[Slot<'m>],
        out: &mut String,
    ) -> Node<'m, AnyPin, AnyPin, 2, 3, D> {
        Node::boot(
            slots,
            Line::new(AnyPin, ActiveLevel::High),
            Line::new(AnyPin, ActiveLevel::High),
            out,
        )
    }

    /// The `r` lines of a log.
    fn reading_lines(out: &str) -> Vec<&str> {
        out.lines().filter(|l| l.starts_with("r ")).collect()
    }

    /// A 2-feature reading table whose rows carry modes (`source::NO_MODE` for none).
    fn mode_table(rows: &[([f32; 2], u32)]) -> Vec<u8> {
        let mut b = crate::source::table_header_modes(2, rows.len() as u32).to_vec();
        for (x, m) in rows {
            for v in x {
                b.extend_from_slice(&v.to_le_bytes());
            }
            b.extend_from_slice(&m.to_le_bytes());
        }
        b
    }

    fn one_slot(bytes: &[u8]) -> [Slot<'_>; 1] {
        [Slot { name: "A", bytes }]
    }

    #[test]
    fn a_nearest_mode_bank_logs_each_readings_mode_and_matches_the_cores_tracker() {
        let (a, len) =
            crate::fixtures::bank_image::<2>(1, 2, ModeSelect::Nearest, WindowSpec::single(), None);
        let slots = one_slot(&a);
        // Mode 0 is centred at 0, mode 1 at 10: 5 is 25 from both (a tie: the lowest mode), and
        // above both alarms (9), so it raises; 11 is mode 1's, and clears.
        let readings = [
            [0.0, 0.0],
            [10.0, 1.0],
            [5.0, 0.0],
            [11.0, 0.0],
            [f32::NAN, 0.0],
        ];
        let mut reference = ellipsoid_core::track::Tracker::<2, 2>::from_blob(&a[..len]).unwrap();
        let want: Vec<_> = readings
            .iter()
            .map(|x| {
                let s = reference.step(x, None);
                s.score.map(|b| (b.mode, b.d2.to_bits())).ok()
            })
            .collect();
        let one = 1.0f32.to_bits();
        assert_eq!(
            want,
            [
                Some((0, 0)),
                Some((1, one)),
                Some((0, 25.0f32.to_bits())),
                Some((1, one)),
                None
            ]
        );
        let rows = table(&readings);
        let mut src = Table::<2>::new(&rows).unwrap();
        let mut alarm = Mock::new(&[
            Transaction::set(State::Low),
            Transaction::set(State::High),
            Transaction::set(State::Low),
        ]);
        let mut fault = Mock::new(&[Transaction::set(State::Low), Transaction::set(State::High)]);
        let mut out = String::new();
        let mut node = Node::<_, _, 2, 3, 4>::boot(
            &slots,
            Line::new(alarm.clone(), ActiveLevel::High),
            Line::new(fault.clone(), ActiveLevel::High),
            &mut out,
        );
        assert!(node.model().is_some_and(|m| m.is_bank()), "{out}");
        let summary = node.run(&mut src, &mut out);
        assert_eq!(
            summary,
            Summary {
                scored: 4,
                faults: 1
            }
        );
        let crc = blob::checksum(&a[..len - blob::CRC_LEN]);
        assert!(
            out.contains(&format!(
                "model slot=A seq=1 id=0x00000008 crc={crc:#010x} mark=unconfirmed modes=2 select=nearest window=1 differences=0 drift=0\n"
            )),
            "{out}"
        );
        assert_eq!(
            reading_lines(&out),
            [
                "r 0 d2=00000000 v=below mode=0 alarm=0 fault=0 event=- drift=0",
                "r 1 d2=3f800000 v=below mode=1 alarm=0 fault=0 event=- drift=0",
                // 25.0f32 = 0x41c80000.
                "r 2 d2=41c80000 v=above mode=0 alarm=1 fault=0 event=raised drift=0 top=0",
                "r 3 d2=3f800000 v=below mode=1 alarm=0 fault=0 event=cleared drift=0",
                "r 4 d2=- v=fault mode=- alarm=0 fault=1 event=fault drift=0 cause=not-finite:0",
            ],
            "{out}"
        );
        alarm.done();
        fault.done();
    }

    #[test]
    fn a_known_mode_bank_takes_the_mode_from_the_table_and_faults_until_its_window_is_whole() {
        let w = WindowSpec {
            length: 2,
            differences: false,
        };
        let (a, _) = crate::fixtures::bank_image::<2>(1, 2, ModeSelect::Known, w, None);
        let slots = one_slot(&a);
        let mut out = String::new();
        let mut node = free_boot::<4>(&slots, &mut out);
        let none = crate::source::NO_MODE;
        let rows = mode_table(&[
            ([0.0, 0.0], 0),     // the window fills
            ([2.0, 0.0], 0),     // mean (1, 0) against mode 0
            ([10.0, 0.0], 1),    // a change of mode restarts the window
            ([10.0, 0.0], 1),    // mean (10, 0) against mode 1
            ([10.0, 0.0], none), // no mode: a fault, not a restart
            ([12.0, 0.0], 7),    // no such mode
            ([12.0, 0.0], 1), // mean (12, 0): a reading without a valid mode still enters the window
        ]);
        let mut src = Table::<2>::new(&rows).unwrap();
        let summary = node.run(&mut src, &mut out);
        assert_eq!(
            summary,
            Summary {
                scored: 3,
                faults: 4
            },
            "{out}"
        );
        assert_eq!(
            reading_lines(&out),
            [
                "r 0 d2=- v=fault mode=- alarm=0 fault=1 event=fault drift=0 cause=window-filling:1",
                "r 1 d2=3f800000 v=below mode=0 alarm=0 fault=0 event=fault-cleared drift=0",
                "r 2 d2=- v=fault mode=- alarm=0 fault=1 event=fault drift=0 cause=window-filling:1",
                "r 3 d2=00000000 v=below mode=1 alarm=0 fault=0 event=fault-cleared drift=0",
                "r 4 d2=- v=fault mode=- alarm=0 fault=1 event=fault drift=0 cause=unknown-mode:-",
                "r 5 d2=- v=fault mode=- alarm=0 fault=1 event=fault drift=0 cause=unknown-mode:7",
                "r 6 d2=40800000 v=below mode=1 alarm=0 fault=0 event=fault-cleared drift=0",
            ],
            "{out}"
        );
    }

    #[test]
    fn drift_follows_a_normal_reading_to_its_bound_and_says_so_once() {
        let (a, _) = crate::fixtures::bank_image::<2>(
            1,
            1,
            ModeSelect::Nearest,
            WindowSpec::single(),
            Some((0.5, 1.0)),
        );
        let slots = one_slot(&a);
        let mut out = String::new();
        let mut node = free_boot::<4>(&slots, &mut out);
        assert!(
            out.contains(" modes=1 select=nearest window=1 differences=0 drift=1\n"),
            "{out}"
        );
        // d² = 9, not above 9: normal, so the centre moves half way, 1.5, past its bound 1.
        node.step(&[3.0, 0.0], &mut out);
        // Then (3 − 1)² = 4: the shift stays at its bound, and the event is not repeated.
        node.step(&[3.0, 0.0], &mut out);
        assert_eq!(
            reading_lines(&out),
            [
                "r 0 d2=41100000 v=below mode=0 alarm=0 fault=0 event=drift drift=1",
                "r 1 d2=40800000 v=below mode=0 alarm=0 fault=0 event=- drift=1",
            ],
            "{out}"
        );
    }

    #[test]
    fn a_bank_with_differences_needs_a_build_that_holds_two_n_and_a_fixed_point_bank_is_refused() {
        let w = WindowSpec {
            length: 1,
            differences: true,
        };
        let (a, _) = crate::fixtures::bank_image::<4>(1, 1, ModeSelect::Nearest, w, None);
        let slots = one_slot(&a);
        let mut out = String::new();
        let mut node = free_boot::<4>(&slots, &mut out);
        assert!(
            matches!(node.model(), Some(SlotModel::BankDiff(_))),
            "{out}"
        );
        assert!(out.contains(" differences=1 drift=0\n"), "{out}");
        // Differences need two readings; then (x, Δx) = (1, 0, 1 − 0, 0): d² = 2.
        node.step(&[0.0, 0.0], &mut out);
        node.step(&[1.0, 0.0], &mut out);
        assert_eq!(
            reading_lines(&out),
            [
                "r 0 d2=- v=fault mode=- alarm=0 fault=1 event=fault drift=0 cause=window-filling:1",
                "r 1 d2=40000000 v=below mode=0 alarm=0 fault=0 event=fault-cleared drift=0",
            ],
            "{out}"
        );
        // A build of D = N cannot hold 2 N scored values: the slot is refused, nothing scored.
        let mut out = String::new();
        let node = free_boot::<2>(&slots, &mut out);
        assert!(node.model().is_none(), "{out}");
        assert!(
            out.starts_with(
                "slot A unusable: blob holds an invalid model bank: 2 raw features with differences \
                 score 4 values, but 2 were asked for\nmodel none\n"
            ),
            "{out}"
        );
        // The fixed-point flag on a bank, resealed with a valid CRC: refused as well.
        let (mut f, len) =
            crate::fixtures::bank_image::<2>(1, 1, ModeSelect::Nearest, WindowSpec::single(), None);
        f[6] |= blob::FLAG_FIXED;
        let crc = blob::checksum(&f[..len - blob::CRC_LEN]);
        f[len - blob::CRC_LEN..len].copy_from_slice(&crc.to_le_bytes());
        let slots = one_slot(&f);
        let mut out = String::new();
        let mut node = free_boot::<4>(&slots, &mut out);
        assert!(node.model().is_none(), "{out}");
        assert!(out.starts_with("slot A unusable: "), "{out}");
        assert_eq!(node.step(&[0.0, 0.0], &mut out), None);
        assert!(!out.contains("\nr "), "{out}");
    }

    #[test]
    fn a_newer_bank_wins_the_slots_and_a_known_bank_told_no_mode_falls_back() {
        let n = slots::PROBATION_READINGS as usize;
        let a = blob_bytes(1, 1);
        let (b, _) =
            crate::fixtures::bank_image::<2>(2, 2, ModeSelect::Known, WindowSpec::single(), None);
        let slots = slots_ab(&a, &b);
        let mut out = String::new();
        let mut node = free_boot::<4>(&slots, &mut out);
        assert!(
            node.model()
                .is_some_and(|m| m.is_bank() && m.meta().sequence == 2),
            "{out}"
        );
        // A plain table gives no mode: every reading is a fault for a known-mode bank.
        let rows = table(&vec![[1.0, 0.0]; n + 1]);
        let mut src = Table::<2>::new(&rows).unwrap();
        let summary = node.run_with_fallback(&slots, &mut src, &mut out);
        assert_eq!(
            summary,
            Summary {
                scored: 1,
                faults: n as u32
            },
            "{out}"
        );
        assert!(
            out.contains(&format!(
                "cause=unknown-mode:-\nfallback from=B at={}: ",
                n - 1
            )),
            "{out}"
        );
        assert!(
            out.contains(&format!(
                "\nr {n} d2=3f800000 v=below alarm=0 fault=0 event=-\n"
            )),
            "{out}"
        );
    }

    #[test]
    fn fixed_point_and_f32_slots_follow_the_same_slot_rules() {
        let a = blob_bytes(1, 1);
        let (mut b, len) = crate::fixtures::fixed_image(2, 1);
        for torn in [false, true] {
            if torn {
                b[len / 2] ^= 0x04;
            }
            let slots = slots_ab(&a, &b);
            let mut out = String::new();
            let node = Node::<_, _, 2, 3, 4>::boot(
                &slots,
                Line::new(
                    Mock::new(&[Transaction::set(State::Low)]),
                    ActiveLevel::High,
                ),
                Line::new(
                    Mock::new(&[Transaction::set(State::Low)]),
                    ActiveLevel::High,
                ),
                &mut out,
            );
            let (seq, fixed) = node
                .model()
                .map(|m| (m.meta().sequence, m.is_fixed()))
                .unwrap();
            if torn {
                // One bit changed in the newer, fixed-point slot: refused, the f32 slot is used.
                assert_eq!((seq, fixed), (1, false), "{out}");
                assert!(out.contains("slot B unusable: CRC mismatch"), "{out}");
                assert!(!out.contains("arith=fixed"), "{out}");
            } else {
                assert_eq!((seq, fixed), (2, true), "{out}");
                assert!(
                    out.contains(
                        "mark=unconfirmed arith=fixed\nprobation slot=B readings=60 fallback=A\n"
                    ),
                    "{out}"
                );
            }
            let (mut al, mut fa) = node.release();
            al.done();
            fa.done();
        }
    }
}
