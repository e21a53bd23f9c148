//! Integer scoring for parts without an FPU: a model quantised to 16-bit coefficients, scored with
//! 32-bit products and 64-bit sums, chosen by flag bit 1 of the blob header (`FORMAT.md`).
//!
//! # How a reading enters
//!
//! A node without an FPU reads integers, so the integer path takes integers: feature `j` is read in
//! units of `2^−kⱼ` of its engineering unit, `rⱼ = round(xⱼ · 2^kⱼ)` (an `i32`). The trainer chooses
//! `kⱼ` (in the blob) so that the healthy range of the feature spans most of 16 bits; a sensor
//! driver delivers `rⱼ` directly (or converts with a shift). The host's `replay` and `evaluate`
//! convert the readings of a CSV file with [`FixedModel::reading`], the one definition of the
//! conversion: the product by the exact power of two, rounded half away from zero, computed from
//! the bits of the `f32` with integer operations only ([`scale_round`]), so that a node without an
//! FPU runs the same function as the host at little cost.
//!
//! # A score
//!
//! With the centre `cⱼ` (an `i32` in the same units), the coefficients `qᵢⱼ` (`i16`, `j ≤ i`) and
//! the model's exponent `E`:
//!
//! * `dⱼ = rⱼ − cⱼ`, which must lie in `±32 767`;
//! * `zᵢ = Σⱼ≤ᵢ qᵢⱼ dⱼ` (32-bit products, a 64-bit sum), then `z'ᵢ = zᵢ · 2^−(E−12)`, rounded;
//! * `d²_q = Σᵢ z'ᵢ²` (a 64-bit sum), so that `d² = d²_q · 2^−24`.
//!
//! `qᵢⱼ ≈ Vᵢⱼ · 2^(E − kⱼ)` with `V = W · diag(scale)` the folded factor of the `f32` model, so
//! `d²` approximates the `f32` score; the trainer reports the worst difference and refuses a model
//! whose quantisation moves a verdict on its baseline. The `f32` d² reported is `d²_q · 2^−24`
//! rounded to nearest (exactly `(d²_q as f32) · 2^−24`), built from integers, and the verdict
//! compares its bits with the threshold's: no floating-point operation on the way.
//!
//! # Saturation: into an alarm, never into "normal"
//!
//! Three things can leave the integer ranges: a deviation beyond `±32 767` units, a `z'ᵢ` beyond
//! `i32`, a `d²_q` beyond `u64`. Each means a reading far outside the model: the trainer chooses
//! `kⱼ` so that `±32 767` units cover at least `max(16, 2 √alarm)` marginal standard deviations of
//! feature `j`, and the Mahalanobis distance is at least the marginal one, so a saturated
//! deviation has `d² > 4 · alarm`. A saturated reading scores `d² = f32::MAX` and
//! [`Verdict::Above`]. A reading that is not finite (host conversion only) is a
//! [`ReadingFault::NotFinite`], as in `f32`.
//!
//! # Log features
//!
//! Refused: a log transform has no exact integer form, so [`quantise`] refuses a model with log
//! features ([`QuantiseError::LogFeatures`]).

use core::fmt;

use crate::blob::{self, DecodeError, CRC_LEN, FLAG_FIXED, FLAG_LATCH, HEADER_LEN, MAGIC, VERSION};
use crate::flash::tri;
use crate::model::{Explained, ReadingFault, Scored, Verdict};
use crate::params::{
    fold_center, fold_factor, AlarmPolicy, ModelError, ModelMeta, ModelParams, Thresholds,
    MAX_FEATURES, MAX_RUN,
};

/// Fraction bits of `z'ᵢ`: `z'ᵢ = zᵢ · 2^12` in standard deviations.
pub const Z_FRAC_BITS: u32 = 12;
/// Fraction bits of `d²_q`: `d² = d²_q · 2^−24`.
pub const D2_FRAC_BITS: u32 = 2 * Z_FRAC_BITS;
/// Largest `|dⱼ|` and `|qᵢⱼ|`.
pub const LIMIT: i32 = i16::MAX as i32;
/// Largest alarm threshold a fixed-point model may have (`d²_q` must hold many times it).
pub const MAX_ALARM: f32 = 1.0e9;
/// Range of the exponent `E`.
pub const EXPONENT_RANGE: core::ops::RangeInclusive<u8> = 12..=62;
/// Range of an input shift `kⱼ`.
pub const SHIFT_RANGE: core::ops::RangeInclusive<i8> = -30..=30;

