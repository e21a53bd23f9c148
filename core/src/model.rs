//! The compiled model and its scoring: the definition of a score.
//!
//! [`Model::new`] validates a [`ModelParams`] once and folds it into the form the hot path wants:
//!
//! * the centre `c = offset + μ / scale`, in the reading's own units (after the optional log);
//! * `V = W · diag(scale)`, so that `z = V (t − c)` equals `W (u − μ)` in exact arithmetic.
//!
//! A score is then `d = t − c`, `zᵢ = Σⱼ≤ᵢ Vᵢⱼ dⱼ`, `d² = Σᵢ zᵢ²`: `N(N+1)/2` multiply-adds for the
//! factor, `N` subtractions and `N` squares. All arithmetic is plain `f32` multiply and add in a fixed
//! order, with no fused multiply-add, so every IEEE-754 machine (a Cortex-M4F, an x86-64 host) gets
//! the same bits.
//!
//! A reading that is not finite makes `d²` NaN or infinite. That one check at the end is all the
//! hot path pays; the slow path then finds which feature was at fault.

use core::fmt;

use crate::params::{
    fold_center, fold_factor, AlarmPolicy, ModelError, ModelMeta, ModelParams, Thresholds,
    MAX_FEATURES,
};

/// `ln(2π)`.
const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// Whether a scored reading lies above the alarm threshold.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Verdict {
    /// `d² ≤` the alarm threshold.
    Below,
    /// `d² >` the alarm threshold.
    Above,
}

/// A reading that was scored.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Scored {
    /// The squared Mahalanobis distance.
    pub d2: f32,
    /// `d2` against the alarm threshold.
    pub verdict: Verdict,
}

/// Why a reading could not be scored. Never a number that could pass as normal.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum ReadingFault {
    /// The reading of this feature is NaN or infinite.
    NotFinite {
        /// Feature index.
        feature: u8,
    },
    /// This feature is log-transformed and its reading is zero or negative.
    LogDomain {
        /// Feature index.
        feature: u8,
    },
    /// Every input was finite but d² overflowed `f32`.
    Overflow,
    /// Only from [`Model::explain`]: d² is finite (and [`Model::score`] scores the reading), but
    /// its split into per-feature contributions does not fit in `f32`: contributions beyond the
    /// range of `f32` cancel to a d² inside it.
    ContributionOverflow,
    /// Only from a model bank with a reading window ([`crate::track::Tracker`]): the window is
    /// not yet whole (after boot, a bad reading or a change of known mode), so there is nothing
    /// to score yet.
    WindowFilling {
        /// Good readings still needed before the next one is scored.
        missing: u8,
    },
    /// Only from a known-mode bank: the reading came without a mode, or with a mode the bank
    /// does not have.
    UnknownMode {
        /// The mode given (`None`: no mode).
        given: Option<u8>,
    },
}

impl fmt::Display for ReadingFault {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ReadingFault::NotFinite { feature } => {
                write!(f, "reading of feature {feature} is not finite")
            }
            ReadingFault::LogDomain { feature } => write!(
                f,
                "feature {feature} is log-transformed and its reading is not positive"
            ),
            ReadingFault::Overflow => f.write_str("d² overflows f32"),
            ReadingFault::ContributionOverflow => f.write_str(
                "the per-feature contributions to a finite d² overflow f32 (the score stands)",
            ),
            ReadingFault::WindowFilling { missing } => write!(
                f,
                "the reading window is not whole yet: {missing} more good reading(s) needed"
            ),
            ReadingFault::UnknownMode { given: None } => {
                f.write_str("the reading came without the operating mode the bank needs")
            }
            ReadingFault::UnknownMode { given: Some(k) } => {
                write!(f, "operating mode {k} is not one of the bank's modes")
            }
        }
    }
}

impl core::error::Error for ReadingFault {}

/// A scored reading with the per-feature contributions to d².
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Explained<const N: usize> {
    /// The same value, to the bit, that [`Model::score`] returns.
    pub score: Scored,
    /// `cᵢ = dᵢ (Vᵀ z)ᵢ`; they sum to d². A large positive value names the feature that broke the pattern.
    pub contributions: [f32; N],
}

impl<const N: usize> Explained<N> {
    /// The feature with the largest contribution, and that contribution.
    pub fn top(&self) -> (usize, f32) {
        top_of(&self.contributions)
    }
}

