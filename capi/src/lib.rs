//! The C API of the Ellipsoid core: decode a model blob into memory the caller owns, score
//! readings, split a score per feature, and run the alarm machine, from C.
//!
//! The header `include/ellipsoid.h` is generated from this file by cbindgen and committed; the
//! test `tests/header.rs` fails when it is stale. The C side never sees a Rust layout: a decoded
//! model lives in a byte array the caller declares with the size the header's
//! `ELLIPSOID_MODEL_BYTES(n)` states (8-byte aligned), and the alarm machine in the opaque words of
//! `ellipsoid_alarm_t`. The library checks both before it writes.
//!
//! # Choosing N
//!
//! The core's models have the number of features `N` as a const generic, so the library is built
//! for one `N`, by a cargo feature (`n5`, the demo's, is the default; `--no-default-features
//! --features n8` builds N = 8). Only that N's decode, score and explain are compiled: a C image
//! carries the flash of one model size, not of every size it might be asked for. The header is the
//! same for every N. [`ellipsoid_features`] tells a C program which N the library it linked was built
//! for, and a blob for another N is refused at decode (`ELLIPSOID_ERR_BLOB_DIMENSION`).
//!
//! # No allocation, no panics across the boundary
//!
//! Nothing here allocates. Every entry point checks its pointers (null, alignment) and lengths
//! before it reads or writes, and every failure is an `ellipsoid_status` code. The end-to-end
//! script checks the C example image for panic machinery reachable from the exported functions.
//! The storage of a model is marked as holding one only once a decode succeeded, so scoring with
//! storage that was never decoded, or whose decode failed, returns `ELLIPSOID_ERR_NOT_DECODED`
//! instead of reading garbage.
//!
//! # Safety contract (for every function)
//!
//! Non-null pointers must point at memory of the stated length that stays valid for the call, and
//! a model or alarm pointer must come from [`ellipsoid_decode`] or [`ellipsoid_alarm_init`] on
//! memory the caller has not written to since. The library is not re-entrant on one model or
//! alarm: call it from one thread (or interrupt level) at a time per object.
#![cfg_attr(target_os = "none", no_std)]
#![deny(missing_docs)]
#![allow(non_camel_case_types)]

use core::ffi::{c_char, c_void};
use core::mem::{align_of, size_of};
use core::ptr;

use ellipsoid_core::{
    blob, AlarmMachine, DecodeError, EventKind, FaultCause, Model, ReadingFault, Scored, Step,
    Verdict,
};

/// Picks N from the one feature that is on, and counts how many are on.
macro_rules! features {
    ($($name:literal => $n:literal),* $(,)?) => {
        /// The number of features per reading this library was built for.
        const N: usize = 0 $(+ if cfg!(feature = $name) { $n } else { 0 })*;
        /// How many of the N features are on: it must be one.
        const FEATURES_ON: usize = 0 $(+ cfg!(feature = $name) as usize)*;
    };
}

features!(
    "n1" => 1, "n2" => 2, "n3" => 3, "n4" => 4, "n5" => 5, "n6" => 6, "n7" => 7, "n8" => 8,
    "n10" => 10, "n12" => 12, "n16" => 16, "n20" => 20, "n24" => 24, "n32" => 32,
);

const _: () = assert!(
    FEATURES_ON == 1,
    "ellipsoid-capi is built for one N: turn on exactly one of the features n1 ... n32 \
     (with --no-default-features to leave out the default n5)"
);

/// The bytes of model storage the header promises for `n` features: `ELLIPSOID_MODEL_BYTES(n)`
/// in `ellipsoid.h` is this same formula.
pub const fn model_storage_bytes(n: usize) -> usize {
    8 * n * n + 16 * n + 64
}

/// Alignment of model storage the header promises (the storage union has a `uint64_t`).
pub const ELLIPSOID_STORAGE_ALIGN: usize = 8;

/// Marks storage that holds a decoded model ("ELMD"), and the N it was decoded for.
const MODEL_TAG: u32 = u32::from_le_bytes(*b"ELMD");
/// Marks an initialised alarm machine ("ELAM").
const ALARM_TAG: u32 = u32::from_le_bytes(*b"ELAM");

/// What the caller's model storage holds after a successful decode.
#[repr(C)]
struct Stored<const M: usize> {
    tag: u32,
    n: u32,
    model: Model<M>,
}

/// The storage of this library's N.
type StoredModel = Stored<N>;

/// What the words of an `ellipsoid_alarm_t` hold after [`ellipsoid_alarm_init`].
#[repr(C)]
struct StoredAlarm {
    tag: u32,
    machine: AlarmMachine,
}

/// The 64-bit words of an `ellipsoid_alarm_t`.
pub const ELLIPSOID_ALARM_WORDS: usize = 6;

