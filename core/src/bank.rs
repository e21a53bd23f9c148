//! A model bank: up to [`MAX_MODES`] Gaussians (operating *modes*) in one blob, the rule that
//! picks the mode for a reading, and [`FlashBank`], the bank read in place from its blob.
//!
//! Each mode is a whole single model of the scored vector's `M` features (its own offset, scale,
//! mean, `W` and alarm and clear limits); the log mask, the window, the drift and the alarm
//! policy belong to the bank. The score of a mode is the single-model score, with the same `f32`
//! operations in the same order as [`crate::Model::score`]: a bank of one mode with a window of
//! one and no drift gives `Model::score`'s bits.
//!
//! # The mode rule
//!
//! * **Known** ([`ModeSelect::Known`]): the device is told the mode `k` with each reading; `k*`
//!   is that mode. No mode, or a mode the bank does not have, is a fault
//!   ([`ReadingFault::UnknownMode`]).
//! * **Nearest** ([`ModeSelect::Nearest`]): `k*` is the mode with the smallest
//!   `rₖ = d²ₖ / alarmₖ` (an `f32` division), the mode in whose alarm ellipsoid the reading lies
//!   deepest; ties go to the lowest `k`. A mode whose d² is not finite is never chosen; if no
//!   mode's is, the reading is a fault ([`ReadingFault::Overflow`]).
//!
//! The verdict is `Above` iff `d²_{k*} > alarm_{k*}`, and the alarm machine's "below" is
//! `d²_{k*} < clear_{k*}`. So a reading is flagged **only when it lies outside every mode's
//! alarm ellipsoid**: in `f32`, `rₖ ≤ 1` exactly when `d²ₖ ≤ alarmₖ` (rounding is monotone, and
//! for `d² > alarm` the exact quotient is at least `1 + ulp(alarm)/alarm > 1 + 2⁻²⁴`, past the
//! midpoint between 1 and the next float, so it never rounds down to 1), hence if any mode has
//! the reading inside, the chosen mode has `r ≤ 1` and the reading inside it too.
//!
//! The mode weights and the log-determinants of the covariances are deliberately **not** part of
//! the rule (it is not the most probable mode of the mixture). For a reading drawn from mode `k`
//! the bank flags it only if mode `k`'s own test does, so its false-alarm rate in the bank is at
//! most the rate mode `k`'s limit promises: each mode's promise from the threshold pipeline
//! still holds, as an upper bound, for the whole bank. With priors and log-determinants, a heavy
//! or broad mode would capture the edge of a light or narrow one, score the reading against its
//! own limit and could flag what the light mode calls normal, and no mode's promise would hold.
//! The cost is the other way: a fault that moves the machine from one mode's region into
//! another's is not flagged (the bank is as blind to it as it is to a change of duty point).

use core::fmt;

use crate::alarm::Judgement;
use crate::blob::{self, f32_at, floats_len, DecodeError, VERSION_BANK};
use crate::flash::{flash_row, Floats};
use crate::model::{self, Folded, ReadingFault, Verdict};
use crate::params::{
    check, fold_center, AlarmPolicy, ModelError, ModelMeta, ParamSource, Thresholds, MAX_RUN,
};
use crate::window::{check_window, WindowError, WindowSpec};

/// The most modes a bank holds.
pub const MAX_MODES: usize = 8;

/// How the bank picks the mode a reading is scored against.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ModeSelect {
    /// The mode in whose alarm ellipsoid the reading lies deepest (see the module docs).
    Nearest,
    /// The mode the device is told with each reading.
    Known,
}

impl ModeSelect {
    /// The byte the blob stores: 0 nearest, 1 known.
    pub const fn code(self) -> u8 {
        match self {
            ModeSelect::Nearest => 0,
            ModeSelect::Known => 1,
        }
    }

    /// `nearest` or `known`.
    pub const fn name(self) -> &'static str {
        match self {
            ModeSelect::Nearest => "nearest",
            ModeSelect::Known => "known",
        }
    }
}

/// Slow re-centring (see [`crate::track`]).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct DriftSpec<const M: usize> {
    /// The weight of each new deviation, `0 < rate < 1`: `s ← s + rate · (t' − c)`.
    pub rate: f32,
    /// The largest `|sᵢ|` per scored feature, in model units (after the log, before offset and
    /// scale), finite and `> 0`.
    pub bound: [f32; M],
}

/// One Gaussian of a bank: a single model of the `M` scored features, without the bank's log
/// mask and policy. The same fields, with the same rules, as a [`crate::ModelParams`].
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ModeParams<const M: usize> {
    /// Subtracted from the (log-transformed) value.
    pub offset: [f32; M],
    /// Multiplies the offset value; finite and positive.
    pub scale: [f32; M],
    /// Mean in the standardised space.
    pub mean: [f32; M],
    /// `W = L⁻¹`, lower-triangular, row-major; the strict upper triangle must be zero.
    pub w: [[f32; M]; M],
    /// This mode's alarm and clear limits on d².
    pub thresholds: Thresholds,
}

