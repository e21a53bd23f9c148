//! The plain parameters of a model: what the blob carries, and what the trainer builds.
//!
//! [`ModelParams`] is data with public fields. [`ModelParams::validate`] checks every rule that
//! [`crate::Model`] relies on, so that a validated value can be compiled and scored without
//! any further checks.

use core::fmt;

/// Largest dimension a blob can describe. The log-transform mask is a `u32`, one bit a feature.
pub const MAX_FEATURES: usize = 32;

/// Largest value of [`AlarmPolicy::raise_after`] and [`AlarmPolicy::clear_after`].
///
/// At one reading a second this is an hour, far beyond any sensible debounce.
pub const MAX_RUN: u16 = 3600;

/// Who made the model and when. Set by the host; the device only reports it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub struct ModelMeta {
    /// An identifier the host chooses (for instance a hash of the training run).
    pub model_id: u32,
    /// When the model was trained, in seconds since 1970-01-01 00:00:00 UTC.
    pub trained_at: u64,
    /// Rises with every model flashed to a node; of two valid model slots the device takes the
    /// higher sequence number.
    pub sequence: u32,
}

/// Per-feature preprocessing, from raw sensor units to the model's space.
///
/// A raw reading `x` becomes `t = ln(x)` if the feature's bit is set in `log_mask`, else `t = x`.
/// The model's standardised value is then `u = (t − offset) · scale`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Preprocess<const N: usize> {
    /// Bit `i` set: feature `i` is log-transformed before the offset and scale. Bits `N..` must be clear.
    pub log_mask: u32,
    /// Subtracted from the (log-transformed) reading, in its units.
    pub offset: [f32; N],
    /// Multiplies the offset reading. Must be finite and positive.
    pub scale: [f32; N],
}

impl<const N: usize> Preprocess<N> {
    /// No transform: offset 0, scale 1, no logs.
    pub const fn identity() -> Self {
        Self {
            log_mask: 0,
            offset: [0.0; N],
            scale: [1.0; N],
        }
    }

    /// Whether feature `i` is log-transformed.
    pub const fn is_log(&self, i: usize) -> bool {
        i < 32 && (self.log_mask >> i) & 1 == 1
    }
}

/// The alarm thresholds on d², the squared Mahalanobis distance.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Thresholds {
    /// A reading with d² strictly above this counts towards raising the alarm.
    pub alarm: f32,
    /// A reading with d² strictly below this counts towards clearing it. `0 ≤ clear ≤ alarm`.
    pub clear: f32,
}

/// How the alarm state machine debounces readings. See [`crate::alarm`].
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct AlarmPolicy {
    /// Raise after this many consecutive readings above the alarm threshold (`1..=MAX_RUN`).
    pub raise_after: u16,
    /// Clear after this many consecutive readings below the clear threshold (`1..=MAX_RUN`).
    pub clear_after: u16,
    /// Once raised, stay raised until an explicit reset.
    pub latch: bool,
}

impl Default for AlarmPolicy {
    fn default() -> Self {
        Self {
            raise_after: 1,
            clear_after: 1,
            latch: false,
        }
    }
}

/// Every parameter of a model of `N` features.
///
/// The Gaussian lives in the standardised space `u` (see [`Preprocess`]): mean `mean`, and covariance
/// `Σ = L Lᵀ` with `w = L⁻¹` lower-triangular. Only the lower triangle of `w` (`j ≤ i`) is used; the
/// strict upper triangle must be zero.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ModelParams<const N: usize> {
    /// Identifier and training time.
    pub meta: ModelMeta,
    /// Raw units to the standardised space.
    pub preprocess: Preprocess<N>,
    /// Mean `μ` in the standardised space.
    pub mean: [f32; N],
    /// `W = L⁻¹`, lower-triangular, row-major: `w[i][j]` for `j ≤ i`.
    pub w: [[f32; N]; N],
    /// Alarm and clear thresholds on d².
    pub thresholds: Thresholds,
    /// Debounce and latch.
    pub policy: AlarmPolicy,
}

