//! The checks of the `decode_score` fuzz target, and the input layout its seeds are written in.
//!
//! One input drives one of two paths, chosen by its first byte (the control byte):
//!
//! ```text
//! control bits 0-2  N, an index into DIMS (1, 2, 3, 4, 5, 8, 16, 32)
//! control bit 3     blob path only: reseal (write the length field and the CRC) before decoding
//! control bit 4     0 = blob path, 1 = parameter path
//! control bit 5     parameter path only: one element above the diagonal of W is set
//!
//! blob path:       u16 LE blob length L, L blob bytes, then readings (N f32 LE each)
//! parameter path:  the fields of ModelParams<N> (see `params_from`), then readings
//! ```
//!
//! The blob path feeds bytes to the decoder; resealing lets mutations of the body get past the
//! CRC to the parser and the model rules. The parameter path feeds arbitrary `f32` bit patterns
//! to the encoder and `Model::new`, so that it finds parameters the encoder writes but a device
//! refuses. Both then score the readings with any model they got.
//!
//! What must hold (every failure is a panic, which the fuzzer reports):
//!
//! * nothing panics;
//! * `blob::decode` and `Model::from_blob` agree: both succeed with the same parameters, or both
//!   fail with the same error; a blob that decodes is the encoder's own output for those
//!   parameters, byte for byte (one model, one encoding);
//! * `ModelParams::validate`, `blob::encode` and `Model::new` agree, and what encodes decodes back
//!   to the same bits;
//! * a reading with a non-finite value is a fault, and the fault names a feature that is at fault;
//! * a scored reading has a finite, non-negative d² and the verdict of its threshold; `explain`
//!   gives the same d² bits and finite contributions (or its documented fault), and
//!   `log_density` is finite;
//! * the alarm machine's fault line is on exactly for the readings that were not scored.

use ellipsoid_core::blob::{self, DecodeError};
use ellipsoid_core::{
    AlarmMachine, AlarmPolicy, Model, ModelMeta, ModelParams, Preprocess, ReadingFault, Thresholds,
    Verdict,
};

/// The dimensions the control byte selects.
pub const DIMS: [usize; 8] = [1, 2, 3, 4, 5, 8, 16, 32];
/// Control bit: reseal the blob.
pub const RESEAL: u8 = 0x08;
/// Control bit: the parameter path.
pub const PARAMS: u8 = 0x10;
/// Control bit: set one element above the diagonal.
pub const UPPER: u8 = 0x20;
/// At most this many readings are scored per input.
pub const MAX_READINGS: usize = 64;

/// Run every check on one input.
pub fn check(data: &[u8]) {
    let Some((&ctl, rest)) = data.split_first() else {
        return;
    };
    match DIMS[usize::from(ctl & 7)] {
        1 => path::<1>(ctl, rest),
        2 => path::<2>(ctl, rest),
        3 => path::<3>(ctl, rest),
        4 => path::<4>(ctl, rest),
        5 => path::<5>(ctl, rest),
        8 => path::<8>(ctl, rest),
        16 => path::<16>(ctl, rest),
        _ => path::<32>(ctl, rest),
    }
}

fn path<const N: usize>(ctl: u8, data: &[u8]) {
    if ctl & PARAMS != 0 {
        let mut c = Cursor { rest: data };
        let p = params_from::<N>(&mut c, ctl & UPPER != 0);
        if let Some(m) = check_params(&p) {
            score_all(&m, c.rest);
        }
    } else {
        let (len, rest) = match data {
            [a, b, rest @ ..] => (usize::from(u16::from_le_bytes([*a, *b])), rest),
            _ => return,
        };
        let (blob, readings) = rest.split_at(len.min(rest.len()));
        let mut b = blob.to_vec();
        if ctl & RESEAL != 0 {
            reseal(&mut b);
        }
        if let Some(m) = check_blob::<N>(&b) {
            score_all(&m, readings);
        }
    }
}

/// Write the length field and the CRC of `b` as a writer would (if it has room for them).
pub fn reseal(b: &mut [u8]) {
    let len = b.len();
    if len < blob::HEADER_LEN + blob::CRC_LEN {
        return;
    }
    if let Ok(l) = u16::try_from(len) {
        b[8..10].copy_from_slice(&l.to_le_bytes());
    }
    let body_end = len - blob::CRC_LEN;
    let crc = blob::checksum(&b[..body_end]);
    b[body_end..].copy_from_slice(&crc.to_le_bytes());
}