// The header's promises hold for the N built, and the alarm fits its words.
const _: () = assert!(size_of::<StoredModel>() <= model_storage_bytes(N));
const _: () = assert!(align_of::<StoredModel>() <= ELLIPSOID_STORAGE_ALIGN);
const _: () = assert!(size_of::<StoredAlarm>() <= size_of::<ellipsoid_alarm_t>());
const _: () = assert!(align_of::<StoredAlarm>() <= align_of::<ellipsoid_alarm_t>());

/// The result of every call: `ELLIPSOID_OK`, a bad argument, why a blob was refused, or why a
/// reading could not be scored. The values are stable. A 32-bit integer in every struct and
/// return value (the C compiler's choice of enum size never matters).
#[repr(i32)]
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ellipsoid_status {
    /// Success; for a score, the reading was scored.
    ELLIPSOID_OK = 0,
    /// A pointer argument is null.
    ELLIPSOID_ERR_NULL = 1,
    /// A length argument is wrong: a reading or contribution array whose length is not the
    /// library's N, or a length too large to be an object.
    ELLIPSOID_ERR_LENGTH = 2,
    /// The model storage is smaller than `ellipsoid_model_bytes()`.
    ELLIPSOID_ERR_STORAGE_SIZE = 3,
    /// A pointer is not aligned for its type (model storage and alarms: 8 bytes; floats: 4).
    ELLIPSOID_ERR_ALIGNMENT = 4,
    /// The model (or alarm) pointer does not point at a decoded model (an initialised alarm).
    ELLIPSOID_ERR_NOT_DECODED = 5,
    /// A value outside its range, such as a score whose status is not a score's.
    ELLIPSOID_ERR_ARGUMENT = 6,
    /// The blob is shorter than its header or than the length it states.
    ELLIPSOID_ERR_BLOB_TOO_SHORT = 16,
    /// The blob does not start with the magic bytes: not a model blob (an erased slot, say).
    ELLIPSOID_ERR_BLOB_MAGIC = 17,
    /// A blob format version this library does not read.
    ELLIPSOID_ERR_BLOB_VERSION = 18,
    /// The blob is for another number of features than the library was built for.
    ELLIPSOID_ERR_BLOB_DIMENSION = 19,
    /// Unknown flag bits in the blob header.
    ELLIPSOID_ERR_BLOB_FLAGS = 20,
    /// The reserved header byte is not zero.
    ELLIPSOID_ERR_BLOB_RESERVED = 21,
    /// The length the header states is impossible.
    ELLIPSOID_ERR_BLOB_LENGTH = 22,
    /// The CRC does not match: the blob is corrupt or torn.
    ELLIPSOID_ERR_BLOB_CRC = 23,
    /// The body could not be read.
    ELLIPSOID_ERR_BLOB_BODY = 24,
    /// A varint in the body is not in its shortest form.
    ELLIPSOID_ERR_BLOB_NON_CANONICAL = 25,
    /// The body has bytes after its last field.
    ELLIPSOID_ERR_BLOB_TRAILING = 26,
    /// The blob decoded but the model breaks a rule (a non-positive scale, say).
    ELLIPSOID_ERR_MODEL_INVALID = 27,
    /// The blob was refused for a reason this version of the API has no code for.
    ELLIPSOID_ERR_BLOB_OTHER = 28,
    /// The reading of a feature is NaN or infinite (the score's `feature` names it).
    ELLIPSOID_FAULT_NOT_FINITE = 48,
    /// A log-transformed feature's reading is zero or negative (the score's `feature` names it).
    ELLIPSOID_FAULT_LOG_DOMAIN = 49,
    /// Every input was finite but d² overflowed.
    ELLIPSOID_FAULT_OVERFLOW = 50,
    /// Only from `ellipsoid_explain`: d² is finite (`ellipsoid_score` scores the reading) but its
    /// split per feature does not fit in a float.
    ELLIPSOID_FAULT_CONTRIBUTION_OVERFLOW = 51,
    /// The reading could not be scored, for a reason this version of the API has no code for.
    ELLIPSOID_FAULT_OTHER = 52,
    /// In an alarm event only: the alarm machine has no model (fault line on for good).
    ELLIPSOID_FAULT_NO_MODEL = 53,
}

use ellipsoid_status::*;

/// A decoded model: an opaque handle into the caller's storage, from `ellipsoid_decode`.
pub struct ellipsoid_model {
    _private: [u8; 0],
}

/// Storage for one alarm machine. Opaque: only the library reads or writes its words.
#[repr(C)]
pub struct ellipsoid_alarm_t {
    _opaque: [u64; ELLIPSOID_ALARM_WORDS],
}

/// A score. After any call that fills one and does not return `ELLIPSOID_OK`, `d2` is NaN and
/// `status` says why: a score that was not made never looks normal.
#[repr(C)]
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ellipsoid_score_t {
    /// The squared Mahalanobis distance; NaN unless `status` is `ELLIPSOID_OK`.
    pub d2: f32,
    /// An `ellipsoid_status`: `ELLIPSOID_OK`, an `ELLIPSOID_FAULT_*` code, or the argument error
    /// of the call.
    pub status: i32,
    /// 1 when `d2` is above the model's alarm threshold, else 0.
    pub above: u8,
    /// For `ELLIPSOID_FAULT_NOT_FINITE` and `ELLIPSOID_FAULT_LOG_DOMAIN`: the feature at fault.
    pub feature: u8,
}

