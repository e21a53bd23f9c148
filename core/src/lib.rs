//! Allocation-free multivariate Gaussian anomaly scoring for microcontrollers.
//!
//! A model of healthy operation is a Gaussian with mean `μ` and covariance `Σ = L Lᵀ`. A reading `x`
//! scores `d² = ‖W (u − μ)‖²` with `W = L⁻¹` and `u` the standardised reading: the squared
//! Mahalanobis distance. Large `d²` means the reading does not fit the learnt pattern, even when
//! every sensor on its own is inside its usual range.
//!
//! # Layers
//!
//! One concept a file:
//!
//! * [`params`]: the plain parameters ([`ModelParams`]) and the rules they must keep
//!   ([`ModelParams::validate`]).
//! * [`blob`]: the wire format, encoder **and** decoder. The blob is the only thing that crosses from
//!   host to device; `FORMAT.md` beside this crate gives it byte by byte.
//! * [`model`]: the compiled [`Model`] and the maths of a score, its per-feature contributions and
//!   its log-density. This is the definition of a score: the host's replay calls it too.
//! * [`alarm`]: the policy, a pure state machine from scores to alarm and fault lines.
//! * [`window`], [`bank`], [`track`]: a model bank (format version 2): up to [`MAX_MODES`]
//!   Gaussians of operating modes with the rule that picks a reading's mode, a window of up to
//!   [`MAX_WINDOW`] readings (mean and first differences), and slow drift of the centre, chained
//!   by the [`Tracker`] into the alarm machine. A version 1 blob runs through the `Tracker` too,
//!   with the same bits as [`FlashModel`] and [`AlarmMachine`].
//!
//! Check once, then never fail: [`Model::from_blob`] validates every field, and after that
//! [`Model::score`] cannot fail except for a reading it cannot score, which is a distinct
//! [`ReadingFault`], never a number that could pass as normal.
//!
//! # Memory
//!
//! Everything has a size known at compile time; there is no heap. Three forms of a model, all
//! scoring through one definition, so their d² are the same bits ([`flash`] has the details):
//!
//! | form | what it keeps | RAM on thumbv7em, N = 8 / 16 / 32 |
//! |---|---|---|
//! | [`Model`] | the parameters and a square folded factor: `8 N² + 16 N + 48` | 688 / 2 352 / 8 752 |
//! | [`CompactModel`] | the folded factor packed (`N(N+1)/2` floats) and the centre | 224 / 656 / 2 288 |
//! | [`FlashModel`] | a checked view of the blob, the centre and a few scalars: `4 N + 48` | 80 / 112 / 176 |
//!
//! The `FlashModel` meets `64 + 8 N` for every N up to 32; the node in `firmware-example` keeps
//! one. `Model`'s figures are pinned by the test `model_sizes_are_as_documented` (x86-64 and
//! thumbv7em have the same field alignments); the other two are pinned at compile time on 32-bit
//! targets and by a test on 64-bit hosts (where the borrowed slice is 8 bytes longer). The
//! fixed-point [`FixedModel`] for parts without an FPU ([`fixed`]) takes 144 bytes at N = 8.
//!
//! Scoring itself uses `4 N` bytes of stack for the deviation vector, plus a few registers.
//!
//! A model bank's [`Tracker`] holds the [`FlashBank`] view (the centres of [`MAX_MODES`] modes,
//! `32 M` bytes, and a few scalars), the [`Window`] ring (`64 N` bytes: [`MAX_WINDOW`] readings,
//! whatever the window's length), the alarm machine, the drift shift (`4 M`) and the last scored vector (`4 M`, for
//! [`Tracker::explain_last`]). On thumbv7em
//! (pinned at compile time in `track.rs`):
//!
//! | N, M | `Tracker` | of which `FlashBank` | `Window` |
//! |---|---|---|---|
//! | 8, 8 | 936 | 312 | 520 |
//! | 8, 16 (differences) | 1 256 | 568 | 520 |
//! | 16, 16 | 1 768 | 568 | 1 032 |
//! | 16, 32 (differences) | 2 408 | 1 080 | 1 032 |
//!
//! # Using it from flash
//!
//! ```
//! use ellipsoid_core::{blob, AlarmMachine, Model, ModelParams, Preprocess, Thresholds};
//! # let params = ModelParams::<2> {
//! #     meta: Default::default(), preprocess: Preprocess::identity(), mean: [0.0; 2],
//! #     w: [[1.0, 0.0], [0.0, 1.0]], thresholds: Thresholds { alarm: 9.0, clear: 4.0 },
//! #     policy: Default::default() };
//! # let mut buf = [0u8; blob::max_len(2)];
//! # let len = blob::encode(&params, &mut buf).unwrap();
//! // `flash` would be a `&'static [u8]` model slot; the header tells how long the blob is.
//! let flash: &[u8] = &buf;
//! let header = blob::Header::parse(flash).unwrap();
//! let model = Model::<2>::from_blob(&flash[..header.len]).unwrap();
//! let mut alarm = AlarmMachine::new(model.thresholds(), model.policy());
//! let step = alarm.update(&model.score(&[0.5, -1.0]));
//! assert!(!step.alarm && !step.fault);
//! ```
//!
//! # Inspecting a binary
//!
//! `arm-none-eabi-size` gives the flash and RAM of a firmware image; `arm-none-eabi-objdump -d`
//! shows the score loop (look for `vmla.f32` and `vldr` in the inner loop; there must be no
//! `vfma`, a fused multiply-add, which would round differently from the host).
#![cfg_attr(not(test), no_std)]
#![forbid(unsafe_code)]
#![deny(missing_docs)]

pub mod alarm;
pub mod bank;
pub mod blob;
pub mod fixed;
pub mod flash;
pub mod model;
pub mod params;
pub mod track;
pub mod window;

pub use alarm::{AlarmMachine, Event, EventKind, FaultCause, Judgement, Status, Step};
pub use bank::{
    BankError, BankParams, BankScore, DriftSpec, FlashBank, ModeParams, ModeSelect, MAX_MODES,
};
pub use blob::{DecodeError, EncodeError};
pub use fixed::{FixedModel, FixedParams};
pub use flash::{tri, CompactModel, FlashModel};
pub use model::{Explained, Model, ReadingFault, Scored, Verdict};
pub use params::{
    AlarmPolicy, Field, ModelError, ModelMeta, ModelParams, Preprocess, Thresholds, MAX_FEATURES,
    MAX_RUN,
};
pub use track::{TrackStep, Tracker};
pub use window::{Window, WindowError, WindowSpec, MAX_WINDOW};

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn model_sizes_are_as_documented() {
        assert_eq!(core::mem::size_of::<Model<8>>(), 688);
        assert_eq!(core::mem::size_of::<Model<16>>(), 2352);
    }
}