/// A quantised model of `N` features, `T = tri(N)` coefficients: what a fixed-point blob carries.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct FixedParams<const N: usize, const T: usize> {
    /// Identifier, training time, sequence.
    pub meta: ModelMeta,
    /// `kⱼ`: feature `j` is read in units of `2^−kⱼ`.
    pub shift: [i8; N],
    /// `cⱼ`, in those units.
    pub center: [i32; N],
    /// `E`.
    pub exponent: u8,
    /// `qᵢⱼ` for `j ≤ i`, row by row.
    pub q: [i16; T],
    /// Alarm and clear thresholds on d², as in `f32` (stored as `f32` bits).
    pub thresholds: ThresholdBits,
    /// Debounce and latch.
    pub policy: AlarmPolicy,
}

/// The thresholds as `f32` bit patterns (so that [`FixedParams`] can be `Eq`).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ThresholdBits {
    /// `f32::to_bits` of the alarm threshold.
    pub alarm: u32,
    /// `f32::to_bits` of the clear threshold.
    pub clear: u32,
}

impl ThresholdBits {
    /// As floats.
    pub fn get(self) -> Thresholds {
        Thresholds {
            alarm: f32::from_bits(self.alarm),
            clear: f32::from_bits(self.clear),
        }
    }
}

/// Why a fixed-point model's parameters break a rule.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum FixedError {
    /// `T` is not `tri(N)`, or `N` is outside 1 to 32.
    Shape,
    /// An input shift is outside [`SHIFT_RANGE`].
    Shift {
        /// Feature.
        index: u8,
    },
    /// The exponent is outside [`EXPONENT_RANGE`].
    Exponent,
    /// A coefficient is `−32 768` (only `±32 767` are allowed).
    Coefficient {
        /// Row.
        row: u8,
    },
    /// A diagonal coefficient is not positive.
    Diagonal {
        /// Row.
        index: u8,
    },
    /// The thresholds are not finite, not ordered `0 ≤ clear ≤ alarm`, `alarm > 0`, or
    /// `alarm > MAX_ALARM`.
    Thresholds,
    /// A run length outside `1..=MAX_RUN`.
    PolicyRange,
}

impl fmt::Display for FixedError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            FixedError::Shape => f.write_str("the coefficient count is not N(N+1)/2"),
            FixedError::Shift { index } => {
                write!(f, "input shift of feature {index} is outside -30..=30")
            }
            FixedError::Exponent => f.write_str("the coefficient exponent is outside 12..=62"),
            FixedError::Coefficient { row } => {
                write!(f, "a coefficient of row {row} is -32768")
            }
            FixedError::Diagonal { index } => {
                write!(f, "diagonal coefficient {index} is not positive")
            }
            FixedError::Thresholds => {
                f.write_str("thresholds must be finite with 0 <= clear <= alarm, 0 < alarm <= 1e9")
            }
            FixedError::PolicyRange => {
                write!(f, "raise_after and clear_after must lie in 1..={MAX_RUN}")
            }
        }
    }
}

impl core::error::Error for FixedError {}

impl<const N: usize, const T: usize> FixedParams<N, T> {
    /// Check every rule the integer score relies on.
    pub fn validate(&self) -> Result<(), FixedError> {
        if N == 0 || N > MAX_FEATURES || T != tri(N) {
            return Err(FixedError::Shape);
        }
        if let Some(i) = self.shift.iter().position(|k| !SHIFT_RANGE.contains(k)) {
            return Err(FixedError::Shift { index: i as u8 });
        }
        if !EXPONENT_RANGE.contains(&self.exponent) {
            return Err(FixedError::Exponent);
        }
        for i in 0..N {
            let row = self.q.get(tri(i)..tri(i) + i + 1).unwrap_or(&[]);
            if row.contains(&i16::MIN) {
                return Err(FixedError::Coefficient { row: i as u8 });
            }
            if row.last().is_none_or(|d| *d <= 0) {
                return Err(FixedError::Diagonal { index: i as u8 });
            }
        }
        let t = self.thresholds.get();
        let finite = t.alarm.is_finite() && t.clear.is_finite();
        let ordered = t.alarm > 0.0 && t.clear >= 0.0 && t.clear <= t.alarm;
        if !(finite && ordered && t.alarm <= MAX_ALARM) {
            return Err(FixedError::Thresholds);
        }
        let run = 1..=MAX_RUN;
        if !run.contains(&self.policy.raise_after) || !run.contains(&self.policy.clear_after) {
            return Err(FixedError::PolicyRange);
        }
        Ok(())
    }
}

