//! The model blob: the only thing that crosses from host to device. `core/FORMAT.md` gives the
//! layout byte by byte.
//!
//! ```text
//! offset  size  field
//! 0       4     magic "ELSD"
//! 4       1     format version (1)
//! 5       1     N, the number of features
//! 6       1     flags: bit 0 = latch; other bits 0
//! 7       1     reserved, 0
//! 8       2     total length of the blob in bytes, CRC included (u16, little-endian)
//! 10      ...   body, a postcard stream (see FORMAT.md)
//! len-4   4     CRC-32/ISO-HDLC of bytes 0..len-4 (u32, little-endian)
//! ```
//!
//! [`encode`] writes into a caller's buffer; [`decode`] validates everything and returns
//! [`ModelParams`]; [`crate::Model::from_blob`] decodes and compiles in one step.

use core::fmt;

use serde::{de::DeserializeOwned, Serialize};

use crate::model::Model;
use crate::params::{
    AlarmPolicy, ModelError, ModelMeta, ModelParams, Preprocess, Thresholds, MAX_FEATURES,
};

/// The four bytes a blob starts with.
pub const MAGIC: [u8; 4] = *b"ELSD";
/// The format version of a single model (read by [`decode`], [`crate::Model::from_blob`],
/// [`crate::FlashModel::from_blob`] and the fixed-point reader).
pub const VERSION: u8 = 1;
/// The format version of a model bank ([`encode_bank`], [`crate::bank::FlashBank::from_blob`]).
pub const VERSION_BANK: u8 = 2;
/// Bytes before the body.
pub const HEADER_LEN: usize = 10;
/// Bytes of the trailing CRC.
pub const CRC_LEN: usize = 4;
/// Flag bit: the alarm latches.
pub const FLAG_LATCH: u8 = 0b0000_0001;
/// Flag bit: a fixed-point model for the integer path (`crate::fixed`), with its own body.
pub const FLAG_FIXED: u8 = 0b0000_0010;

/// Bitwise, without a table: a blob is checked once, at boot, and a few hundred bytes take a few
/// thousand instructions this way, while the 256-entry table would cost 1 KiB of flash.
const CRC: crc::Crc<u32, crc::NoTable> = crc::Crc::<u32, crc::NoTable>::new(&crc::CRC_32_ISO_HDLC);

/// The CRC the blob's last four bytes carry, over `bytes`.
pub fn checksum(bytes: &[u8]) -> u32 {
    CRC.checksum(bytes)
}

/// The largest blob a model of `n` features can need (varints at their longest).
pub const fn max_len(n: usize) -> usize {
    // model_id u32 (5) + trained_at u64 (10) + sequence u32 (5) + log_mask u32 (5)
    // + f32 × (3n + n(n+1)/2 + 2) + raise_after, clear_after u16 (3 + 3)
    HEADER_LEN + 25 + 4 * (3 * n + n * (n + 1) / 2 + 2) + 6 + CRC_LEN
}

/// The fixed header, read without checking the CRC. Useful to find a blob's length in a flash slot.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Header {
    /// Format version.
    pub version: u8,
    /// Number of features.
    pub n: u8,
    /// Flag byte.
    pub flags: u8,
    /// Total length in bytes, CRC included.
    pub len: usize,
}

impl Header {
    /// Read the header from the start of `bytes`, which may be longer than the blob.
    /// Checks the magic, version, flags, reserved byte and that the stated length is plausible.
    pub fn parse(bytes: &[u8]) -> Result<Self, DecodeError> {
        let head: &[u8; HEADER_LEN] = bytes
            .get(..HEADER_LEN)
            .and_then(|h| h.try_into().ok())
            .ok_or(DecodeError::TooShort { len: bytes.len() })?;
        let [m0, m1, m2, m3, version, n, flags, reserved, l0, l1] = *head;
        if [m0, m1, m2, m3] != MAGIC {
            return Err(DecodeError::Magic);
        }
        if version != VERSION && version != VERSION_BANK {
            return Err(DecodeError::Version { found: version });
        }
        if flags & !(FLAG_LATCH | FLAG_FIXED) != 0 {
            return Err(DecodeError::Flags { found: flags });
        }
        if reserved != 0 {
            return Err(DecodeError::Reserved { found: reserved });
        }
        let len = usize::from(u16::from_le_bytes([l0, l1]));
        if len < HEADER_LEN + CRC_LEN {
            return Err(DecodeError::Length {
                stated: len,
                actual: bytes.len(),
            });
        }
        Ok(Self {
            version,
            n,
            flags,
            len,
        })
    }
}