/// Every parameter of a bank of `N` raw and `M` scored features (`M = N`, or `2 N` with
/// differences).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BankParams<'m, const N: usize, const M: usize> {
    /// Identifier and training time.
    pub meta: ModelMeta,
    /// Bit `i`: raw feature `i` is log-transformed (its window mean is). Bits `N..` are clear:
    /// differences are never logged.
    pub log_mask: u32,
    /// How a reading's mode is picked.
    pub select: ModeSelect,
    /// The modes, 1 to [`MAX_MODES`].
    pub modes: &'m [ModeParams<M>],
    /// The reading window.
    pub window: WindowSpec,
    /// Slow re-centring, if on.
    pub drift: Option<DriftSpec<M>>,
    /// Debounce and latch, for the whole bank.
    pub policy: AlarmPolicy,
    /// [`crate::blob::names_digest`] of the raw feature names, in column order.
    pub names_digest: u32,
}

/// Why a bank was refused. The same errors on encode and decode.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum BankError {
    /// The window, or the shape `N`, `M` it implies, breaks a rule.
    Window(WindowError),
    /// The number of modes is outside `1..=MAX_MODES`.
    Modes {
        /// The number found.
        count: usize,
    },
    /// The mode-selection byte is neither 0 (nearest) nor 1 (known).
    Select {
        /// The byte found.
        found: u8,
    },
    /// The options byte has bits other than 0 (differences) and 1 (drift).
    Options {
        /// The byte found.
        found: u8,
    },
    /// `raise_after` or `clear_after` is outside `1..=MAX_RUN`.
    PolicyRange,
    /// A mode breaks a single model's rule.
    Mode {
        /// The mode's index.
        mode: u8,
        /// The rule it broke.
        error: ModelError,
    },
    /// The drift rate is not strictly between 0 and 1.
    DriftRate,
    /// A drift bound is not finite and positive.
    DriftBound {
        /// The scored feature.
        index: u8,
    },
}

impl fmt::Display for BankError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            BankError::Window(e) => write!(f, "{e}"),
            BankError::Modes { count } => {
                write!(f, "a bank has 1 to {MAX_MODES} modes, not {count}")
            }
            BankError::Select { found } => write!(
                f,
                "mode selection {found} is neither 0 (nearest) nor 1 (known)"
            ),
            BankError::Options { found } => write!(
                f,
                "options byte {found:#04x} has bits other than differences (0) and drift (1)"
            ),
            BankError::PolicyRange => {
                write!(f, "raise_after and clear_after must lie in 1..={MAX_RUN}")
            }
            BankError::Mode { mode, error } => write!(f, "mode {mode}: {error}"),
            BankError::DriftRate => f.write_str("the drift rate must lie strictly between 0 and 1"),
            BankError::DriftBound { index } => {
                write!(
                    f,
                    "the drift bound of feature {index} is not finite and positive"
                )
            }
        }
    }
}

impl core::error::Error for BankError {}

impl From<BankError> for DecodeError {
    fn from(e: BankError) -> Self {
        DecodeError::Bank(e)
    }
}

/// The layout rules, checked before the floats are read (they give the body's length): the
/// selection byte, the number of modes, the options byte, the window and the shape `N`, `M`.
/// The encoder checks the same, in the same order.
pub(crate) fn check_layout<const N: usize, const M: usize>(
    select: u8,
    k: u8,
    length: u8,
    options: u8,
    log_mask: u32,
) -> Result<(ModeSelect, WindowSpec), BankError> {
    let select = match select {
        0 => ModeSelect::Nearest,
        1 => ModeSelect::Known,
        found => return Err(BankError::Select { found }),
    };
    if !(1..=MAX_MODES).contains(&usize::from(k)) {
        return Err(BankError::Modes {
            count: usize::from(k),
        });
    }
    if options & !(blob::OPTION_DIFFERENCES | blob::OPTION_DRIFT) != 0 {
        return Err(BankError::Options { found: options });
    }
    let window = WindowSpec {
        length,
        differences: options & blob::OPTION_DIFFERENCES != 0,
    };
    check_window(N, M, window, log_mask).map_err(BankError::Window)?;
    Ok((select, window))
}

/// The rules after the layout: the policy, each mode as a single model of `M` features (in
/// order), the drift rate and bounds.
pub(crate) fn check_rules<const M: usize, S: ParamSource<M>>(
    policy: AlarmPolicy,
    modes: impl Iterator<Item = S>,
    drift_rate: Option<f32>,
    bound: impl Fn(usize) -> f32,
) -> Result<(), BankError> {
    let run = 1..=MAX_RUN;
    if !run.contains(&policy.raise_after) || !run.contains(&policy.clear_after) {
        return Err(BankError::PolicyRange);
    }
    for (k, mode) in modes.enumerate() {
        check::<M, _>(&mode).map_err(|error| BankError::Mode {
            mode: k as u8,
            error,
        })?;
    }
    if let Some(rate) = drift_rate {
        if !(rate > 0.0 && rate < 1.0) {
            return Err(BankError::DriftRate);
        }
        if let Some(i) = (0..M).position(|i| {
            let b = bound(i);
            !(b.is_finite() && b > 0.0)
        }) {
            return Err(BankError::DriftBound { index: i as u8 });
        }
    }
    Ok(())
}