/// What the alarm machine reports about a reading (a 32-bit integer in structs).
#[repr(i32)]
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ellipsoid_event_kind {
    /// The alarm line went on.
    ELLIPSOID_EVENT_RAISED = 1,
    /// The alarm line went off after enough readings below the clear threshold.
    ELLIPSOID_EVENT_CLEARED = 2,
    /// The alarm line went off by `ellipsoid_alarm_reset`.
    ELLIPSOID_EVENT_RESET = 3,
    /// The fault line went on, or its cause changed (see the event's `cause`).
    ELLIPSOID_EVENT_FAULT = 4,
    /// The fault line went off: a reading was scored again.
    ELLIPSOID_EVENT_FAULT_CLEARED = 5,
    /// An event this version of the API has no code for.
    ELLIPSOID_EVENT_OTHER = 6,
}

/// One event and the index of the reading that caused it (0-based; a reset carries the index of
/// the next reading).
#[repr(C)]
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ellipsoid_event_t {
    /// Index of the reading.
    pub index: u32,
    /// What happened.
    pub kind: ellipsoid_event_kind,
    /// For `ELLIPSOID_EVENT_FAULT`: an `ELLIPSOID_FAULT_*` code; else `ELLIPSOID_OK`.
    pub cause: ellipsoid_status,
    /// For a fault of one feature: that feature; else 0.
    pub feature: u8,
}

/// The line levels after a reading (or a reset), and up to two events, in the order they happened.
#[repr(C)]
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ellipsoid_step_t {
    /// 1 while the alarm line is on.
    pub alarm: u8,
    /// 1 while the fault line is on.
    pub fault: u8,
    /// How many of `events` are filled (0 to 2).
    pub n_events: u8,
    /// The events; entries past `n_events` are zeroed.
    pub events: [ellipsoid_event_t; 2],
}

/// What a decoded model says about itself.
#[repr(C)]
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ellipsoid_model_info_t {
    /// The identifier the trainer gave the model.
    pub model_id: u32,
    /// The model's sequence number.
    pub sequence: u32,
    /// When the model was trained, seconds since 1970-01-01 00:00:00 UTC.
    pub trained_at: u64,
    /// Features per reading.
    pub features: u32,
    /// d² above this counts towards raising the alarm.
    pub alarm_threshold: f32,
    /// d² below this counts towards clearing it.
    pub clear_threshold: f32,
    /// Consecutive readings above the alarm threshold that raise the alarm.
    pub raise_after: u16,
    /// Consecutive readings below the clear threshold that clear it.
    pub clear_after: u16,
    /// 1 when a raised alarm stays on until `ellipsoid_alarm_reset`.
    pub latch: u8,
}

fn decode_status(e: DecodeError) -> ellipsoid_status {
    match e {
        DecodeError::TooShort { .. } => ELLIPSOID_ERR_BLOB_TOO_SHORT,
        DecodeError::Magic => ELLIPSOID_ERR_BLOB_MAGIC,
        DecodeError::Version { .. } => ELLIPSOID_ERR_BLOB_VERSION,
        DecodeError::UnsupportedDimension { .. } | DecodeError::Dimension { .. } => {
            ELLIPSOID_ERR_BLOB_DIMENSION
        }
        DecodeError::Flags { .. } => ELLIPSOID_ERR_BLOB_FLAGS,
        DecodeError::Reserved { .. } => ELLIPSOID_ERR_BLOB_RESERVED,
        DecodeError::Length { .. } => ELLIPSOID_ERR_BLOB_LENGTH,
        DecodeError::Crc { .. } => ELLIPSOID_ERR_BLOB_CRC,
        DecodeError::Body => ELLIPSOID_ERR_BLOB_BODY,
        DecodeError::NonCanonical { .. } => ELLIPSOID_ERR_BLOB_NON_CANONICAL,
        DecodeError::TrailingBytes => ELLIPSOID_ERR_BLOB_TRAILING,
        DecodeError::Invalid(_) => ELLIPSOID_ERR_MODEL_INVALID,
        _ => ELLIPSOID_ERR_BLOB_OTHER,
    }
}

/// The status and feature of a reading fault.
fn fault_status(f: ReadingFault) -> (ellipsoid_status, u8) {
    match f {
        ReadingFault::NotFinite { feature } => (ELLIPSOID_FAULT_NOT_FINITE, feature),
        ReadingFault::LogDomain { feature } => (ELLIPSOID_FAULT_LOG_DOMAIN, feature),
        ReadingFault::Overflow => (ELLIPSOID_FAULT_OVERFLOW, 0),
        ReadingFault::ContributionOverflow => (ELLIPSOID_FAULT_CONTRIBUTION_OVERFLOW, 0),
        _ => (ELLIPSOID_FAULT_OTHER, 0),
    }
}

