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