/// A validated fixed-point model, ready to score integer readings.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct FixedModel<const N: usize, const T: usize> {
    p: FixedParams<N, T>,
}

/// `u² ` for a 32-bit `u`, from 16-bit halves: three 16 × 16 → 32-bit products, which a Cortex-M0
/// does in one instruction each (a 64-bit multiply would be a library call).
#[inline(always)]
fn square(u: u32) -> u64 {
    let (hi, lo) = (u >> 16, u & 0xFFFF);
    let cross = u64::from(hi * lo) << 17;
    (u64::from(hi * hi) << 32) + cross + u64::from(lo * lo)
}

/// `v · 2^−24` rounded to the nearest `f32` (ties to even): exactly `(v as f32) · 2^−24`, from
/// integer operations only.
pub fn q24_to_f32(v: u64) -> f32 {
    if v == 0 {
        return 0.0;
    }
    let msb = 63 - v.leading_zeros();
    let m = if msb <= 23 {
        v << (23 - msb)
    } else {
        let sh = msb - 23;
        let half = 1u64 << (sh - 1);
        let rest = v & ((1u64 << sh) - 1);
        let m = v >> sh;
        if rest > half || (rest == half && m & 1 == 1) {
            m + 1
        } else {
            m
        }
    };
    // Biased exponent of 2^(msb − 24) is msb − 24 + 127; the implicit bit of `m` adds one more.
    let biased = msb + 103;
    f32::from_bits(((biased - 1) << 23) + m as u32)
}

/// `round(x · 2^k)`, half away from zero, clamped to `i32`, or `None` when `x` is not finite: the
/// reading conversion of [`FixedModel::reading`], from the bits of `x` (integer operations only).
///
/// `|x| = M · 2^e` with `M < 2^24` the significand (the implicit bit included) and `e` its
/// exponent, so `|x| · 2^k = M · 2^(e + k)`: a left shift, or a right shift whose dropped bits
/// decide the rounding (at least half of the last kept unit rounds up, away from zero).
pub const fn scale_round(x: f32, k: i8) -> Option<i32> {
    let bits = x.to_bits();
    let field = (bits >> 23) & 0xFF;
    if field == 0xFF {
        return None;
    }
    let frac = (bits & 0x007F_FFFF) as u64;
    let (m, e) = if field == 0 {
        (frac, -149)
    } else {
        (frac | 0x0080_0000, field as i32 - 150)
    };
    let e = e + k as i32;
    // |x| · 2^k rounded, saturated at 2^31 (beyond every i32 magnitude but i32::MIN's).
    const CAP: u64 = 1 << 31;
    let v = if m == 0 {
        0
    } else if e >= 0 {
        // m < 2^24: a shift of 8 or more already reaches 2^31.
        if e >= 8 {
            CAP
        } else {
            let v = m << e;
            if v > CAP {
                CAP
            } else {
                v
            }
        }
    } else {
        let sh = -e as u32;
        if sh > 25 {
            // m < 2^24 ≤ 2^(sh − 2): below one half, rounds to 0.
            0
        } else {
            let q = m >> sh;
            let rest = m & ((1u64 << sh) - 1);
            if rest >= 1u64 << (sh - 1) {
                q + 1
            } else {
                q
            }
        }
    };
    Some(if bits >> 31 == 1 {
        // −2^31 is i32::MIN itself; beyond it, clamped to it.
        (0i64 - v as i64) as i32
    } else if v >= CAP {
        i32::MAX
    } else {
        v as i32
    })
}

/// What a saturated reading scores: far above any threshold.
const SATURATED: Scored = Scored {
    d2: f32::MAX,
    verdict: Verdict::Above,
};

impl<const N: usize, const T: usize> FixedModel<N, T> {
    /// Validate and keep.
    pub fn new(p: FixedParams<N, T>) -> Result<Self, FixedError> {
        p.validate()?;
        Ok(Self { p })
    }

    /// The parameters.
    pub const fn params(&self) -> &FixedParams<N, T> {
        &self.p
    }

    /// Identifier, training time, sequence.
    pub const fn meta(&self) -> ModelMeta {
        self.p.meta
    }

    /// Alarm and clear thresholds.
    pub fn thresholds(&self) -> Thresholds {
        self.p.thresholds.get()
    }

    /// Debounce and latch policy.
    pub const fn policy(&self) -> AlarmPolicy {
        self.p.policy
    }