/// The largest contribution and its feature, the first on a tie: the one rule every form uses.
pub(crate) fn top_of(contributions: &[f32]) -> (usize, f32) {
    let mut best = (0, f32::NEG_INFINITY);
    for (i, c) in contributions.iter().enumerate() {
        if *c > best.1 {
            best = (i, *c);
        }
    }
    best
}

/// A validated model of `N` features, ready to score.
///
/// Build it with [`Model::new`] from parameters, or [`Model::from_blob`] from flash.
/// After that nothing on it can fail or panic.
#[derive(Clone, Debug, PartialEq)]
pub struct Model<const N: usize> {
    params: ModelParams<N>,
    center: [f32; N],
    v: [[f32; N]; N],
    /// `Σ ln Vᵢᵢ − N/2 ln 2π`, the log normalising constant in the reading's units.
    ln_norm: f32,
}

impl<const N: usize> Model<N> {
    const DIMENSION_OK: () = assert!(N > 0 && N <= MAX_FEATURES, "N must be in 1..=32");

    /// Validate `params` and compile them for scoring.
    ///
    /// Fails exactly when [`ModelParams::validate`] does: the validation checks this very fold
    /// (every element of `V` and `c` finite, the diagonal of `V` positive), with the same
    /// operations, so a blob that decodes also compiles.
    pub fn new(params: ModelParams<N>) -> Result<Self, ModelError> {
        #[allow(clippy::let_unit_value)]
        let () = Self::DIMENSION_OK;
        params.validate()?;
        let p = &params.preprocess;
        let mut center = [0.0f32; N];
        for (((c, o), m), s) in center
            .iter_mut()
            .zip(&p.offset)
            .zip(&params.mean)
            .zip(&p.scale)
        {
            *c = fold_center(*o, *m, *s);
        }
        let mut v = [[0.0f32; N]; N];
        for (i, (vrow, wrow)) in v.iter_mut().zip(&params.w).enumerate() {
            for (vij, (wij, sj)) in vrow.iter_mut().zip(wrow.iter().zip(&p.scale)).take(i + 1) {
                *vij = fold_factor(*wij, *sj);
            }
        }
        let ln_norm = ln_norm(
            N,
            v.iter().enumerate().filter_map(|(i, r)| r.get(i).copied()),
        );
        Ok(Self {
            params,
            center,
            v,
            ln_norm,
        })
    }

    /// The parameters this model was built from.
    pub const fn params(&self) -> &ModelParams<N> {
        &self.params
    }

    /// Identifier and training time.
    pub const fn meta(&self) -> ModelMeta {
        self.params.meta
    }

    /// Alarm and clear thresholds.
    pub const fn thresholds(&self) -> Thresholds {
        self.params.thresholds
    }

    /// Debounce and latch policy.
    pub const fn policy(&self) -> AlarmPolicy {
        self.params.policy
    }

    /// The centre `c` of the reading, in its (log-transformed) units.
    pub const fn center(&self) -> &[f32; N] {
        &self.center
    }

    /// Score a reading in raw sensor units: d² and its verdict, or why it could not be scored.
    #[inline]
    pub fn score(&self, x: &[f32; N]) -> Result<Scored, ReadingFault> {
        score(self, x)
    }

    /// Score a reading and split d² into per-feature contributions.
    ///
    /// The contributions are accumulated in `f64` (software on an FPU-less or single-precision
    /// core, but only needed when an alarm is raised), then rounded to `f32`. They cannot overflow
    /// `f64` (each is at most about 10⁹⁸ for finite inputs), but they can leave `f32` while their
    /// sum, d², stays inside it (large terms of opposite sign that cancel). Then there is no
    /// faithful `f32` split, and this returns [`ReadingFault::ContributionOverflow`] rather than
    /// an infinite contribution; [`Model::score`] still scores the reading. Every contribution
    /// returned is finite.
    pub fn explain(&self, x: &[f32; N]) -> Result<Explained<N>, ReadingFault> {
        explain(self, x)
    }

    /// The natural log of the model's density at `x`, in the units of the raw reading
    /// (including the Jacobian of any log transform): `−½ (d² + N ln 2π) + Σ ln Vᵢᵢ − Σ_log ln xᵢ`.
    pub fn log_density(&self, x: &[f32; N]) -> Result<f32, ReadingFault> {
        log_density(self, self.ln_norm, x)
    }
}

impl<const N: usize> Folded<N> for Model<N> {
    #[inline(always)]
    fn center(&self) -> &[f32; N] {
        &self.center
    }

    #[inline(always)]
    fn log_mask(&self) -> u32 {
        self.params.preprocess.log_mask
    }

