//! Model slots: two regions of flash, apart from the firmware image, that each may hold a blob.
//!
//! A retrained model is written to the slot that is *not* in use, with a higher sequence number
//! ([`ellipsoid_core::ModelMeta::sequence`], covered by the blob's CRC). At boot every slot is
//! checked in full ([`load`]), and the valid one with the highest sequence wins ([`choose`]). A slot
//! torn by a power cut during writing fails its CRC and is skipped, so the older model keeps working.

use core::fmt;

use ellipsoid_core::{blob, DecodeError, FlashModel};

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

/// Validate the blob at the start of `bytes` and keep a view of it in place: the model stays in
/// flash, and only its centre and a few scalars are kept in RAM (see `ellipsoid_core::flash`).
///
/// Never panics: every access is checked. Kept out of line so that the image check for panic
/// machinery (see the README) can find this path by its symbol.
#[inline(never)]
pub fn load<const N: usize>(bytes: &[u8]) -> Result<FlashModel<'_, N>, SlotError> {
    let head = bytes.get(..blob::HEADER_LEN).unwrap_or(bytes);
    if head.iter().all(|b| *b == 0xFF) || head.iter().all(|b| *b == 0x00) {
        return Err(SlotError::Empty);
    }
    let header = blob::Header::parse(bytes).map_err(SlotError::Blob)?;
    let blob = bytes.get(..header.len).ok_or(SlotError::TooLong {
        stated: header.len,
        capacity: bytes.len(),
    })?;
    FlashModel::from_blob(blob).map_err(SlotError::Blob)
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
    },
    /// No usable model, and why.
    Unusable(SlotError),
}

/// The model chosen at boot.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Chosen<'a, const N: usize> {
    /// Index into the slots given to [`choose`].
    pub slot: usize,
    /// The checked model, in place in its slot.
    pub model: FlashModel<'a, N>,
}

/// Check every slot, call `report` for each, and return the valid model with the highest sequence
/// number (the first of equals), or `None` when no slot validates.
pub fn choose<'a, const N: usize>(
    slots: &[Slot<'a>],
    mut report: impl FnMut(&Slot<'a>, &SlotReport),
) -> Option<Chosen<'a, N>> {
    let mut best: Option<Chosen<'a, N>> = None;
    for (i, slot) in slots.iter().enumerate() {
        match load::<N>(slot.bytes) {
            Ok(model) => {
                let meta = model.meta();
                report(
                    slot,
                    &SlotReport::Valid {
                        sequence: meta.sequence,
                        model_id: meta.model_id,
                    },
                );
                let newer = best
                    .as_ref()
                    .is_none_or(|b| meta.sequence > b.model.meta().sequence);
                if newer {
                    best = Some(Chosen { slot: i, model });
                }
            }
            Err(e) => report(slot, &SlotReport::Unusable(e)),
        }
    }
    best
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
        let c = choose::<2>(slots, |s, r| lines.push(format!("{} {:?}", s.name, r)));
        (c.map(|c| (c.slot, c.model.meta().sequence)), lines)
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
        assert_eq!(load::<2>(&erased), Err(SlotError::Empty));
        assert_eq!(load::<2>(&zero), Err(SlotError::Empty));
        assert_eq!(load::<2>(&zero[..3]), Err(SlotError::Empty));
        let (a, len) = blob(1);
        assert!(matches!(
            load::<3>(&a),
            Err(SlotError::Blob(DecodeError::Dimension {
                found: 2,
                expected: 3
            }))
        ));
        assert_eq!(
            load::<2>(&a[..len - 1]),
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
