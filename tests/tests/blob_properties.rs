//! Property tests of the blob: round-trips bit for bit; every single-bit flip and every
//! truncation of a valid blob is rejected; random bytes never panic the decoder.

use ellipsoid_core::blob::{self, DecodeError};
use ellipsoid_core::{
    AlarmPolicy, CompactModel, FlashModel, Model, ModelMeta, ModelParams, Preprocess, Thresholds,
};
use proptest::prelude::*;

/// Any valid parameters of dimension N (finite values, positive diagonal and scales, ordered thresholds).
fn params<const N: usize>() -> impl Strategy<Value = ModelParams<N>> {
    let f = || -1.0e3f32..1.0e3;
    let pos = || 1.0e-3f32..1.0e3;
    (
        (any::<u32>(), any::<u64>(), any::<u32>()),
        any::<u32>(),
        proptest::array::uniform::<_, N>(f()),
        proptest::array::uniform::<_, N>(pos()),
        proptest::array::uniform::<_, N>(f()),
        proptest::array::uniform::<_, N>(proptest::array::uniform::<_, N>(f())),
        proptest::array::uniform::<_, N>(pos()),
        (1.0e-3f32..1.0e4, 0.0f32..=1.0),
        (1u16..=3600, 1u16..=3600, any::<bool>()),
    )
        .prop_map(
            |(
                (id, at, seq),
                mask,
                offset,
                scale,
                mean,
                raw_w,
                diag,
                (alarm, frac),
                (k, m, latch),
            )| {
                let mut w = [[0.0f32; N]; N];
                for i in 0..N {
                    for j in 0..i {
                        w[i][j] = raw_w[i][j];
                    }
                    w[i][i] = diag[i];
                }
                let log_mask = if N >= 32 {
                    mask
                } else {
                    mask & ((1u32 << N) - 1)
                };
                ModelParams {
                    meta: ModelMeta {
                        model_id: id,
                        trained_at: at,
                        sequence: seq,
                    },
                    preprocess: Preprocess {
                        log_mask,
                        offset,
                        scale,
                    },
                    mean,
                    w,
                    thresholds: Thresholds {
                        alarm,
                        clear: alarm * frac,
                    },
                    policy: AlarmPolicy {
                        raise_after: k,
                        clear_after: m,
                        latch,
                    },
                }
            },
        )
}

fn encode<const N: usize>(p: &ModelParams<N>) -> Vec<u8> {
    let mut buf = vec![0u8; blob::max_len(N)];
    let n = blob::encode(p, &mut buf).expect("valid params encode");
    buf.truncate(n);
    buf
}