/// Why bytes were refused as a blob. Every failure has its own variant.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum DecodeError {
    /// Fewer bytes than a header.
    TooShort {
        /// Bytes given.
        len: usize,
    },
    /// The first four bytes are not [`MAGIC`].
    Magic,
    /// A format version this crate does not read.
    Version {
        /// The version byte found.
        found: u8,
    },
    /// The caller asked for a model of a dimension no blob can describe (0, or more than
    /// [`MAX_FEATURES`]).
    UnsupportedDimension {
        /// N in the blob.
        found: u8,
        /// N the caller asked for.
        requested: usize,
    },
    /// The blob is for another number of features than the firmware was built for.
    Dimension {
        /// N in the blob.
        found: u8,
        /// N the caller asked for.
        expected: u8,
    },
    /// Unknown flag bits.
    Flags {
        /// The flag byte found.
        found: u8,
    },
    /// The reserved header byte is not zero.
    Reserved {
        /// The byte found.
        found: u8,
    },
    /// The length in the header does not match the bytes given.
    Length {
        /// Length the header states.
        stated: usize,
        /// Bytes given.
        actual: usize,
    },
    /// The CRC does not match: the blob is corrupt or torn.
    Crc {
        /// CRC stored in the blob.
        stored: u32,
        /// CRC computed over the bytes.
        computed: u32,
    },
    /// The body could not be read (a varint too long, or the body ended early).
    Body,
    /// A varint in the body is not in its shortest form (it ends in a `0x00` byte after a
    /// continuation byte). Only the canonical form is accepted, so that a model has exactly one
    /// encoding and one CRC.
    NonCanonical {
        /// Offset in the blob of the varint's first byte.
        offset: usize,
    },
    /// The body has bytes left over after the last field.
    TrailingBytes,
    /// The bytes decoded, but the model breaks a rule.
    Invalid(ModelError),
    /// The blob is for the other arithmetic: a fixed-point blob (header flag bit 1) given to the
    /// `f32` decoder, or an `f32` blob given to the fixed-point one.
    Arithmetic {
        /// Whether the blob is fixed-point.
        fixed: bool,
    },
    /// The fixed-point blob decoded, but its model breaks a rule.
    Fixed(crate::fixed::FixedError),
    /// A version 2 blob (a model bank) with the fixed-point flag: the fixed-point path has no
    /// bank.
    FixedBank,
    /// The bank blob's bytes decoded, but the bank breaks a rule (or does not fit the `N` and `M`
    /// the caller was built for).
    Bank(crate::bank::BankError),
}

impl fmt::Display for DecodeError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            DecodeError::TooShort { len } => {
                write!(f, "{len} bytes is shorter than a blob header")
            }
            DecodeError::Magic => f.write_str("not a model blob (bad magic)"),
            DecodeError::Version { found: VERSION_BANK } => f.write_str(
                "blob format version 2 holds a model bank: read it with the bank reader \
                 (bank::FlashBank or track::Tracker), not as a single model",
            ),
            DecodeError::Version { found } => {
                write!(f, "blob format version {found} is not supported (this build reads {VERSION} and {VERSION_BANK})")
            }
            DecodeError::UnsupportedDimension { found, requested } => {
                if usize::from(*found) == *requested {
                    write!(f, "blob has {found} features; models have 1 to {MAX_FEATURES}")
                } else {
                    write!(
                        f,
                        "blob has {found} features, and the {requested} asked for is outside \
                         the 1 to {MAX_FEATURES} models have"
                    )
                }
            }
            DecodeError::Dimension { found, expected } => {
                write!(f, "blob has {found} features, expected {expected}")
            }
            DecodeError::Flags { found } => write!(f, "unknown flags {found:#04x} in blob header"),
            DecodeError::Reserved { found } => {
                write!(f, "reserved header byte is {found:#04x}, not 0")
            }
            DecodeError::Length { stated, actual } => {
                write!(f, "blob header states {stated} bytes but {actual} were given")
            }
            DecodeError::Crc { stored, computed } => write!(
                f,
                "CRC mismatch: blob says {stored:#010x}, bytes give {computed:#010x} (corrupt or torn)"
            ),
            DecodeError::Body => f.write_str("blob body is malformed"),
            DecodeError::NonCanonical { offset } => write!(
                f,
                "the varint at byte {offset} of the blob is not in its shortest form"
            ),
            DecodeError::TrailingBytes => f.write_str("blob body has bytes after its last field"),
            DecodeError::Invalid(e) => write!(f, "blob holds an invalid model: {e}"),
            DecodeError::Arithmetic { fixed: true } => {
                f.write_str("blob holds a fixed-point model; this build scores f32 models")
            }
            DecodeError::Arithmetic { fixed: false } => {
                f.write_str("blob holds an f32 model; this build scores fixed-point models")
            }
            DecodeError::Fixed(e) => write!(f, "blob holds an invalid fixed-point model: {e}"),
            DecodeError::FixedBank => f.write_str(
                "a version 2 blob (a model bank) cannot be fixed-point: the fixed-point path has no bank",
            ),
            DecodeError::Bank(e) => write!(f, "blob holds an invalid model bank: {e}"),
        }
    }
}

impl core::error::Error for DecodeError {
    fn source(&self) -> Option<&(dyn core::error::Error + 'static)> {
        match self {
            DecodeError::Invalid(e) => Some(e),
            DecodeError::Bank(e) => Some(e),
            _ => None,
        }
    }
}

impl From<ModelError> for DecodeError {
    fn from(e: ModelError) -> Self {
        DecodeError::Invalid(e)
    }
}