/// Every float and integer of two parameter sets, compared bit for bit (the strict upper
/// triangle of `W` by value: it is not in the blob, and `-0.0` there is accepted as zero).
pub fn same_bits<const N: usize>(a: &ModelParams<N>, b: &ModelParams<N>) -> bool {
    let bits = |x: &[f32], y: &[f32]| x.iter().zip(y).all(|(p, q)| p.to_bits() == q.to_bits());
    let (pa, pb) = (&a.preprocess, &b.preprocess);
    a.meta == b.meta
        && a.policy == b.policy
        && pa.log_mask == pb.log_mask
        && bits(&pa.offset, &pb.offset)
        && bits(&pa.scale, &pb.scale)
        && bits(&a.mean, &b.mean)
        && a.w
            .iter()
            .zip(&b.w)
            .enumerate()
            .all(|(i, (ra, rb))| bits(&ra[..=i], &rb[..=i]) && ra[i + 1..] == rb[i + 1..])
        && bits(
            &[a.thresholds.alarm, a.thresholds.clear],
            &[b.thresholds.alarm, b.thresholds.clear],
        )
}

fn encode<const N: usize>(p: &ModelParams<N>) -> Result<Vec<u8>, blob::EncodeError> {
    let mut buf = vec![0u8; blob::max_len(N)];
    let n = blob::encode(p, &mut buf)?;
    buf.truncate(n);
    Ok(buf)
}

/// The blob checks; the model, if the blob holds a valid one.
fn check_blob<const N: usize>(b: &[u8]) -> Option<Model<N>> {
    let decoded = blob::decode::<N>(b);
    let model = Model::<N>::from_blob(b);
    match (&decoded, &model) {
        (Ok(p), Ok(m)) => {
            assert!(same_bits(p, m.params()), "from_blob kept other parameters");
            assert_eq!(p.validate(), Ok(()), "decode returned invalid parameters");
            let again = encode(p).expect("decoded parameters must encode");
            assert_eq!(
                again, b,
                "a blob that decodes is not the encoder's own output"
            );
            let h = blob::Header::parse(b).expect("a decoded blob has a header");
            assert_eq!(h.len, b.len());
        }
        (Err(d), Err(f)) => {
            assert_eq!(d, f, "decode and from_blob refuse for different reasons");
            if let DecodeError::NonCanonical { offset } = d {
                assert!(*offset >= blob::HEADER_LEN && *offset < b.len() - blob::CRC_LEN);
            }
        }
        (d, f) => panic!(
            "decode and from_blob disagree: decode {:?}, from_blob {:?}",
            d.as_ref().err(),
            f.as_ref().err()
        ),
    }
    model.ok()
}

/// The parameter checks; the model, if the parameters are valid.
fn check_params<const N: usize>(p: &ModelParams<N>) -> Option<Model<N>> {
    let valid = p.validate();
    let model = Model::new(*p);
    let encoded = encode(p);
    assert_eq!(
        model.as_ref().err().copied(),
        valid.err(),
        "Model::new and validate disagree"
    );
    match (&encoded, valid) {
        (Ok(bytes), Ok(())) => {
            let back = blob::decode::<N>(bytes).expect("what encodes must decode");
            assert!(same_bits(&back, p), "the round trip changed a bit");
            let m = Model::<N>::from_blob(bytes).expect("what encodes must compile");
            assert!(same_bits(m.params(), p));
        }
        (Err(blob::EncodeError::Invalid(e)), Err(v)) => assert_eq!(*e, v),
        (e, v) => panic!(
            "encode and validate disagree: encode {:?}, validate {v:?}",
            e.as_ref().err()
        ),
    }
    model.ok()
}