macro_rules! blob_props {
    ($($name:ident = $n:literal),*) => {$(
        mod $name {
            use super::*;
            proptest! {
                #![proptest_config(ProptestConfig::with_cases(64))]

                #[test]
                fn round_trip_is_bit_exact(p in params::<$n>()) {
                    let bytes = encode(&p);
                    prop_assert!(bytes.len() <= blob::max_len($n));
                    let back = blob::decode::<$n>(&bytes).unwrap();
                    // Bit for bit: re-encoding gives the same bytes, and every float keeps its bits.
                    prop_assert_eq!(encode(&back), bytes.clone());
                    for i in 0..$n {
                        prop_assert_eq!(back.mean[i].to_bits(), p.mean[i].to_bits());
                        prop_assert_eq!(back.preprocess.offset[i].to_bits(), p.preprocess.offset[i].to_bits());
                        prop_assert_eq!(back.preprocess.scale[i].to_bits(), p.preprocess.scale[i].to_bits());
                        for j in 0..$n {
                            prop_assert_eq!(back.w[i][j].to_bits(), p.w[i][j].to_bits());
                        }
                    }
                    prop_assert_eq!(back, p);
                }

                #[test]
                fn every_bit_flip_is_rejected(p in params::<$n>()) {
                    let bytes = encode(&p);
                    let mut b = bytes.clone();
                    for bit in 0..bytes.len() * 8 {
                        b[bit / 8] ^= 1 << (bit % 8);
                        let r = blob::decode::<$n>(&b);
                        prop_assert!(r.is_err(), "flip of bit {} accepted", bit);
                        prop_assert!(Model::<$n>::from_blob(&b).is_err());
                        b[bit / 8] ^= 1 << (bit % 8);
                    }
                    prop_assert_eq!(&b, &bytes);
                }

                #[test]
                fn every_truncation_is_rejected(p in params::<$n>()) {
                    let bytes = encode(&p);
                    for len in 0..bytes.len() {
                        prop_assert!(blob::decode::<$n>(&bytes[..len]).is_err(), "prefix {} accepted", len);
                    }
                    // And a blob with bytes appended is refused too: the length must be exact.
                    let mut longer = bytes.clone();
                    longer.push(0);
                    prop_assert!(blob::decode::<$n>(&longer).is_err());
                }
            }

            proptest! {
                // Each case decodes every single-bit flip twice over (sealed and resealed), so
                // fewer cases than above keep the suite's time in check.
                #![proptest_config(ProptestConfig::with_cases(16))]

                /// The flash-resident check refuses exactly what `decode` refuses, with the same
                /// error: every single-bit flip, resealed with a correct CRC so that it reaches the
                /// body and the rules, and the unsealed flips too. And what it accepts scores as
                /// the full model does, to the bit.
                #[test]
                fn flash_check_matches_decode(p in params::<$n>(), x in proptest::array::uniform::<_, $n>(-2.0e3f32..2.0e3)) {
                    let bytes = encode(&p);
                    let flash = FlashModel::<$n>::from_blob(&bytes).unwrap();
                    let full = Model::<$n>::from_blob(&bytes).unwrap();
                    let compact = CompactModel::<$n, { ellipsoid_core::tri($n) }>::from_blob(&bytes).unwrap();
                    let s = full.score(&x).map(|s| s.d2.to_bits());
                    prop_assert_eq!(flash.score(&x).map(|s| s.d2.to_bits()), s);
                    prop_assert_eq!(compact.score(&x).map(|s| s.d2.to_bits()), s);
                    prop_assert_eq!(flash.meta(), full.meta());
                    prop_assert_eq!(flash.policy(), full.policy());
                    prop_assert_eq!(flash.thresholds(), full.thresholds());
                    let body_end = bytes.len() - blob::CRC_LEN;
                    for bit in 0..bytes.len() * 8 {
                        let mut b = bytes.clone();
                        b[bit / 8] ^= 1 << (bit % 8);
                        prop_assert_eq!(FlashModel::<$n>::from_blob(&b).err(), blob::decode::<$n>(&b).err());
                        if bit / 8 >= blob::HEADER_LEN && bit / 8 < body_end {
                            let crc = blob::checksum(&b[..body_end]);
                            b[body_end..].copy_from_slice(&crc.to_le_bytes());
                            let want = blob::decode::<$n>(&b).map(|_| ());
                            prop_assert_eq!(FlashModel::<$n>::from_blob(&b).map(|_| ()), want);
                        }
                    }
                }

            }
        }
    )*};
}

blob_props!(n1 = 1, n3 = 3, n5 = 5, n8 = 8, n16 = 16);