/// Why a model could not be encoded.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum EncodeError {
    /// The buffer is too small; [`max_len`] always suffices.
    BufferTooSmall {
        /// Bytes the buffer has.
        capacity: usize,
    },
    /// The parameters break a rule, so no device would accept them.
    Invalid(ModelError),
    /// The fixed-point parameters break a rule.
    InvalidFixed(crate::fixed::FixedError),
    /// The bank's parameters break a rule, so no device would accept them.
    InvalidBank(crate::bank::BankError),
}

impl fmt::Display for EncodeError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            EncodeError::BufferTooSmall { capacity } => {
                write!(f, "a buffer of {capacity} bytes is too small for the blob")
            }
            EncodeError::Invalid(e) => write!(f, "cannot encode an invalid model: {e}"),
            EncodeError::InvalidFixed(e) => {
                write!(f, "cannot encode an invalid fixed-point model: {e}")
            }
            EncodeError::InvalidBank(e) => write!(f, "cannot encode an invalid model bank: {e}"),
        }
    }
}

impl core::error::Error for EncodeError {}

pub(crate) struct Writer<'a> {
    buf: &'a mut [u8],
    pos: usize,
}

impl<'a> Writer<'a> {
    pub(crate) fn new(buf: &'a mut [u8], pos: usize) -> Self {
        Self { buf, pos }
    }

    /// Raw bytes.
    pub(crate) fn bytes(&mut self, b: &[u8]) -> Result<(), EncodeError> {
        let capacity = self.buf.len();
        let end = self.pos + b.len();
        self.buf
            .get_mut(self.pos..end)
            .ok_or(EncodeError::BufferTooSmall { capacity })?
            .copy_from_slice(b);
        self.pos = end;
        Ok(())
    }

    /// Write the header in front of the body written so far and the CRC after it.
    pub(crate) fn seal(self, n: u8, flags: u8) -> Result<usize, EncodeError> {
        self.seal_as(VERSION, n, flags)
    }

    /// [`Self::seal`] with the given version byte.
    pub(crate) fn seal_as(self, version: u8, n: u8, flags: u8) -> Result<usize, EncodeError> {
        let capacity = self.buf.len();
        let too_small = EncodeError::BufferTooSmall { capacity };
        let body_end = self.pos;
        let len = body_end + CRC_LEN;
        let len16 = u16::try_from(len).map_err(|_| too_small)?;
        let buf = self.buf;
        let [l0, l1] = len16.to_le_bytes();
        let head = [
            MAGIC[0], MAGIC[1], MAGIC[2], MAGIC[3], version, n, flags, 0, l0, l1,
        ];
        buf.get_mut(..HEADER_LEN)
            .ok_or(too_small)?
            .copy_from_slice(&head);
        let crc = checksum(buf.get(..body_end).ok_or(too_small)?);
        buf.get_mut(body_end..len)
            .ok_or(too_small)?
            .copy_from_slice(&crc.to_le_bytes());
        Ok(len)
    }

    pub(crate) fn put<T: Serialize>(&mut self, value: &T) -> Result<(), EncodeError> {
        let capacity = self.buf.len();
        let rest = self
            .buf
            .get_mut(self.pos..)
            .ok_or(EncodeError::BufferTooSmall { capacity })?;
        let used = postcard::to_slice(value, rest)
            .map_err(|_| EncodeError::BufferTooSmall { capacity })?
            .len();
        self.pos += used;
        Ok(())
    }

    pub(crate) fn put_all(&mut self, values: &[f32]) -> Result<(), EncodeError> {
        values.iter().try_for_each(|v| self.put(v))
    }
}

/// Encode validated parameters into `buf`; returns the blob's length.
pub fn encode<const N: usize>(
    params: &ModelParams<N>,
    buf: &mut [u8],
) -> Result<usize, EncodeError> {
    params.validate().map_err(EncodeError::Invalid)?;
    let mut w = Writer::new(buf, HEADER_LEN);
    let (m, p, t, pol) = (
        &params.meta,
        &params.preprocess,
        &params.thresholds,
        &params.policy,
    );
    w.put(&m.model_id)?;
    w.put(&m.trained_at)?;
    w.put(&m.sequence)?;
    w.put(&p.log_mask)?;
    w.put_all(&p.offset)?;
    w.put_all(&p.scale)?;
    w.put_all(&params.mean)?;
    for (i, row) in params.w.iter().enumerate() {
        w.put_all(row.get(..=i).unwrap_or(row))?;
    }
    w.put(&t.alarm)?;
    w.put(&t.clear)?;
    w.put(&pol.raise_after)?;
    w.put(&pol.clear_after)?;
    let flags = if pol.latch { FLAG_LATCH } else { 0 };
    w.seal(N as u8, flags)
}

pub(crate) struct Reader<'a> {
    rest: &'a [u8],
    /// Offset in the blob of `rest[0]`.
    offset: usize,
}