/// The reading fault a score's status stands for (`None`: not a fault code).
fn status_fault(status: i32, feature: u8) -> Option<ReadingFault> {
    const NOT_FINITE: i32 = ELLIPSOID_FAULT_NOT_FINITE as i32;
    const LOG_DOMAIN: i32 = ELLIPSOID_FAULT_LOG_DOMAIN as i32;
    const OVERFLOW: i32 = ELLIPSOID_FAULT_OVERFLOW as i32;
    const CONTRIBUTION: i32 = ELLIPSOID_FAULT_CONTRIBUTION_OVERFLOW as i32;
    match status {
        NOT_FINITE => Some(ReadingFault::NotFinite { feature }),
        LOG_DOMAIN => Some(ReadingFault::LogDomain { feature }),
        OVERFLOW => Some(ReadingFault::Overflow),
        CONTRIBUTION => Some(ReadingFault::ContributionOverflow),
        _ => None,
    }
}

const fn failed_score(status: ellipsoid_status, feature: u8) -> ellipsoid_score_t {
    ellipsoid_score_t {
        d2: f32::NAN,
        status: status as i32,
        above: 0,
        feature,
    }
}

fn to_c_score(r: Result<Scored, ReadingFault>) -> (ellipsoid_status, ellipsoid_score_t) {
    match r {
        Ok(s) => (
            ELLIPSOID_OK,
            ellipsoid_score_t {
                d2: s.d2,
                status: ELLIPSOID_OK as i32,
                above: u8::from(s.verdict == Verdict::Above),
                feature: 0,
            },
        ),
        Err(f) => {
            let (status, feature) = fault_status(f);
            (status, failed_score(status, feature))
        }
    }
}

fn misaligned<T>(p: *const T, align: usize) -> bool {
    !(p as usize).is_multiple_of(align)
}

/// Write `value` through `out` if it is not null.
///
/// # Safety
/// `out` is null or valid for a write of one `T` and aligned for it (checked by the callers).
unsafe fn put<T>(out: *mut T, value: T) {
    if !out.is_null() && !misaligned(out, align_of::<T>()) {
        // SAFETY: non-null and aligned, checked above; valid for writes by the caller's contract.
        // `write` drops nothing, so garbage in the caller's memory is never read.
        unsafe { ptr::write(out, value) }
    }
}

/// The model behind a handle, after checking it.
///
/// # Safety
/// `model` is null or points at storage given to [`ellipsoid_decode`] (the safety contract).
unsafe fn model_ref<'a>(model: *const ellipsoid_model) -> Result<&'a Model<N>, ellipsoid_status> {
    if model.is_null() {
        return Err(ELLIPSOID_ERR_NULL);
    }
    if misaligned(model, ELLIPSOID_STORAGE_ALIGN) {
        return Err(ELLIPSOID_ERR_ALIGNMENT);
    }
    let stored = model.cast::<StoredModel>();
    // SAFETY: non-null and aligned for `StoredModel` (checked above), and by the contract the
    // handle points at model storage, at least `ellipsoid_model_bytes()` long, which holds a
    // `StoredModel` if its tag says so. The two integers are read first; the model only when
    // they mark storage that a successful decode wrote.
    unsafe {
        let tag = ptr::read(ptr::addr_of!((*stored).tag));
        let n = ptr::read(ptr::addr_of!((*stored).n));
        if tag != MODEL_TAG || n as usize != N {
            return Err(ELLIPSOID_ERR_NOT_DECODED);
        }
        Ok(&*ptr::addr_of!((*stored).model))
    }
}

/// The alarm machine in `alarm`, after checking it.
///
/// # Safety
/// `alarm` is null or points at an `ellipsoid_alarm_t` (the safety contract).
unsafe fn alarm_mut<'a>(
    alarm: *mut ellipsoid_alarm_t,
) -> Result<&'a mut AlarmMachine, ellipsoid_status> {
    if alarm.is_null() {
        return Err(ELLIPSOID_ERR_NULL);
    }
    if misaligned(alarm, align_of::<ellipsoid_alarm_t>()) {
        return Err(ELLIPSOID_ERR_ALIGNMENT);
    }
    let stored = alarm.cast::<StoredAlarm>();
    // SAFETY: non-null, aligned, and an `ellipsoid_alarm_t` is large enough for a `StoredAlarm`
    // (asserted at compile time). The machine is only used when the tag says that
    // `ellipsoid_alarm_init` wrote it.
    unsafe {
        if ptr::read(ptr::addr_of!((*stored).tag)) != ALARM_TAG {
            return Err(ELLIPSOID_ERR_NOT_DECODED);
        }
        Ok(&mut *ptr::addr_of_mut!((*stored).machine))
    }
}

