//! Model slots: two regions of flash, apart from the firmware image, that each may hold a blob.
//!
//! A retrained model is written to the slot that is *not* in use, with the next sequence number
//! ([`ellipsoid_core::ModelMeta::sequence`], covered by the blob's CRC). At boot every slot is
//! checked in full ([`load`]), and of the valid ones the newest wins ([`choose`]). A slot torn by a
//! power cut during writing fails its CRC and is skipped, so the older model keeps working.
//!
//! # Which slot wins
//!
//! 1. Only valid slots count.
//! 2. Sequence numbers compare as RFC 1982 serial numbers of 32 bits ([`serial_cmp`]): `b` is newer
//!    than `a` when `b − a`, modulo 2³², is between 1 and 2³¹ − 1. So 0 is newer than 4 294 967 295
//!    (the counter wraps), and a node can be updated forever.
//! 3. Two slots with equal sequence numbers and the same CRC hold the same model: slot A is used.
//! 4. A **tie** is reported on the console, never resolved silently: equal sequence numbers with
//!    different content (different CRCs), or two numbers exactly 2³¹ apart, whose order RFC 1982
//!    leaves undefined. The rule: a confirmed model beats an unconfirmed one; otherwise slot A
//!    (the first slot) wins.
//!
//! # Confirmation and fall-back
//!
//! A model is **unconfirmed** until marked. The mark is the 32-bit word right after the blob,
//! rounded up to a multiple of 4 bytes ([`mark_offset`]): erased flash (`0xFFFF_FFFF`) means
//! unconfirmed, [`CONFIRM_MARK`] means confirmed. Flash programs bits from 1 to 0 without an
//! erase, so the word can be written once in place, after the blob, without touching it (the CRC
//! does not cover it). Any other value is reported as a damaged mark and counts as unconfirmed.
//!
//! An unconfirmed model chosen while another valid slot exists is **on probation**
//! ([`Probation`]): if it faults on each of its first [`PROBATION_READINGS`] readings (a firmware
//! constant: one minute at 1 Hz), the node falls back to the other valid slot and says so. Its
//! first scored reading ends the probation: the console then says where the mark goes, for the
//! board (or the engineer's programmer) to write it. This firmware does not write flash itself.

use core::cmp::Ordering;
use core::fmt;

use ellipsoid_core::bank::{BankError, FlashBank};
use ellipsoid_core::window::WindowError;
use ellipsoid_core::{
    blob, DecodeError, Explained, FixedModel, FlashModel, ModelMeta, ReadingFault, Scored,
};
use ellipsoid_core::{AlarmPolicy, Thresholds};

/// The confirmation mark: the word after the blob, as its four bytes `CONF` in flash.
pub const CONFIRM_MARK: u32 = u32::from_le_bytes(*b"CONF");
/// Readings an unconfirmed model may fault on, every one, before the node falls back to the other
/// valid slot: 60, a minute at 1 Hz. A firmware constant; a port changes it here.
pub const PROBATION_READINGS: u32 = 60;

/// RFC 1982 serial-number comparison of `a` with `b` in a space of `bits` bits (1 to 32): `Less`
/// when `b` is newer, `Greater` when `a` is, `Equal` when equal, and `None` when they are exactly
/// 2^(bits−1) apart, which RFC 1982 (section 3.2) leaves undefined.
pub const fn serial_cmp_bits(a: u32, b: u32, bits: u32) -> Option<Ordering> {
    let mask = if bits >= 32 {
        u32::MAX
    } else {
        (1u32 << bits) - 1
    };
    let half = 1u32 << (bits - 1);
    let (a, b) = (a & mask, b & mask);
    if a == b {
        return Some(Ordering::Equal);
    }
    // b − a modulo 2^bits: 1 ..= half − 1 means b is newer.
    let d = b.wrapping_sub(a) & mask;
    if d == half {
        None
    } else if d < half {
        Some(Ordering::Less)
    } else {
        Some(Ordering::Greater)
    }
}

