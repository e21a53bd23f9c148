//! Golden vector: the exact bytes of a small blob. An accidental change to the wire format
//! fails here loudly. `core/FORMAT.md` walks through these same bytes.

use ellipsoid_core::blob;
use ellipsoid_core::{AlarmPolicy, Model, ModelMeta, ModelParams, Preprocess, Thresholds};

fn golden_params() -> ModelParams<2> {
    ModelParams {
        meta: ModelMeta {
            model_id: 0x00C0_FFEE,
            trained_at: 1_767_225_600, // 2026-01-01T00:00:00Z
            sequence: 3,
        },
        preprocess: Preprocess {
            log_mask: 0b10,
            offset: [12.5, 1.0],
            scale: [0.5, 2.0],
        },
        mean: [0.0, 0.25],
        w: [[1.0, 0.0], [-0.5, 1.5]],
        thresholds: Thresholds {
            alarm: 13.8155,
            clear: 9.2103,
        },
        policy: AlarmPolicy {
            raise_after: 3,
            clear_after: 300,
            latch: true,
        },
    }
}

const GOLDEN: [u8; 72] = [
    0x45, 0x4c, 0x53, 0x44, 0x01, 0x02, 0x01, 0x00, 0x48, 0x00, 0xee, 0xff, 0x83, 0x06, 0x80, 0xf2,
    0xd6, 0xca, 0x06, 0x03, 0x02, 0x00, 0x00, 0x48, 0x41, 0x00, 0x00, 0x80, 0x3f, 0x00, 0x00, 0x00,
    0x3f, 0x00, 0x00, 0x00, 0x40, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x80, 0x3e, 0x00, 0x00, 0x80,
    0x3f, 0x00, 0x00, 0x00, 0xbf, 0x00, 0x00, 0xc0, 0x3f, 0x4a, 0x0c, 0x5d, 0x41, 0x64, 0x5d, 0x13,
    0x41, 0x03, 0xac, 0x02, 0x0f, 0x88, 0x47, 0x25,
];

#[test]
fn golden_bytes_are_pinned() {
    let mut buf = [0u8; blob::max_len(2)];
    let n = blob::encode(&golden_params(), &mut buf).unwrap();
    let hex: Vec<String> = buf[..n].iter().map(|b| format!("0x{b:02x}")).collect();
    assert_eq!(
        &buf[..n],
        &GOLDEN[..],
        "blob bytes changed: {}",
        hex.join(", ")
    );
}

#[test]
fn golden_bytes_decode_to_the_model() {
    let params = blob::decode::<2>(&GOLDEN).unwrap();
    assert_eq!(params, golden_params());
    assert!(Model::<2>::from_blob(&GOLDEN).is_ok());
}
