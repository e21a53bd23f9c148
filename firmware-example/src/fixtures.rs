//! Test fixtures shared by the host tests of the slots and the node.

use ellipsoid_core::{blob, AlarmPolicy, ModelMeta, ModelParams, Preprocess, Thresholds};

use crate::slots::Slot;
use crate::source::table_header;

/// A flash slot holding a valid 2-feature blob (identity `W`, alarm above 9, clear below 4,
/// clear after 1), followed by erased flash (0xFF). Returns the slot's bytes and the blob's length.
pub fn slot_image(sequence: u32, raise_after: u16) -> (Vec<u8>, usize) {
    image_of(&params(sequence, raise_after))
}

/// The parameters of [`slot_image`]'s model.
pub fn params(sequence: u32, raise_after: u16) -> ModelParams<2> {
    ModelParams::<2> {
        meta: ModelMeta {
            model_id: 7,
            trained_at: 0,
            sequence,
        },
        preprocess: Preprocess::identity(),
        mean: [0.0; 2],
        w: [[1.0, 0.0], [0.0, 1.0]],
        thresholds: Thresholds {
            alarm: 9.0,
            clear: 4.0,
        },
        policy: AlarmPolicy {
            raise_after,
            clear_after: 1,
            latch: false,
        },
    }
}

/// A flash slot holding the blob of `params`, followed by erased flash (0xFF). Returns the slot's
/// bytes and the blob's length.
pub fn image_of(params: &ModelParams<2>) -> (Vec<u8>, usize) {
    let mut buf = vec![0xFF; 512];
    let len = blob::encode(params, &mut buf).unwrap();
    (buf, len)
}

/// [`slot_image`]'s model quantised to fixed point (`ellipsoid_core::fixed`, header flag bit 1),
/// followed by erased flash. Returns the slot's bytes and the blob's length.
pub fn fixed_image(sequence: u32, raise_after: u16) -> (Vec<u8>, usize) {
    use ellipsoid_core::{fixed, tri};
    let (f32_blob, f32_len) = slot_image(sequence, raise_after);
    let params = blob::decode::<2>(&f32_blob[..f32_len]).unwrap();
    let q = fixed::quantise::<2, { tri(2) }>(&params).unwrap();
    let mut buf = vec![0xFF; 512];
    let len = fixed::encode(&q, &mut buf).unwrap();
    (buf, len)
}

/// Slots A and B, in that order.
pub fn slots_ab<'a>(a: &'a [u8], b: &'a [u8]) -> [Slot<'a>; 2] {
    [
        Slot {
            name: "A",
            bytes: a,
        },
        Slot {
            name: "B",
            bytes: b,
        },
    ]
}

/// A reading table (the emulator's format, `source::table_header` then the `f32` values) of
/// 2-feature readings.
pub fn table(rows: &[[f32; 2]]) -> Vec<u8> {
    let mut b = table_header(2, rows.len() as u32).to_vec();
    for r in rows {
        for v in r {
            b.extend_from_slice(&v.to_le_bytes());
        }
    }
    b
}

/// The CRC-32 of [`slot_image`]'s blob, computed over its bytes by the core's checksum (not read
/// from the blob), as the console reports it.
pub fn image_crc(sequence: u32, raise_after: u16) -> u32 {
    let (bytes, len) = slot_image(sequence, raise_after);
    blob::checksum(&bytes[..len - blob::CRC_LEN])
}

/// Mode `k` of [`bank_image`]'s banks: identity `W` (on the `M` scored values), centred at
/// `(10 k, 0, ...)`, alarm above 9, clear below 4.
pub fn bank_mode<const M: usize>(k: usize) -> ellipsoid_core::bank::ModeParams<M> {
    let mut w = [[0.0; M]; M];
    for (i, row) in w.iter_mut().enumerate() {
        row[i] = 1.0;
    }
    let mut mean = [0.0; M];
    mean[0] = 10.0 * k as f32;
    ellipsoid_core::bank::ModeParams {
        offset: [0.0; M],
        scale: [1.0; M],
        mean,
        w,
        thresholds: Thresholds {
            alarm: 9.0,
            clear: 4.0,
        },
    }
}

/// A flash slot holding a version 2 bank of 2 raw features and `M` scored ones (`M = 4`: with
/// differences): `k` modes of [`bank_mode`], the given mode rule, window and drift (rate,
/// bound on every scored feature), raise and clear after 1. Followed by erased flash.
pub fn bank_image<const M: usize>(
    sequence: u32,
    k: usize,
    select: ellipsoid_core::bank::ModeSelect,
    window: ellipsoid_core::window::WindowSpec,
    drift: Option<(f32, f32)>,
) -> (Vec<u8>, usize) {
    use ellipsoid_core::bank::{BankParams, DriftSpec};
    let modes: Vec<_> = (0..k).map(bank_mode::<M>).collect();
    let p = BankParams::<2, M> {
        meta: ModelMeta {
            model_id: 8,
            trained_at: 0,
            sequence,
        },
        log_mask: 0,
        select,
        modes: &modes,
        window,
        drift: drift.map(|(rate, bound)| DriftSpec {
            rate,
            bound: [bound; M],
        }),
        policy: AlarmPolicy {
            raise_after: 1,
            clear_after: 1,
            latch: false,
        },
        names_digest: blob::names_digest(["a", "b"]),
    };
    let mut buf = vec![0xFF; 1024];
    let len = blob::encode_bank(&p, &mut buf).unwrap();
    (buf, len)
}