    /// A reading in engineering units as the integers this model scores: `round(xⱼ · 2^kⱼ)`
    /// (`f64`, half away from zero), clamped to `i32` (a clamped reading saturates, see the
    /// module docs). A reading that is not finite is a fault. The host's one definition of the
    /// conversion; a node without an FPU reads the integers directly.
    ///
    /// Computed from the bits of `xⱼ` with integer operations only ([`scale_round`]), so that a
    /// node without an FPU converts as cheaply as it scores; the result is the `f64` formula's,
    /// bit for bit (the product by `2^kⱼ` is exact in `f64`, see the tests).
    pub fn reading(&self, x: &[f32; N]) -> Result<[i32; N], ReadingFault> {
        let mut r = [0i32; N];
        for (i, ((ri, xi), k)) in r.iter_mut().zip(x).zip(&self.p.shift).enumerate() {
            *ri = scale_round(*xi, *k).ok_or(ReadingFault::NotFinite { feature: i as u8 })?;
        }
        Ok(r)
    }

    /// `dⱼ = rⱼ − cⱼ`, or `None` when one leaves `±32 767` (saturated).
    #[inline(always)]
    fn deviation(&self, r: &[i32; N]) -> Option<[i32; N]> {
        let mut d = [0i32; N];
        for ((dj, rj), cj) in d.iter_mut().zip(r).zip(&self.p.center) {
            let v = rj.checked_sub(*cj)?;
            if !(-LIMIT..=LIMIT).contains(&v) {
                return None;
            }
            *dj = v;
        }
        Some(d)
    }

    /// `z'ᵢ`, or `None` when it leaves `i32`.
    #[inline(always)]
    fn z(&self, d: &[i32; N], i: usize) -> Option<i32> {
        let row = self.p.q.get(tri(i)..tri(i) + i + 1).unwrap_or(&[]);
        // Pairs of products fit an i32 (2 · 32 767² < 2³¹); each pair is added to the i64 sum.
        let mut acc: i64 = 0;
        let mut it = row.iter().zip(d);
        while let Some((q0, d0)) = it.next() {
            let mut pair = i32::from(*q0) * d0;
            if let Some((q1, d1)) = it.next() {
                pair += i32::from(*q1) * d1;
            }
            acc += i64::from(pair);
        }
        let s = u32::from(self.p.exponent) - Z_FRAC_BITS;
        let rounded = if s == 0 {
            acc
        } else {
            (acc + (1i64 << (s - 1))) >> s
        };
        i32::try_from(rounded).ok()
    }

    /// `d²_q`, or `None` when saturated.
    #[inline(always)]
    fn d2_q(&self, r: &[i32; N]) -> Option<u64> {
        let d = self.deviation(r)?;
        let mut sum: u64 = 0;
        for i in 0..N {
            sum = sum.checked_add(square(self.z(&d, i)?.unsigned_abs()))?;
        }
        Some(sum)
    }

    /// Score an integer reading: integer arithmetic only. Never fails: a saturated reading scores
    /// `f32::MAX`, above.
    #[inline]
    pub fn score(&self, r: &[i32; N]) -> Scored {
        let Some(q) = self.d2_q(r) else {
            return SATURATED;
        };
        let d2 = q24_to_f32(q);
        // Both non-negative and finite: their order is the order of their bits.
        let verdict = if d2.to_bits() > self.p.thresholds.alarm {
            Verdict::Above
        } else {
            Verdict::Below
        };
        Scored { d2, verdict }
    }

    /// Score a reading in engineering units ([`Self::reading`], then [`Self::score`]): what the
    /// host's replay does.
    pub fn score_f32(&self, x: &[f32; N]) -> Result<Scored, ReadingFault> {
        Ok(self.score(&self.reading(x)?))
    }

    /// Score and split d² per feature: `cⱼ = dⱼ (Qᵀ z')ⱼ · 2^−(E+12)`, the products in `f64` (only
    /// needed on a raised alarm). A saturated reading has no split: [`ReadingFault::Overflow`].
    pub fn explain(&self, r: &[i32; N]) -> Result<Explained<N>, ReadingFault> {
        let score = self.score(r);
        let d = self.deviation(r).ok_or(ReadingFault::Overflow)?;
        let mut back = [0i64; N];
        for i in 0..N {
            let z = i64::from(self.z(&d, i).ok_or(ReadingFault::Overflow)?);
            let row = self.p.q.get(tri(i)..tri(i) + i + 1).unwrap_or(&[]);
            for (bj, q) in back.iter_mut().zip(row) {
                *bj += i64::from(*q) * z;
            }
        }
        let unit = libm::ldexp(1.0, -(i32::from(self.p.exponent) + Z_FRAC_BITS as i32));
        let mut contributions = [0.0f32; N];
        for ((c, dj), bj) in contributions.iter_mut().zip(&d).zip(&back) {
            *c = (f64::from(*dj) * (*bj as f64) * unit) as f32;
        }
        Ok(Explained {
            score,
            contributions,
        })
    }
}