/// [`serial_cmp_bits`] for 32-bit sequence numbers.
pub const fn serial_cmp(a: u32, b: u32) -> Option<Ordering> {
    serial_cmp_bits(a, b, 32)
}

/// Where the confirmation word of a blob of `blob_len` bytes sits in its slot.
pub const fn mark_offset(blob_len: usize) -> usize {
    blob_len.div_ceil(4) * 4
}

/// The state of a slot's confirmation word.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Mark {
    /// [`CONFIRM_MARK`].
    Confirmed,
    /// Erased flash: not confirmed yet.
    Unconfirmed,
    /// Another value (or no room for the word in the slot): counts as unconfirmed.
    Damaged(u32),
}

impl Mark {
    /// Read the word after a blob of `blob_len` bytes in `slot`.
    pub fn read(slot: &[u8], blob_len: usize) -> Self {
        let at = mark_offset(blob_len);
        match slot
            .get(at..at + 4)
            .and_then(|b| <[u8; 4]>::try_from(b).ok())
        {
            Some(w) => match u32::from_le_bytes(w) {
                CONFIRM_MARK => Mark::Confirmed,
                u32::MAX => Mark::Unconfirmed,
                other => Mark::Damaged(other),
            },
            None => Mark::Damaged(0),
        }
    }

    /// Whether the model counts as confirmed.
    pub const fn is_confirmed(self) -> bool {
        matches!(self, Mark::Confirmed)
    }
}

impl fmt::Display for Mark {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Mark::Confirmed => f.write_str("confirmed"),
            Mark::Unconfirmed => f.write_str("unconfirmed"),
            Mark::Damaged(w) => write!(f, "unconfirmed(mark={w:#010x})"),
        }
    }
}

/// The CRC-32 a valid blob at the start of `bytes` carries in its last four bytes: the model's
/// identity on the console (two models that differ in any byte, thresholds included, differ here).
fn blob_crc(bytes: &[u8]) -> (u32, usize) {
    let len = blob::Header::parse(bytes).map_or(0, |h| h.len);
    let crc = len
        .checked_sub(blob::CRC_LEN)
        .and_then(|at| bytes.get(at..len))
        .and_then(|b| <[u8; 4]>::try_from(b).ok())
        .map_or(0, u32::from_le_bytes);
    (crc, len)
}

/// A named model slot: its bytes as mapped in memory.
#[derive(Clone, Copy, Debug)]
pub struct Slot<'a> {
    /// A short name for reports (`"A"`, `"B"`).
    pub name: &'static str,
    /// The whole slot, which is usually longer than the blob in it.
    pub bytes: &'a [u8],
}

/// Why a slot holds no usable model.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum SlotError {
    /// The header bytes are all erased (`0xFF`) or all zero: nothing was ever written.
    Empty,
    /// The blob's header states a length longer than the slot.
    TooLong {
        /// Length the header states.
        stated: usize,
        /// Bytes in the slot.
        capacity: usize,
    },
    /// The bytes are not a valid blob for this firmware (corrupt, torn, wrong N...).
    Blob(DecodeError),
}

impl fmt::Display for SlotError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            SlotError::Empty => f.write_str("empty"),
            SlotError::TooLong { stated, capacity } => write!(
                f,
                "blob header states {stated} bytes but the slot holds {capacity}"
            ),
            SlotError::Blob(e) => write!(f, "{e}"),
        }
    }
}

impl core::error::Error for SlotError {}