/// A [`ModeParams`] with the bank's log mask and policy, read by the single-model rules.
struct ModeSource<'p, const M: usize> {
    p: &'p ModeParams<M>,
    log_mask: u32,
    policy: AlarmPolicy,
}

impl<const M: usize> ParamSource<M> for ModeSource<'_, M> {
    fn offset(&self, i: usize) -> f32 {
        self.p.offset.get(i).copied().unwrap_or(f32::NAN)
    }
    fn scale(&self, i: usize) -> f32 {
        self.p.scale.get(i).copied().unwrap_or(f32::NAN)
    }
    fn mean(&self, i: usize) -> f32 {
        self.p.mean.get(i).copied().unwrap_or(f32::NAN)
    }
    fn w(&self, i: usize, j: usize) -> f32 {
        self.p
            .w
            .get(i)
            .and_then(|r| r.get(j))
            .copied()
            .unwrap_or(f32::NAN)
    }
    fn row_finite(&self, i: usize) -> bool {
        self.p
            .w
            .get(i)
            .is_some_and(|r| r.iter().all(|v| v.is_finite()))
    }
    fn above_diagonal(&self, i: usize) -> Option<usize> {
        let row = self.p.w.get(i)?;
        row.iter()
            .skip(i + 1)
            .position(|v| *v != 0.0)
            .map(|j| i + 1 + j)
    }
    fn log_mask(&self) -> u32 {
        self.log_mask
    }
    fn thresholds(&self) -> Thresholds {
        self.p.thresholds
    }
    fn policy(&self) -> AlarmPolicy {
        self.policy
    }
}

impl<const N: usize, const M: usize> BankParams<'_, N, M> {
    /// Check every rule a [`FlashBank`] relies on, in the decoder's order: `Ok` here means the
    /// blob [`crate::blob::encode_bank`] writes is read back.
    pub fn validate(&self) -> Result<(), BankError> {
        let k = self.modes.len();
        if !(1..=MAX_MODES).contains(&k) {
            return Err(BankError::Modes { count: k });
        }
        let options = if self.window.differences {
            blob::OPTION_DIFFERENCES
        } else {
            0
        } | if self.drift.is_some() {
            blob::OPTION_DRIFT
        } else {
            0
        };
        check_layout::<N, M>(
            self.select.code(),
            k as u8,
            self.window.length,
            options,
            self.log_mask,
        )?;
        let (log_mask, policy) = (self.log_mask, self.policy);
        check_rules::<M, _>(
            policy,
            self.modes.iter().map(|p| ModeSource {
                p,
                log_mask,
                policy,
            }),
            self.drift.as_ref().map(|d| d.rate),
            |i| {
                self.drift
                    .as_ref()
                    .and_then(|d| d.bound.get(i))
                    .copied()
                    .unwrap_or(f32::NAN)
            },
        )
    }
}

/// A scored reading of a bank.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BankScore {
    /// The mode `k*` the reading was scored against.
    pub mode: u8,
    /// `d²_{k*}`.
    pub d2: f32,
    /// `Above` iff `d²_{k*} > alarm_{k*}`.
    pub verdict: Verdict,
}

/// One mode of a [`FlashBank`], read in place: the [`Folded`] form the score is written against.
struct ModeView<'b, const M: usize> {
    floats: &'b [u8],
    center: &'b [f32; M],
    log_mask: u32,
}

impl<const M: usize> ModeView<'_, M> {
    fn thresholds(&self) -> Thresholds {
        Thresholds {
            alarm: f32_at(self.floats, Floats::<M>::THRESHOLDS),
            clear: f32_at(self.floats, Floats::<M>::THRESHOLDS + 1),
        }
    }
}

impl<const M: usize> Folded<M> for ModeView<'_, M> {
    #[inline(always)]
    fn center(&self) -> &[f32; M] {
        self.center
    }
    #[inline(always)]
    fn log_mask(&self) -> u32 {
        self.log_mask
    }
    #[inline(always)]
    fn alarm(&self) -> f32 {
        f32_at(self.floats, Floats::<M>::THRESHOLDS)
    }
    #[inline(always)]
    fn row(&self, i: usize) -> impl Iterator<Item = f32> + '_ {
        flash_row::<M>(self.floats, i)
    }
}

/// A validated bank blob (version 2, or a version 1 single model read as a bank of one), scored
/// in place: the modes live in flash.
///
/// [`FlashBank::from_blob`] checks every rule; after that nothing on it can fail or panic. It
/// keeps the centre of each mode (`offset + mean / scale`, `4 M` bytes a mode, for
/// [`MAX_MODES`] modes) and reads each `Wᵢⱼ · scaleⱼ` from the blob's bytes at every score, as
/// [`crate::FlashModel`] does.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct FlashBank<'a, const N: usize, const M: usize> {
    /// `K · floats_len(M)` bytes.
    modes: &'a [u8],
    /// Empty, or the drift rate and the `M` bounds.
    drift: &'a [u8],
    centers: [[f32; M]; MAX_MODES],
    meta: ModelMeta,
    policy: AlarmPolicy,
    log_mask: u32,
    names_digest: Option<u32>,
    k: u8,
    select: ModeSelect,
    window: WindowSpec,
    version: u8,
}