/// Why an `f32` model could not be quantised.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum QuantiseError {
    /// The model log-transforms features; the integer path has no logarithm.
    LogFeatures,
    /// The `f32` model itself is invalid.
    Invalid(ModelError),
    /// A feature's range needs an input shift outside [`SHIFT_RANGE`], or its centre leaves `i32`.
    InputRange {
        /// Feature.
        index: u8,
    },
    /// The coefficients are too large for 16 bits at the chosen input resolution
    /// (the exponent would fall below 12).
    Coefficients,
    /// The alarm threshold is above [`MAX_ALARM`].
    Threshold,
}

impl fmt::Display for QuantiseError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            QuantiseError::LogFeatures => f.write_str(
                "the model log-transforms features, which the fixed-point path cannot do",
            ),
            QuantiseError::Invalid(e) => write!(f, "invalid model: {e}"),
            QuantiseError::InputRange { index } => write!(
                f,
                "feature {index}: its range cannot be read as a 16-bit deviation from a 32-bit centre"
            ),
            QuantiseError::Coefficients => f.write_str(
                "the factor's coefficients are too large for 16 bits at the input resolution",
            ),
            QuantiseError::Threshold => f.write_str("the alarm threshold is above 1e9"),
        }
    }
}

impl core::error::Error for QuantiseError {}

/// Quantise a validated `f32` model (`T = tri(N)`).
///
/// * `kⱼ`: the largest shift with `32 767 · 2^−kⱼ ≥ max(16, 2 √alarm) · σⱼ`, where
///   `σⱼ = √Σⱼⱼ / scaleⱼ` is the marginal standard deviation of feature `j` in its own units
///   (`Σ = W⁻¹ W⁻ᵀ`, computed in `f64`);
/// * `cⱼ = round(centreⱼ · 2^kⱼ)`, the `f32` model's centre;
/// * `E`: the largest exponent with every `|Vᵢⱼ| · 2^(E − kⱼ) ≤ 32 767`, and
///   `qᵢⱼ = round(Vᵢⱼ · 2^(E − kⱼ))`, `V` the `f32` model's folded factor.
#[allow(clippy::needless_range_loop)] // the triangular solves read best with indices
pub fn quantise<const N: usize, const T: usize>(
    p: &ModelParams<N>,
) -> Result<FixedParams<N, T>, QuantiseError> {
    if T != tri(N) {
        return Err(QuantiseError::Invalid(ModelError::Dimension { n: N }));
    }
    p.validate().map_err(QuantiseError::Invalid)?;
    if p.preprocess.log_mask != 0 {
        return Err(QuantiseError::LogFeatures);
    }
    let alarm = p.thresholds.alarm;
    if alarm > MAX_ALARM {
        return Err(QuantiseError::Threshold);
    }
    // L = W⁻¹ by forward substitution, column by column: Σⱼⱼ = Σₖ Lⱼₖ².
    let mut l = [[0.0f64; N]; N];
    for col in 0..N {
        for i in col..N {
            let mut s = if i == col { 1.0 } else { 0.0 };
            for k in col..i {
                s -= f64::from(p.w[i][k]) * l[k][col];
            }
            l[i][col] = s / f64::from(p.w[i][i]);
        }
    }
    let reach = libm::fmax(16.0, 2.0 * libm::sqrt(f64::from(alarm)));
    let mut shift = [0i8; N];
    let mut center = [0i32; N];
    for j in 0..N {
        let var: f64 = l[j].iter().map(|v| v * v).sum();
        let sigma = libm::sqrt(var) / f64::from(p.preprocess.scale[j]);
        let k = libm::floor(libm::log2(f64::from(LIMIT) / (reach * sigma)));
        if !(k >= f64::from(*SHIFT_RANGE.start()) && k <= f64::from(*SHIFT_RANGE.end())) {
            return Err(QuantiseError::InputRange { index: j as u8 });
        }
        shift[j] = k as i8;
        let c = fold_center(p.preprocess.offset[j], p.mean[j], p.preprocess.scale[j]);
        let cq = libm::round(f64::from(c) * libm::ldexp(1.0, k as i32));
        if !(cq >= f64::from(i32::MIN) && cq <= f64::from(i32::MAX)) {
            return Err(QuantiseError::InputRange { index: j as u8 });
        }
        center[j] = cq as i32;
    }
    // The folded factor in reading units per input unit: Vᵢⱼ · 2^−kⱼ.
    let v = |i: usize, j: usize| {
        f64::from(fold_factor(p.w[i][j], p.preprocess.scale[j]))
            * libm::ldexp(1.0, -i32::from(shift[j]))
    };
    let mut biggest = 0.0f64;
    for i in 0..N {
        for j in 0..=i {
            biggest = libm::fmax(biggest, libm::fabs(v(i, j)));
        }
    }
    // 2^E · biggest ≤ 32 767 (with rounding kept inside by the floor).
    let e = libm::floor(libm::log2(f64::from(LIMIT) / biggest));
    let e = libm::fmin(e, f64::from(*EXPONENT_RANGE.end()));
    if e.is_nan() || e < f64::from(*EXPONENT_RANGE.start()) {
        return Err(QuantiseError::Coefficients);
    }
    let exponent = e as u8;
    let mut q = [0i16; T];
    let mut slots = q.iter_mut();
    for i in 0..N {
        for j in 0..=i {
            let value = libm::round(v(i, j) * libm::ldexp(1.0, i32::from(exponent)));
            let value = value.clamp(-f64::from(LIMIT), f64::from(LIMIT)) as i16;
            if let Some(slot) = slots.next() {
                *slot = value;
            }
        }
    }
    let fixed = FixedParams {
        meta: p.meta,
        shift,
        center,
        exponent,
        q,
        thresholds: ThresholdBits {
            alarm: p.thresholds.alarm.to_bits(),
            clear: p.thresholds.clear.to_bits(),
        },
        policy: p.policy,
    };
    // A diagonal that rounded to zero (a tiny Vᵢᵢ) cannot be scored.
    fixed.validate().map_err(|_| QuantiseError::Coefficients)?;
    Ok(fixed)
}