/// A checked model from a slot: a single model of either arithmetic (flag bit 1 of the blob
/// header), or a model bank (format version 2).
///
/// * [`SlotModel::Float`]: an `f32` model, a checked view of the blob in place in flash.
/// * [`SlotModel::Fixed`]: a fixed-point model (`ellipsoid_core::fixed`), which has no in-flash
///   form: its parameters are copied into RAM once, at boot (`size_of::<FixedModel<N, T>>()`,
///   88 bytes at N = 5, 144 at N = 8). `T` is `tri(N)`, its coefficient count.
/// * [`SlotModel::Bank`]: a bank of modes scoring `M = N` values (the window's mean), a checked
///   view in flash (`ellipsoid_core::bank::FlashBank`); the node scores it through an
///   `ellipsoid_core::track::Tracker`, which holds the window, alarm and drift state.
/// * [`SlotModel::BankDiff`]: a bank that scores the first differences too, `M = 2 N = D`. A
///   build whose `D` is not `2 N` cannot hold one, and refuses such a blob like any invalid slot.
///
/// The single models score a reading in engineering units: the fixed model converts it with
/// `FixedModel::reading`, the same function the host's `replay` uses, then scores it with integer
/// arithmetic only, so that the device's d² is the host's, bit for bit.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum SlotModel<'a, const N: usize, const T: usize, const D: usize> {
    /// An `f32` model, scored in place in flash.
    Float(FlashModel<'a, N>),
    /// A fixed-point model, copied into RAM.
    Fixed(FixedModel<N, T>),
    /// A model bank without differences (`M = N`), in place in flash.
    Bank(FlashBank<'a, N, N>),
    /// A model bank with differences (`M = 2 N = D`), in place in flash.
    BankDiff(FlashBank<'a, N, D>),
}

impl<const N: usize, const T: usize, const D: usize> SlotModel<'_, N, T, D> {
    /// Identifier, training time, sequence.
    pub fn meta(&self) -> ModelMeta {
        match self {
            SlotModel::Float(m) => m.meta(),
            SlotModel::Fixed(m) => m.meta(),
            SlotModel::Bank(b) => b.meta(),
            SlotModel::BankDiff(b) => b.meta(),
        }
    }

    /// Alarm and clear thresholds (of mode 0, for a bank: each mode has its own, and the bank's
    /// tracker judges every reading against its chosen mode's).
    pub fn thresholds(&self) -> Thresholds {
        let none = Thresholds {
            alarm: f32::INFINITY,
            clear: f32::INFINITY,
        };
        match self {
            SlotModel::Float(m) => m.thresholds(),
            SlotModel::Fixed(m) => m.thresholds(),
            SlotModel::Bank(b) => b.thresholds(0).unwrap_or(none),
            SlotModel::BankDiff(b) => b.thresholds(0).unwrap_or(none),
        }
    }

    /// Debounce and latch policy.
    pub fn policy(&self) -> AlarmPolicy {
        match self {
            SlotModel::Float(m) => m.policy(),
            SlotModel::Fixed(m) => m.policy(),
            SlotModel::Bank(b) => b.policy(),
            SlotModel::BankDiff(b) => b.policy(),
        }
    }

    /// Whether the model scores in fixed point.
    pub const fn is_fixed(&self) -> bool {
        matches!(self, SlotModel::Fixed(_))
    }

    /// Whether the model is a bank (format version 2), scored through a tracker.
    pub const fn is_bank(&self) -> bool {
        matches!(self, SlotModel::Bank(_) | SlotModel::BankDiff(_))
    }

    /// Score a reading in engineering units. A bank has no score of one reading on its own (its
    /// window, mode and drift are state, kept by its tracker): for a bank this is the fault
    /// `WindowFilling` of its whole window, never a score.
    #[inline(always)]
    pub fn score(&self, x: &[f32; N]) -> Result<Scored, ReadingFault> {
        match self {
            SlotModel::Float(m) => m.score(x),
            SlotModel::Fixed(m) => m.score_f32(x),
            SlotModel::Bank(b) => Err(ReadingFault::WindowFilling {
                missing: b.window().need(),
            }),
            SlotModel::BankDiff(b) => Err(ReadingFault::WindowFilling {
                missing: b.window().need(),
            }),
        }
    }

    /// Score a reading and split d² per feature (a fault for a bank, as [`Self::score`]).
    #[inline(always)]
    pub fn explain(&self, x: &[f32; N]) -> Result<Explained<N>, ReadingFault> {
        match self {
            SlotModel::Float(m) => m.explain(x),
            SlotModel::Fixed(m) => m.explain(&m.reading(x)?),
            SlotModel::Bank(b) => Err(ReadingFault::WindowFilling {
                missing: b.window().need(),
            }),
            SlotModel::BankDiff(b) => Err(ReadingFault::WindowFilling {
                missing: b.window().need(),
            }),
        }
    }
}

/// Validate the blob at the start of `bytes`. An `f32` blob is kept as a view in place: the model
/// stays in flash, and only its centre and a few scalars are kept in RAM (see
/// `ellipsoid_core::flash`). A fixed-point blob (flag bit 1) is decoded into a RAM copy. A bank
/// (format version 2) is kept as a view in place too, `M = N` or, with differences, `M = D`
/// (the node builds its tracker on it).
///
/// Never panics: every access is checked. Kept out of line so that the image check for panic
/// machinery (see the README) can find this path by its symbol.
#[inline(never)]
pub fn load<const N: usize, const T: usize, const D: usize>(
    bytes: &[u8],
) -> Result<SlotModel<'_, N, T, D>, SlotError> {
    let head = bytes.get(..blob::HEADER_LEN).unwrap_or(bytes);
    if head.iter().all(|b| *b == 0xFF) || head.iter().all(|b| *b == 0x00) {
        return Err(SlotError::Empty);
    }
    let header = blob::Header::parse(bytes).map_err(SlotError::Blob)?;
    let blob = bytes.get(..header.len).ok_or(SlotError::TooLong {
        stated: header.len,
        capacity: bytes.len(),
    })?;
    if header.version == blob::VERSION_BANK {
        // The core refuses a version 2 blob with the fixed-point flag (no bank in fixed point).
        // `FlashBank::from_blob` checks every rule `Tracker::new` relies on (the window's shape,
        // at least one mode), so the node's tracker can always be built from what passes here.
        return match FlashBank::<N, N>::from_blob(blob) {
            Ok(b) => Ok(SlotModel::Bank(b)),
            // The blob scores differences: `M = 2 N`, which only the `D` variant can hold.
            Err(DecodeError::Bank(BankError::Window(WindowError::Shape {
                differences: true,
                ..
            }))) => FlashBank::<N, D>::from_blob(blob)
                .map(SlotModel::BankDiff)
                .map_err(SlotError::Blob),
            Err(e) => Err(SlotError::Blob(e)),
        };
    }
    if header.flags & blob::FLAG_FIXED != 0 {
        FixedModel::from_blob(blob)
            .map(SlotModel::Fixed)
            .map_err(SlotError::Blob)
    } else {
        FlashModel::from_blob(blob)
            .map(SlotModel::Float)
            .map_err(SlotError::Blob)
    }
}

