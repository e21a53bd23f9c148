//! The `ellipsoid-node` image's program, on any [`Board`]: boot the [`Node`] on the board's slots
//! and lines, score the board's readings until they end, report, and end the run.
//!
//! Around the node's own report (see [`crate::node`]) it writes:
//!
//! ```text
//! boot ellipsoid-node n=5                     (first)
//! stack boot_peak_bytes=400                   (after boot, when the board measures its stack)
//! readings count=14400                        (after boot, when the source is a table)
//! readings unusable: <reason>                 (instead, when the source cannot be opened)
//! stack peak_bytes=1968                       (after the run, when the board measures it)
//! leds=01                                     (last, when the board reads its pins back)
//! ```

use core::fmt::Write;

use embedded_hal::digital::OutputPin;

use crate::board::{Board, Parts};
use crate::node::Node;
use crate::pins::Line;
use crate::source::ReadingSource;

/// Run the node on the board taken at reset, then end the run ([`Board::finish`]).
///
/// Called once, from the image's entry, and inlined there (as is [`session`]), so that the image's
/// code and stack are the same as if the entry did all this itself.
#[inline(always)]
pub fn run<const N: usize, const T: usize, const D: usize>(
    parts: Parts<impl Board<N>, impl OutputPin, impl OutputPin>,
) -> ! {
    let Parts {
        mut board,
        alarm,
        fault,
    } = parts;
    let ok = session::<_, _, _, N, T, D>(&mut board, alarm, fault);
    board.finish(ok)
}