/// The reading of `n` floats at `x`, borrowed in place (no copy).
///
/// # Safety
/// `x` is null or valid for reads of `n` floats that nothing writes during the call.
unsafe fn reading<'a>(x: *const f32, n: usize) -> Result<&'a [f32; N], ellipsoid_status> {
    if x.is_null() {
        return Err(ELLIPSOID_ERR_NULL);
    }
    if n != N {
        return Err(ELLIPSOID_ERR_LENGTH);
    }
    if misaligned(x, align_of::<f32>()) {
        return Err(ELLIPSOID_ERR_ALIGNMENT);
    }
    // SAFETY: non-null and aligned (checked above); by the contract `n = N` floats at `x` are
    // readable and not written during the call, and any bits are a valid `f32`. The borrow does
    // not outlive the exported function that made it.
    Ok(unsafe { &*x.cast::<[f32; N]>() })
}

fn c_step(step: &Step) -> ellipsoid_step_t {
    const NONE: ellipsoid_event_t = ellipsoid_event_t {
        index: 0,
        kind: ellipsoid_event_kind::ELLIPSOID_EVENT_OTHER,
        cause: ELLIPSOID_OK,
        feature: 0,
    };
    let mut out = ellipsoid_step_t {
        alarm: u8::from(step.alarm),
        fault: u8::from(step.fault),
        n_events: 0,
        events: [NONE; 2],
    };
    for (slot, e) in out.events.iter_mut().zip(step.events.iter()) {
        use ellipsoid_event_kind::*;
        let (kind, cause, feature) = match e.kind {
            EventKind::Raised => (ELLIPSOID_EVENT_RAISED, ELLIPSOID_OK, 0),
            EventKind::Cleared => (ELLIPSOID_EVENT_CLEARED, ELLIPSOID_OK, 0),
            EventKind::Reset => (ELLIPSOID_EVENT_RESET, ELLIPSOID_OK, 0),
            EventKind::FaultCleared => (ELLIPSOID_EVENT_FAULT_CLEARED, ELLIPSOID_OK, 0),
            EventKind::Fault(FaultCause::Reading(f)) => {
                let (s, feature) = fault_status(f);
                (ELLIPSOID_EVENT_FAULT, s, feature)
            }
            EventKind::Fault(FaultCause::NoModel) => {
                (ELLIPSOID_EVENT_FAULT, ELLIPSOID_FAULT_NO_MODEL, 0)
            }
            EventKind::Fault(_) => (ELLIPSOID_EVENT_FAULT, ELLIPSOID_FAULT_OTHER, 0),
            _ => (ELLIPSOID_EVENT_OTHER, ELLIPSOID_OK, 0),
        };
        *slot = ellipsoid_event_t {
            index: e.index,
            kind,
            cause,
            feature,
        };
        out.n_events += 1;
    }
    out
}

/// The number of features per reading this library was built for (its N).
#[no_mangle]
pub extern "C" fn ellipsoid_features() -> usize {
    N
}

/// The bytes of storage `ellipsoid_decode` needs: at most `ELLIPSOID_MODEL_BYTES(ellipsoid_features())`.
#[no_mangle]
pub extern "C" fn ellipsoid_model_bytes() -> usize {
    size_of::<StoredModel>()
}

/// Validate the model blob at `blob` and decode it into `storage`, which must be 8-byte aligned
/// and at least `ellipsoid_model_bytes()` long. `blob_len` may be longer than the blob (a whole
/// flash slot): the blob's header states its length. On success `*model` is the handle to score
/// with, pointing into `storage`. On any failure `*model` is NULL and the storage is marked as
/// holding no model, even if it held one before, so a stale handle to it is refused.
///
/// # Safety
/// `blob` is valid for reads of `blob_len` bytes, `storage` for writes of `storage_len` bytes, and
/// `model` for a write of one pointer; the three do not overlap.
#[no_mangle]
pub unsafe extern "C" fn ellipsoid_decode(
    blob: *const u8,
    blob_len: usize,
    storage: *mut c_void,
    storage_len: usize,
    model: *mut *const ellipsoid_model,
) -> ellipsoid_status {
    if model.is_null() {
        return ELLIPSOID_ERR_NULL;
    }
    if misaligned(model, align_of::<*const ellipsoid_model>()) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    // SAFETY: `model` is non-null and aligned (checked above), valid for a write by the contract.
    unsafe { put(model, ptr::null()) };
    if blob.is_null() || storage.is_null() {
        return ELLIPSOID_ERR_NULL;
    }
    if misaligned(storage, ELLIPSOID_STORAGE_ALIGN) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    if storage_len < size_of::<StoredModel>() {
        return ELLIPSOID_ERR_STORAGE_SIZE;
    }
    if blob_len > isize::MAX as usize {
        return ELLIPSOID_ERR_LENGTH;
    }
    let stored = storage.cast::<StoredModel>();
    // SAFETY: `storage` is non-null, aligned for `StoredModel` and at least its size (checked
    // above), and valid for writes by the contract. Clearing the tag first means that storage
    // whose decode fails holds no model, whatever it held before.
    unsafe { ptr::write(ptr::addr_of_mut!((*stored).tag), 0) };
    // SAFETY: non-null, at most `isize::MAX` bytes (checked above), readable by the contract. The
    // bytes are only read, and not after this call.
    let bytes = unsafe { core::slice::from_raw_parts(blob, blob_len) };
    let decoded = match blob::Header::parse(bytes) {
        Ok(h) => match bytes.get(..h.len) {
            Some(b) => Model::<N>::from_blob(b),
            None => Err(DecodeError::TooShort { len: bytes.len() }),
        },
        Err(e) => Err(e),
    };
    let m = match decoded {
        Ok(m) => m,
        Err(e) => return decode_status(e),
    };
    // SAFETY: as for the tag above; the model is written whole before the tag marks it.
    unsafe {
        ptr::write(ptr::addr_of_mut!((*stored).model), m);
        ptr::write(ptr::addr_of_mut!((*stored).n), N as u32);
        ptr::write(ptr::addr_of_mut!((*stored).tag), MODEL_TAG);
        put(model, storage.cast_const().cast::<ellipsoid_model>());
    }
    ELLIPSOID_OK
}

