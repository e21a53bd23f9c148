//! The reading window: a fixed ring of the last raw readings, and the vector a model bank scores.
//!
//! A [`Window`] keeps the last [`MAX_WINDOW`] raw readings of `N` features (no heap: the ring is
//! always [`MAX_WINDOW`] readings long, whatever the window length), and how many consecutive
//! *good* readings it holds. From them it forms the scored vector `y` of length `M`:
//!
//! * `yᵢ = (x_{t−w+1,i} + … + x_{t,i}) / w` for `i < N`: the mean of the last `w` readings, summed
//!   in plain `f32` from the oldest to the newest, starting from the oldest value itself (not
//!   from `0.0`), then one division by `w as f32`. With `w = 1` this is `x` to the bit (`x / 1.0
//!   = x`), so a window of one changes nothing.
//! * with differences (`M = 2N`), `y_{N+i} = x_{t,i} − x_{t−1,i}`, the first differences of the
//!   raw readings (the dynamic augmentation of Ku, Storer and Georgakis, 1995).
//!
//! A reading is *bad* when it cannot be scored: a value that is NaN or infinite, or zero or
//! negative on a log-transformed feature. A bad reading is its own fault
//! ([`ReadingFault::NotFinite`] / [`ReadingFault::LogDomain`], the same fault, checked in the same
//! order, as [`crate::Model::score`] reports for it) and restarts the window: it is not kept, and
//! the next `need − 1` readings are faults too ([`ReadingFault::WindowFilling`]), where `need` is
//! `w`, or `max(w, 2)` with differences. The device never calls a window normal that it could
//! not fill with good readings.

use crate::model::ReadingFault;

/// The longest reading window.
pub const MAX_WINDOW: usize = 16;

/// How the raw readings become the scored vector.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct WindowSpec {
    /// The number of readings averaged, `1..=MAX_WINDOW`.
    pub length: u8,
    /// Whether the first differences `xₜ − xₜ₋₁` are scored too, as `N` more features.
    pub differences: bool,
}

impl WindowSpec {
    /// No window: each reading scored on its own (`w = 1`, no differences).
    pub const fn single() -> Self {
        Self {
            length: 1,
            differences: false,
        }
    }

    /// Good readings needed before one is scored: `w`, or `max(w, 2)` with differences.
    pub const fn need(&self) -> u8 {
        if self.differences && self.length < 2 {
            2
        } else {
            self.length
        }
    }

    /// The length of the scored vector for `n` raw features: `n`, or `2 n` with differences.
    pub const fn scored_len(&self, n: usize) -> usize {
        if self.differences {
            2 * n
        } else {
            n
        }
    }
}

impl Default for WindowSpec {
    fn default() -> Self {
        Self::single()
    }
}

/// Why a window could not be built.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum WindowError {
    /// The window length is outside `1..=MAX_WINDOW`.
    Length {
        /// The length asked for.
        length: u8,
    },
    /// `M` is not `N` (no differences) or `2 N` (differences), or `N` is 0 or more than 32.
    Shape {
        /// Raw features.
        n: usize,
        /// Scored features asked for.
        m: usize,
        /// Whether differences are on.
        differences: bool,
    },
    /// The log mask has a bit at or beyond `N`.
    LogMask,
}

impl core::fmt::Display for WindowError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            WindowError::Length { length } => {
                write!(f, "window length {length} is outside 1..={MAX_WINDOW}")
            }
            WindowError::Shape { n, m, differences } => {
                let want = if *differences { 2 * n } else { *n };
                let how = if *differences {
                    "with differences"
                } else {
                    "without differences"
                };
                write!(
                    f,
                    "{n} raw features {how} score {want} values, but {m} were asked for"
                )
            }
            WindowError::LogMask => f.write_str("log mask names a feature beyond the raw readings"),
        }
    }
}

impl core::error::Error for WindowError {}

/// The check every window spec gets (the bank's blob rules call it too).
pub(crate) fn check_window(
    n: usize,
    m: usize,
    spec: WindowSpec,
    log_mask: u32,
) -> Result<(), WindowError> {
    let shape = WindowError::Shape {
        n,
        m,
        differences: spec.differences,
    };
    if n == 0 || n > crate::params::MAX_FEATURES || m != spec.scored_len(n) {
        return Err(shape);
    }
    if !(1..=MAX_WINDOW as u8).contains(&spec.length) {
        return Err(WindowError::Length {
            length: spec.length,
        });
    }
    if n < 32 && log_mask >> n != 0 {
        return Err(WindowError::LogMask);
    }
    Ok(())
}