/// Why a set of parameters was refused. Each variant names the rule it broke.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum ModelError {
    /// `N` is 0 or larger than [`MAX_FEATURES`].
    Dimension {
        /// The dimension asked for.
        n: usize,
    },
    /// A parameter is NaN or infinite.
    NotFinite {
        /// Which parameter.
        field: Field,
        /// Index of the feature (row for `W`).
        index: u8,
    },
    /// A diagonal element of `W` is not strictly positive.
    FactorDiagonal {
        /// Row of the offending element.
        index: u8,
    },
    /// An element above the diagonal of `W` is not zero.
    FactorNotLower {
        /// Row of the offending element.
        row: u8,
        /// Column of the offending element.
        col: u8,
    },
    /// A scale is zero or negative.
    Scale {
        /// Feature index.
        index: u8,
    },
    /// The log mask has bits set at or beyond `N`.
    LogMask,
    /// The thresholds are not ordered `0 ≤ clear ≤ alarm`, or `alarm` is not positive.
    ThresholdOrder,
    /// A policy run length is outside `1..=MAX_RUN`.
    PolicyRange,
    /// The folded form a [`crate::Model`] scores with leaves the range of `f32`: an element of
    /// `W · diag(scale)` or of the centre `offset + mean / scale` is not finite, or a diagonal
    /// element of `W · diag(scale)` underflows to zero.
    Overflow,
}

/// The parameter a [`ModelError::NotFinite`] is about.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum Field {
    /// [`Preprocess::offset`].
    Offset,
    /// [`Preprocess::scale`].
    Scale,
    /// [`ModelParams::mean`].
    Mean,
    /// [`ModelParams::w`].
    Factor,
    /// [`ModelParams::thresholds`].
    Threshold,
}

impl fmt::Display for Field {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Field::Offset => "offset",
            Field::Scale => "scale",
            Field::Mean => "mean",
            Field::Factor => "factor W",
            Field::Threshold => "threshold",
        })
    }
}

impl fmt::Display for ModelError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ModelError::Dimension { n } => {
                write!(f, "dimension {n} is outside 1..={MAX_FEATURES}")
            }
            // The thresholds belong to the model, not to a feature: index 0 is the alarm
            // threshold, 1 the clear threshold.
            ModelError::NotFinite {
                field: Field::Threshold,
                index,
            } => {
                let which = if *index == 0 { "alarm" } else { "clear" };
                write!(f, "the {which} threshold is not finite")
            }
            ModelError::NotFinite { field, index } => {
                write!(f, "{field} of feature {index} is not finite")
            }
            ModelError::FactorDiagonal { index } => {
                write!(f, "diagonal W[{index}][{index}] is not positive")
            }
            ModelError::FactorNotLower { row, col } => {
                write!(f, "W[{row}][{col}] lies above the diagonal but is not zero")
            }
            ModelError::Scale { index } => write!(f, "scale of feature {index} is not positive"),
            ModelError::LogMask => f.write_str("log mask names a feature beyond the dimension"),
            ModelError::ThresholdOrder => {
                f.write_str("thresholds must satisfy 0 <= clear <= alarm and alarm > 0")
            }
            ModelError::PolicyRange => {
                write!(f, "raise_after and clear_after must lie in 1..={MAX_RUN}")
            }
            ModelError::Overflow => f.write_str(
                "folding the scale into W, or the mean into the offset, leaves the range of f32",
            ),
        }
    }
}

impl core::error::Error for ModelError {}

/// `W[i][j] · scale[j]`, one element of the factor in the reading's units. The one definition of
/// the fold, shared by [`ModelParams::validate`] and [`crate::Model::new`], so that what the one
/// accepts the other builds.
#[inline(always)]
pub(crate) fn fold_factor(w: f32, scale: f32) -> f32 {
    w * scale
}

/// `offset + mean / scale`, one element of the centre in the reading's units (see
/// [`fold_factor`]).
#[inline(always)]
pub(crate) fn fold_center(offset: f32, mean: f32, scale: f32) -> f32 {
    offset + mean / scale
}

impl<const N: usize> ModelParams<N> {
    /// Check every rule a [`crate::Model`] relies on, the fold into its scoring form included:
    /// `Ok` here means [`crate::Model::new`] succeeds.
    pub fn validate(&self) -> Result<(), ModelError> {
        check(self)
    }
}