/// Fill `*info` with what the decoded `model` says about itself.
///
/// # Safety
/// `model` comes from `ellipsoid_decode`; `info` is valid for a write of one `ellipsoid_model_info_t`.
#[no_mangle]
pub unsafe extern "C" fn ellipsoid_model_info(
    model: *const ellipsoid_model,
    info: *mut ellipsoid_model_info_t,
) -> ellipsoid_status {
    if info.is_null() {
        return ELLIPSOID_ERR_NULL;
    }
    if misaligned(info, align_of::<ellipsoid_model_info_t>()) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    // SAFETY: `model` is null or from `ellipsoid_decode`, which `model_ref` checks.
    let m = match unsafe { model_ref(model) } {
        Ok(m) => m,
        Err(e) => return e,
    };
    let (meta, t, p) = (m.meta(), m.thresholds(), m.policy());
    // SAFETY: `info` is non-null and aligned (checked above), writable by the contract.
    unsafe {
        put(
            info,
            ellipsoid_model_info_t {
                model_id: meta.model_id,
                sequence: meta.sequence,
                trained_at: meta.trained_at,
                features: N as u32,
                alarm_threshold: t.alarm,
                clear_threshold: t.clear,
                raise_after: p.raise_after,
                clear_after: p.clear_after,
                latch: u8::from(p.latch),
            },
        )
    };
    ELLIPSOID_OK
}

/// Score the reading `x` of `n` floats (raw sensor units; `n` must be the library's N). Returns
/// `ELLIPSOID_OK` when the reading was scored, an `ELLIPSOID_FAULT_*` code when it could not be, or
/// an argument error; `*out` (if not NULL) gets the same status and, on `ELLIPSOID_OK` only, d².
/// Here and in every call, an output pointer that is not aligned for its type is refused with
/// `ELLIPSOID_ERR_ALIGNMENT` before anything else is done.
///
/// # Safety
/// `model` comes from `ellipsoid_decode`; `x` is valid for reads of `n` floats; `out` is NULL or
/// valid for a write of one `ellipsoid_score_t`.
#[no_mangle]
pub unsafe extern "C" fn ellipsoid_score(
    model: *const ellipsoid_model,
    x: *const f32,
    n: usize,
    out: *mut ellipsoid_score_t,
) -> ellipsoid_status {
    if misaligned(out, align_of::<ellipsoid_score_t>()) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    // SAFETY: the arguments are checked by the helpers, and valid by the contract.
    let (status, score) = match unsafe { model_ref(model).and_then(|m| Ok((m, reading(x, n)?))) } {
        Ok((m, r)) => to_c_score(m.score(r)),
        Err(e) => (e, failed_score(e, 0)),
    };
    // SAFETY: `out` is null or writable by the contract; `put` checks null and alignment.
    unsafe { put(out, score) };
    status
}