/// What [`choose`] found in one slot.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SlotReport {
    /// A valid model with this sequence number.
    Valid {
        /// [`ellipsoid_core::ModelMeta::sequence`].
        sequence: u32,
        /// [`ellipsoid_core::ModelMeta::model_id`].
        model_id: u32,
        /// The blob's CRC-32: the model's identity.
        crc: u32,
        /// Its confirmation word.
        mark: Mark,
    },
    /// No usable model, and why.
    Unusable(SlotError),
    /// This slot and an earlier one, `other`, could not be ordered by their sequence numbers
    /// (equal with different content, or 2³¹ apart); this slot was `chosen` or not by the tie rule.
    Tie {
        /// Index of the other slot.
        other: usize,
        /// This slot's sequence number, and the other's.
        sequences: (u32, u32),
        /// Why they tie.
        why: TieKind,
        /// Whether this slot won the tie.
        won: bool,
    },
}

/// Why two valid slots tie.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum TieKind {
    /// The same sequence number, different CRCs.
    EqualSequence,
    /// Sequence numbers exactly 2³¹ apart: RFC 1982 leaves their order undefined.
    Undefined,
}

/// The model chosen at boot.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Chosen<'a, const N: usize, const T: usize, const D: usize> {
    /// Index into the slots given to [`choose`].
    pub slot: usize,
    /// The checked model (in place in its slot for an `f32` model).
    pub model: SlotModel<'a, N, T, D>,
    /// The blob's CRC-32.
    pub crc: u32,
    /// The chosen slot's confirmation word.
    pub mark: Mark,
    /// The next best valid slot, which an unconfirmed model falls back to ([`Probation`]).
    pub fallback: Option<usize>,
    /// The blob's length (its confirmation word is at [`mark_offset`] of it).
    pub blob_len: usize,
}

