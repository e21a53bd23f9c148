//! Models that keep (almost) nothing in RAM: [`FlashModel`], a checked view of a blob read in
//! place, and [`CompactModel`], the folded form alone, packed.
//!
//! A [`crate::Model`] keeps its parameters and a square folded factor, `8 N² + 16 N + 48` bytes. On
//! a sensor node the blob already sits in flash, validated, and a score needs only the lower
//! triangle of `W`, the scales and the centre. So:
//!
//! * [`FlashModel`] borrows the blob. It keeps the centre `c` (`4 N` bytes, computed once: it needs
//!   a division a feature) and the few scalars a node reports, and reads `Wᵢⱼ` and `scaleⱼ` from
//!   the blob's bytes at every score (`f32::from_le_bytes`, any alignment), multiplying them with
//!   the same `f32` multiply [`crate::Model::new`] does once. The products are the same bits, so
//!   the score is the same bits.
//! * [`CompactModel`] holds `V = W · diag(scale)` folded and packed (`N(N+1)/2` floats, row by
//!   row) with the centre: no parameters, no zeros above the diagonal, no blob needed after
//!   construction. Its second const parameter is the triangle's length, [`tri`]`(N)`, checked at
//!   compile time.
//!
//! All three forms score through one definition (`model::score` and its helpers), so d²,
//! contributions and log-density agree to the bit; `tests/golden/*.pins` pin them.
//!
//! | form | RAM (thumbv7em, 32-bit pointers) | at N = 5 / 8 / 16 / 32 |
//! |---|---|---|
//! | [`crate::Model`] | `8 N² + 16 N + 48` | 328 / 688 / 2 352 / 8 752 |
//! | [`CompactModel`] | `2 N² + 6 N + 44`, rounded up to 8 | 128 / 224 / 656 / 2 288 |
//! | [`FlashModel`] | `4 N + 48`, rounded up to 8 | 72 / 80 / 112 / 176 |
//!
//! The sizes are pinned at compile time on 32-bit targets (the image fails to build if they move)
//! and by a test on 64-bit hosts, where the borrowed slice is 16 bytes instead of 8.

use crate::blob::{self, f32_at, DecodeError};
use crate::model::{self, Explained, Folded, ReadingFault, Scored};
use crate::params::{
    check, fold_center, fold_factor, AlarmPolicy, ModelMeta, ParamSource, Thresholds, MAX_FEATURES,
};

/// `n (n + 1) / 2`, the length of a packed lower triangle of side `n`.
pub const fn tri(n: usize) -> usize {
    n * (n + 1) / 2
}

/// The blob's floats, read in place: `offset`, `scale`, `mean` (`N` each), `W`'s lower triangle
/// row by row, the two thresholds (see FORMAT.md).
/// A model bank's mode (`crate::bank`) is the same block of floats, with `N` the scored length.
#[derive(Clone, Copy)]
pub(crate) struct Floats<'a, const N: usize> {
    pub(crate) bytes: &'a [u8],
    pub(crate) log_mask: u32,
    pub(crate) policy: AlarmPolicy,
}

impl<const N: usize> Floats<'_, N> {
    pub(crate) const SCALE: usize = N;
    pub(crate) const MEAN: usize = 2 * N;
    pub(crate) const W: usize = 3 * N;
    pub(crate) const THRESHOLDS: usize = 3 * N + tri(N);
}

/// What a row would read past the end of a short slice: NaN, so that d² would be NaN and the
/// reading a fault, never "normal". No model reaches it: `from_blob` checked the length.
struct NanBytes<const N: usize>;

impl<const N: usize> NanBytes<N> {
    const BYTES: [[u8; 4]; N] = [f32::NAN.to_le_bytes(); N];
}

/// Row `i` of `V = W · diag(scale)` from a block of floats in place (see [`Floats`]): the one
/// definition of a row read from flash, for [`FlashModel`] and each mode of a bank.
#[inline(always)]
pub(crate) fn flash_row<const N: usize>(floats: &[u8], i: usize) -> impl Iterator<Item = f32> + '_ {
    // Slices of the row's own length (not fixed windows as in RAM): the compiler keeps this
    // loop rolled, which is smaller in flash and, with the fold's extra load and multiply,
    // no slower at N = 8.
    let nan: &[[u8; 4]] = &NanBytes::<N>::BYTES;
    let start = 4 * (Floats::<N>::W + tri(i));
    let w = floats.get(start..start + 4 * (i + 1));
    let s = floats.get(4 * Floats::<N>::SCALE..4 * Floats::<N>::MEAN);
    let w = w.map_or(nan, |w| w.as_chunks::<4>().0);
    let s = s.map_or(nan, |s| s.as_chunks::<4>().0);
    w.iter()
        .zip(s)
        .map(|(w, s)| fold_factor(f32::from_le_bytes(*w), f32::from_le_bytes(*s)))
}