/// Score the reading `x` as `ellipsoid_score` does (to the bit), and write each feature's
/// contribution to d² into `contributions` (`n_contributions` floats, the library's N). They sum
/// to d²; the largest names the feature that broke the pattern. On any status but `ELLIPSOID_OK`
/// every contribution is NaN.
///
/// # Safety
/// As `ellipsoid_score`; `contributions` is valid for writes of `n_contributions` floats.
#[no_mangle]
pub unsafe extern "C" fn ellipsoid_explain(
    model: *const ellipsoid_model,
    x: *const f32,
    n: usize,
    contributions: *mut f32,
    n_contributions: usize,
    out: *mut ellipsoid_score_t,
) -> ellipsoid_status {
    if misaligned(out, align_of::<ellipsoid_score_t>()) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    let checked = if contributions.is_null() {
        Err(ELLIPSOID_ERR_NULL)
    } else if n_contributions != N {
        Err(ELLIPSOID_ERR_LENGTH)
    } else if misaligned(contributions, align_of::<f32>()) {
        Err(ELLIPSOID_ERR_ALIGNMENT)
    } else {
        // SAFETY: the arguments are checked by the helpers, and valid by the contract.
        unsafe { model_ref(model).and_then(|m| Ok((m, reading(x, n)?))) }
    };
    let (status, score, values) = match checked {
        Ok((m, r)) => match m.explain(r) {
            Ok(e) => {
                let (s, score) = to_c_score(Ok(e.score));
                (s, score, Some(e.contributions))
            }
            Err(f) => {
                let (s, score) = to_c_score(Err(f));
                (s, score, None)
            }
        },
        Err(e) => (e, failed_score(e, 0), None),
    };
    if !contributions.is_null() && !misaligned(contributions, align_of::<f32>()) {
        for i in 0..n_contributions.min(N) {
            let v = values.as_ref().and_then(|c| c.get(i)).copied();
            // SAFETY: `i < n_contributions`, and the caller gave that many writable, aligned
            // floats at `contributions` (checked non-null and aligned just above).
            unsafe { ptr::write(contributions.add(i), v.unwrap_or(f32::NAN)) };
        }
    }
    // SAFETY: `out` is null or writable by the contract; `put` checks null and alignment.
    unsafe { put(out, score) };
    status
}

/// Initialise `*alarm` for the decoded `model`'s thresholds and policy: alarm and fault lines off.
///
/// # Safety
/// `alarm` is valid for writes of one `ellipsoid_alarm_t`; `model` comes from `ellipsoid_decode`.
#[no_mangle]
pub unsafe extern "C" fn ellipsoid_alarm_init(
    alarm: *mut ellipsoid_alarm_t,
    model: *const ellipsoid_model,
) -> ellipsoid_status {
    // SAFETY: `model_ref` checks the handle.
    let machine = match unsafe { model_ref(model) } {
        Ok(m) => AlarmMachine::new(m.thresholds(), m.policy()),
        Err(e) => return e,
    };
    // SAFETY: `alarm_init` checks `alarm`.
    unsafe { alarm_init(alarm, machine) }
}

/// Initialise `*alarm` as a machine with no valid model: the fault line is on for good, an event
/// `ELLIPSOID_FAULT_NO_MODEL` comes on the first update, and nothing is ever normal.
///
/// # Safety
/// `alarm` is valid for writes of one `ellipsoid_alarm_t`.
#[no_mangle]
pub unsafe extern "C" fn ellipsoid_alarm_init_without_model(
    alarm: *mut ellipsoid_alarm_t,
) -> ellipsoid_status {
    // SAFETY: `alarm_init` checks `alarm`.
    unsafe { alarm_init(alarm, AlarmMachine::without_model()) }
}

/// # Safety
/// `alarm` is null or valid for writes of one `ellipsoid_alarm_t`.
unsafe fn alarm_init(alarm: *mut ellipsoid_alarm_t, machine: AlarmMachine) -> ellipsoid_status {
    if alarm.is_null() {
        return ELLIPSOID_ERR_NULL;
    }
    if misaligned(alarm, align_of::<ellipsoid_alarm_t>()) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    let stored = alarm.cast::<StoredAlarm>();
    // SAFETY: non-null, aligned, large enough (asserted at compile time), writable by the
    // contract; `write` reads nothing of what was there.
    unsafe {
        ptr::write(
            stored,
            StoredAlarm {
                tag: ALARM_TAG,
                machine,
            },
        )
    };
    ELLIPSOID_OK
}

/// Feed one reading's score (as `ellipsoid_score` or `ellipsoid_explain` filled it) to the alarm
/// machine; `*step` gets the line levels and events. A score whose status is a fault counts as a
/// reading that could not be scored (the fault line goes on), as does one whose d² is not finite.
///
/// # Safety
/// `alarm` was initialised by `ellipsoid_alarm_init*`; `score` is valid for a read of one
/// `ellipsoid_score_t`; `step` is NULL or valid for a write of one `ellipsoid_step_t`.
#[no_mangle]
pub unsafe extern "C" fn ellipsoid_alarm_update(
    alarm: *mut ellipsoid_alarm_t,
    score: *const ellipsoid_score_t,
    step: *mut ellipsoid_step_t,
) -> ellipsoid_status {
    // SAFETY: `alarm_mut` checks `alarm`. The borrow ends here: the alarm is checked first, so
    // that its errors come first, and borrowed again only after the score has been read.
    if let Err(e) = unsafe { alarm_mut(alarm) } {
        return e;
    }
    if misaligned(step, align_of::<ellipsoid_step_t>()) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    if score.is_null() {
        return ELLIPSOID_ERR_NULL;
    }
    if misaligned(score, align_of::<ellipsoid_score_t>()) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    // SAFETY: non-null and aligned (checked above), readable by the contract. Every field is a
    // plain integer or float, so any bits are a valid value.
    let s = unsafe { ptr::read(score) };
    let input = if s.status == ELLIPSOID_OK as i32 {
        Ok(Scored {
            d2: s.d2,
            verdict: if s.above != 0 {
                Verdict::Above
            } else {
                Verdict::Below
            },
        })
    } else {
        match status_fault(s.status, s.feature) {
            Some(f) => Err(f),
            None => return ELLIPSOID_ERR_ARGUMENT,
        }
    };
    // SAFETY: as above; no other reference into the caller's memory is alive now.
    let machine = match unsafe { alarm_mut(alarm) } {
        Ok(m) => m,
        Err(e) => return e,
    };
    let out = c_step(&machine.update(&input));
    // SAFETY: `step` is null or writable by the contract; `put` checks null and alignment.
    unsafe { put(step, out) };
    ELLIPSOID_OK
}