    #[inline(always)]
    fn alarm(&self) -> f32 {
        self.params.thresholds.alarm
    }

    #[inline(always)]
    fn row(&self, i: usize) -> impl Iterator<Item = f32> + '_ {
        self.v.get(i).unwrap_or(&[f32::NAN; N]).iter().copied()
    }
}

/// The folded form a score reads: the centre `c`, the rows of `V = W · diag(scale)` (lower
/// triangle, `Vᵢⱼ` for `j ≤ i`), the log mask and the alarm threshold.
///
/// Three forms provide it: [`Model`] (parameters and a square `V` in RAM), the compact
/// [`crate::CompactModel`] (a packed `V` in RAM) and the flash-resident [`crate::FlashModel`],
/// which computes each `Vᵢⱼ = Wᵢⱼ · scaleⱼ` from the blob's bytes as it goes, with the same `f32`
/// multiply the others did once. The maths below is written once against this trait, so the three
/// give the same bits.
pub(crate) trait Folded<const N: usize> {
    /// The centre `c`.
    fn center(&self) -> &[f32; N];
    /// Bit `i`: feature `i` is log-transformed.
    fn log_mask(&self) -> u32;
    /// The alarm threshold on d².
    fn alarm(&self) -> f32;
    /// Row `i` from `Vᵢ₀` on, at least `i + 1` values; the callers take the first `i + 1`. (Every
    /// form gives `N` values, a fixed-length window, which the compiler unrolls: in a packed
    /// triangle the `N` values from row `i`'s start never run past its end.)
    fn row(&self, i: usize) -> impl Iterator<Item = f32> + '_;
}

/// `d = t(x) − c`. Without log features this is a plain subtraction.
#[inline(always)]
pub(crate) fn deviation<const N: usize>(
    mask: u32,
    center: &[f32; N],
    x: &[f32; N],
) -> Result<[f32; N], ReadingFault> {
    let mut d = [0.0f32; N];
    if mask == 0 {
        for ((di, xi), ci) in d.iter_mut().zip(x).zip(center) {
            *di = xi - ci;
        }
    } else {
        for (i, ((di, xi), ci)) in d.iter_mut().zip(x).zip(center).enumerate() {
            let t = if (mask >> i) & 1 == 1 {
                if !xi.is_finite() {
                    return Err(ReadingFault::NotFinite { feature: i as u8 });
                }
                if *xi <= 0.0 {
                    return Err(ReadingFault::LogDomain { feature: i as u8 });
                }
                libm::logf(*xi)
            } else {
                *xi
            };
            *di = t - ci;
        }
    }
    Ok(d)
}

/// `zᵢ = Σⱼ≤ᵢ Vᵢⱼ dⱼ`, summed from `j = 0` up, starting from the first product (not from
/// `0.0`, which would cost an instruction a row and only changes the sign of a zero `zᵢ`).
/// The one definition of a row, shared by [`distance`] and [`project`].
#[inline(always)]
fn row_dot<const N: usize>(row: impl Iterator<Item = f32>, d: &[f32; N], i: usize) -> f32 {
    let mut terms = row.zip(d).take(i + 1).map(|(vij, dj)| vij * dj);
    let first = terms.next().unwrap_or(0.0);
    terms.fold(first, |z, t| z + t)
}

/// `d² = ‖V d‖²`, without keeping `z`: `z₀² + z₁² + …`, summed in row order. Same operations,
/// in the same order, as [`project`], so the two agree to the bit.
#[inline(always)]
pub(crate) fn distance<const N: usize, F: Folded<N>>(f: &F, d: &[f32; N]) -> f32 {
    let mut zs = (0..N).map(|i| row_dot(f.row(i), d, i));
    let z0 = zs.next().unwrap_or(0.0);
    zs.fold(z0 * z0, |acc, z| acc + z * z)
}

/// `z = V d` and `d² = ‖z‖²`, with the operations of [`distance`].
#[inline(always)]
pub(crate) fn project<const N: usize, F: Folded<N>>(f: &F, d: &[f32; N]) -> ([f32; N], f32) {
    let mut zs = [0.0f32; N];
    for (i, zi) in zs.iter_mut().enumerate() {
        *zi = row_dot(f.row(i), d, i);
    }
    let mut it = zs.iter();
    let z0 = it.next().copied().unwrap_or(0.0);
    let acc = it.fold(z0 * z0, |acc, z| acc + z * z);
    (zs, acc)
}