impl<'a> Reader<'a> {
    /// The next `len` bytes, in place.
    pub(crate) fn slice(&mut self, len: usize) -> Result<&'a [u8], DecodeError> {
        if self.rest.len() < len {
            return Err(DecodeError::Body);
        }
        let (head, rest) = self.rest.split_at(len);
        self.rest = rest;
        self.offset += len;
        Ok(head)
    }

    fn take<T: DeserializeOwned>(&mut self) -> Result<(T, &[u8]), DecodeError> {
        let before = self.rest;
        let (value, rest) = postcard::take_from_bytes(before).map_err(|_| DecodeError::Body)?;
        let used = before.len() - rest.len();
        self.rest = rest;
        self.offset += used;
        Ok((value, before.get(..used).unwrap_or(before)))
    }

    /// An unsigned varint (LEB128, as postcard writes it), in its shortest form only. postcard's
    /// reader refuses a varint too long for its type or with bits beyond it, but accepts padding:
    /// `83 00` reads as 3. A varint of more than one byte is the shortest form exactly when its
    /// last byte is not zero.
    pub(crate) fn varint<T: DeserializeOwned>(&mut self) -> Result<T, DecodeError> {
        let offset = self.offset;
        let (value, bytes) = self.take()?;
        if let [_, .., 0] = bytes {
            return Err(DecodeError::NonCanonical { offset });
        }
        Ok(value)
    }

    /// The next `K` raw bytes.
    pub(crate) fn array<const K: usize>(&mut self) -> Result<[u8; K], DecodeError> {
        let (head, rest) = self
            .rest
            .split_first_chunk::<K>()
            .ok_or(DecodeError::Body)?;
        self.rest = rest;
        self.offset += K;
        Ok(*head)
    }

    /// The body must end here.
    pub(crate) fn finish(&self) -> Result<(), DecodeError> {
        if self.rest.is_empty() {
            Ok(())
        } else {
            Err(DecodeError::TrailingBytes)
        }
    }
}

/// The checks every blob gets before its body, in FORMAT.md's order (header, `N`, length, CRC),
/// and a reader at the start of the body. `fixed`: which arithmetic the caller scores with; a
/// blob for the other is refused ([`DecodeError::Arithmetic`]) right after the header.
pub(crate) fn open<const N: usize>(
    bytes: &[u8],
    fixed: bool,
) -> Result<(u8, Reader<'_>), DecodeError> {
    open_as::<N>(bytes, fixed, VERSION)
}

/// [`open`] for a blob of the given format version (any other is refused as
/// [`DecodeError::Version`], right after the header's own checks).
pub(crate) fn open_as<const N: usize>(
    bytes: &[u8],
    fixed: bool,
    version: u8,
) -> Result<(u8, Reader<'_>), DecodeError> {
    let h = Header::parse(bytes)?;
    if h.version != version {
        return Err(DecodeError::Version { found: h.version });
    }
    let is_fixed = h.flags & FLAG_FIXED != 0;
    if version == VERSION_BANK && is_fixed {
        return Err(DecodeError::FixedBank);
    }
    if is_fixed != fixed {
        return Err(DecodeError::Arithmetic { fixed: is_fixed });
    }
    if N == 0 || N > MAX_FEATURES {
        return Err(DecodeError::UnsupportedDimension {
            found: h.n,
            requested: N,
        });
    }
    if usize::from(h.n) != N {
        return Err(DecodeError::Dimension {
            found: h.n,
            expected: N as u8,
        });
    }
    if h.len != bytes.len() {
        return Err(DecodeError::Length {
            stated: h.len,
            actual: bytes.len(),
        });
    }
    let body_end = h.len - CRC_LEN;
    let (covered, tail) = bytes.split_at(body_end);
    let stored = u32::from_le_bytes(tail.try_into().map_err(|_| DecodeError::Body)?);
    let computed = checksum(covered);
    if stored != computed {
        return Err(DecodeError::Crc { stored, computed });
    }
    let r = Reader {
        rest: covered.get(HEADER_LEN..).ok_or(DecodeError::Body)?,
        offset: HEADER_LEN,
    };
    Ok((h.flags, r))
}

/// Bytes of the floats of a model of `n` features in the body: offset, scale and mean (`n` each),
/// the lower triangle of `W` and the two thresholds.
pub const fn floats_len(n: usize) -> usize {
    4 * (3 * n + n * (n + 1) / 2 + 2)
}

/// A blob whose header, CRC and varints have been checked: its integer fields, and its floats
/// still as bytes (in flash, for a blob read in place). The model rules are not yet checked.
pub(crate) struct Body<'a> {
    pub(crate) meta: ModelMeta,
    pub(crate) log_mask: u32,
    /// [`floats_len`]`(N)` bytes, from `offset[0]` to the clear threshold.
    pub(crate) floats: &'a [u8],
    pub(crate) policy: AlarmPolicy,
}