/// The largest fixed-point blob for `n` features.
pub const fn max_len(n: usize) -> usize {
    // ids (5 + 10 + 5), exponent 1, shifts n, centres 4n, coefficients 2·tri, thresholds 8,
    // policy 6.
    HEADER_LEN + 20 + 1 + n + 4 * n + 2 * tri(n) + 8 + 6 + CRC_LEN
}

/// Encode a fixed-point model; returns the blob's length.
pub fn encode<const N: usize, const T: usize>(
    p: &FixedParams<N, T>,
    buf: &mut [u8],
) -> Result<usize, blob::EncodeError> {
    p.validate().map_err(blob::EncodeError::InvalidFixed)?;
    let mut w = blob::Writer::new(buf, HEADER_LEN);
    w.put(&p.meta.model_id)?;
    w.put(&p.meta.trained_at)?;
    w.put(&p.meta.sequence)?;
    w.bytes(&[p.exponent])?;
    for k in &p.shift {
        w.bytes(&k.to_le_bytes())?;
    }
    for c in &p.center {
        w.bytes(&c.to_le_bytes())?;
    }
    for q in &p.q {
        w.bytes(&q.to_le_bytes())?;
    }
    w.bytes(&p.thresholds.alarm.to_le_bytes())?;
    w.bytes(&p.thresholds.clear.to_le_bytes())?;
    w.put(&p.policy.raise_after)?;
    w.put(&p.policy.clear_after)?;
    let flags = FLAG_FIXED | if p.policy.latch { FLAG_LATCH } else { 0 };
    w.seal(N as u8, flags)
}

/// Decode and validate a fixed-point blob (flag bit 1 set) of `N` features.
pub fn decode<const N: usize, const T: usize>(
    bytes: &[u8],
) -> Result<FixedParams<N, T>, DecodeError> {
    let (flags, mut r) = blob::open::<N>(bytes, true)?;
    let meta = ModelMeta {
        model_id: r.varint()?,
        trained_at: r.varint()?,
        sequence: r.varint()?,
    };
    let [exponent] = r.array::<1>()?;
    let mut shift = [0i8; N];
    for k in shift.iter_mut() {
        *k = i8::from_le_bytes(r.array::<1>()?);
    }
    let mut center = [0i32; N];
    for c in center.iter_mut() {
        *c = i32::from_le_bytes(r.array::<4>()?);
    }
    let mut q = [0i16; T];
    for v in q.iter_mut() {
        *v = i16::from_le_bytes(r.array::<2>()?);
    }
    let thresholds = ThresholdBits {
        alarm: u32::from_le_bytes(r.array::<4>()?),
        clear: u32::from_le_bytes(r.array::<4>()?),
    };
    let policy = AlarmPolicy {
        raise_after: r.varint()?,
        clear_after: r.varint()?,
        latch: flags & FLAG_LATCH != 0,
    };
    r.finish()?;
    let p = FixedParams {
        meta,
        shift,
        center,
        exponent,
        q,
        thresholds,
        policy,
    };
    p.validate().map_err(DecodeError::Fixed)?;
    Ok(p)
}