/// Score each reading in `bytes` (N little-endian f32 a reading) and check the results.
fn score_all<const N: usize>(m: &Model<N>, bytes: &[u8]) {
    let mut machine = AlarmMachine::new(m.thresholds(), m.policy());
    let pre = &m.params().preprocess;
    for chunk in bytes.chunks_exact(4 * N).take(MAX_READINGS) {
        let mut x = [0.0f32; N];
        for (xi, c) in x.iter_mut().zip(chunk.chunks_exact(4)) {
            *xi = f32::from_le_bytes([c[0], c[1], c[2], c[3]]);
        }
        let s = m.score(&x);
        let all_finite = x.iter().all(|v| v.is_finite());
        match &s {
            Ok(sc) => {
                assert!(all_finite, "a non-finite reading was scored: {x:?}");
                assert!(sc.d2.is_finite() && sc.d2 >= 0.0, "d2 {} for {x:?}", sc.d2);
                let above = sc.d2 > m.thresholds().alarm;
                assert_eq!(sc.verdict == Verdict::Above, above);
                let lp = m.log_density(&x).expect("a scored reading has a density");
                assert!(lp.is_finite(), "log density {lp} for {x:?}");
            }
            Err(ReadingFault::NotFinite { feature }) => {
                assert!(!x[usize::from(*feature)].is_finite(), "{x:?}")
            }
            Err(ReadingFault::LogDomain { feature }) => {
                let i = usize::from(*feature);
                assert!(pre.is_log(i) && x[i] <= 0.0, "{x:?}")
            }
            Err(ReadingFault::Overflow) => assert!(all_finite, "{x:?}"),
            Err(other) => panic!("score gave {other:?}, a fault only explain may give"),
        }
        match (m.explain(&x), &s) {
            (Ok(e), Ok(sc)) => {
                assert_eq!(e.score.d2.to_bits(), sc.d2.to_bits());
                assert_eq!(e.score.verdict, sc.verdict);
                assert!(
                    e.contributions.iter().all(|c| c.is_finite()),
                    "contributions {:?} for {x:?}",
                    e.contributions
                );
            }
            (Err(ReadingFault::ContributionOverflow), Ok(_)) => {}
            (Err(e), Err(f)) => assert_eq!(e, *f),
            (e, f) => panic!("explain {e:?} but score {f:?} for {x:?}"),
        }
        let step = machine.update(&s);
        assert_eq!(step.fault, s.is_err(), "fault line for {s:?}");
    }
}

/// Reads fields from the front of a byte string; zeros once it runs out.
pub struct Cursor<'a> {
    /// What is left.
    pub rest: &'a [u8],
}

impl Cursor<'_> {
    fn bytes<const K: usize>(&mut self) -> [u8; K] {
        let mut out = [0u8; K];
        let k = K.min(self.rest.len());
        out[..k].copy_from_slice(&self.rest[..k]);
        self.rest = &self.rest[k..];
        out
    }
    fn f32(&mut self) -> f32 {
        f32::from_le_bytes(self.bytes())
    }
    fn f32s<const N: usize>(&mut self) -> [f32; N] {
        let mut a = [0.0; N];
        a.iter_mut().for_each(|v| *v = self.f32());
        a
    }
}

/// Parameters from raw bytes, in the order of `params_bytes`: model id (u32), trained at (u64),
/// sequence (u32), log mask (u32), offset, scale, mean (N f32 each), the lower triangle of W row
/// by row, alarm, clear (f32), raise_after, clear_after (u16), latch (u8, bit 0); with `upper`,
/// then one more element above the diagonal: row and column bytes and an f32.
pub fn params_from<const N: usize>(c: &mut Cursor<'_>, upper: bool) -> ModelParams<N> {
    let meta = ModelMeta {
        model_id: u32::from_le_bytes(c.bytes()),
        trained_at: u64::from_le_bytes(c.bytes()),
        sequence: u32::from_le_bytes(c.bytes()),
    };
    let log_mask = u32::from_le_bytes(c.bytes());
    let preprocess = Preprocess {
        log_mask,
        offset: c.f32s(),
        scale: c.f32s(),
    };
    let mean = c.f32s();
    let mut w = [[0.0f32; N]; N];
    for (i, row) in w.iter_mut().enumerate() {
        row[..=i].iter_mut().for_each(|v| *v = c.f32());
    }
    let thresholds = Thresholds {
        alarm: c.f32(),
        clear: c.f32(),
    };
    let policy = AlarmPolicy {
        raise_after: u16::from_le_bytes(c.bytes()),
        clear_after: u16::from_le_bytes(c.bytes()),
        latch: c.bytes::<1>()[0] & 1 == 1,
    };
    if upper {
        let [r, k] = c.bytes::<2>();
        let (r, k) = (usize::from(r) % N, usize::from(k) % N);
        let v = c.f32();
        if k > r {
            w[r][k] = v;
        }
    }
    ModelParams {
        meta,
        preprocess,
        mean,
        w,
        thresholds,
        policy,
    }
}