/// Whether a raw reading can be scored, with the fault [`crate::Model::score`] would report for
/// it: the log features in order first (not finite, or not positive), then the first value that
/// is not finite.
#[inline(always)]
pub(crate) fn check_reading<const N: usize>(
    log_mask: u32,
    x: &[f32; N],
) -> Result<(), ReadingFault> {
    if log_mask != 0 {
        for (i, xi) in x.iter().enumerate() {
            if i < 32 && (log_mask >> i) & 1 == 1 {
                if !xi.is_finite() {
                    return Err(ReadingFault::NotFinite { feature: i as u8 });
                }
                if *xi <= 0.0 {
                    return Err(ReadingFault::LogDomain { feature: i as u8 });
                }
            }
        }
    }
    match x.iter().position(|v| !v.is_finite()) {
        Some(i) => Err(ReadingFault::NotFinite { feature: i as u8 }),
        None => Ok(()),
    }
}

/// The ring of the last raw readings. `M` is the scored vector's length (`N`, or `2 N` with
/// differences), checked by [`Window::new`].
#[derive(Clone, Debug, PartialEq)]
pub struct Window<const N: usize, const M: usize> {
    ring: [[f32; N]; MAX_WINDOW],
    /// Where the next reading goes.
    head: u8,
    /// Consecutive good readings held, at most `need` (it stops counting there).
    count: u8,
    spec: WindowSpec,
    log_mask: u32,
}

impl<const N: usize, const M: usize> Window<N, M> {
    /// An empty window. `log_mask` is the model's: a zero or negative reading of a
    /// log-transformed feature is bad.
    pub fn new(spec: WindowSpec, log_mask: u32) -> Result<Self, WindowError> {
        check_window(N, M, spec, log_mask)?;
        Ok(Self {
            ring: [[0.0; N]; MAX_WINDOW],
            head: 0,
            count: 0,
            spec,
            log_mask,
        })
    }

    /// The window's spec.
    pub const fn spec(&self) -> WindowSpec {
        self.spec
    }

    /// Good readings needed before one is scored.
    pub const fn need(&self) -> u8 {
        self.spec.need()
    }

    /// Whether the next good reading is scored (the window holds `need − 1` good readings or
    /// more).
    pub const fn whole(&self) -> bool {
        self.count >= self.spec.need()
    }

    /// Forget every reading held: the next `need` readings fill the window again.
    pub fn restart(&mut self) {
        self.count = 0;
    }

    /// The reading `back` places before the newest (0: the newest).
    #[inline(always)]
    fn back(&self, back: usize) -> &[f32; N] {
        let at = (usize::from(self.head) + MAX_WINDOW - 1 - back) % MAX_WINDOW;
        // `at < MAX_WINDOW` always; the fallback is never taken.
        self.ring.get(at).unwrap_or(&self.ring[0])
    }

    /// Take one raw reading. A bad reading restarts the window and is its fault; while the
    /// window is filling, the fault is [`ReadingFault::WindowFilling`]; otherwise the scored
    /// vector `y`.
    pub fn push(&mut self, x: &[f32; N]) -> Result<[f32; M], ReadingFault> {
        if let Err(fault) = check_reading(self.log_mask, x) {
            self.count = 0;
            return Err(fault);
        }
        if let Some(slot) = self.ring.get_mut(usize::from(self.head)) {
            *slot = *x;
        }
        self.head = ((usize::from(self.head) + 1) % MAX_WINDOW) as u8;
        let need = self.spec.need();
        if self.count < need {
            self.count += 1;
        }
        if self.count < need {
            return Err(ReadingFault::WindowFilling {
                missing: need - self.count,
            });
        }
        Ok(self.vector())
    }