impl<'a, const N: usize, const M: usize> FlashBank<'a, N, M> {
    /// Check `bytes` (exactly one blob) and keep a view of it. A version 2 blob is a bank; a
    /// version 1 blob (f32) is read as a bank of one mode with `M = N`, a window of one, no
    /// drift, the nearest rule and no names digest, and is checked exactly as
    /// [`crate::FlashModel::from_blob`] checks it (the same errors).
    pub fn from_blob(bytes: &'a [u8]) -> Result<Self, DecodeError> {
        let header = blob::Header::parse(bytes)?;
        if header.version == VERSION_BANK {
            Self::from_v2(bytes)
        } else {
            Self::from_v1(bytes)
        }
    }

    fn from_v1(bytes: &'a [u8]) -> Result<Self, DecodeError> {
        let body = blob::read_body::<N>(bytes)?;
        let window = WindowSpec::single();
        check_window(N, M, window, body.log_mask)
            .map_err(|e| DecodeError::Bank(BankError::Window(e)))?;
        let f = Floats::<M> {
            bytes: body.floats,
            log_mask: body.log_mask,
            policy: body.policy,
        };
        check::<M, _>(&f)?;
        let mut bank = Self {
            modes: body.floats,
            drift: &[],
            centers: [[0.0; M]; MAX_MODES],
            meta: body.meta,
            policy: body.policy,
            log_mask: body.log_mask,
            names_digest: None,
            k: 1,
            select: ModeSelect::Nearest,
            window,
            version: blob::VERSION,
        };
        bank.fill_centers();
        Ok(bank)
    }

    fn from_v2(bytes: &'a [u8]) -> Result<Self, DecodeError> {
        let body = blob::read_bank_body::<N, M>(bytes)?;
        let per = floats_len(M);
        let modes = (0..usize::from(body.k)).map(|k| Floats::<M> {
            bytes: body.modes.get(k * per..(k + 1) * per).unwrap_or(&[]),
            log_mask: body.log_mask,
            policy: body.policy,
        });
        let drift = body.drift;
        check_rules::<M, _>(
            body.policy,
            modes,
            (!drift.is_empty()).then(|| f32_at(drift, 0)),
            |i| f32_at(drift, 1 + i),
        )?;
        let mut bank = Self {
            modes: body.modes,
            drift,
            centers: [[0.0; M]; MAX_MODES],
            meta: body.meta,
            policy: body.policy,
            log_mask: body.log_mask,
            names_digest: Some(body.names_digest),
            k: body.k,
            select: body.select,
            window: body.window,
            version: VERSION_BANK,
        };
        bank.fill_centers();
        Ok(bank)
    }

    fn fill_centers(&mut self) {
        let per = floats_len(M);
        for (k, center) in self
            .centers
            .iter_mut()
            .enumerate()
            .take(usize::from(self.k))
        {
            let f = Floats::<M> {
                bytes: self.modes.get(k * per..(k + 1) * per).unwrap_or(&[]),
                log_mask: self.log_mask,
                policy: self.policy,
            };
            for (i, c) in center.iter_mut().enumerate() {
                *c = fold_center(f.offset(i), f.mean(i), f.scale(i));
            }
        }
    }

    /// The number of modes `K`.
    pub const fn modes(&self) -> usize {
        self.k as usize
    }

    /// How a reading's mode is picked.
    pub const fn select(&self) -> ModeSelect {
        self.select
    }

    /// The reading window.
    pub const fn window(&self) -> WindowSpec {
        self.window
    }

    /// The drift parameters, if drift is on (copied out of the blob).
    pub fn drift(&self) -> Option<DriftSpec<M>> {
        if self.drift.is_empty() {
            return None;
        }
        let mut bound = [0.0f32; M];
        for (i, b) in bound.iter_mut().enumerate() {
            *b = f32_at(self.drift, 1 + i);
        }
        Some(DriftSpec {
            rate: f32_at(self.drift, 0),
            bound,
        })
    }

    /// Whether drift is on.
    pub const fn has_drift(&self) -> bool {
        !self.drift.is_empty()
    }

    /// The drift rate (read in place; `None` without drift).
    #[inline]
    pub(crate) fn drift_rate(&self) -> Option<f32> {
        (!self.drift.is_empty()).then(|| f32_at(self.drift, 0))
    }

    /// The drift bound of scored feature `i` (read in place).
    #[inline]
    pub(crate) fn drift_bound(&self, i: usize) -> f32 {
        f32_at(self.drift, 1 + i)
    }