/// The slow path after a non-finite d²: find which input was at fault.
#[cold]
fn diagnose<const N: usize>(x: &[f32; N]) -> ReadingFault {
    match x.iter().position(|v| !v.is_finite()) {
        Some(i) => ReadingFault::NotFinite { feature: i as u8 },
        None => ReadingFault::Overflow,
    }
}

#[inline(always)]
fn judge<const N: usize>(alarm: f32, x: &[f32; N], d2: f32) -> Result<Scored, ReadingFault> {
    if !d2.is_finite() {
        return Err(diagnose(x));
    }
    let verdict = if d2 > alarm {
        Verdict::Above
    } else {
        Verdict::Below
    };
    Ok(Scored { d2, verdict })
}

/// A score: the definition every form calls.
#[inline(always)]
pub(crate) fn score<const N: usize, F: Folded<N>>(
    f: &F,
    x: &[f32; N],
) -> Result<Scored, ReadingFault> {
    let d = deviation(f.log_mask(), f.center(), x)?;
    judge(f.alarm(), x, distance(f, &d))
}

/// A score split into contributions (see [`Model::explain`]).
pub(crate) fn explain<const N: usize, F: Folded<N>>(
    f: &F,
    x: &[f32; N],
) -> Result<Explained<N>, ReadingFault> {
    let d = deviation(f.log_mask(), f.center(), x)?;
    let (z, d2) = project(f, &d);
    let score = judge(f.alarm(), x, d2)?;
    let contributions = split(f, &d, &z)?;
    Ok(Explained {
        score,
        contributions,
    })
}

/// The per-feature contributions `cⱼ = dⱼ (Vᵀ z)ⱼ` of the deviation `d` and its `z = V d` (see
/// [`Model::explain`]).
pub(crate) fn split<const N: usize, F: Folded<N>>(
    f: &F,
    d: &[f32; N],
    z: &[f32; N],
) -> Result<[f32; N], ReadingFault> {
    // `backⱼ = Σᵢ Vᵢⱼ zᵢ` over the lower triangle. (The square `V` of [`Model`] once added its
    // zeros above the diagonal too; adding `±0` to a sum that starts at `+0` changes no bit.)
    let mut back = [0.0f64; N];
    for (i, zi) in z.iter().enumerate() {
        for (bj, vij) in back.iter_mut().zip(f.row(i)).take(i + 1) {
            *bj += f64::from(vij) * f64::from(*zi);
        }
    }
    let mut contributions = [0.0f32; N];
    for ((c, dj), bj) in contributions.iter_mut().zip(d).zip(&back) {
        *c = (f64::from(*dj) * bj) as f32;
        if !c.is_finite() {
            return Err(ReadingFault::ContributionOverflow);
        }
    }
    Ok(contributions)
}

/// The log-density (see [`Model::log_density`]), with `ln_norm = Σ ln Vᵢᵢ − N/2 ln 2π`.
pub(crate) fn log_density<const N: usize, F: Folded<N>>(
    f: &F,
    ln_norm: f32,
    x: &[f32; N],
) -> Result<f32, ReadingFault> {
    let s = score(f, x)?;
    let mask = f.log_mask();
    let mut jac = 0.0f32;
    for (i, xi) in x.iter().enumerate() {
        if i < 32 && (mask >> i) & 1 == 1 {
            jac += libm::logf(*xi);
        }
    }
    Ok(ln_norm - 0.5 * s.d2 - jac)
}