/// What [`choose`] keeps of a valid slot while it compares them.
#[derive(Clone, Copy)]
struct Candidate {
    slot: usize,
    sequence: u32,
    crc: u32,
    mark: Mark,
    len: usize,
}

/// Whether `b` (a later slot) beats `a`, and the tie, if they tie.
fn beats(a: &Candidate, b: &Candidate) -> (bool, Option<TieKind>) {
    match serial_cmp(a.sequence, b.sequence) {
        Some(Ordering::Less) => (true, None),
        Some(Ordering::Greater) => (false, None),
        // The same model in both slots: the earlier slot, and nothing to report.
        Some(Ordering::Equal) if a.crc == b.crc => (false, None),
        Some(Ordering::Equal) => (
            b.mark.is_confirmed() && !a.mark.is_confirmed(),
            Some(TieKind::EqualSequence),
        ),
        None => (
            b.mark.is_confirmed() && !a.mark.is_confirmed(),
            Some(TieKind::Undefined),
        ),
    }
}

/// Check every slot, call `report` for each (and for every tie), and return the newest valid
/// model (see the module documentation for the rule), or `None` when no slot validates. Slots
/// `skip` (an index) is passed over, as if unusable, without a report: the slot a node has fallen
/// back from.
///
/// Out of line: its frame (a model decoded from each slot) is on the stack only while it runs.
#[inline(never)]
pub fn choose<'a, const N: usize, const T: usize, const D: usize>(
    slots: &[Slot<'a>],
    skip: Option<usize>,
    mut report: impl FnMut(&Slot<'a>, &SlotReport),
) -> Option<Chosen<'a, N, T, D>> {
    let mut best: Option<(Candidate, SlotModel<'a, N, T, D>)> = None;
    let mut second: Option<Candidate> = None;
    for (i, slot) in slots.iter().enumerate() {
        if skip == Some(i) {
            continue;
        }
        let model = match load::<N, T, D>(slot.bytes) {
            Ok(m) => m,
            Err(e) => {
                report(slot, &SlotReport::Unusable(e));
                continue;
            }
        };
        let meta = model.meta();
        let (crc, len) = blob_crc(slot.bytes);
        let c = Candidate {
            slot: i,
            sequence: meta.sequence,
            crc,
            mark: Mark::read(slot.bytes, len),
            len,
        };
        report(
            slot,
            &SlotReport::Valid {
                sequence: c.sequence,
                model_id: meta.model_id,
                crc,
                mark: c.mark,
            },
        );
        let Some((b, _)) = &best else {
            best = Some((c, model));
            continue;
        };
        let (wins, tie) = beats(b, &c);
        if let Some(why) = tie {
            report(
                slot,
                &SlotReport::Tie {
                    other: b.slot,
                    sequences: (c.sequence, b.sequence),
                    why,
                    won: wins,
                },
            );
        }
        if wins {
            second = best.take().map(|(b, _)| b);
            best = Some((c, model));
        } else if second.is_none_or(|s| beats(&s, &c).0) {
            second = Some(c);
        }
    }
    best.map(|(c, model)| Chosen {
        slot: c.slot,
        model,
        crc: c.crc,
        mark: c.mark,
        fallback: second.map(|s| s.slot),
        blob_len: c.len,
    })
}

/// What [`Probation::observe`] decides after a reading.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Watch {
    /// Nothing to do.
    Keep,
    /// The model scored a reading: its probation is over, and it may be marked confirmed.
    Passed,
    /// It faulted on every reading of its probation: fall back to the other slot.
    FallBack,
}