/// Everything of [`decode`] but the floats' values and the model rules, in the order FORMAT.md
/// gives: header, `N`, length, CRC, body.
pub(crate) fn read_body<const N: usize>(bytes: &[u8]) -> Result<Body<'_>, DecodeError> {
    let (flags, mut r) = open::<N>(bytes, false)?;
    let meta = ModelMeta {
        model_id: r.varint()?,
        trained_at: r.varint()?,
        sequence: r.varint()?,
    };
    let log_mask = r.varint()?;
    let n_floats = floats_len(N);
    if r.rest.len() < n_floats {
        return Err(DecodeError::Body);
    }
    let (floats, rest) = r.rest.split_at(n_floats);
    r.rest = rest;
    r.offset += n_floats;
    let policy = AlarmPolicy {
        raise_after: r.varint()?,
        clear_after: r.varint()?,
        latch: flags & FLAG_LATCH != 0,
    };
    r.finish()?;
    Ok(Body {
        meta,
        log_mask,
        floats,
        policy,
    })
}

/// The `k`-th little-endian `f32` of `bytes` (NaN past the end, which no caller reaches: the
/// rules refuse NaN, so a short slice could never pass for a model).
#[inline(always)]
pub(crate) fn f32_at(bytes: &[u8], k: usize) -> f32 {
    match bytes.get(4 * k..4 * k + 4) {
        Some(&[a, b, c, d]) => f32::from_le_bytes([a, b, c, d]),
        _ => f32::NAN,
    }
}

/// Decode and validate a blob for a model of `N` features. `bytes` must be exactly the blob.
pub fn decode<const N: usize>(bytes: &[u8]) -> Result<ModelParams<N>, DecodeError> {
    let body = read_body::<N>(bytes)?;
    let fl = body.floats;
    let mut k = 0;
    let mut next = || {
        let v = f32_at(fl, k);
        k += 1;
        v
    };
    let mut preprocess = Preprocess::<N> {
        log_mask: body.log_mask,
        ..Preprocess::identity()
    };
    preprocess.offset.iter_mut().for_each(|v| *v = next());
    preprocess.scale.iter_mut().for_each(|v| *v = next());
    let mut mean = [0.0f32; N];
    mean.iter_mut().for_each(|v| *v = next());
    let mut w = [[0.0f32; N]; N];
    for (i, row) in w.iter_mut().enumerate() {
        row.iter_mut().take(i + 1).for_each(|v| *v = next());
    }
    let thresholds = Thresholds {
        alarm: next(),
        clear: next(),
    };
    let params = ModelParams {
        meta: body.meta,
        preprocess,
        mean,
        w,
        thresholds,
        policy: body.policy,
    };
    params.validate()?;
    Ok(params)
}

/// The digest of a model's ordered raw feature names that a version 2 blob carries: the
/// CRC-32/ISO-HDLC (the CRC of the blob itself) of the names in column order, each as its UTF-8
/// bytes followed by one `0x0A` byte. The host compares it with its input's columns, so that a
/// bank is never scored on columns in another order.
pub fn names_digest<'n>(names: impl IntoIterator<Item = &'n str>) -> u32 {
    let mut digest = CRC.digest();
    for name in names {
        digest.update(name.as_bytes());
        digest.update(b"\n");
    }
    digest.finalize()
}

/// The largest version 2 blob of `k` modes, `n` raw and `m` scored features, with or without
/// drift (varints at their longest).
pub const fn max_bank_len(n: usize, m: usize, k: usize, drift: bool) -> usize {
    let _ = n;
    // model_id, trained_at, sequence, log_mask (25) + names_digest (4) + select, K, w,
    // options (4) + per mode the floats of a v1 model of m features + drift rate and bounds
    // + raise_after, clear_after (6).
    let drift_len = if drift { 4 * (m + 1) } else { 0 };
    HEADER_LEN + 25 + 4 + 4 + k * floats_len(m) + drift_len + 6 + CRC_LEN
}

/// Option bit of a version 2 body: the first differences are scored.
pub const OPTION_DIFFERENCES: u8 = 0b01;
/// Option bit of a version 2 body: drift is on (its rate and bounds follow the modes).
pub const OPTION_DRIFT: u8 = 0b10;

/// Encode a validated model bank into `buf` as a version 2 blob; returns its length.
///
/// The rules are the decoder's ([`crate::bank::FlashBank::from_blob`]), checked in the same
/// order with the same errors, so a blob this writes is one every reader of `N`, `M` accepts.
pub fn encode_bank<const N: usize, const M: usize>(
    p: &crate::bank::BankParams<'_, N, M>,
    buf: &mut [u8],
) -> Result<usize, EncodeError> {
    p.validate().map_err(EncodeError::InvalidBank)?;
    let mut w = Writer::new(buf, HEADER_LEN);
    w.put(&p.meta.model_id)?;
    w.put(&p.meta.trained_at)?;
    w.put(&p.meta.sequence)?;
    w.put(&p.log_mask)?;
    w.bytes(&p.names_digest.to_le_bytes())?;
    let options = if p.window.differences {
        OPTION_DIFFERENCES
    } else {
        0
    } | if p.drift.is_some() { OPTION_DRIFT } else { 0 };
    w.bytes(&[
        p.select.code(),
        p.modes.len() as u8,
        p.window.length,
        options,
    ])?;
    for mode in p.modes {
        w.put_all(&mode.offset)?;
        w.put_all(&mode.scale)?;
        w.put_all(&mode.mean)?;
        for (i, row) in mode.w.iter().enumerate() {
            w.put_all(row.get(..=i).unwrap_or(row))?;
        }
        w.put(&mode.thresholds.alarm)?;
        w.put(&mode.thresholds.clear)?;
    }
    if let Some(d) = &p.drift {
        w.put(&d.rate)?;
        w.put_all(&d.bound)?;
    }
    w.put(&p.policy.raise_after)?;
    w.put(&p.policy.clear_after)?;
    let flags = if p.policy.latch { FLAG_LATCH } else { 0 };
    w.seal_as(VERSION_BANK, N as u8, flags)
}

