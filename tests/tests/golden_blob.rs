//! Golden vector: the exact bytes of a small blob. An accidental change to the wire format
//! fails here loudly. `core/FORMAT.md` walks through these same bytes.

use ellipsoid_core::blob::{self, DecodeError};
use ellipsoid_core::{
    AlarmPolicy, BankError, BankParams, DriftSpec, FlashBank, ModeParams, ModeSelect, Model,
    ModelMeta, ModelParams, Thresholds, WindowError, WindowSpec,
};

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

/// The version 2 worked example of `core/FORMAT.md`: a known-mode bank of two modes for one raw
/// feature (`pump_flow`, its window mean log-transformed), a window of 4 with differences
/// (`M = 2`) and drift. These bytes are the output of `tests/golden/bank_v2_golden.py`, which
/// writes the blob from the same parameters with Python's `struct` and `zlib.crc32` alone, an
/// encoder independent of the core's.
const BANK_GOLDEN: [u8; 136] = [
    0x45, 0x4c, 0x53, 0x44, 0x02, 0x01, 0x00, 0x00, 0x88, 0x00, 0xee, 0xff, 0x83, 0x06, 0x80, 0xf2,
    0xd6, 0xca, 0x06, 0x04, 0x01, 0x73, 0xf4, 0x0b, 0x51, 0x01, 0x02, 0x04, 0x03, 0x00, 0x00, 0x20,
    0x40, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x80, 0x40, 0x00, 0x00, 0x00, 0x40, 0x00, 0x00, 0x00,
    0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x80, 0x3f, 0x00, 0x00, 0x80, 0x3e, 0x00, 0x00, 0x80,
    0x3f, 0x64, 0x5d, 0x13, 0x41, 0x5e, 0xba, 0xbf, 0x40, 0x00, 0x00, 0x40, 0x40, 0x00, 0x00, 0x00,
    0x00, 0x00, 0x00, 0x00, 0x41, 0x00, 0x00, 0x80, 0x3f, 0x00, 0x00, 0x00, 0x3e, 0x00, 0x00, 0x00,
    0x00, 0x00, 0x00, 0x80, 0x3f, 0x00, 0x00, 0x00, 0xbf, 0x00, 0x00, 0xc0, 0x3f, 0x64, 0x5d, 0x13,
    0x41, 0x5e, 0xba, 0xbf, 0x40, 0x00, 0x00, 0x80, 0x3d, 0x00, 0x00, 0x00, 0x3e, 0x00, 0x00, 0x00,
    0x3f, 0x03, 0xac, 0x02, 0x9f, 0x25, 0x8b, 0xeb,
];

fn bank_golden_modes() -> [ModeParams<2>; 2] {
    let thresholds = Thresholds {
        alarm: 9.2103,
        clear: 5.9915,
    };
    [
        ModeParams {
            offset: [2.5, 0.0],
            scale: [4.0, 2.0],
            mean: [0.0, 0.0],
            w: [[1.0, 0.0], [0.25, 1.0]],
            thresholds,
        },
        ModeParams {
            offset: [3.0, 0.0],
            scale: [8.0, 1.0],
            mean: [0.125, 0.0],
            w: [[1.0, 0.0], [-0.5, 1.5]],
            thresholds,
        },
    ]
}

fn bank_golden_params(modes: &[ModeParams<2>]) -> BankParams<'_, 1, 2> {
    BankParams {
        meta: ModelMeta {
            model_id: 0x00C0_FFEE,
            trained_at: 1_767_225_600,
            sequence: 4,
        },
        log_mask: 0b1,
        select: ModeSelect::Known,
        modes,
        window: WindowSpec {
            length: 4,
            differences: true,
        },
        drift: Some(DriftSpec {
            rate: 0.0625,
            bound: [0.125, 0.5],
        }),
        policy: AlarmPolicy {
            raise_after: 3,
            clear_after: 300,
            latch: false,
        },
        names_digest: blob::names_digest(["pump_flow"]),
    }
}

#[test]
fn bank_golden_bytes_are_pinned() {
    let modes = bank_golden_modes();
    let p = bank_golden_params(&modes);
    let mut buf = [0u8; blob::max_bank_len(1, 2, 2, true)];
    let n = blob::encode_bank(&p, &mut buf).unwrap();
    let hex: Vec<String> = buf[..n].iter().map(|b| format!("0x{b:02x}")).collect();
    assert_eq!(
        &buf[..n],
        &BANK_GOLDEN[..],
        "bank blob bytes changed: {}",
        hex.join(", ")
    );
    // The names digest: Python's zlib.crc32(b"pump_flow\n") is 0x510bf473.
    assert_eq!(p.names_digest, 0x510b_f473);
    // CRC of the first 132 bytes, as zlib.crc32 gives it (the script prints 0xeb8b259f).
    assert_eq!(blob::checksum(&BANK_GOLDEN[..132]), 0xeb8b_259f);
}

#[test]
fn bank_golden_bytes_decode_to_the_bank() {
    let bank = FlashBank::<1, 2>::from_blob(&BANK_GOLDEN).unwrap();
    let modes = bank_golden_modes();
    let mut out = bank_golden_modes();
    assert_eq!(bank.params(&mut out), Some(bank_golden_params(&modes)));
    assert_eq!(bank.version(), 2);
    assert_eq!(bank.names_digest(), Some(0x510b_f473));
    // The single-model readers refuse it by its version; readers of another shape by theirs.
    assert_eq!(
        Model::<1>::from_blob(&BANK_GOLDEN),
        Err(DecodeError::Version { found: 2 })
    );
    assert_eq!(
        FlashBank::<1, 1>::from_blob(&BANK_GOLDEN),
        Err(DecodeError::Bank(BankError::Window(WindowError::Shape {
            n: 1,
            m: 1,
            differences: true
        })))
    );
    assert!(matches!(
        FlashBank::<2, 4>::from_blob(&BANK_GOLDEN),
        Err(DecodeError::Dimension {
            found: 1,
            expected: 2
        })
    ));
    // The version 1 golden blob reads as a bank of one.
    let v1 = FlashBank::<2, 2>::from_blob(&GOLDEN).unwrap();
    assert_eq!((v1.version(), v1.modes(), v1.names_digest()), (1, 1, None));
    assert!(v1.drift().is_none() && v1.latch());
}