    /// The names digest of a version 2 blob; `None` for a version 1 blob, which has none.
    pub const fn names_digest(&self) -> Option<u32> {
        self.names_digest
    }

    /// The blob's format version: 1 (a single model read as a bank) or 2.
    pub const fn version(&self) -> u8 {
        self.version
    }

    /// Debounce and latch policy.
    pub const fn policy(&self) -> AlarmPolicy {
        self.policy
    }

    /// Whether the alarm latches.
    pub const fn latch(&self) -> bool {
        self.policy.latch
    }

    /// Identifier, training time and sequence.
    pub const fn meta(&self) -> ModelMeta {
        self.meta
    }

    /// The log mask (bits below `N` only).
    pub const fn log_mask(&self) -> u32 {
        self.log_mask
    }

    /// The centre of mode `k` in model units (`None` for `k ≥ K`).
    pub fn center(&self, k: usize) -> Option<&[f32; M]> {
        if k < self.modes() {
            self.centers.get(k)
        } else {
            None
        }
    }

    /// The thresholds of mode `k` (`None` for `k ≥ K`).
    pub fn thresholds(&self, k: usize) -> Option<Thresholds> {
        self.view(k).map(|v| v.thresholds())
    }

    fn view(&self, k: usize) -> Option<ModeView<'_, M>> {
        if k >= self.modes() {
            return None;
        }
        let per = floats_len(M);
        Some(ModeView {
            floats: self.modes.get(k * per..(k + 1) * per)?,
            center: self.centers.get(k)?,
            log_mask: self.log_mask,
        })
    }

    /// The parameters of mode `k`, copied out of the blob (for the host's inspection; `None`
    /// for `k ≥ K`).
    pub fn mode_params(&self, k: usize) -> Option<ModeParams<M>> {
        let v = self.view(k)?;
        let f = Floats::<M> {
            bytes: v.floats,
            log_mask: self.log_mask,
            policy: self.policy,
        };
        let mut p = ModeParams {
            offset: [0.0; M],
            scale: [0.0; M],
            mean: [0.0; M],
            w: [[0.0; M]; M],
            thresholds: v.thresholds(),
        };
        for i in 0..M {
            p.offset[i] = f.offset(i);
            p.scale[i] = f.scale(i);
            p.mean[i] = f.mean(i);
            for j in 0..=i {
                p.w[i][j] = f.w(i, j);
            }
        }
        Some(p)
    }

    /// All the bank's parameters, the modes copied into `modes` (which must hold `K` of them;
    /// `None` otherwise). A version 1 blob has no names digest: 0 is given.
    pub fn params<'m>(&self, modes: &'m mut [ModeParams<M>]) -> Option<BankParams<'m, N, M>> {
        let k = self.modes();
        let out = modes.get_mut(..k)?;
        for (i, m) in out.iter_mut().enumerate() {
            *m = self.mode_params(i)?;
        }
        Some(BankParams {
            meta: self.meta,
            log_mask: self.log_mask,
            select: self.select,
            modes: out,
            window: self.window,
            drift: self.drift(),
            policy: self.policy,
            names_digest: self.names_digest.unwrap_or(0),
        })
    }

    /// `t = ln y` on the log features, else `y`; then `t' = t − shift` when a shift is given.
    #[inline(always)]
    pub(crate) fn transform(&self, y: &[f32; M], shift: Option<&[f32; M]>) -> [f32; M] {
        let mut t = *y;
        let mask = self.log_mask;
        if mask != 0 {
            for (i, ti) in t.iter_mut().enumerate() {
                if i < 32 && (mask >> i) & 1 == 1 {
                    *ti = libm::logf(*ti);
                }
            }
        }
        if let Some(s) = shift {
            for (ti, si) in t.iter_mut().zip(s) {
                *ti -= si;
            }
        }
        t
    }

    /// `d = t' − c_k`: mode `k`'s deviation (zeros for `k ≥ K`, never reached).
    #[inline(always)]
    pub(crate) fn deviation(&self, k: usize, t: &[f32; M]) -> [f32; M] {
        let mut d = [0.0f32; M];
        if let Some(c) = self.centers.get(k) {
            for ((di, ti), ci) in d.iter_mut().zip(t).zip(c) {
                *di = ti - ci;
            }
        }
        d
    }

    /// d² of mode `k` on `t'` (NaN for `k ≥ K`, never reached).
    #[inline(always)]
    fn d2(&self, k: usize, t: &[f32; M]) -> f32 {
        match self.view(k) {
            Some(v) => model::distance(&v, &self.deviation(k, t)),
            None => f32::NAN,
        }
    }

    /// Score the model-unit vector `t'` (after the log and the drift shift): the mode rule, its
    /// d², verdict, and the judgement the alarm machine takes. `mode` is used by a known-mode
    /// bank only.
    pub(crate) fn score_t(
        &self,
        t: &[f32; M],
        mode: Option<u8>,
    ) -> Result<(BankScore, Judgement), ReadingFault> {
        // Each mode's d² is computed once: the nearest rule keeps the winner's.
        let (k, d2) = match self.select {
            ModeSelect::Known => match mode {
                Some(k) if usize::from(k) < self.modes() => {
                    let k = usize::from(k);
                    (k, self.d2(k, t))
                }
                given => return Err(ReadingFault::UnknownMode { given }),
            },
            ModeSelect::Nearest => {
                let mut best: Option<(usize, f32, f32)> = None;
                for k in 0..self.modes() {
                    let d2 = self.d2(k, t);
                    if !d2.is_finite() {
                        continue;
                    }
                    let alarm = self.view(k).map_or(f32::NAN, |v| v.alarm());
                    let r = d2 / alarm;
                    // Strictly smaller: a tie keeps the lower mode.
                    if best.is_none_or(|(_, br, _)| r < br) {
                        best = Some((k, r, d2));
                    }
                }
                match best {
                    Some((k, _, d2)) => (k, d2),
                    None => return Err(ReadingFault::Overflow),
                }
            }
        };
        if !d2.is_finite() {
            return Err(ReadingFault::Overflow);
        }
        let th = self.thresholds(k).unwrap_or(Thresholds {
            alarm: f32::NAN,
            clear: f32::NAN,
        });
        let above = d2 > th.alarm;
        let verdict = if above {
            Verdict::Above
        } else {
            Verdict::Below
        };
        Ok((
            BankScore {
                mode: k as u8,
                d2,
                verdict,
            },
            Judgement {
                above,
                below: d2 < th.clear,
            },
        ))
    }

    /// Score a transformed vector `y` (the window's output, raw units) with the given drift
    /// shift (model units; `None`: no shift): the mode rule, d² and verdict of the chosen mode.
    pub fn score(
        &self,
        y: &[f32; M],
        shift: Option<&[f32; M]>,
        mode: Option<u8>,
    ) -> Result<BankScore, ReadingFault> {
        let t = self.transform(y, shift);
        self.score_t(&t, mode).map(|(s, _)| s)
    }

    /// The per-feature contributions to d² of mode `k` at `t'` (they sum to d²), as
    /// [`crate::Model::explain`] splits them.
    pub(crate) fn contributions(&self, k: usize, t: &[f32; M]) -> Result<[f32; M], ReadingFault> {
        let v = self.view(k).ok_or(ReadingFault::Overflow)?;
        let d = self.deviation(k, t);
        let (z, _) = model::project(&v, &d);
        model::split(&v, &d, &z)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    extern crate std;
    use crate::{blob, Model, ModelParams, Preprocess};

    fn single() -> ModelParams<3> {
        ModelParams {
            meta: ModelMeta {
                model_id: 9,
                trained_at: 1_767_225_600,
                sequence: 4,
            },
            preprocess: Preprocess {
                log_mask: 0b001,
                offset: [0.5, 2.0, -1.0],
                scale: [4.0, 0.5, 1.5],
            },
            mean: [0.2, 0.0, -0.1],
            w: [[1.0, 0.0, 0.0], [0.6, 1.2, 0.0], [-0.3, 0.1, 0.8]],
            thresholds: Thresholds {
                alarm: 7.8,
                clear: 5.0,
            },
            policy: AlarmPolicy {
                raise_after: 1,
                clear_after: 2,
                latch: true,
            },
        }
    }

    fn as_mode<const N: usize>(p: &ModelParams<N>) -> ModeParams<N> {
        ModeParams {
            offset: p.preprocess.offset,
            scale: p.preprocess.scale,
            mean: p.mean,
            w: p.w,
            thresholds: p.thresholds,
        }
    }

    /// A version 2 bank of one mode, window one, no drift: `Model::score`'s bits, and the
    /// fields read back as written.
    #[test]
    fn a_v2_bank_of_one_scores_as_model_score() {
        let p = single();
        let modes = [as_mode(&p)];
        let bp = BankParams::<3, 3> {
            meta: p.meta,
            log_mask: p.preprocess.log_mask,
            select: ModeSelect::Nearest,
            modes: &modes,
            window: WindowSpec::single(),
            drift: None,
            policy: p.policy,
            names_digest: 0xDEAD_BEEF,
        };
        let mut buf = [0u8; blob::max_bank_len(3, 3, 1, false)];
        let n = blob::encode_bank(&bp, &mut buf).unwrap();
        let bank = FlashBank::<3, 3>::from_blob(&buf[..n]).unwrap();
        assert_eq!(bank.version(), 2);
        assert_eq!(bank.names_digest(), Some(0xDEAD_BEEF));
        let mut out = [as_mode(&p)];
        assert_eq!(bank.params(&mut out), Some(bp));
        let m = Model::new(p).unwrap();
        for x in [[1.0, 2.0, -1.0], [3.0, 0.0, 5.0], [0.01, -7.0, 2.0]] {
            let want = m.score(&x).unwrap();
            let got = bank.score(&x, None, None).unwrap();
            assert_eq!(got.d2.to_bits(), want.d2.to_bits());
            assert_eq!(got.verdict, want.verdict);
        }
        // The single-model readers refuse version 2 by its version.
        assert_eq!(
            Model::<3>::from_blob(&buf[..n]),
            Err(DecodeError::Version { found: 2 })
        );
        assert_eq!(
            crate::FlashModel::<3>::from_blob(&buf[..n]),
            Err(DecodeError::Version { found: 2 })
        );
    }

    fn two_modes() -> [ModeParams<2>; 2] {
        let m = ModeParams {
            offset: [1.0, 0.0],
            scale: [2.0, 1.0],
            mean: [0.0, 0.0],
            w: [[1.0, 0.0], [0.5, 1.0]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
        };
        [
            m,
            ModeParams {
                offset: [5.0, 0.0],
                ..m
            },
        ]
    }

    fn base(modes: &[ModeParams<2>]) -> BankParams<'_, 1, 2> {
        BankParams {
            meta: ModelMeta::default(),
            log_mask: 0,
            select: ModeSelect::Nearest,
            modes,
            window: WindowSpec {
                length: 3,
                differences: true,
            },
            drift: Some(DriftSpec {
                rate: 0.1,
                bound: [1.0, 2.0],
            }),
            policy: AlarmPolicy::default(),
            names_digest: 1,
        }
    }

    fn reseal(b: &mut [u8]) {
        let n = b.len();
        let crc = blob::checksum(&b[..n - 4]);
        b[n - 4..].copy_from_slice(&crc.to_le_bytes());
    }

    /// Every bank rule: the encoder refuses the parameters with an error, and the blob of the
    /// same parameters (written without the rules) is refused by the decoder with the same one.
    #[test]
    fn each_bank_rule_is_refused_the_same_way_by_encode_and_decode() {
        let modes = two_modes();
        let mut bad_scale = two_modes();
        bad_scale[1].scale[0] = -1.0;
        let nine = [modes[0]; 9];
        let cases: [(BankParams<'_, 1, 2>, BankError); 11] = [
            (
                BankParams {
                    modes: &[],
                    ..base(&modes)
                },
                BankError::Modes { count: 0 },
            ),
            (
                BankParams {
                    modes: &nine,
                    ..base(&modes)
                },
                BankError::Modes { count: 9 },
            ),
            (
                BankParams {
                    window: WindowSpec {
                        length: 0,
                        differences: true,
                    },
                    ..base(&modes)
                },
                BankError::Window(WindowError::Length { length: 0 }),
            ),
            (
                BankParams {
                    window: WindowSpec {
                        length: 17,
                        differences: true,
                    },
                    ..base(&modes)
                },
                BankError::Window(WindowError::Length { length: 17 }),
            ),
            (
                BankParams {
                    log_mask: 0b10,
                    ..base(&modes)
                },
                BankError::Window(WindowError::LogMask),
            ),
            (
                BankParams {
                    policy: AlarmPolicy {
                        raise_after: 0,
                        ..AlarmPolicy::default()
                    },
                    ..base(&modes)
                },
                BankError::PolicyRange,
            ),
            (
                BankParams {
                    modes: &bad_scale,
                    ..base(&modes)
                },
                BankError::Mode {
                    mode: 1,
                    error: ModelError::Scale { index: 0 },
                },
            ),
            (
                BankParams {
                    drift: Some(DriftSpec {
                        rate: 0.0,
                        bound: [1.0, 1.0],
                    }),
                    ..base(&modes)
                },
                BankError::DriftRate,
            ),
            (
                BankParams {
                    drift: Some(DriftSpec {
                        rate: 1.0,
                        bound: [1.0, 1.0],
                    }),
                    ..base(&modes)
                },
                BankError::DriftRate,
            ),
            (
                BankParams {
                    drift: Some(DriftSpec {
                        rate: f32::NAN,
                        bound: [1.0, 1.0],
                    }),
                    ..base(&modes)
                },
                BankError::DriftRate,
            ),
            (
                BankParams {
                    drift: Some(DriftSpec {
                        rate: 0.5,
                        bound: [1.0, f32::INFINITY],
                    }),
                    ..base(&modes)
                },
                BankError::DriftBound { index: 1 },
            ),
        ];
        for (p, want) in cases {
            let mut buf = [0u8; 1024];
            assert_eq!(
                blob::encode_bank(&p, &mut buf),
                Err(blob::EncodeError::InvalidBank(want)),
                "{want:?}"
            );
            let n = blob::write_bank(&p, &mut buf).unwrap();
            assert_eq!(
                FlashBank::<1, 2>::from_blob(&buf[..n]),
                Err(DecodeError::Bank(want)),
                "{want:?}"
            );
        }
        // A zero bound too, and the good base both ways.
        let mut p = base(&modes);
        p.drift = Some(DriftSpec {
            rate: 0.5,
            bound: [0.0, 1.0],
        });
        assert_eq!(p.validate(), Err(BankError::DriftBound { index: 0 }));
        let mut buf = [0u8; 1024];
        let n = blob::encode_bank(&base(&modes), &mut buf).unwrap();
        // Six varints at one byte each instead of their longest: 25 bytes under the bound.
        assert_eq!(n, blob::max_bank_len(1, 2, 2, true) - 25);
        assert!(FlashBank::<1, 2>::from_blob(&buf[..n]).is_ok());
    }

    /// The bytes no typed parameter can write: a selection byte beyond 1, option bits beyond
    /// the two, and the fixed-point flag on a bank.
    #[test]
    fn bytes_beyond_the_types_are_refused() {
        let modes = two_modes();
        let mut buf = [0u8; 1024];
        let n = blob::encode_bank(&base(&modes), &mut buf).unwrap();
        // Varints: model_id 0, trained_at 0, sequence 0, log_mask 0 (one byte each) from 10,
        // the digest 14..18, then select, K, w, options.
        assert_eq!(buf[18..22], [0, 2, 3, 0b11]);
        let mut b = buf;
        b[18] = 2;
        reseal(&mut b[..n]);
        assert_eq!(
            FlashBank::<1, 2>::from_blob(&b[..n]),
            Err(DecodeError::Bank(BankError::Select { found: 2 }))
        );
        let mut b = buf;
        b[21] = 0b111;
        reseal(&mut b[..n]);
        assert_eq!(
            FlashBank::<1, 2>::from_blob(&b[..n]),
            Err(DecodeError::Bank(BankError::Options { found: 0b111 }))
        );
        // Drift off in the options byte, its floats still there: the policy varints are read
        // from the rate's bytes (`cd cc cc 3d`, too long for a u16).
        let mut b = buf;
        b[21] = 0b01;
        reseal(&mut b[..n]);
        assert_eq!(
            FlashBank::<1, 2>::from_blob(&b[..n]),
            Err(DecodeError::Body)
        );
        let mut b = buf;
        b[6] |= blob::FLAG_FIXED;
        reseal(&mut b[..n]);
        assert_eq!(
            FlashBank::<1, 2>::from_blob(&b[..n]),
            Err(DecodeError::FixedBank)
        );
        // The fixed-point reader refuses a bank by its version.
        assert_eq!(
            crate::fixed::decode::<1, 1>(&buf[..n]),
            Err(DecodeError::Version { found: 2 })
        );
        // And the messages say what is wrong.
        let text = std::format!("{}", DecodeError::FixedBank);
        assert!(text.contains("no bank"), "{text}");
        let text = std::format!("{}", DecodeError::Version { found: 2 });
        assert!(text.contains("bank reader"), "{text}");
    }

    /// FORMAT.md's "Size" figures of version 2 at N = 8.
    #[test]
    fn bank_sizes_for_n8() {
        let mut w = [[0.0f32; 8]; 8];
        for (i, row) in w.iter_mut().enumerate() {
            row[i] = 1.0;
        }
        let mode = ModeParams::<8> {
            offset: [0.0; 8],
            scale: [1.0; 8],
            mean: [0.0; 8],
            w,
            thresholds: Thresholds {
                alarm: 26.1,
                clear: 20.0,
            },
        };
        let modes = [mode; 4];
        let mut buf = [0u8; blob::max_bank_len(8, 8, 4, true)];
        for (k, drift, want) in [
            (1, false, 284),
            (2, false, 532),
            (4, false, 1028),
            (1, true, 320),
            (4, true, 1064),
        ] {
            let p = BankParams::<8, 8> {
                meta: ModelMeta {
                    model_id: 0x00AB_CDEF,
                    trained_at: 1_780_000_000,
                    sequence: 1,
                },
                log_mask: 0,
                select: ModeSelect::Nearest,
                modes: &modes[..k],
                window: WindowSpec::single(),
                drift: drift.then_some(DriftSpec {
                    rate: 0.01,
                    bound: [3.0; 8],
                }),
                policy: AlarmPolicy {
                    raise_after: 3,
                    clear_after: 300,
                    latch: false,
                },
                names_digest: 0x1234_5678,
            };
            assert_eq!(blob::encode_bank(&p, &mut buf), Ok(want), "K = {k}");
            assert!(want <= blob::max_bank_len(8, 8, k, drift));
        }
        assert_eq!(blob::floats_len(16), 744);
        assert_eq!(blob::floats_len(32), 2504);
    }

    /// The ratio test of the nearest rule keeps the limit exact in `f32`: `d² / alarm ≤ 1`
    /// exactly when `d² ≤ alarm`, for d² one float either side of the limit, at limits of every
    /// magnitude and mantissa (the argument in the module docs).
    #[test]
    fn the_ratio_is_at_most_one_exactly_when_inside() {
        let mut alarm = 1.0e-30f32;
        let mut n = 0;
        while alarm < 1.0e30 {
            for a in [alarm, alarm * 1.999_999_9, alarm * 1.5, alarm * 1.000_000_1] {
                let up = f32::from_bits(a.to_bits() + 1);
                let down = f32::from_bits(a.to_bits() - 1);
                assert!(up / a > 1.0, "{a}");
                assert!(a / a <= 1.0 && down / a <= 1.0, "{a}");
                n += 1;
            }
            alarm *= 1.37;
        }
        assert!(n > 100);
    }
}