/// A version 2 blob whose header, CRC, varints and layout (shape, `K`, window, option bits) have
/// been checked: its fields, the modes' floats and the drift floats still as bytes. The bank's
/// rules are not yet checked.
pub(crate) struct BankBody<'a> {
    pub(crate) meta: ModelMeta,
    pub(crate) log_mask: u32,
    pub(crate) names_digest: u32,
    pub(crate) select: crate::bank::ModeSelect,
    pub(crate) k: u8,
    pub(crate) window: crate::window::WindowSpec,
    /// `K · floats_len(M)` bytes: per mode the floats of a v1 model of `M` features.
    pub(crate) modes: &'a [u8],
    /// Empty, or `4 (M + 1)` bytes: the drift rate and the `M` bounds.
    pub(crate) drift: &'a [u8],
    pub(crate) policy: AlarmPolicy,
}

/// Everything of a version 2 decode but the floats' values and the bank's rules, in FORMAT.md's
/// order.
pub(crate) fn read_bank_body<const N: usize, const M: usize>(
    bytes: &[u8],
) -> Result<BankBody<'_>, DecodeError> {
    let (flags, mut r) = open_as::<N>(bytes, false, VERSION_BANK)?;
    let meta = ModelMeta {
        model_id: r.varint()?,
        trained_at: r.varint()?,
        sequence: r.varint()?,
    };
    let log_mask = r.varint()?;
    let names_digest = u32::from_le_bytes(r.array::<4>()?);
    let [select, k, length, options] = r.array::<4>()?;
    let layout = crate::bank::check_layout::<N, M>(select, k, length, options, log_mask)
        .map_err(DecodeError::Bank)?;
    let modes = r.slice(usize::from(k) * floats_len(M))?;
    let drift = if options & OPTION_DRIFT != 0 {
        r.slice(4 * (M + 1))?
    } else {
        &[]
    };
    let policy = AlarmPolicy {
        raise_after: r.varint()?,
        clear_after: r.varint()?,
        latch: flags & FLAG_LATCH != 0,
    };
    r.finish()?;
    Ok(BankBody {
        meta,
        log_mask,
        names_digest,
        select: layout.0,
        k,
        window: layout.1,
        modes,
        drift,
        policy,
    })
}