impl<const N: usize, const T: usize> FixedModel<N, T> {
    /// Decode, validate and keep a fixed-point blob.
    pub fn from_blob(bytes: &[u8]) -> Result<Self, DecodeError> {
        Ok(Self {
            p: decode::<N, T>(bytes)?,
        })
    }
}

// Keep the magic and version in one place (the header is the float blob's).
const _: () = assert!(MAGIC.len() == 4 && VERSION == 1);

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{Model, Preprocess};

    fn params() -> ModelParams<3> {
        ModelParams {
            meta: ModelMeta {
                model_id: 0x00C0_FFEE,
                trained_at: 1_767_225_600,
                sequence: 3,
            },
            preprocess: Preprocess {
                log_mask: 0,
                offset: [20.0, 1.5, -3.0],
                scale: [0.5, 4.0, 0.25],
            },
            mean: [0.1, -0.2, 0.0],
            w: [[1.2, 0.0, 0.0], [-0.6, 1.5, 0.0], [0.3, 0.4, 0.9]],
            thresholds: Thresholds {
                alarm: 11.34,
                clear: 7.81,
            },
            policy: AlarmPolicy {
                raise_after: 2,
                clear_after: 5,
                latch: false,
            },
        }
    }

    /// A small deterministic generator (a 32-bit LCG, constants from Numerical Recipes).
    struct Lcg(u32);
    impl Lcg {
        fn next(&mut self) -> u32 {
            self.0 = self.0.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
            self.0
        }
    }

    /// The definition `scale_round` must match: the `f64` product by the exact power of two,
    /// `libm::round` (half away from zero), clamped to `i32` (the conversion as first written).
    fn scale_round_f64(x: f32, k: i8) -> Option<i32> {
        if !x.is_finite() {
            return None;
        }
        let v = libm::round(f64::from(x) * libm::ldexp(1.0, i32::from(k)));
        Some(v.clamp(f64::from(i32::MIN), f64::from(i32::MAX)) as i32)
    }

    #[test]
    fn the_integer_reading_conversion_is_the_f64_one_bit_for_bit() {
        let mut g = Lcg(0x5EED);
        let mut edges = vec![
            0.0f32,
            -0.0,
            0.5,
            -0.5,
            1.5,
            -2.5,
            0.499_999_97,
            f32::MIN_POSITIVE,
            -f32::MIN_POSITIVE,
            f32::from_bits(1),
            f32::MAX,
            f32::MIN,
            2_147_483_648.0,
            -2_147_483_648.0,
            2_147_483_520.0,
            -2_147_483_904.0,
            f32::INFINITY,
            f32::NEG_INFINITY,
            f32::NAN,
        ];
        // Exact halves and their neighbours at every scale the shifts reach.
        for p in -40i32..40 {
            let h = libm::ldexpf(1.5, p);
            edges.extend([
                h,
                -h,
                f32::from_bits(h.to_bits() + 1),
                f32::from_bits(h.to_bits() - 1),
            ]);
        }
        for k in SHIFT_RANGE {
            for &x in &edges {
                assert_eq!(
                    scale_round(x, k),
                    scale_round_f64(x, k),
                    "x = {x:e}, k = {k}"
                );
            }
            for _ in 0..20_000 {
                // Any bit pattern, and values of every magnitude a sensor gives.
                let x = f32::from_bits(g.next());
                assert_eq!(
                    scale_round(x, k),
                    scale_round_f64(x, k),
                    "x = {x:e}, k = {k}"
                );
                let y = (g.next() as i32) as f32 * libm::ldexpf(1.0, (g.next() % 48) as i32 - 40);
                assert_eq!(
                    scale_round(y, k),
                    scale_round_f64(y, k),
                    "y = {y:e}, k = {k}"
                );
            }
        }
    }

    #[test]
    fn integer_helpers_are_exact() {
        let mut g = Lcg(7);
        for _ in 0..100_000 {
            let u = g.next();
            assert_eq!(square(u), u64::from(u) * u64::from(u));
            let v = (u64::from(g.next()) << 32 | u64::from(g.next())) >> (g.next() % 64);
            // The rounding of `as` (to nearest, ties to even) and an exact power-of-two scaling.
            assert_eq!(q24_to_f32(v), (v as f32) * (1.0 / 16_777_216.0), "{v}");
        }
        for v in [0u64, 1, 2, 3, (1 << 24) + 1, (1 << 25) + 3, u64::MAX] {
            assert_eq!(q24_to_f32(v), (v as f32) * (1.0 / 16_777_216.0), "{v}");
        }
        assert_eq!(square(u32::MAX), u64::from(u32::MAX) * u64::from(u32::MAX));
    }

    #[test]
    fn quantised_scores_follow_the_f32_scores() {
        let p = params();
        let m = Model::new(p).unwrap();
        let f = FixedModel::new(quantise::<3, 6>(&p).unwrap()).unwrap();
        let mut g = Lcg(11);
        let mut worst = 0.0f64;
        for _ in 0..20_000 {
            let mut x = [0.0f32; 3];
            for (i, xi) in x.iter_mut().enumerate() {
                let u = (g.next() >> 8) as f32 / (1u32 << 24) as f32 * 8.0 - 4.0;
                *xi = m.center()[i] + u / p.preprocess.scale[i];
            }
            let (a, b) = (m.score(&x).unwrap(), f.score_f32(&x).unwrap());
            // Relative to the threshold: 16-bit coefficients and inputs give about 1e-4 of it.
            worst = worst.max((f64::from(a.d2) - f64::from(b.d2)).abs() / (1.0 + f64::from(a.d2)));
            if (a.d2 - p.thresholds.alarm).abs() > 0.05 {
                assert_eq!(a.verdict, b.verdict, "{x:?}");
            }
        }
        assert!(worst < 2e-3, "worst relative d² difference {worst}");
    }

    #[test]
    fn saturation_is_an_alarm_and_non_finite_a_fault() {
        let p = params();
        let f = FixedModel::new(quantise::<3, 6>(&p).unwrap()).unwrap();
        let far = f.score(&[i32::MAX, 0, 0]);
        assert_eq!(far.verdict, Verdict::Above);
        assert_eq!(far.d2, f32::MAX);
        let c = f.params().center;
        assert_eq!(
            f.score(&[c[0] + LIMIT + 1, c[1], c[2]]).verdict,
            Verdict::Above
        );
        // At the edge of the range the score is finite, and by the choice of the shifts far above.
        let edge = f.score(&[c[0] + LIMIT, c[1], c[2]]);
        assert!(
            edge.d2 < f32::MAX && edge.d2 > 4.0 * p.thresholds.alarm,
            "{edge:?}"
        );
        assert_eq!(
            f.score_f32(&[f32::NAN, 0.0, 0.0]),
            Err(ReadingFault::NotFinite { feature: 0 })
        );
        assert_eq!(f.score(&c).d2, 0.0);
    }

    #[test]
    fn blobs_round_trip_and_each_decoder_refuses_the_other_arithmetic() {
        let q = quantise::<3, 6>(&params()).unwrap();
        let mut buf = [0u8; max_len(3)];
        let n = encode(&q, &mut buf).unwrap();
        assert_eq!(decode::<3, 6>(&buf[..n]), Ok(q));
        assert_eq!(
            blob::decode::<3>(&buf[..n]),
            Err(DecodeError::Arithmetic { fixed: true })
        );
        let mut fb = [0u8; blob::max_len(3)];
        let m = blob::encode(&params(), &mut fb).unwrap();
        assert_eq!(
            decode::<3, 6>(&fb[..m]),
            Err(DecodeError::Arithmetic { fixed: false })
        );
        // Every single-bit flip is refused.
        for bit in 0..n * 8 {
            let mut b = buf;
            b[bit / 8] ^= 1 << (bit % 8);
            assert!(
                decode::<3, 6>(&b[..n]).is_err(),
                "flip of bit {bit} accepted"
            );
        }
    }

    #[test]
    fn log_features_are_refused() {
        let mut p = params();
        p.preprocess.log_mask = 0b1;
        assert_eq!(quantise::<3, 6>(&p), Err(QuantiseError::LogFeatures));
    }

    #[test]
    fn explain_sums_to_the_score() {
        let p = params();
        let f = FixedModel::new(quantise::<3, 6>(&p).unwrap()).unwrap();
        let r = f.reading(&[25.0, 1.0, -1.0]).unwrap();
        let e = f.explain(&r).unwrap();
        let sum: f32 = e.contributions.iter().sum();
        assert!(
            (sum - e.score.d2).abs() < 1e-3 * (1.0 + e.score.d2),
            "{e:?}"
        );
    }
}