/// Where [`check`] reads a model's parameters from: a [`ModelParams`] in RAM, or the packed
/// floats of a blob in flash (`crate::flash`). The rules are written once, in [`check`], against
/// this view, so that a model in RAM and one read in place in flash are held to the same rules,
/// with the same errors in the same order.
pub(crate) trait ParamSource<const N: usize> {
    /// `offset[i]`.
    fn offset(&self, i: usize) -> f32;
    /// `scale[i]`.
    fn scale(&self, i: usize) -> f32;
    /// `mean[i]`.
    fn mean(&self, i: usize) -> f32;
    /// `W[i][j]` for `j ≤ i`.
    fn w(&self, i: usize, j: usize) -> f32;
    /// Whether every stored element of row `i` of `W` is finite (the strict upper triangle too,
    /// where there is one).
    fn row_finite(&self, i: usize) -> bool {
        (0..=i).all(|j| self.w(i, j).is_finite())
    }
    /// The first column above the diagonal of row `i` that is not zero (a packed triangle has none).
    fn above_diagonal(&self, _i: usize) -> Option<usize> {
        None
    }
    /// The log mask.
    fn log_mask(&self) -> u32;
    /// The thresholds.
    fn thresholds(&self) -> Thresholds;
    /// The policy.
    fn policy(&self) -> AlarmPolicy;
}

impl<const N: usize> ParamSource<N> for ModelParams<N> {
    fn offset(&self, i: usize) -> f32 {
        self.preprocess.offset.get(i).copied().unwrap_or(f32::NAN)
    }
    fn scale(&self, i: usize) -> f32 {
        self.preprocess.scale.get(i).copied().unwrap_or(f32::NAN)
    }
    fn mean(&self, i: usize) -> f32 {
        self.mean.get(i).copied().unwrap_or(f32::NAN)
    }
    fn w(&self, i: usize, j: usize) -> f32 {
        self.w
            .get(i)
            .and_then(|r| r.get(j))
            .copied()
            .unwrap_or(f32::NAN)
    }
    fn row_finite(&self, i: usize) -> bool {
        self.w
            .get(i)
            .is_some_and(|r| r.iter().all(|v| v.is_finite()))
    }
    fn above_diagonal(&self, i: usize) -> Option<usize> {
        let row = self.w.get(i)?;
        row.iter()
            .skip(i + 1)
            .position(|v| *v != 0.0)
            .map(|j| i + 1 + j)
    }
    fn log_mask(&self) -> u32 {
        self.preprocess.log_mask
    }
    fn thresholds(&self) -> Thresholds {
        self.thresholds
    }
    fn policy(&self) -> AlarmPolicy {
        self.policy
    }
}

fn first_not_finite(values: impl Iterator<Item = f32>, field: Field) -> Result<(), ModelError> {
    let mut values = values;
    match values.position(|v| !v.is_finite()) {
        None => Ok(()),
        Some(i) => Err(ModelError::NotFinite {
            field,
            index: i as u8,
        }),
    }
}