/// Clear a raised or latched alarm by hand; `*step` gets the levels and a `ELLIPSOID_EVENT_RESET`
/// if the alarm was on. Does nothing to a machine without a model.
///
/// # Safety
/// `alarm` was initialised by `ellipsoid_alarm_init*`; `step` is NULL or valid for a write of one
/// `ellipsoid_step_t`.
#[no_mangle]
pub unsafe extern "C" fn ellipsoid_alarm_reset(
    alarm: *mut ellipsoid_alarm_t,
    step: *mut ellipsoid_step_t,
) -> ellipsoid_status {
    // SAFETY: `alarm_mut` checks `alarm`.
    let machine = match unsafe { alarm_mut(alarm) } {
        Ok(m) => m,
        Err(e) => return e,
    };
    if misaligned(step, align_of::<ellipsoid_step_t>()) {
        return ELLIPSOID_ERR_ALIGNMENT;
    }
    let out = c_step(&machine.reset());
    // SAFETY: `step` is null or writable by the contract; `put` checks null and alignment.
    unsafe { put(step, out) };
    ELLIPSOID_OK
}

/// A short lower-case name for a status value (`"ok"`, `"crc"`, `"not-finite"`...), NUL-terminated
/// and static; `"unknown"` for a value that is no status.
#[no_mangle]
pub extern "C" fn ellipsoid_status_name(status: i32) -> *const c_char {
    let name: &'static [u8] = match status {
        0 => b"ok\0",
        1 => b"null-pointer\0",
        2 => b"length\0",
        3 => b"storage-size\0",
        4 => b"alignment\0",
        5 => b"not-decoded\0",
        6 => b"argument\0",
        16 => b"too-short\0",
        17 => b"magic\0",
        18 => b"version\0",
        19 => b"dimension\0",
        20 => b"flags\0",
        21 => b"reserved\0",
        22 => b"length-field\0",
        23 => b"crc\0",
        24 => b"body\0",
        25 => b"non-canonical\0",
        26 => b"trailing-bytes\0",
        27 => b"invalid-model\0",
        28 => b"blob-other\0",
        48 => b"not-finite\0",
        49 => b"log-domain\0",
        50 => b"overflow\0",
        51 => b"contribution-overflow\0",
        52 => b"fault-other\0",
        53 => b"no-model\0",
        _ => b"unknown\0",
    };
    name.as_ptr().cast()
}

/// Stops a bare-metal image on a panic. No exported function can reach it: the end-to-end script
/// checks the C example's image for that.
#[cfg(all(target_os = "none", not(test)))]
#[panic_handler]
fn halt(_: &core::panic::PanicInfo) -> ! {
    loop {
        core::hint::spin_loop();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The header's `ELLIPSOID_MODEL_BYTES(n)` holds for every N a feature can choose, not only
    /// for the one built (which a compile-time assertion checks).
    #[test]
    fn the_storage_formula_holds_for_every_supported_n() {
        macro_rules! each {
            ($($n:literal)*) => {$(
                assert!(
                    size_of::<Stored<$n>>() <= model_storage_bytes($n),
                    "N = {}: {} bytes needed, the header promises {}",
                    $n,
                    size_of::<Stored<$n>>(),
                    model_storage_bytes($n)
                );
                assert!(align_of::<Stored<$n>>() <= ELLIPSOID_STORAGE_ALIGN);
            )*};
        }
        each!(1 2 3 4 5 6 7 8 10 12 16 20 24 32);
    }

    #[test]
    fn every_status_has_its_own_name() {
        let codes = (0..=6).chain(16..=28).chain(48..=53);
        let mut names: Vec<&[u8]> = codes
            .map(|c| {
                // SAFETY: `ellipsoid_status_name` returns a static NUL-terminated string.
                unsafe { core::ffi::CStr::from_ptr(ellipsoid_status_name(c)) }.to_bytes()
            })
            .collect();
        assert!(!names.contains(&&b"unknown"[..]));
        let all = names.len();
        names.sort();
        names.dedup();
        assert_eq!(names.len(), all, "two status codes share a name");
    }
}