proptest! {
    #![proptest_config(ProptestConfig::with_cases(2000))]

    /// Random bytes: the decoder returns an error and never panics.
    #[test]
    fn random_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..400)) {
        let _ = blob::Header::parse(&bytes);
        // A random 32-bit CRC and magic match by chance about once in 2⁶⁴ tries.
        prop_assert!(blob::decode::<4>(&bytes).is_err());
        prop_assert!(Model::<4>::from_blob(&bytes).is_err());
    }

    /// Random bodies behind a well-formed header and a correct CRC reach the body parser and the
    /// validation: they never panic, and whatever decodes is a valid model.
    #[test]
    fn random_bodies_with_valid_crc_never_panic(body in proptest::collection::vec(any::<u8>(), 0..200), latch in any::<bool>()) {
        let len = blob::HEADER_LEN + body.len() + blob::CRC_LEN;
        let mut b = Vec::with_capacity(len);
        b.extend_from_slice(&blob::MAGIC);
        b.extend_from_slice(&[blob::VERSION, 2, u8::from(latch), 0]);
        b.extend_from_slice(&(len as u16).to_le_bytes());
        b.extend_from_slice(&body);
        let crc = blob::checksum(&b);
        b.extend_from_slice(&crc.to_le_bytes());
        prop_assert_eq!(
            FlashModel::<2>::from_blob(&b).map(|_| ()),
            blob::decode::<2>(&b).map(|_| ())
        );
        match blob::decode::<2>(&b) {
            Ok(p) => prop_assert!(p.validate().is_ok()),
            Err(e) => {
                let body_or_rule = matches!(
                    e,
                    DecodeError::Body
                        | DecodeError::NonCanonical { .. }
                        | DecodeError::TrailingBytes
                        | DecodeError::Invalid(_)
                );
                prop_assert!(body_or_rule, "{:?}", e);
            }
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Version 2: the model bank.

use ellipsoid_core::{
    AlarmMachine, BankParams, DriftSpec, FlashBank, ModeParams, ModeSelect, Tracker, WindowSpec,
};

/// A bank's parameters, owned (a `BankParams` borrows its modes).
#[derive(Clone, Debug)]
struct OwnedBank<const M: usize> {
    meta: ModelMeta,
    log_mask: u32,
    select: ModeSelect,
    modes: Vec<ModeParams<M>>,
    length: u8,
    drift: Option<DriftSpec<M>>,
    policy: AlarmPolicy,
    names_digest: u32,
}

impl<const M: usize> OwnedBank<M> {
    fn params<const N: usize>(&self) -> BankParams<'_, N, M> {
        BankParams {
            meta: self.meta,
            log_mask: self.log_mask,
            select: self.select,
            modes: &self.modes,
            window: WindowSpec {
                length: self.length,
                differences: M == 2 * N,
            },
            drift: self.drift,
            policy: self.policy,
            names_digest: self.names_digest,
        }
    }
}

/// Any valid bank of `N` raw and `M` scored features: 1 to 3 modes, each any valid model of `M`
/// features, a log mask on the raw features only, any window length, drift or not.
fn bank<const N: usize, const M: usize>() -> impl Strategy<Value = OwnedBank<M>> {
    (
        proptest::collection::vec(params::<M>(), 1..=3),
        any::<u32>(),
        any::<bool>(),
        1u8..=16,
        proptest::option::of((
            1.0e-4f32..0.9999,
            proptest::array::uniform::<_, M>(1.0e-3f32..1.0e3),
        )),
        any::<u32>(),
    )
        .prop_map(|(models, mask, known, length, drift, digest)| {
            let first = models[0];
            OwnedBank {
                meta: first.meta,
                log_mask: if N >= 32 {
                    mask
                } else {
                    mask & ((1u32 << N) - 1)
                },
                select: if known {
                    ModeSelect::Known
                } else {
                    ModeSelect::Nearest
                },
                modes: models
                    .iter()
                    .map(|p| ModeParams {
                        offset: p.preprocess.offset,
                        scale: p.preprocess.scale,
                        mean: p.mean,
                        w: p.w,
                        thresholds: p.thresholds,
                    })
                    .collect(),
                length,
                drift: drift.map(|(rate, bound)| DriftSpec { rate, bound }),
                policy: first.policy,
                names_digest: digest,
            }
        })
}

fn encode_bank<const N: usize, const M: usize>(p: &BankParams<'_, N, M>) -> Vec<u8> {
    let mut buf = vec![0u8; blob::max_bank_len(N, M, p.modes.len(), p.drift.is_some())];
    let n = blob::encode_bank(p, &mut buf).expect("a valid bank encodes");
    buf.truncate(n);
    buf
}

/// What a decoder accepted, written again: for a version 2 blob, the same bytes. (Every field
/// is stored bit for bit or as a canonical varint, so a blob that decodes has exactly one
/// encoding, and encode and decode hold it to the same rules.)
fn reencoded<const N: usize, const M: usize>(b: &FlashBank<'_, N, M>) -> Vec<u8> {
    let mut modes = vec![b.mode_params(0).unwrap(); b.modes()];
    let p = b.params(&mut modes).unwrap();
    encode_bank(&p)
}

macro_rules! bank_props {
    ($($name:ident = ($n:literal, $m:literal, $cases:literal)),*) => {$(
        mod $name {
            use super::*;
            proptest! {
                // Each case decodes every single-bit flip of a blob of up to three modes,
                // twice over: few cases keep the suite's time in check.
                #![proptest_config(ProptestConfig::with_cases($cases))]

                /// encode → decode gives the parameters back, and re-encoding the same bytes; a
                /// Tracker on it takes any readings (bad ones too) without a panic and never
                /// scores a non-finite d².
                #[test]
                fn bank_round_trip_is_bit_exact(
                    o in bank::<$n, $m>(),
                    xs in proptest::collection::vec(proptest::array::uniform::<_, $n>(
                        prop_oneof![8 => -2.0e3f32..2.0e3, 1 => Just(f32::NAN), 1 => Just(0.0f32)]), 0..40),
                    modes in proptest::collection::vec(proptest::option::of(0u8..4), 40),
                ) {
                    let p = o.params::<$n>();
                    let bytes = encode_bank(&p);
                    prop_assert!(bytes.len() <= blob::max_bank_len($n, $m, p.modes.len(), p.drift.is_some()));
                    let b = FlashBank::<$n, $m>::from_blob(&bytes).unwrap();
                    let mut out = o.modes.clone();
                    prop_assert_eq!(b.params(&mut out), Some(p));
                    prop_assert_eq!(reencoded(&b), bytes.clone());
                    let mut t = Tracker::<$n, $m>::from_blob(&bytes).unwrap();
                    for (x, k) in xs.iter().zip(&modes) {
                        let s = t.step(x, *k);
                        if let Ok(s) = s.score {
                            prop_assert!(s.d2.is_finite() && usize::from(s.mode) < p.modes.len());
                        }
                        prop_assert_eq!(s.step.fault, s.score.is_err());
                    }
                }

                /// Every single-bit flip of a bank blob is refused (by the header checks or the
                /// CRC); resealed with a correct CRC, whatever still decodes is a bank the encoder
                /// writes to the same bytes.
                #[test]
                fn every_bank_bit_flip_is_rejected(o in bank::<$n, $m>()) {
                    let bytes = encode_bank(&o.params::<$n>());
                    let body_end = bytes.len() - blob::CRC_LEN;
                    for bit in 0..bytes.len() * 8 {
                        let mut b = bytes.clone();
                        b[bit / 8] ^= 1 << (bit % 8);
                        prop_assert!(FlashBank::<$n, $m>::from_blob(&b).is_err(), "flip of bit {} accepted", bit);
                        prop_assert!(Tracker::<$n, $m>::from_blob(&b).is_err());
                        if bit / 8 >= blob::HEADER_LEN && bit / 8 < body_end {
                            let crc = blob::checksum(&b[..body_end]);
                            b[body_end..].copy_from_slice(&crc.to_le_bytes());
                            if let Ok(fb) = FlashBank::<$n, $m>::from_blob(&b) {
                                prop_assert_eq!(reencoded(&fb), b.clone());
                            }
                        }
                    }
                    for len in 0..bytes.len() {
                        prop_assert!(FlashBank::<$n, $m>::from_blob(&bytes[..len]).is_err());
                    }
                }
            }
        }
    )*};
}

bank_props!(
    b1 = (1, 1, 16),
    b1d = (1, 2, 16),
    b3 = (3, 3, 12),
    b3d = (3, 6, 8),
    b8 = (8, 8, 4)
);

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// A version 1 blob through the Tracker: FlashModel + AlarmMachine's d², verdict and
    /// steps, bit for bit, on any valid model and readings.
    #[test]
    fn v1_through_the_tracker_is_flash_model_and_alarm_machine(
        p in params::<5>(),
        xs in proptest::collection::vec(proptest::array::uniform::<_, 5>(
            prop_oneof![8 => -2.0e3f32..2.0e3, 1 => Just(f32::NAN), 1 => Just(-1.0f32)]), 1..60),
    ) {
        let bytes = encode(&p);
        let fm = FlashModel::<5>::from_blob(&bytes).unwrap();
        let mut am = AlarmMachine::new(fm.thresholds(), fm.policy());
        let mut t = Tracker::<5, 5>::from_blob(&bytes).unwrap();
        for x in &xs {
            let want = fm.score(x);
            let want_step = am.update(&want);
            let got = t.step(x, None);
            prop_assert_eq!(got.score.map(|s| (s.d2.to_bits(), s.verdict)), want.map(|s| (s.d2.to_bits(), s.verdict)));
            prop_assert_eq!(got.step, want_step);
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(1000))]

    /// Random bytes, and random bodies behind a version 2 header with a correct CRC: the bank
    /// reader never panics, and whatever it accepts the encoder writes to the same bytes.
    #[test]
    fn random_bank_bodies_never_panic(body in proptest::collection::vec(any::<u8>(), 0..200), flags in 0u8..4, raw in proptest::collection::vec(any::<u8>(), 0..200)) {
        prop_assert!(FlashBank::<2, 4>::from_blob(&raw).is_err());
        let len = blob::HEADER_LEN + body.len() + blob::CRC_LEN;
        let mut b = Vec::with_capacity(len);
        b.extend_from_slice(&blob::MAGIC);
        b.extend_from_slice(&[blob::VERSION_BANK, 1, flags, 0]);
        b.extend_from_slice(&(len as u16).to_le_bytes());
        b.extend_from_slice(&body);
        let crc = blob::checksum(&b);
        b.extend_from_slice(&crc.to_le_bytes());
        if let Ok(fb) = FlashBank::<1, 1>::from_blob(&b) {
            prop_assert_eq!(reencoded(&fb), b.clone());
        }
        if let Ok(fb) = FlashBank::<1, 2>::from_blob(&b) {
            prop_assert_eq!(reencoded(&fb), b.clone());
        }
        if flags & blob::FLAG_FIXED != 0 {
            prop_assert_eq!(FlashBank::<1, 1>::from_blob(&b).err(), Some(DecodeError::FixedBank));
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// A version 2 bank of one mode, a window of one and no drift scores as `Model::score` on the
    /// same parameters, bit for bit (the mode, d² bits, verdict and fault).
    #[test]
    fn a_bank_of_one_is_model_score(
        p in params::<8>(),
        xs in proptest::collection::vec(proptest::array::uniform::<_, 8>(
            prop_oneof![8 => -2.0e3f32..2.0e3, 1 => Just(f32::NAN), 1 => Just(0.0f32)]), 1..20),
    ) {
        let mode = ModeParams {
            offset: p.preprocess.offset,
            scale: p.preprocess.scale,
            mean: p.mean,
            w: p.w,
            thresholds: p.thresholds,
        };
        let modes = [mode];
        let bp = BankParams::<8, 8> {
            meta: p.meta,
            log_mask: p.preprocess.log_mask,
            select: ModeSelect::Nearest,
            modes: &modes,
            window: WindowSpec::single(),
            drift: None,
            policy: p.policy,
            names_digest: 7,
        };
        let bytes = encode_bank(&bp);
        let mut t = Tracker::<8, 8>::from_blob(&bytes).unwrap();
        let m = Model::new(p).unwrap();
        for x in &xs {
            let want = m.score(x).map(|s| (0u8, s.d2.to_bits(), s.verdict));
            let got = t.step(x, None).score.map(|s| (s.mode, s.d2.to_bits(), s.verdict));
            prop_assert_eq!(got, want);
        }
    }
}