/// The bytes `params_from` reads back to `p` (without the optional upper element).
pub fn params_bytes<const N: usize>(p: &ModelParams<N>) -> Vec<u8> {
    let mut out = Vec::new();
    out.extend_from_slice(&p.meta.model_id.to_le_bytes());
    out.extend_from_slice(&p.meta.trained_at.to_le_bytes());
    out.extend_from_slice(&p.meta.sequence.to_le_bytes());
    out.extend_from_slice(&p.preprocess.log_mask.to_le_bytes());
    let floats = p
        .preprocess
        .offset
        .iter()
        .chain(&p.preprocess.scale)
        .chain(&p.mean)
        .chain(p.w.iter().enumerate().flat_map(|(i, row)| &row[..=i]))
        .chain([&p.thresholds.alarm, &p.thresholds.clear]);
    for v in floats {
        out.extend_from_slice(&v.to_le_bytes());
    }
    out.extend_from_slice(&p.policy.raise_after.to_le_bytes());
    out.extend_from_slice(&p.policy.clear_after.to_le_bytes());
    out.push(u8::from(p.policy.latch));
    out
}

/// A valid model of `N` features for the seeds: a banded factor, offsets and scales of several
/// magnitudes, every third feature log-transformed.
pub fn seed_params<const N: usize>() -> ModelParams<N> {
    let mut w = [[0.0f32; N]; N];
    for (i, row) in w.iter_mut().enumerate() {
        row[i] = 1.0 + 0.1 * i as f32;
        if i > 0 {
            row[i - 1] = -0.3;
        }
    }
    let mut log_mask = 0u32;
    for i in (2..N).step_by(3) {
        log_mask |= 1 << i;
    }
    let mut offset = [0.0f32; N];
    let mut scale = [1.0f32; N];
    for i in 0..N {
        offset[i] = if log_mask >> i & 1 == 1 {
            0.5
        } else {
            10.0 * i as f32
        };
        scale[i] = 0.25 + 0.5 * (i % 4) as f32;
    }
    ModelParams {
        meta: ModelMeta {
            model_id: 0x0F00_0000 | N as u32,
            trained_at: 1_767_225_600,
            sequence: 1,
        },
        preprocess: Preprocess {
            log_mask,
            offset,
            scale,
        },
        mean: [0.0; N],
        w,
        thresholds: Thresholds {
            alarm: 2.0 * N as f32 + 6.0,
            clear: 2.0 * N as f32,
        },
        policy: AlarmPolicy {
            raise_after: 2,
            clear_after: 3,
            latch: false,
        },
    }
}

/// A few readings of `N` features for the seeds: at the offsets, off them, one with a dropout.
pub fn seed_readings<const N: usize>(p: &ModelParams<N>) -> Vec<u8> {
    let mut out = Vec::new();
    for k in 0..4 {
        for i in 0..N {
            let base = if p.preprocess.is_log(i) {
                1.5
            } else {
                p.preprocess.offset[i]
            };
            let v = match k {
                0 => base,
                1 => base + 0.5,
                2 => base * 3.0 + 7.0,
                _ if i == N - 1 => f32::NAN,
                _ => base,
            };
            out.extend_from_slice(&v.to_le_bytes());
        }
    }
    out
}

/// An input of the blob path: control byte, length, blob, readings.
pub fn blob_input(ctl: u8, blob: &[u8], readings: &[u8]) -> Vec<u8> {
    let mut out = vec![ctl];
    out.extend_from_slice(&(blob.len() as u16).to_le_bytes());
    out.extend_from_slice(blob);
    out.extend_from_slice(readings);
    out
}

/// The index of `n` in [`DIMS`].
pub fn dim_index(n: usize) -> u8 {
    DIMS.iter()
        .position(|d| *d == n)
        .expect("a fuzzed dimension") as u8
}
