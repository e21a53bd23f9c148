//! Golden vector: the exact bytes of a small blob. An accidental change to the wire format
//! fails here loudly. `core/FORMAT.md` walks through these same bytes.

use ellipsoid_core::blob;
use ellipsoid_core::{Model, ModelParams};

fn golden_params() -> ModelParams<2> {
    // The parameters of FORMAT.md's worked example, shared with the pinned scores.
    ellipsoid_tests::golden::golden_n2()
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

/// The fixed-point worked example of `core/FORMAT.md`, byte by byte as the page lays it out; the
/// CRC is the one Python's `zlib.crc32` gives for the first 48 bytes (an outside reference for
/// CRC-32/ISO-HDLC).
const FIXED_GOLDEN: [u8; 52] = [
    0x45, 0x4c, 0x53, 0x44, 0x01, 0x02, 0x03, 0x00, 0x34, 0x00, 0xee, 0xff, 0x83, 0x06, 0x80, 0xf2,
    0xd6, 0xca, 0x06, 0x03, 0x14, 0x04, 0xfe, 0xc8, 0x00, 0x00, 0x00, 0xf3, 0xff, 0xff, 0xff, 0x08,
    0x52, 0x78, 0xec, 0x30, 0x75, 0x4a, 0x0c, 0x5d, 0x41, 0x64, 0x5d, 0x13, 0x41, 0x03, 0xac, 0x02,
    0x27, 0x2b, 0x90, 0x80,
];

fn fixed_golden_params() -> ellipsoid_core::FixedParams<2, 3> {
    use ellipsoid_core::fixed::ThresholdBits;
    use ellipsoid_core::{AlarmPolicy, ModelMeta};
    ellipsoid_core::FixedParams {
        meta: ModelMeta {
            model_id: 0x00C0_FFEE,
            trained_at: 1_767_225_600,
            sequence: 3,
        },
        shift: [4, -2],
        center: [200, -13],
        exponent: 20,
        q: [21_000, -5_000, 30_000],
        thresholds: ThresholdBits {
            alarm: 13.8155f32.to_bits(),
            clear: 9.2103f32.to_bits(),
        },
        policy: AlarmPolicy {
            raise_after: 3,
            clear_after: 300,
            latch: true,
        },
    }
}

#[test]
fn fixed_golden_blob_is_pinned() {
    use ellipsoid_core::fixed;
    let mut buf = [0u8; fixed::max_len(2)];
    let n = fixed::encode(&fixed_golden_params(), &mut buf).unwrap();
    assert_eq!(&buf[..n], &FIXED_GOLDEN[..]);
    assert_eq!(
        fixed::decode::<2, 3>(&FIXED_GOLDEN),
        Ok(fixed_golden_params())
    );
    // Its score of one reading, by hand: r = (216, −11) gives d = (16, 2), z = (336 000,
    // −80 000 + 60 000 = −20 000), z' = z · 2⁻⁸ = (1 312.5 → 1 313, −78.125 → −78) (rounded half
    // up), d²_q = 1 313² + 78² = 1 730 053, d² = 1 730 053 · 2⁻²⁴ = 0.103 120 6...
    let m = ellipsoid_core::FixedModel::<2, 3>::from_blob(&FIXED_GOLDEN).unwrap();
    let s = m.score(&[216, -11]);
    assert_eq!(s.d2, 1_730_053.0f32 / 16_777_216.0);
    // The f32 decoder refuses it: it is for the integer path.
    assert_eq!(
        blob::decode::<2>(&FIXED_GOLDEN),
        Err(blob::DecodeError::Arithmetic { fixed: true })
    );
}