impl<const N: usize> ParamSource<N> for Floats<'_, N> {
    fn offset(&self, i: usize) -> f32 {
        f32_at(self.bytes, i)
    }
    fn scale(&self, i: usize) -> f32 {
        f32_at(self.bytes, Self::SCALE + i)
    }
    fn mean(&self, i: usize) -> f32 {
        f32_at(self.bytes, Self::MEAN + i)
    }
    fn w(&self, i: usize, j: usize) -> f32 {
        f32_at(self.bytes, Self::W + tri(i) + j)
    }
    fn log_mask(&self) -> u32 {
        self.log_mask
    }
    fn thresholds(&self) -> Thresholds {
        Thresholds {
            alarm: f32_at(self.bytes, Self::THRESHOLDS),
            clear: f32_at(self.bytes, Self::THRESHOLDS + 1),
        }
    }
    fn policy(&self) -> AlarmPolicy {
        self.policy
    }
}

/// What every compact form keeps besides its factor.
#[derive(Clone, Copy, Debug, PartialEq)]
struct Scalars {
    meta: ModelMeta,
    thresholds: Thresholds,
    policy: AlarmPolicy,
    log_mask: u32,
}

/// A validated blob, scored in place: the model lives in flash.
///
/// Build it with [`FlashModel::from_blob`], which checks the blob exactly as
/// [`crate::blob::decode`] does (the same errors, in the same order) without copying its
/// parameters anywhere. After that nothing on it can fail or panic.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct FlashModel<'a, const N: usize> {
    /// The `4 (N(N+1)/2 + 3 N + 2)` bytes of the blob's floats.
    floats: &'a [u8],
    center: [f32; N],
    scalars: Scalars,
}

impl<'a, const N: usize> FlashModel<'a, N> {
    const DIMENSION_OK: () = assert!(N > 0 && N <= MAX_FEATURES, "N must be in 1..=32");

    /// Check `bytes` (exactly one blob, for instance in a flash slot) and keep a view of it.
    pub fn from_blob(bytes: &'a [u8]) -> Result<Self, DecodeError> {
        #[allow(clippy::let_unit_value)]
        let () = Self::DIMENSION_OK;
        let body = blob::read_body::<N>(bytes)?;
        let f = Floats::<N> {
            bytes: body.floats,
            log_mask: body.log_mask,
            policy: body.policy,
        };
        check::<N, _>(&f)?;
        let mut center = [0.0f32; N];
        for (i, c) in center.iter_mut().enumerate() {
            *c = fold_center(f.offset(i), f.mean(i), f.scale(i));
        }
        Ok(Self {
            floats: body.floats,
            center,
            scalars: Scalars {
                meta: body.meta,
                thresholds: f.thresholds(),
                policy: body.policy,
                log_mask: body.log_mask,
            },
        })
    }

    /// `Σ ln Vᵢᵢ − N/2 ln 2π`, from the blob (only [`Self::log_density`] needs it, so boot does not
    /// pay for the `f64` logarithm).
    fn ln_norm(&self) -> f32 {
        let f = Floats::<N> {
            bytes: self.floats,
            log_mask: self.scalars.log_mask,
            policy: self.scalars.policy,
        };
        model::ln_norm(N, (0..N).map(|i| fold_factor(f.w(i, i), f.scale(i))))
    }

    /// Identifier, training time and sequence.
    pub const fn meta(&self) -> ModelMeta {
        self.scalars.meta
    }

    /// Alarm and clear thresholds.
    pub const fn thresholds(&self) -> Thresholds {
        self.scalars.thresholds
    }

    /// Debounce and latch policy.
    pub const fn policy(&self) -> AlarmPolicy {
        self.scalars.policy
    }