    /// `y` from the ring (the window is whole).
    #[inline(always)]
    fn vector(&self) -> [f32; M] {
        let mut y = [0.0f32; M];
        let w = usize::from(self.spec.length);
        if w == 1 {
            for (yi, xi) in y.iter_mut().zip(self.back(0)) {
                *yi = *xi;
            }
        } else {
            let oldest = self.back(w - 1);
            for (yi, xi) in y.iter_mut().zip(oldest) {
                *yi = *xi;
            }
            for b in (0..w - 1).rev() {
                for (yi, xi) in y.iter_mut().zip(self.back(b)) {
                    *yi += *xi;
                }
            }
            let wf = w as f32;
            for yi in y.iter_mut().take(N) {
                *yi /= wf;
            }
        }
        if self.spec.differences {
            let (now, before) = (self.back(0), self.back(1));
            for ((yi, a), b) in y.iter_mut().skip(N).zip(now).zip(before) {
                *yi = a - b;
            }
        }
        y
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    extern crate std;

    fn spec(length: u8, differences: bool) -> WindowSpec {
        WindowSpec {
            length,
            differences,
        }
    }

    #[test]
    fn a_window_of_one_is_the_reading_to_the_bit() {
        let mut w = Window::<3, 3>::new(WindowSpec::single(), 0).unwrap();
        for x in [[-0.0f32, 1.0e-45, 3.5], [f32::MAX, -f32::MAX, 0.1]] {
            let y = w.push(&x).unwrap();
            assert_eq!(y.map(f32::to_bits), x.map(f32::to_bits));
        }
    }

    #[test]
    fn the_mean_is_summed_oldest_first_and_restarts_on_a_bad_reading() {
        let mut w = Window::<2, 4>::new(spec(3, true), 0b01).unwrap();
        assert_eq!(
            w.push(&[1.0, 10.0]),
            Err(ReadingFault::WindowFilling { missing: 2 })
        );
        assert_eq!(
            w.push(&[2.0, 20.0]),
            Err(ReadingFault::WindowFilling { missing: 1 })
        );
        // (1 + 2 + 4) / 3 and (10 + 20 + 70) / 3, then the differences 4 − 2 and 70 − 20.
        let y = w.push(&[4.0, 70.0]).unwrap();
        assert_eq!(y, [7.0 / 3.0, 100.0 / 3.0, 2.0, 50.0]);
        // A zero on the log feature 0: its fault, and the window restarts.
        assert_eq!(
            w.push(&[0.0, 1.0]),
            Err(ReadingFault::LogDomain { feature: 0 })
        );
        assert_eq!(
            w.push(&[1.0, 1.0]),
            Err(ReadingFault::WindowFilling { missing: 2 })
        );
        // A NaN on the plain feature 1.
        assert_eq!(
            w.push(&[1.0, f32::NAN]),
            Err(ReadingFault::NotFinite { feature: 1 })
        );
        assert!(w.push(&[1.0, 1.0]).is_err());
        assert!(w.push(&[1.0, 1.0]).is_err());
        assert_eq!(w.push(&[1.0, 4.0]).unwrap(), [1.0, 2.0, 0.0, 3.0]);
    }

    /// The order is pinned: oldest first, for the readings (1, 1, 1e8, −1e8) the sum is
    /// `((1 + 1) + 1e8) − 1e8 = 0` in `f32` (1e8 + 2 rounds to 1e8, whose spacing is 8), so the
    /// mean is 0; newest first it would be `((−1e8 + 1e8) + 1) + 1 = 2` (mean 0.5, also the exact
    /// value), and the oldest then the newest `((1 − 1e8) + 1e8) + 1 = 1` (0.25).
    #[test]
    fn the_sum_runs_from_the_oldest_reading() {
        let mut w = Window::<1, 1>::new(spec(4, false), 0).unwrap();
        let four = [1.0f32, 1.0, 1.0e8, -1.0e8];
        for x in &four[..3] {
            assert!(w.push(&[*x]).is_err());
        }
        assert_eq!(w.push(&[four[3]]).unwrap(), [0.0]);
        // The ring wraps: many readings later the same four give the same bits.
        for _ in 0..13 {
            let _ = w.push(&[3.0]);
        }
        for x in &four[..3] {
            let _ = w.push(&[*x]);
        }
        assert_eq!(w.push(&[four[3]]).unwrap(), [0.0]);
    }

    #[test]
    fn differences_with_a_window_of_one_need_two_readings() {
        let mut w = Window::<1, 2>::new(spec(1, true), 0).unwrap();
        assert_eq!(w.need(), 2);
        assert_eq!(
            w.push(&[5.0]),
            Err(ReadingFault::WindowFilling { missing: 1 })
        );
        assert_eq!(w.push(&[7.5]).unwrap(), [7.5, 2.5]);
        assert_eq!(w.push(&[7.0]).unwrap(), [7.0, -0.5]);
    }

    /// The fault of a bad reading is the one `Model::score` reports: the log features in order
    /// first, then the first value that is not finite.
    #[test]
    fn a_bad_reading_gets_the_fault_model_score_gives() {
        use crate::{AlarmPolicy, Model, ModelMeta, ModelParams, Preprocess, Thresholds};
        let m = Model::new(ModelParams::<3> {
            meta: ModelMeta::default(),
            preprocess: Preprocess {
                log_mask: 0b100,
                offset: [0.0; 3],
                scale: [1.0; 3],
            },
            mean: [0.0; 3],
            w: [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]],
            thresholds: Thresholds {
                alarm: 9.0,
                clear: 4.0,
            },
            policy: AlarmPolicy::default(),
        })
        .unwrap();
        let n = f32::NAN;
        let i = f32::INFINITY;
        for x in [
            [n, 1.0, -1.0],
            [n, i, 1.0],
            [1.0, 1.0, n],
            [i, 1.0, 0.0],
            [1.0, -i, 2.0],
        ] {
            let want = m.score(&x).unwrap_err();
            assert_eq!(check_reading(0b100, &x), Err(want), "{x:?}");
        }
    }