/// Everything of [`run`] but the end: boot on the board's slots, then score every reading of its
/// source. Returns `false` if the source could not be opened (nothing was scored, the fault line
/// is on).
#[inline(always)]
pub fn session<B, A, F, const N: usize, const T: usize, const D: usize>(
    board: &mut B,
    alarm: Line<A>,
    fault: Line<F>,
) -> bool
where
    B: Board<N>,
    A: OutputPin,
    F: OutputPin,
{
    let _ = writeln!(board.console(), "boot ellipsoid-node n={N}");
    // Boot is measured on its own: choosing a model must not cost the stack a copy of one.
    board.start_measuring();
    let slots = board.model_slots();
    let mut node = Node::<_, _, N, T, D>::boot(&slots, alarm, fault, board.console());
    if let Some(peak) = board.stack_peak() {
        let _ = writeln!(board.console(), "stack boot_peak_bytes={peak}");
    }
    let ok = match board.readings() {
        Ok(mut source) => {
            if let Some(count) = source.total() {
                let _ = writeln!(board.console(), "readings count={count}");
            }
            board.start_measuring();
            node.run_with_fallback(&slots, &mut source, board.console());
            if let Some(peak) = board.stack_peak() {
                let _ = writeln!(board.console(), "stack peak_bytes={peak}");
            }
            true
        }
        Err(e) => {
            let _ = writeln!(board.console(), "readings unusable: {e}");
            node.source_failed(board.console());
            false
        }
    };
    if let Some(levels) = board.output_levels() {
        let _ = writeln!(board.console(), "leds={:02b}", levels & 0b11);
    }
    ok
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fixtures::{slot_image, slots_ab, table};
    use crate::pins::ActiveLevel;
    use crate::slots::Slot;
    use crate::source::{table_header, Table, TableError};
    use embedded_hal_mock::eh1::digital::{Mock, State, Transaction};

    /// A board on the host: a `String` console, slots and a table in leaked memory, and fixed
    /// figures for the measurement hooks, so the test can tell where each is reported.
    struct Bench {
        out: String,
        slots: [Slot<'static>; 2],
        table: &'static [u8],
        measures: bool,
        started: bool,
    }

    impl Bench {
        fn new(table: Vec<u8>, measures: bool) -> Self {
            let a: &'static [u8] = slot_image(1, 1).0.leak();
            let b: &'static [u8] = vec![0xFF; 64].leak();
            Self {
                out: String::new(),
                slots: slots_ab(a, b),
                table: table.leak(),
                measures,
                started: false,
            }
        }
    }

    impl Board<2> for Bench {
        type Console = String;
        type Source = Table<'static, 2>;
        type SourceError = TableError;

        fn console(&mut self) -> &mut String {
            &mut self.out
        }

        fn model_slots(&self) -> [Slot<'static>; 2] {
            self.slots
        }

        fn readings(&mut self) -> Result<Table<'static, 2>, TableError> {
            Table::new(self.table)
        }

        fn start_measuring(&mut self) {
            self.started = true;
            self.out.push_str("(painted)\n");
        }

        fn stack_peak(&self) -> Option<usize> {
            (self.measures && self.started).then_some(1234)
        }

        fn output_levels(&self) -> Option<u32> {
            // Bits above the two lines must not be reported.
            self.measures.then_some(0b1101)
        }

        fn finish(self, _ok: bool) -> ! {
            unreachable!("the tests call `session`, which returns")
        }
    }

    #[test]
    fn a_session_reports_boot_the_readings_the_stack_and_the_pins_in_order() {
        let mut alarm = Mock::new(&[
            Transaction::set(State::Low),  // boot: off
            Transaction::set(State::High), // reading 0 raises
            Transaction::set(State::Low),  // reading 1 clears
        ]);
        let mut fault = Mock::new(&[Transaction::set(State::Low)]);
        // d² = 16 (above 9, raise after 1), then 0 (below 4, clear after 1).
        let mut bench = Bench::new(table(&[[4.0, 0.0], [0.0, 0.0]]), true);
        let ok = session::<_, _, _, 2, 3, 4>(
            &mut bench,
            Line::new(alarm.clone(), ActiveLevel::High),
            Line::new(fault.clone(), ActiveLevel::High),
        );
        assert!(ok);
        let lines: Vec<&str> = bench.out.lines().collect();
        let crc = crate::fixtures::image_crc(1, 1);
        let slot_line =
            format!("slot A valid seq=1 id=0x00000007 crc={crc:#010x} mark=unconfirmed");
        let model_line =
            format!("model slot=A seq=1 id=0x00000007 crc={crc:#010x} mark=unconfirmed");
        let expected = [
            "boot ellipsoid-node n=2",
            "(painted)",
            &slot_line,
            "slot B unusable: empty",
            &model_line,
            "pin fault off level=low at=boot",
            "pin alarm off level=low at=boot",
            "stack boot_peak_bytes=1234",
            "readings count=2",
            "(painted)",
            // 16.0f32 = 0x41800000 (IEEE-754 single: exponent 131, mantissa 0).
            "r 0 d2=41800000 v=above alarm=1 fault=0 event=raised top=0",
            "pin alarm on level=high at=0",
            "r 1 d2=00000000 v=below alarm=0 fault=0 event=cleared",
            "pin alarm off level=low at=1",
            "end scored=2 faults=0",
            "stack peak_bytes=1234",
            "leds=01",
        ];
        assert_eq!(lines, expected);
        alarm.done();
        fault.done();
    }

    #[test]
    fn an_unusable_table_is_reported_turns_the_fault_line_on_and_fails_the_run() {
        let mut alarm = Mock::new(&[Transaction::set(State::Low)]);
        let mut fault = Mock::new(&[Transaction::set(State::Low), Transaction::set(State::High)]);
        // A table for 3 features on a node for 2.
        let mut bench = Bench::new(table_header(3, 1).to_vec(), false);
        let ok = session::<_, _, _, 2, 3, 4>(
            &mut bench,
            Line::new(alarm.clone(), ActiveLevel::High),
            Line::new(fault.clone(), ActiveLevel::High),
        );
        assert!(!ok);
        let tail: Vec<&str> = bench.out.lines().skip(5).collect();
        assert_eq!(
            tail,
            [
                "pin fault off level=low at=boot",
                "pin alarm off level=low at=boot",
                "readings unusable: reading table has 3 features, expected 2",
                "pin fault on level=high at=boot",
            ],
            "{}",
            bench.out
        );
        assert!(
            !bench.out.contains("stack peak_bytes"),
            "measured a run that never started"
        );
        alarm.done();
        fault.done();
    }
}