    /// The centre `c` of the reading, in its (log-transformed) units.
    pub const fn center(&self) -> &[f32; N] {
        &self.center
    }

    /// Score a reading: the same bits as [`crate::Model::score`] on the same blob.
    #[inline]
    pub fn score(&self, x: &[f32; N]) -> Result<Scored, ReadingFault> {
        model::score(self, x)
    }

    /// Score and split d² per feature: the same bits as [`crate::Model::explain`].
    pub fn explain(&self, x: &[f32; N]) -> Result<Explained<N>, ReadingFault> {
        model::explain(self, x)
    }

    /// The log-density: the same bits as [`crate::Model::log_density`].
    pub fn log_density(&self, x: &[f32; N]) -> Result<f32, ReadingFault> {
        model::log_density(self, self.ln_norm(), x)
    }

    /// Fold the factor into RAM, for speed: a [`CompactModel`] (call with `T = tri(N)`).
    pub fn compact<const T: usize>(&self) -> CompactModel<N, T> {
        #[allow(clippy::let_unit_value)]
        let () = CompactModel::<N, T>::SHAPE_OK;
        let mut v = [0.0f32; T];
        let mut slots = v.iter_mut();
        for i in 0..N {
            // The row first: `zip` stops on it without taking another slot.
            for (f, vij) in self.row(i).take(i + 1).zip(slots.by_ref()) {
                *vij = f;
            }
        }
        CompactModel {
            center: self.center,
            v,
            scalars: self.scalars,
            ln_norm: self.ln_norm(),
        }
    }
}

impl<const N: usize> Folded<N> for FlashModel<'_, N> {
    #[inline(always)]
    fn center(&self) -> &[f32; N] {
        &self.center
    }

    #[inline(always)]
    fn log_mask(&self) -> u32 {
        self.scalars.log_mask
    }

    #[inline(always)]
    fn alarm(&self) -> f32 {
        self.scalars.thresholds.alarm
    }

    #[inline(always)]
    fn row(&self, i: usize) -> impl Iterator<Item = f32> + '_ {
        flash_row::<N>(self.floats, i)
    }
}

/// The folded form alone, in RAM: the centre and `V = W · diag(scale)` packed row by row.
///
/// `T` must be [`tri`]`(N)` (checked at compile time): `CompactModel<8, { tri(8) }>`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CompactModel<const N: usize, const T: usize> {
    center: [f32; N],
    /// `Vᵢⱼ` for `j ≤ i`, row by row.
    v: [f32; T],
    scalars: Scalars,
    /// `Σ ln Vᵢᵢ − N/2 ln 2π`.
    ln_norm: f32,
}

impl<const N: usize, const T: usize> CompactModel<N, T> {
    const SHAPE_OK: () = assert!(
        N > 0 && N <= MAX_FEATURES && T == tri(N),
        "CompactModel<N, T> needs 1 <= N <= 32 and T = tri(N)"
    );

    /// Check a blob as [`crate::blob::decode`] does and fold it into RAM.
    pub fn from_blob(bytes: &[u8]) -> Result<Self, DecodeError> {
        Ok(FlashModel::<N>::from_blob(bytes)?.compact())
    }

    /// Identifier, training time and sequence.
    pub const fn meta(&self) -> ModelMeta {
        self.scalars.meta
    }

    /// Alarm and clear thresholds.
    pub const fn thresholds(&self) -> Thresholds {
        self.scalars.thresholds
    }

    /// Debounce and latch policy.
    pub const fn policy(&self) -> AlarmPolicy {
        self.scalars.policy
    }

    /// The centre `c` of the reading, in its (log-transformed) units.
    pub const fn center(&self) -> &[f32; N] {
        &self.center
    }

    /// Score a reading: the same bits as [`crate::Model::score`] on the same blob.
    #[inline]
    pub fn score(&self, x: &[f32; N]) -> Result<Scored, ReadingFault> {
        model::score(self, x)
    }

    /// Score and split d² per feature: the same bits as [`crate::Model::explain`].
    pub fn explain(&self, x: &[f32; N]) -> Result<Explained<N>, ReadingFault> {
        model::explain(self, x)
    }

    /// The log-density: the same bits as [`crate::Model::log_density`].
    pub fn log_density(&self, x: &[f32; N]) -> Result<f32, ReadingFault> {
        model::log_density(self, self.ln_norm, x)
    }
}