/// The probation of an unconfirmed model (see the module documentation).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Probation {
    /// Readings left in the probation; `None` when there is none (confirmed, no other slot, or
    /// over).
    left: Option<u32>,
}

impl Probation {
    /// No probation.
    pub const fn none() -> Self {
        Self { left: None }
    }

    /// A probation of `readings` readings (at least 1).
    pub const fn new(readings: u32) -> Self {
        Self {
            left: Some(if readings == 0 { 1 } else { readings }),
        }
    }

    /// The probation a chosen model gets: [`PROBATION_READINGS`] if it is unconfirmed and another
    /// valid slot exists, none otherwise.
    pub const fn for_chosen(mark: Mark, fallback: Option<usize>) -> Self {
        if !mark.is_confirmed() && fallback.is_some() {
            Self::new(PROBATION_READINGS)
        } else {
            Self::none()
        }
    }

    /// Whether the probation is running.
    pub const fn active(&self) -> bool {
        self.left.is_some()
    }

    /// Note one reading: `faulted` when the model could not score it.
    pub fn observe(&mut self, faulted: bool) -> Watch {
        let Some(left) = self.left else {
            return Watch::Keep;
        };
        if !faulted {
            self.left = None;
            return Watch::Passed;
        }
        if left <= 1 {
            self.left = None;
            Watch::FallBack
        } else {
            self.left = Some(left - 1);
            Watch::Keep
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fixtures::{slot_image, slots_ab};

    fn blob(sequence: u32) -> (Vec<u8>, usize) {
        slot_image(sequence, 1)
    }

    fn chosen_seq(slots: &[Slot<'_>]) -> (Option<(usize, u32)>, Vec<String>) {
        let mut lines = Vec::new();
        let c = choose::<2, 3, 4>(slots, None, |s: &Slot<'_>, r: &SlotReport| {
            lines.push(format!("{} {:?}", s.name, r))
        });
        (c.map(|c| (c.slot, c.model.meta().sequence)), lines)
    }

    /// A slot image whose blob is marked confirmed.
    fn confirmed(mut image: (Vec<u8>, usize)) -> Vec<u8> {
        let at = mark_offset(image.1);
        image.0[at..at + 4].copy_from_slice(&CONFIRM_MARK.to_le_bytes());
        image.0
    }

    #[test]
    fn serial_comparison_follows_the_examples_of_rfc_1982() {
        use Ordering::{Greater, Less};
        // RFC 1982, section 5.1, SERIAL_BITS = 2: "1 > 0, 2 > 1, 3 > 2, and 0 > 3. It is undefined
        // whether 2 > 0 or 0 > 2, and whether 1 > 3 or 3 > 1."
        for (a, b) in [(1, 0), (2, 1), (3, 2), (0, 3)] {
            assert_eq!(serial_cmp_bits(a, b, 2), Some(Greater), "{a} > {b}");
            assert_eq!(serial_cmp_bits(b, a, 2), Some(Less), "{b} < {a}");
        }
        for (a, b) in [(2, 0), (0, 2), (1, 3), (3, 1)] {
            assert_eq!(serial_cmp_bits(a, b, 2), None, "{a} ? {b}");
        }
        // Section 5.2, SERIAL_BITS = 8: "1 > 0, 44 > 0, 100 > 0, 100 > 44, 200 > 100, 255 > 200,
        // 0 > 255, 100 > 255, 0 > 200, and 44 > 200."
        for (a, b) in [
            (1, 0),
            (44, 0),
            (100, 0),
            (100, 44),
            (200, 100),
            (255, 200),
            (0, 255),
            (100, 255),
            (0, 200),
            (44, 200),
        ] {
            assert_eq!(serial_cmp_bits(a, b, 8), Some(Greater), "{a} > {b}");
            assert_eq!(serial_cmp_bits(b, a, 8), Some(Less), "{b} < {a}");
        }
        // Its additions, 255 + 1 == 0 and 200 + 100 == 44, are what makes the last two newer.
        assert_eq!(serial_cmp_bits(200, 200 + 100 - 256, 8), Some(Less));
        // 32 bits: the counter wraps, and 2^31 apart is undefined.
        assert_eq!(serial_cmp(u32::MAX, 0), Some(Less));
        assert_eq!(serial_cmp(0, u32::MAX), Some(Greater));
        assert_eq!(serial_cmp(5, 5), Some(Ordering::Equal));
        assert_eq!(serial_cmp(0, 1 << 31), None);
        assert_eq!(serial_cmp(0, (1 << 31) - 1), Some(Less));
        assert_eq!(serial_cmp(0, (1 << 31) + 1), Some(Greater));
    }

    #[test]
    fn the_sequence_number_wraps_around() {
        let (a, _) = blob(u32::MAX);
        let (b, _) = blob(0);
        assert_eq!(chosen_seq(&slots_ab(&a, &b)).0, Some((1, 0)));
        assert_eq!(chosen_seq(&slots_ab(&b, &a)).0, Some((0, 0)));
    }

    #[test]
    fn ties_are_reported_and_resolved_by_the_rule() {
        // Equal sequences, different content (another policy, so another CRC).
        let a = slot_image(4, 1).0;
        let b = slot_image(4, 2).0;
        let (c, lines) = chosen_seq(&slots_ab(&a, &b));
        assert_eq!(c, Some((0, 4)), "neither confirmed: the first slot");
        assert!(
            lines[2].starts_with(
                "B Tie { other: 0, sequences: (4, 4), why: EqualSequence, won: false }"
            ),
            "{lines:?}"
        );
        // A confirmed model wins the tie, in either slot.
        let bc = confirmed(slot_image(4, 2));
        let (c, lines) = chosen_seq(&slots_ab(&a, &bc));
        assert_eq!(c, Some((1, 4)));
        assert!(lines[2].contains("won: true"), "{lines:?}");
        let ac = confirmed(slot_image(4, 1));
        assert_eq!(chosen_seq(&slots_ab(&ac, &bc)).0, Some((0, 4)));
        // The same model in both slots is no tie.
        let (c, lines) = chosen_seq(&slots_ab(&a, &a));
        assert_eq!(c, Some((0, 4)));
        assert_eq!(lines.len(), 2, "{lines:?}");
        // 2^31 apart: undefined order, a tie.
        let (u, _) = blob(1 << 31);
        let (z, _) = blob(0);
        let (c, lines) = chosen_seq(&slots_ab(&z, &u));
        assert_eq!(c, Some((0, 0)));
        assert!(lines[2].contains("why: Undefined"), "{lines:?}");
    }

    #[test]
    fn the_mark_after_the_blob_and_the_fallback_slot() {
        let (a, len) = blob(3);
        assert_eq!(Mark::read(&a, len), Mark::Unconfirmed);
        let ac = confirmed((a.clone(), len));
        assert_eq!(Mark::read(&ac, len), Mark::Confirmed);
        let mut damaged = a.clone();
        damaged[mark_offset(len)] = 0;
        assert_eq!(Mark::read(&damaged, len), Mark::Damaged(0xFFFF_FF00));
        assert_eq!(
            Mark::read(&a[..len], len),
            Mark::Damaged(0),
            "no room for the word"
        );
        assert_eq!(mark_offset(57), 60);
        assert_eq!(mark_offset(60), 60);
        // The mark is outside the blob: a confirmed slot still validates, with the same CRC.
        let (b, _) = blob(4);
        let c = choose::<2, 3, 4>(&slots_ab(&ac, &b), None, |_, _| {}).unwrap();
        assert_eq!(
            (c.slot, c.mark, c.fallback),
            (1, Mark::Unconfirmed, Some(0))
        );
        let c = choose::<2, 3, 4>(&slots_ab(&ac, &b), Some(1), |_, _| {}).unwrap();
        assert_eq!((c.slot, c.mark, c.fallback), (0, Mark::Confirmed, None));
    }

    #[test]
    fn probation_passes_on_a_scored_reading_and_falls_back_after_all_faults() {
        let mut p = Probation::new(3);
        assert_eq!(p.observe(true), Watch::Keep);
        assert_eq!(p.observe(true), Watch::Keep);
        assert_eq!(p.observe(false), Watch::Passed);
        assert!(!p.active());
        assert_eq!(p.observe(true), Watch::Keep, "over: faults no longer count");
        let mut p = Probation::new(3);
        assert_eq!(p.observe(true), Watch::Keep);
        assert_eq!(p.observe(true), Watch::Keep);
        assert_eq!(p.observe(true), Watch::FallBack);
        assert_eq!(p.observe(true), Watch::Keep);
        assert!(!Probation::for_chosen(Mark::Confirmed, Some(0)).active());
        assert!(!Probation::for_chosen(Mark::Unconfirmed, None).active());
        assert!(Probation::for_chosen(Mark::Damaged(0), Some(1)).active());
    }

    #[test]
    fn newest_valid_slot_wins() {
        let (a, _) = blob(3);
        let (b, _) = blob(4);
        let slots = slots_ab(&a, &b);
        assert_eq!(chosen_seq(&slots).0, Some((1, 4)));
        let slots = slots_ab(&b, &a);
        assert_eq!(chosen_seq(&slots).0, Some((0, 4)));
        // Equal sequence numbers: the first slot.
        let slots = slots_ab(&a, &a);
        assert_eq!(chosen_seq(&slots).0, Some((0, 3)));
    }

    #[test]
    fn a_torn_newer_slot_is_skipped_and_reported() {
        let (a, _) = blob(3);
        let (mut b, len) = blob(9);
        // A write cut short: the second half of the blob is still erased flash.
        b[len / 2..].fill(0xFF);
        let slots = slots_ab(&a, &b);
        let (c, lines) = chosen_seq(&slots);
        assert_eq!(c, Some((0, 3)));
        assert!(lines[1].starts_with("B Unusable(Blob(Crc"), "{lines:?}");
    }

    #[test]
    fn empty_erased_and_wrong_dimension_slots() {
        let erased = [0xFFu8; 64];
        let zero = [0u8; 64];
        assert_eq!(load::<2, 3, 4>(&erased), Err(SlotError::Empty));
        assert_eq!(load::<2, 3, 4>(&zero), Err(SlotError::Empty));
        assert_eq!(load::<2, 3, 4>(&zero[..3]), Err(SlotError::Empty));
        let (a, len) = blob(1);
        assert!(matches!(
            load::<3, 6, 6>(&a),
            Err(SlotError::Blob(DecodeError::Dimension {
                found: 2,
                expected: 3
            }))
        ));
        assert_eq!(
            load::<2, 3, 4>(&a[..len - 1]),
            Err(SlotError::TooLong {
                stated: len,
                capacity: len - 1
            })
        );
        let (c, lines) = chosen_seq(&[Slot {
            name: "A",
            bytes: &erased,
        }]);
        assert_eq!(c, None);
        assert_eq!(lines, ["A Unusable(Empty)"]);
    }
}