/// `Σ ln Vᵢᵢ − N/2 ln 2π` in `f64`, rounded to `f32`, from the diagonal in row order.
pub(crate) fn ln_norm(n: usize, diagonal: impl Iterator<Item = f32>) -> f32 {
    let mut acc = -0.5 * n as f64 * LN_2PI;
    for d in diagonal {
        acc += libm::log(f64::from(d));
    }
    acc as f32
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::params::{Preprocess, Thresholds};

    fn model2(log_mask: u32) -> Model<2> {
        Model::new(ModelParams {
            meta: ModelMeta::default(),
            preprocess: Preprocess {
                log_mask,
                offset: [10.0, 2.0],
                scale: [0.5, 4.0],
            },
            mean: [0.0, 0.0],
            w: [[1.0, 0.0], [-0.6, 1.25]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
            policy: AlarmPolicy::default(),
        })
        .unwrap()
    }

    #[test]
    fn score_matches_hand_computation() {
        let m = model2(0);
        // u = ((12 − 10)·0.5, (2.5 − 2)·4) = (1, 2); z = (1, −0.6 + 2.5) = (1, 1.9).
        let s = m.score(&[12.0, 2.5]).unwrap();
        assert!((s.d2 - (1.0 + 1.9 * 1.9)).abs() < 1e-5, "{}", s.d2);
        assert_eq!(s.verdict, Verdict::Below);
        assert_eq!(m.score(&[20.0, 2.0]).unwrap().verdict, Verdict::Above);
    }

    #[test]
    fn non_finite_readings_are_faults() {
        let m = model2(0);
        assert_eq!(
            m.score(&[f32::NAN, 1.0]),
            Err(ReadingFault::NotFinite { feature: 0 })
        );
        assert_eq!(
            m.score(&[1.0, f32::INFINITY]),
            Err(ReadingFault::NotFinite { feature: 1 })
        );
        assert_eq!(
            m.score(&[1.0, f32::NEG_INFINITY]),
            Err(ReadingFault::NotFinite { feature: 1 })
        );
        assert_eq!(m.score(&[3.0e38, 0.0]), Err(ReadingFault::Overflow));
    }

    #[test]
    fn log_features_refuse_non_positive_readings() {
        let m = model2(0b10);
        assert_eq!(
            m.score(&[1.0, 0.0]),
            Err(ReadingFault::LogDomain { feature: 1 })
        );
        assert_eq!(
            m.score(&[1.0, -3.0]),
            Err(ReadingFault::LogDomain { feature: 1 })
        );
        assert_eq!(
            m.score(&[1.0, f32::NAN]),
            Err(ReadingFault::NotFinite { feature: 1 })
        );
        for inf in [f32::INFINITY, f32::NEG_INFINITY] {
            assert_eq!(
                m.score(&[1.0, inf]),
                Err(ReadingFault::NotFinite { feature: 1 })
            );
        }
        assert!(m.score(&[10.0, core::f32::consts::E * 7.389_056]).is_ok());
    }

    #[test]
    fn contributions_sum_to_d2_and_match_score_bits() {
        let m = model2(0);
        let x = [13.0, 1.0];
        let e = m.explain(&x).unwrap();
        let s = m.score(&x).unwrap();
        assert_eq!(e.score.d2.to_bits(), s.d2.to_bits());
        let sum: f32 = e.contributions.iter().sum();
        assert!(((sum - s.d2) / s.d2).abs() < 1e-5);
    }

    /// Contributions of opposite sign beyond f32 that cancel to a finite d²: N = 2,
    /// W₁₀ = −2⁴⁰, x = (2⁴⁰, 2⁸⁰ + 2⁵⁷). Then z = (2⁴⁰, 2⁵⁷) exactly, d² = 2⁸⁰ + 2¹¹⁴, but the
    /// contributions are about ∓2¹³⁷, beyond f32's 2¹²⁸.
    #[test]
    fn contributions_beyond_f32_are_a_fault_not_infinity() {
        let two40 = 2.0f32.powi(40);
        let m = Model::<2>::new(ModelParams {
            meta: ModelMeta::default(),
            preprocess: Preprocess::identity(),
            mean: [0.0; 2],
            w: [[1.0, 0.0], [-two40, 1.0]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
            policy: AlarmPolicy::default(),
        })
        .unwrap();
        let x = [two40, 2.0f32.powi(80) + 2.0f32.powi(57)];
        let s = m.score(&x).unwrap();
        assert_eq!(s.d2, 2.0f32.powi(80) + 2.0f32.powi(114));
        assert_eq!(m.explain(&x), Err(ReadingFault::ContributionOverflow));
        // A reading of the same model whose contributions fit is explained, finitely.
        let e = m.explain(&[1.0, two40]).unwrap();
        assert!(e.contributions.iter().all(|c| c.is_finite()));
    }

    #[test]
    fn log_density_of_identity_model_is_standard_normal() {
        let m = Model::<2>::new(ModelParams {
            meta: ModelMeta::default(),
            preprocess: Preprocess::identity(),
            mean: [0.0; 2],
            w: [[1.0, 0.0], [0.0, 1.0]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
            policy: AlarmPolicy::default(),
        })
        .unwrap();
        // Standard bivariate normal: pdf([1,1]) = 0.05854983152431917 (shared/reference-values.md,
        // from the closed form (2π)⁻¹ exp(−½‖x‖²)).
        let lp = m.log_density(&[1.0, 1.0]).unwrap();
        assert!((lp - libm::logf(0.058_549_83)).abs() < 1e-6);
    }
}