impl<const N: usize, const T: usize> Folded<N> for CompactModel<N, T> {
    #[inline(always)]
    fn center(&self) -> &[f32; N] {
        &self.center
    }

    #[inline(always)]
    fn log_mask(&self) -> u32 {
        self.scalars.log_mask
    }

    #[inline(always)]
    fn alarm(&self) -> f32 {
        self.scalars.thresholds.alarm
    }

    #[inline(always)]
    fn row(&self, i: usize) -> impl Iterator<Item = f32> + '_ {
        self.v
            .get(tri(i)..)
            .and_then(|r| r.first_chunk::<N>())
            .unwrap_or(&[f32::NAN; N])
            .iter()
            .copied()
    }
}

// The RAM figures of the table above, pinned where they matter: on every 32-bit target (the
// firmware's), at compile time.
#[cfg(target_pointer_width = "32")]
const _: () = {
    use core::mem::size_of;
    assert!(size_of::<FlashModel<'static, 5>>() == 72);
    assert!(size_of::<FlashModel<'static, 8>>() == 80);
    assert!(size_of::<FlashModel<'static, 16>>() == 112);
    assert!(size_of::<FlashModel<'static, 32>>() == 176);
    assert!(size_of::<CompactModel<5, { tri(5) }>>() == 128);
    assert!(size_of::<CompactModel<8, { tri(8) }>>() == 224);
    assert!(size_of::<CompactModel<16, { tri(16) }>>() == 656);
    assert!(size_of::<CompactModel<32, { tri(32) }>>() == 2288);
};

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{Model, ModelParams, Preprocess};

    /// The table in the module docs, on a 64-bit host: the same as the 32-bit figures pinned at
    /// compile time, except that the borrowed slice is 16 bytes here instead of 8.
    #[cfg(target_pointer_width = "64")]
    #[test]
    fn sizes_are_as_documented() {
        use core::mem::size_of;
        assert_eq!(size_of::<FlashModel<'static, 5>>(), 72 + 8);
        assert_eq!(size_of::<FlashModel<'static, 8>>(), 80 + 8);
        assert_eq!(size_of::<FlashModel<'static, 32>>(), 176 + 8);
        assert_eq!(size_of::<CompactModel<8, { tri(8) }>>(), 224);
        assert_eq!(size_of::<CompactModel<16, { tri(16) }>>(), 656);
        // The target of the flash-resident form: at most 64 + 8 N bytes for N up to 32, on the
        // 32-bit targets (the size here, less the 8 extra bytes of a 64-bit slice).
        assert!(size_of::<FlashModel<'static, 1>>() - 8 <= 64 + 8);
        assert!(size_of::<FlashModel<'static, 16>>() - 8 <= 64 + 8 * 16);
        assert!(size_of::<FlashModel<'static, 32>>() - 8 <= 64 + 8 * 32);
    }

    /// A blob that is not aligned in memory (a slot at an odd address) scores the same bits.
    #[test]
    fn unaligned_blob_scores_the_same() {
        let p = ModelParams::<3> {
            meta: Default::default(),
            preprocess: Preprocess {
                log_mask: 0b100,
                offset: [1.0, -2.0, 0.5],
                scale: [0.5, 2.0, 3.0],
            },
            mean: [0.1, 0.2, -0.3],
            w: [[1.0, 0.0, 0.0], [0.3, 2.0, 0.0], [-0.7, 0.25, 1.5]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
            policy: Default::default(),
        };
        let mut buf = [0u8; blob::max_len(3) + 1];
        let n = blob::encode(&p, &mut buf[1..]).unwrap();
        let m = Model::new(p).unwrap();
        let f = FlashModel::<3>::from_blob(&buf[1..=n]).unwrap();
        let c = f.compact::<{ tri(3) }>();
        for x in [[3.0, -1.0, 2.0], [1.0, -2.0, 0.6], [0.0, 0.0, -1.0]] {
            let want = m.score(&x);
            assert_eq!(f.score(&x), want);
            assert_eq!(c.score(&x), want);
            assert_eq!(f.explain(&x), m.explain(&x));
            assert_eq!(f.log_density(&x), m.log_density(&x));
        }
        assert_eq!(
            f.score(&[0.0, 0.0, -1.0]),
            Err(ReadingFault::LogDomain { feature: 2 })
        );
    }
}