impl<const N: usize> Model<N> {
    /// Decode, validate and compile a blob, for instance one in flash. Do this once, at boot.
    pub fn from_blob(bytes: &[u8]) -> Result<Self, DecodeError> {
        Ok(Model::new(decode(bytes)?)?)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn params() -> ModelParams<2> {
        ModelParams {
            meta: ModelMeta {
                model_id: 0x0102_0304,
                trained_at: 1_700_000_000,
                sequence: 7,
            },
            preprocess: Preprocess {
                log_mask: 0b10,
                offset: [1.0, 2.0],
                scale: [0.5, 0.25],
            },
            mean: [0.0, 0.0],
            w: [[1.0, 0.0], [-0.5, 2.0]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
            policy: AlarmPolicy {
                raise_after: 3,
                clear_after: 200,
                latch: true,
            },
        }
    }

    #[test]
    fn blob_size_for_n8() {
        // The representative model of FORMAT.md's "Size" section.
        let mut w = [[0.0f32; 8]; 8];
        for (i, row) in w.iter_mut().enumerate() {
            row[i] = 1.0;
        }
        let p = ModelParams::<8> {
            meta: ModelMeta {
                model_id: 0x00AB_CDEF,
                trained_at: 1_780_000_000,
                sequence: 1,
            },
            preprocess: Preprocess::identity(),
            mean: [0.0; 8],
            w,
            thresholds: Thresholds {
                alarm: 26.1,
                clear: 20.0,
            },
            policy: AlarmPolicy {
                raise_after: 3,
                clear_after: 300,
                latch: false,
            },
        };
        let mut buf = [0u8; max_len(8)];
        assert_eq!(encode(&p, &mut buf), Ok(276));
        assert_eq!(max_len(8), 293);
    }

    #[test]
    fn round_trip() {
        let mut buf = [0u8; max_len(2)];
        let n = encode(&params(), &mut buf).unwrap();
        assert_eq!(decode::<2>(&buf[..n]), Ok(params()));
    }

    #[test]
    fn each_header_failure_has_its_variant() {
        let mut buf = [0u8; max_len(2)];
        let n = encode(&params(), &mut buf).unwrap();
        let good = &buf[..n];
        assert_eq!(
            decode::<2>(&good[..5]),
            Err(DecodeError::TooShort { len: 5 })
        );
        let mut b = [0u8; max_len(2)];
        b[..n].copy_from_slice(good);
        b[0] = b'X';
        assert_eq!(decode::<2>(&b[..n]), Err(DecodeError::Magic));
        b[..n].copy_from_slice(good);
        b[4] = 2;
        assert_eq!(decode::<2>(&b[..n]), Err(DecodeError::Version { found: 2 }));
        b[..n].copy_from_slice(good);
        b[6] = 0x81;
        assert_eq!(
            decode::<2>(&b[..n]),
            Err(DecodeError::Flags { found: 0x81 })
        );
        assert_eq!(
            decode::<3>(good),
            Err(DecodeError::Dimension {
                found: 2,
                expected: 3
            })
        );
        assert_eq!(
            decode::<2>(&good[..n - 1]),
            Err(DecodeError::Length {
                stated: n,
                actual: n - 1
            })
        );
        b[..n].copy_from_slice(good);
        b[7] = 1;
        assert_eq!(
            decode::<2>(&b[..n]),
            Err(DecodeError::Reserved { found: 1 })
        );
        b[..n].copy_from_slice(good);
        b[12] ^= 0x10;
        assert!(matches!(decode::<2>(&b[..n]), Err(DecodeError::Crc { .. })));
    }

    /// Rewrite a blob's length and CRC after editing its body, as a writer that means it would.
    fn reseal(body: &[u8]) -> heapless::Vec<u8, 256> {
        let mut b: heapless::Vec<u8, 256> = heapless::Vec::new();
        let len = (body.len() + CRC_LEN) as u16;
        b.extend_from_slice(body).unwrap();
        b[8..10].copy_from_slice(&len.to_le_bytes());
        let crc = checksum(&b);
        b.extend_from_slice(&crc.to_le_bytes()).unwrap();
        b
    }

    #[test]
    fn body_failures_behind_a_valid_crc_have_their_variants() {
        let mut buf = [0u8; max_len(2)];
        let n = encode(&params(), &mut buf).unwrap();
        let covered = &buf[..n - CRC_LEN];
        // One byte more after the last field.
        let mut longer: heapless::Vec<u8, 256> = heapless::Vec::new();
        longer.extend_from_slice(covered).unwrap();
        longer.push(0).unwrap();
        assert_eq!(
            decode::<2>(&reseal(&longer)),
            Err(DecodeError::TrailingBytes)
        );
        // The body ends inside the last field.
        assert_eq!(
            decode::<2>(&reseal(&covered[..covered.len() - 1])),
            Err(DecodeError::Body)
        );
        // A well-formed body whose model breaks a rule: W[1][1] (2.0, the last float before the
        // two thresholds and the two varints) set to zero, and the blob resealed.
        let mut bad = [0u8; max_len(2)];
        bad[..n].copy_from_slice(&buf[..n]);
        let at = n - CRC_LEN - 3 - 8 - 4;
        assert_eq!(bad[at..at + 4], 2.0f32.to_le_bytes());
        bad[at..at + 4].copy_from_slice(&0.0f32.to_le_bytes());
        assert_eq!(
            decode::<2>(&reseal(&bad[..n - CRC_LEN])),
            Err(DecodeError::Invalid(ModelError::FactorDiagonal {
                index: 1
            }))
        );
    }

    /// `covered` (a blob without its CRC) with `cut` bytes at `at` replaced by `with`, resealed.
    fn spliced(covered: &[u8], at: usize, cut: usize, with: &[u8]) -> heapless::Vec<u8, 256> {
        let mut body: heapless::Vec<u8, 256> = heapless::Vec::new();
        body.extend_from_slice(&covered[..at]).unwrap();
        body.extend_from_slice(with).unwrap();
        body.extend_from_slice(&covered[at + cut..]).unwrap();
        reseal(&body)
    }

    #[test]
    fn overlong_varints_are_refused() {
        let mut buf = [0u8; max_len(2)];
        let n = encode(&params(), &mut buf).unwrap();
        let covered = &buf[..n - CRC_LEN];
        // The resealed original decodes: the splicing itself is sound.
        assert_eq!(decode::<2>(&spliced(covered, 19, 0, &[])), Ok(params()));
        // model_id 0x01020304 (4 bytes at 10), trained_at (5 bytes), sequence 7 at 19.
        assert_eq!(covered[19], 7);
        // 7 as `87 00`: the same value, one byte longer.
        assert_eq!(
            decode::<2>(&spliced(covered, 19, 1, &[0x87, 0x00])),
            Err(DecodeError::NonCanonical { offset: 19 })
        );
        // 7 as `87 80 80 80 00`, at the longest a u32 can be.
        assert_eq!(
            decode::<2>(&spliced(covered, 19, 1, &[0x87, 0x80, 0x80, 0x80, 0x00])),
            Err(DecodeError::NonCanonical { offset: 19 })
        );
        // model_id, its 4 bytes padded to 5.
        let id = &covered[10..14];
        assert_eq!(id[3] & 0x80, 0);
        let padded = [id[0], id[1], id[2], id[3] | 0x80, 0x00];
        assert_eq!(
            decode::<2>(&spliced(covered, 10, 4, &padded)),
            Err(DecodeError::NonCanonical { offset: 10 })
        );
        // clear_after 200, the last field (`c8 01`), as `c8 81 00`.
        let at = covered.len() - 2;
        assert_eq!(covered[at..], [0xc8, 0x01]);
        assert_eq!(
            decode::<2>(&spliced(covered, at, 2, &[0xc8, 0x81, 0x00])),
            Err(DecodeError::NonCanonical { offset: at })
        );
        // A varint with bits beyond its type, or longer than its type allows, stays a Body error.
        assert_eq!(
            decode::<2>(&spliced(covered, 19, 1, &[0x87, 0x80, 0x80, 0x80, 0x10])),
            Err(DecodeError::Body)
        );
        assert_eq!(
            decode::<2>(&spliced(
                covered,
                19,
                1,
                &[0x87, 0x80, 0x80, 0x80, 0x80, 0x00]
            )),
            Err(DecodeError::Body)
        );
        // A zero in one byte is canonical.
        let mut p = params();
        p.meta.sequence = 0;
        let mut b = [0u8; max_len(2)];
        let len = encode(&p, &mut b).unwrap();
        assert_eq!(b[19], 0);
        assert_eq!(decode::<2>(&b[..len]), Ok(p));
    }

    /// Each parameter is finite, but `W₀₀ · scale₀ = 1e30 · 1e30` is not: the encoder refuses to
    /// write it, and a blob carrying it (written by hand and resealed) is refused by the decoder,
    /// exactly as `Model::from_blob` refuses it.
    #[test]
    fn a_fold_beyond_f32_is_refused_by_encode_and_decode() {
        let mut p = params();
        p.preprocess.scale[0] = 1.0e30;
        p.w[0][0] = 1.0e30;
        let mut buf = [0u8; max_len(2)];
        assert_eq!(
            encode(&p, &mut buf),
            Err(EncodeError::Invalid(ModelError::Overflow))
        );
        let n = encode(&params(), &mut buf).unwrap();
        let mut covered = [0u8; max_len(2)];
        covered[..n - CRC_LEN].copy_from_slice(&buf[..n - CRC_LEN]);
        // Varints take 11 bytes (4 + 5 + 1 + 1): offset at 21, scale at 29, mean at 37, W₀₀ at 45.
        assert_eq!(covered[29..33], 0.5f32.to_le_bytes());
        assert_eq!(covered[45..49], 1.0f32.to_le_bytes());
        covered[29..33].copy_from_slice(&1.0e30f32.to_le_bytes());
        covered[45..49].copy_from_slice(&1.0e30f32.to_le_bytes());
        let blob = reseal(&covered[..n - CRC_LEN]);
        let refused = DecodeError::Invalid(ModelError::Overflow);
        assert_eq!(decode::<2>(&blob), Err(refused));
        assert_eq!(Model::<2>::from_blob(&blob), Err(refused));
    }

    #[test]
    fn an_unsupported_dimension_is_named_as_such() {
        // A blob of 40 features (header only matters: the dimension is checked before the CRC).
        let mut b = [0u8; 64];
        b[..10].copy_from_slice(&[b'E', b'L', b'S', b'D', VERSION, 40, 0, 0, 64, 0]);
        let e = decode::<40>(&b).unwrap_err();
        assert_eq!(
            e,
            DecodeError::UnsupportedDimension {
                found: 40,
                requested: 40
            }
        );
        assert_eq!(e.to_string(), "blob has 40 features; models have 1 to 32");
        assert!(matches!(
            decode::<0>(&b),
            Err(DecodeError::UnsupportedDimension { requested: 0, .. })
        ));
        // A supported build and a blob of another dimension: the plain mismatch.
        assert_eq!(
            decode::<5>(&b).unwrap_err().to_string(),
            "blob has 40 features, expected 5"
        );
    }

    /// CRC-32/ISO-HDLC check value: the CRC of the ASCII bytes "123456789" is 0xCBF43926, as
    /// listed in the catalogue of parametrised CRC algorithms and carried by the `crc` crate's
    /// `CRC_32_ISO_HDLC.check` (the value is also from memory; the crate's constant is the source).
    #[test]
    fn crc_matches_the_catalogue_check_value() {
        assert_eq!(checksum(b"123456789"), 0xCBF4_3926);
        assert_eq!(checksum(b"123456789"), crc::CRC_32_ISO_HDLC.check);
    }

    #[test]
    fn encoder_refuses_invalid_params_and_small_buffers() {
        let mut p = params();
        p.thresholds.clear = 100.0;
        let mut buf = [0u8; 128];
        assert_eq!(
            encode(&p, &mut buf),
            Err(EncodeError::Invalid(ModelError::ThresholdOrder))
        );
        let mut small = [0u8; 20];
        assert_eq!(
            encode(&params(), &mut small),
            Err(EncodeError::BufferTooSmall { capacity: 20 })
        );
    }
}