    #[test]
    fn shapes_and_lengths_are_checked() {
        assert_eq!(
            Window::<2, 2>::new(spec(2, true), 0),
            Err(WindowError::Shape {
                n: 2,
                m: 2,
                differences: true
            })
        );
        assert_eq!(
            Window::<2, 2>::new(spec(17, false), 0),
            Err(WindowError::Length { length: 17 })
        );
        assert_eq!(
            Window::<2, 2>::new(spec(0, false), 0),
            Err(WindowError::Length { length: 0 })
        );
        assert_eq!(
            Window::<2, 4>::new(spec(2, true), 0b100),
            Err(WindowError::LogMask)
        );
    }

    /// The window mean against an `f64` reference: within the rounding-error bound of a sum of
    /// `w` terms and one division, `|ŷ − y| ≤ (γ_{w−1} (1 + u) + u) Σ|x| / w` with
    /// `γₙ = n u / (1 − n u)`, `u = 2⁻²⁴` (Higham, *Accuracy and Stability of Numerical
    /// Algorithms*, 2nd ed., §3.1 and §4.2; the bound is from memory), for every length and a
    /// ring that has wrapped many times; and the differences are exact `f32` subtractions.
    #[test]
    fn the_window_mean_is_within_the_rounding_bound_of_an_f64_reference() {
        let mut state = 7u64;
        let mut next = || {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            // Values of mixed sign and magnitude, so the sum has cancellation to get wrong.
            let u = ((state >> 40) as f32) / ((1u64 << 24) as f32);
            let e = ((state >> 20) % 12) as i32 - 6;
            (u - 0.3) * 2f32.powi(e)
        };
        let u = f64::from(f32::EPSILON) / 2.0;
        let mut worst = 0.0f64;
        for length in 1..=MAX_WINDOW as u8 {
            let mut w = Window::<3, 6>::new(spec(length, true), 0).unwrap();
            let mut history: std::vec::Vec<[f32; 3]> = std::vec::Vec::new();
            for _ in 0..100 {
                let x = [next(), next(), next()];
                history.push(x);
                let got = w.push(&x);
                if history.len() < usize::from(w.need()) {
                    assert!(got.is_err());
                    continue;
                }
                let y = got.unwrap();
                let l = usize::from(length);
                let last = &history[history.len() - l..];
                for i in 0..3 {
                    let exact: f64 = last.iter().map(|r| f64::from(r[i])).sum::<f64>() / l as f64;
                    let abs: f64 = last.iter().map(|r| f64::from(r[i]).abs()).sum::<f64>();
                    let n = (l - 1) as f64;
                    let gamma = n * u / (1.0 - n * u);
                    let bound = (gamma * (1.0 + u) + u) * abs / l as f64;
                    let err = (f64::from(y[i]) - exact).abs();
                    assert!(err <= bound, "w = {l}: {} against {exact}", y[i]);
                    if bound > 0.0 {
                        worst = worst.max(err / bound);
                    }
                    let k = history.len();
                    assert_eq!(y[3 + i], history[k - 1][i] - history[k - 2][i]);
                }
            }
        }
        // The check had rounding to see.
        assert!(worst > 0.0);
    }
}
