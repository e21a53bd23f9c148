//! A model bank as the device runs it: a blob's run-time `(N, M)` mapped to the core's
//! `Tracker<N, M>` (window → bank → alarm machine → drift) and `FlashBank<N, M>`.
//!
//! The tracker's state (the window's ring, the alarm machine, the drift shift) lives in the core's
//! type and is carried from one reading to the next exactly as on the device: nothing here scores,
//! averages or re-centres. A version 1 blob goes through the same tracker as a bank of one mode
//! with a window of one reading and no drift, which the core defines to give `Model::score`'s bits.

use ellipsoid_core::bank::{BankError, FlashBank, ModeSelect};
use ellipsoid_core::blob;
use ellipsoid_core::track::Tracker;
use ellipsoid_core::window::{WindowError, WindowSpec};
use ellipsoid_core::{AlarmPolicy, DecodeError, ModelMeta, ReadingFault, Step, Verdict};

use crate::device::dims::ParamsView;

/// One reading after the tracker has stepped, with the dimensions erased.
#[derive(Clone, Debug, PartialEq)]
pub struct TrackRow {
    /// The chosen mode, d² and verdict, or why the reading could not be scored.
    pub score: Result<(u8, f32, Verdict), ReadingFault>,
    /// Alarm and fault lines after the reading, and its events.
    pub step: Step,
    /// Per-feature contributions of the scored vector (`M` values), for the chosen mode.
    pub contributions: Option<Vec<f32>>,
    /// Index (into the scored vector) of the largest contribution, as the core picks it.
    pub top: Option<usize>,
    /// Whether the drift shift has reached its bound on some feature since the blob was loaded.
    pub drift_at_bound: bool,
}

/// A core `Tracker<N, M>` whose dimensions are known only at run time.
pub trait AnyTracker {
    /// Raw readings per sample.
    fn n(&self) -> usize;
    /// Length of the scored vector (`N`, or `2 N` with differences).
    fn m(&self) -> usize;
    /// [`Tracker::step_explained`] (the same step as [`Tracker::step`], to the bit, with the
    /// chosen mode's contributions). `x` must hold `n()` values.
    fn step(&mut self, x: &[f32], mode: Option<u8>) -> TrackRow;
    /// [`Tracker::reset`]: the alarm reset.
    fn reset(&mut self) -> Step;
    /// [`Tracker::shift`]: the drift shift now, in model units (`m()` values).
    fn shift(&self) -> Vec<f32>;
}

fn fixed<const N: usize>(x: &[f32]) -> [f32; N] {
    let mut a = [f32::NAN; N];
    for (d, s) in a.iter_mut().zip(x) {
        *d = *s;
    }
    a
}

impl<const N: usize, const M: usize> AnyTracker for Tracker<'_, N, M> {
    fn n(&self) -> usize {
        N
    }
    fn m(&self) -> usize {
        M
    }
    fn step(&mut self, x: &[f32], mode: Option<u8>) -> TrackRow {
        let s = Tracker::step_explained(self, &fixed::<N>(x), mode);
        // The core's own rule for the largest contribution (`Explained::top`).
        let top = s.top();
        TrackRow {
            score: s.score.map(|b| (b.mode, b.d2, b.verdict)),
            step: s.step,
            contributions: s.contributions.map(|c| c.to_vec()),
            top,
            drift_at_bound: s.drift_at_bound,
        }
    }
    fn reset(&mut self) -> Step {
        Tracker::reset(self)
    }
    fn shift(&self) -> Vec<f32> {
        Tracker::shift(self).to_vec()
    }
}

/// Everything a bank blob holds, with the dimensions erased (for `inspect` and reports).
#[derive(Clone, Debug, PartialEq)]
pub struct BankView {
    /// The blob's format version (1: a single model, read as a bank of one).
    pub version: u8,
    /// Raw readings per sample.
    pub n: usize,
    /// Length of the scored vector.
    pub m: usize,
    /// Identifier, training time, sequence.
    pub meta: ModelMeta,
    /// Bit `i`: raw feature `i` is log-transformed.
    pub log_mask: u32,
    /// How the mode of a reading is chosen.
    pub select: ModeSelect,
    /// The reading window.
    pub window: WindowSpec,
    /// Drift: the rate and the bound per scored feature (model units), when on.
    pub drift: Option<(f32, Vec<f32>)>,
    /// The digest of the ordered raw feature names (version 2 only).
    pub names_digest: Option<u32>,
    /// Alarm policy (its latch from the header).
    pub policy: AlarmPolicy,
    /// Each mode's parameters, in the view a single model has (`m` features each).
    pub modes: Vec<ParamsView>,
}

fn view_of<const N: usize, const M: usize>(b: &FlashBank<'_, N, M>) -> BankView {
    let policy = b.policy();
    BankView {
        version: b.version(),
        n: N,
        m: M,
        meta: b.meta(),
        log_mask: b.log_mask(),
        select: b.select(),
        window: b.window(),
        drift: b.drift().map(|d| (d.rate, d.bound.to_vec())),
        names_digest: b.names_digest(),
        policy,
        modes: (0..b.modes())
            .map(|k| {
                // `k < modes()`: the bank has this mode.
                let p = b.mode_params(k)?;
                Some(ParamsView {
                    meta: b.meta(),
                    log_mask: b.log_mask(),
                    offset: p.offset.to_vec(),
                    scale: p.scale.to_vec(),
                    mean: p.mean.to_vec(),
                    w: p.w.iter().flatten().copied().collect(),
                    thresholds: p.thresholds,
                    policy,
                })
            })
            .collect::<Option<Vec<_>>>()
            .unwrap_or_default(),
    }
}

/// The blob's scored length does not fit the `M` tried: try the other one.
fn wrong_shape(e: &DecodeError) -> bool {
    matches!(
        e,
        DecodeError::Bank(BankError::Window(WindowError::Shape { .. }))
    )
}

fn unsupported(n: usize) -> DecodeError {
    DecodeError::Dimension {
        found: n.min(255) as u8,
        expected: crate::device::dims::MAX_DIM as u8,
    }
}

/// Run `$make` (a `FlashBank`-checking constructor of `N`, `M` over `$bytes`) for the blob's
/// `(N, M)`: `M = N` first, then `M = 2 N` when the blob's window scores the differences.
macro_rules! for_blob_dims {
    ($bytes:expr, $N:ident, $M:ident => $make:block) => {{
        let n = usize::from(blob::Header::parse($bytes)?.n);
        let same = $crate::with_bank_dims!(n, n, $N, $M => $make).unwrap_or(Err(unsupported(n)));
        match same {
            Err(e) if wrong_shape(&e) => $crate::with_bank_dims!(n, 2 * n, $N, $M => $make)
                .unwrap_or(Err(unsupported(n))),
            other => other,
        }
    }};
}

/// A tracker for an f32 blob of version 1 or 2, borrowing its bytes (as the device borrows its
/// flash slot): an empty window, a quiet alarm, no drift shift.
pub fn tracker(bytes: &[u8]) -> Result<Box<dyn AnyTracker + '_>, DecodeError> {
    for_blob_dims!(bytes, N, M => {
        Tracker::<N, M>::from_blob(bytes).map(|t| Box::new(t) as Box<dyn AnyTracker + '_>)
    })
}

/// The bank a blob of version 1 or 2 holds, through the core's bank reader.
pub fn bank_view(bytes: &[u8]) -> Result<BankView, DecodeError> {
    for_blob_dims!(bytes, N, M => {
        FlashBank::<N, M>::from_blob(bytes).map(|b| view_of(&b))
    })
}