/// Every rule a model keeps, the fold into its scoring form included, read through `s`. The one
/// definition of the rules: [`ModelParams::validate`] and the flash-resident model's check both
/// call it.
pub(crate) fn check<const N: usize, S: ParamSource<N>>(s: &S) -> Result<(), ModelError> {
    if N == 0 || N > MAX_FEATURES {
        return Err(ModelError::Dimension { n: N });
    }
    first_not_finite((0..N).map(|i| s.offset(i)), Field::Offset)?;
    first_not_finite((0..N).map(|i| s.scale(i)), Field::Scale)?;
    if let Some(i) = (0..N).position(|i| s.scale(i) <= 0.0) {
        return Err(ModelError::Scale { index: i as u8 });
    }
    if N < 32 && s.log_mask() >> N != 0 {
        return Err(ModelError::LogMask);
    }
    first_not_finite((0..N).map(|i| s.mean(i)), Field::Mean)?;
    for i in 0..N {
        if !s.row_finite(i) {
            return Err(ModelError::NotFinite {
                field: Field::Factor,
                index: i as u8,
            });
        }
        if let Some(j) = s.above_diagonal(i) {
            return Err(ModelError::FactorNotLower {
                row: i as u8,
                col: j as u8,
            });
        }
        if s.w(i, i) <= 0.0 || s.w(i, i).is_nan() {
            return Err(ModelError::FactorDiagonal { index: i as u8 });
        }
    }
    let t = s.thresholds();
    first_not_finite([t.alarm, t.clear].into_iter(), Field::Threshold)?;
    if !(t.alarm > 0.0 && t.clear >= 0.0 && t.clear <= t.alarm) {
        return Err(ModelError::ThresholdOrder);
    }
    let run = 1..=MAX_RUN;
    let policy = s.policy();
    if !run.contains(&policy.raise_after) || !run.contains(&policy.clear_after) {
        return Err(ModelError::PolicyRange);
    }
    // The fold the scoring forms do, element by element without keeping it: every element of
    // `W · diag(scale)` finite and its diagonal still positive, every centre finite.
    for i in 0..N {
        for j in 0..=i {
            let v = fold_factor(s.w(i, j), s.scale(j));
            if !v.is_finite() || (j == i && v <= 0.0) {
                return Err(ModelError::Overflow);
            }
        }
    }
    for i in 0..N {
        if !fold_center(s.offset(i), s.mean(i), s.scale(i)).is_finite() {
            return Err(ModelError::Overflow);
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn good() -> ModelParams<2> {
        ModelParams {
            meta: ModelMeta::default(),
            preprocess: Preprocess::identity(),
            mean: [0.0; 2],
            w: [[1.0, 0.0], [0.5, 2.0]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 6.0,
            },
            policy: AlarmPolicy::default(),
        }
    }

    #[test]
    fn accepts_a_good_model() {
        assert_eq!(good().validate(), Ok(()));
    }

    #[test]
    fn rejects_each_broken_rule() {
        let mut p = good();
        p.w[1][1] = 0.0;
        assert_eq!(p.validate(), Err(ModelError::FactorDiagonal { index: 1 }));
        let mut p = good();
        p.w[0][1] = 0.1;
        assert_eq!(
            p.validate(),
            Err(ModelError::FactorNotLower { row: 0, col: 1 })
        );
        let mut p = good();
        p.mean[1] = f32::NAN;
        assert_eq!(
            p.validate(),
            Err(ModelError::NotFinite {
                field: Field::Mean,
                index: 1
            })
        );
        let mut p = good();
        p.thresholds.alarm = f32::INFINITY;
        let e = p.validate().unwrap_err();
        assert_eq!(
            e,
            ModelError::NotFinite {
                field: Field::Threshold,
                index: 0
            }
        );
        let mut text = heapless::String::<64>::new();
        core::fmt::write(&mut text, format_args!("{e}")).unwrap();
        assert_eq!(text.as_str(), "the alarm threshold is not finite");
        let mut p = good();
        p.preprocess.scale[0] = -1.0;
        assert_eq!(p.validate(), Err(ModelError::Scale { index: 0 }));
        let mut p = good();
        p.preprocess.log_mask = 0b100;
        assert_eq!(p.validate(), Err(ModelError::LogMask));
        let mut p = good();
        p.thresholds.clear = 10.0;
        assert_eq!(p.validate(), Err(ModelError::ThresholdOrder));
        let mut p = good();
        p.policy.raise_after = 0;
        assert_eq!(p.validate(), Err(ModelError::PolicyRange));
        let mut p = good();
        p.policy.clear_after = MAX_RUN + 1;
        assert_eq!(p.validate(), Err(ModelError::PolicyRange));
    }

    /// Parameters that are each finite but whose fold into the scoring form is not: `validate`
    /// (and so `blob::encode` and `blob::decode`) refuses them, as `Model::new` does.
    #[test]
    fn rejects_a_fold_that_leaves_f32() {
        // W₀₀ · scale₀ = 1e30 · 1e30 overflows f32.
        let mut p = good();
        p.preprocess.scale = [1.0e30, 1.0];
        p.w[0][0] = 1.0e30;
        assert_eq!(p.validate(), Err(ModelError::Overflow));
        // An element below the diagonal: W₁₀ · scale₀.
        let mut p = good();
        p.preprocess.scale = [1.0e30, 1.0];
        p.w[1][0] = -1.0e10;
        assert_eq!(p.validate(), Err(ModelError::Overflow));
        // A diagonal element that underflows to zero: 1e-30 · 1e-30.
        let mut p = good();
        p.preprocess.scale = [1.0, 1.0e-30];
        p.w[1][1] = 1.0e-30;
        assert_eq!(p.validate(), Err(ModelError::Overflow));
        // The centre offset + mean / scale: 3e38 + 3e38 overflows.
        let mut p = good();
        p.preprocess.offset = [3.0e38, 0.0];
        p.mean = [3.0e38, 0.0];
        assert_eq!(p.validate(), Err(ModelError::Overflow));
        // And one step inside the range is accepted.
        let mut p = good();
        p.preprocess.scale = [1.0e19, 1.0];
        p.w[0][0] = 1.0e19;
        assert_eq!(p.validate(), Ok(()));
    }
}
