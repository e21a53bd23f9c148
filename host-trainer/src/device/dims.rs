//! From a dimension known at run time to the core's `const N`.
//!
//! The core's `Model<N>` fixes the number of features at compile time, as a device build does.
//! The trainer learns it from a CSV header, so it picks the matching instantiation here.

/// Run `$body` with `$N` bound as a `const usize` equal to `$n` (1 to 32).
/// Evaluates to `Some(body)`, or `None` when `$n` is outside that range.
///
/// ```
/// let sum = ellipsoid_trainer::with_dim!(3usize, N => { [1u8; N].len() });
/// assert_eq!(sum, Some(3));
/// ```
#[macro_export]
macro_rules! with_dim {
    ($n:expr, $N:ident => $body:block) => {
        match $n {
            1 => {
                const $N: usize = 1;
                Some($body)
            }
            2 => {
                const $N: usize = 2;
                Some($body)
            }
            3 => {
                const $N: usize = 3;
                Some($body)
            }
            4 => {
                const $N: usize = 4;
                Some($body)
            }
            5 => {
                const $N: usize = 5;
                Some($body)
            }
            6 => {
                const $N: usize = 6;
                Some($body)
            }
            7 => {
                const $N: usize = 7;
                Some($body)
            }
            8 => {
                const $N: usize = 8;
                Some($body)
            }
            9 => {
                const $N: usize = 9;
                Some($body)
            }
            10 => {
                const $N: usize = 10;
                Some($body)
            }
            11 => {
                const $N: usize = 11;
                Some($body)
            }
            12 => {
                const $N: usize = 12;
                Some($body)
            }
            13 => {
                const $N: usize = 13;
                Some($body)
            }
            14 => {
                const $N: usize = 14;
                Some($body)
            }
            15 => {
                const $N: usize = 15;
                Some($body)
            }
            16 => {
                const $N: usize = 16;
                Some($body)
            }
            17 => {
                const $N: usize = 17;
                Some($body)
            }
            18 => {
                const $N: usize = 18;
                Some($body)
            }
            19 => {
                const $N: usize = 19;
                Some($body)
            }
            20 => {
                const $N: usize = 20;
                Some($body)
            }
            21 => {
                const $N: usize = 21;
                Some($body)
            }
            22 => {
                const $N: usize = 22;
                Some($body)
            }
            23 => {
                const $N: usize = 23;
                Some($body)
            }
            24 => {
                const $N: usize = 24;
                Some($body)
            }
            25 => {
                const $N: usize = 25;
                Some($body)
            }
            26 => {
                const $N: usize = 26;
                Some($body)
            }
            27 => {
                const $N: usize = 27;
                Some($body)
            }
            28 => {
                const $N: usize = 28;
                Some($body)
            }
            29 => {
                const $N: usize = 29;
                Some($body)
            }
            30 => {
                const $N: usize = 30;
                Some($body)
            }
            31 => {
                const $N: usize = 31;
                Some($body)
            }
            32 => {
                const $N: usize = 32;
                Some($body)
            }
            _ => None,
        }
    };
}

/// The largest dimension [`with_dim!`] handles, the same as the core's limit.
pub const MAX_DIM: usize = ellipsoid_core::MAX_FEATURES;

use ellipsoid_core::{
    blob, AlarmPolicy, DecodeError, FixedModel, Model, ModelMeta, ModelParams, ReadingFault,
    Scored, Thresholds,
};

/// A decoded core model whose dimension is known only at run time.
///
/// Every method calls straight into the core's `Model<N>`: this is a thin dispatch, not a copy of
/// the scoring.
pub trait AnyModel: Send + Sync {
    /// Number of features.
    fn n(&self) -> usize;
    /// [`Model::score`]. `x` must hold `n()` values.
    fn score(&self, x: &[f32]) -> Result<Scored, ReadingFault>;
    /// [`Model::explain`]: the score, the per-feature contributions, and the index of the largest
    /// (the core's [`ellipsoid_core::Explained::top`], as the device reports it).
    fn explain(&self, x: &[f32]) -> Result<(Scored, Vec<f32>, usize), ReadingFault>;
    /// [`Model::log_density`].
    fn log_density(&self, x: &[f32]) -> Result<f32, ReadingFault>;
    /// The parameters, as plain vectors.
    fn params(&self) -> ParamsView;
    /// The size of the decoded `Model<N>` in bytes, as on the device.
    fn ram_bytes(&self) -> usize;
}

/// [`ModelParams`] with the dimension erased.
#[derive(Clone, Debug, PartialEq)]
pub struct ParamsView {
    /// Identifier, training time, sequence.
    pub meta: ModelMeta,
    /// Bit `i`: feature `i` is log-transformed.
    pub log_mask: u32,
    /// Preprocessing offsets.
    pub offset: Vec<f32>,
    /// Preprocessing scales.
    pub scale: Vec<f32>,
    /// Mean in the standardised space.
    pub mean: Vec<f32>,
    /// `W`, row-major `n × n`, lower triangle.
    pub w: Vec<f32>,
    /// Thresholds.
    pub thresholds: Thresholds,
    /// Alarm policy.
    pub policy: AlarmPolicy,
}

impl ParamsView {
    /// The covariance of the (log-transformed) reading in its own units, rebuilt from the blob:
    /// `Σᵤ = (WᵀW)⁻¹` in the standardised space, then `Σ = S⁻¹ Σᵤ S⁻¹` with `S = diag(scale)`.
    pub fn covariance(&self) -> Option<Vec<f64>> {
        let p = self;
        let n = p.mean.len();
        let w = nalgebra::DMatrix::from_fn(n, n, |i, j| f64::from(p.w[i * n + j]));
        let precision = w.transpose() * &w;
        let sigma_u = precision.try_inverse()?;
        Some(
            (0..n * n)
                .map(|k| {
                    let (i, j) = (k / n, k % n);
                    sigma_u[(i, j)] / (f64::from(p.scale[i]) * f64::from(p.scale[j]))
                })
                .collect(),
        )
    }

    /// The mean of the (log-transformed) reading in its own units: `offset + mean / scale`.
    pub fn raw_mean(&self) -> Vec<f64> {
        let p = self;
        p.offset
            .iter()
            .zip(&p.mean)
            .zip(&p.scale)
            .map(|((o, m), s)| f64::from(*o) + f64::from(*m) / f64::from(*s))
            .collect()
    }
}

fn fixed<const N: usize>(x: &[f32]) -> [f32; N] {
    let mut a = [f32::NAN; N];
    for (d, s) in a.iter_mut().zip(x) {
        *d = *s;
    }
    a
}

impl<const N: usize> AnyModel for Model<N> {
    fn n(&self) -> usize {
        N
    }
    fn score(&self, x: &[f32]) -> Result<Scored, ReadingFault> {
        Model::score(self, &fixed::<N>(x))
    }
    fn explain(&self, x: &[f32]) -> Result<(Scored, Vec<f32>, usize), ReadingFault> {
        let e = Model::explain(self, &fixed::<N>(x))?;
        Ok((e.score, e.contributions.to_vec(), e.top().0))
    }
    fn log_density(&self, x: &[f32]) -> Result<f32, ReadingFault> {
        Model::log_density(self, &fixed::<N>(x))
    }
    fn params(&self) -> ParamsView {
        let p: &ModelParams<N> = Model::params(self);
        ParamsView {
            meta: p.meta,
            log_mask: p.preprocess.log_mask,
            offset: p.preprocess.offset.to_vec(),
            scale: p.preprocess.scale.to_vec(),
            mean: p.mean.to_vec(),
            w: p.w.iter().flatten().copied().collect(),
            thresholds: p.thresholds,
            policy: p.policy,
        }
    }
    fn ram_bytes(&self) -> usize {
        core::mem::size_of::<Model<N>>()
    }
}

/// The fixed-point model (header flag bit 1): the same integer code as on a node without an FPU,
/// fed with the documented conversion of each reading (`FixedModel::reading`).
impl<const N: usize, const T: usize> AnyModel for FixedModel<N, T> {
    fn n(&self) -> usize {
        N
    }
    fn score(&self, x: &[f32]) -> Result<Scored, ReadingFault> {
        FixedModel::score_f32(self, &fixed::<N>(x))
    }
    fn explain(&self, x: &[f32]) -> Result<(Scored, Vec<f32>, usize), ReadingFault> {
        let r = self.reading(&fixed::<N>(x))?;
        let e = FixedModel::explain(self, &r)?;
        Ok((e.score, e.contributions.to_vec(), e.top().0))
    }
    fn log_density(&self, x: &[f32]) -> Result<f32, ReadingFault> {
        // The density of the dequantised model (the view below), from the integer d².
        let s = FixedModel::score_f32(self, &fixed::<N>(x))?;
        let v = AnyModel::params(self);
        let mut ln = -0.5 * N as f64 * 1.837_877_066_409_345_5;
        for i in 0..N {
            ln += f64::from(v.w[i * N + i]).ln();
        }
        Ok(ln as f32 - 0.5 * s.d2)
    }
    /// The quantised model as `f32` parameters: offset = `cⱼ · 2^−kⱼ`, scale 1, mean 0 and
    /// `W = q · 2^(kⱼ − E)` (the folded factor in reading units).
    fn params(&self) -> ParamsView {
        let p = FixedModel::params(self);
        let mut w = vec![0.0f32; N * N];
        let mut k = 0;
        for i in 0..N {
            for j in 0..=i {
                let e = i32::from(p.shift[j]) - i32::from(p.exponent);
                w[i * N + j] = (f64::from(p.q[k]) * 2f64.powi(e)) as f32;
                k += 1;
            }
        }
        ParamsView {
            meta: p.meta,
            log_mask: 0,
            offset: (0..N)
                .map(|j| (f64::from(p.center[j]) * 2f64.powi(-i32::from(p.shift[j]))) as f32)
                .collect(),
            scale: vec![1.0; N],
            mean: vec![0.0; N],
            w,
            thresholds: p.thresholds.get(),
            policy: p.policy,
        }
    }
    fn ram_bytes(&self) -> usize {
        core::mem::size_of::<FixedModel<N, T>>()
    }
}

/// Read and decode a blob file, with errors that name the file (and say plainly when the blob's
/// dimension is one no `Model<N>` exists for).
pub fn decode_file(path: &std::path::Path) -> anyhow::Result<(Vec<u8>, Box<dyn AnyModel>)> {
    use std::io::Read as _;
    // Read no more than the largest blob and one byte: `/dev/zero` or a log named by mistake
    // is refused at once instead of being read whole.
    let limit = blob::max_len(MAX_DIM).max(ellipsoid_core::fixed::max_len(MAX_DIM));
    let mut bytes = Vec::new();
    std::fs::File::open(path)
        .and_then(|f| f.take(limit as u64 + 1).read_to_end(&mut bytes))
        .map_err(|e| anyhow::anyhow!("cannot read the model blob {}: {e}", path.display()))?;
    anyhow::ensure!(
        bytes.len() <= limit,
        "{}: longer than any model blob ({limit} bytes at most): not a blob",
        path.display()
    );
    if let Ok(h) = blob::Header::parse(&bytes) {
        anyhow::ensure!(
            (1..=MAX_DIM).contains(&usize::from(h.n)),
            "{}: the blob has {} features; models have 1 to {MAX_DIM}",
            path.display(),
            h.n
        );
    }
    let model = decode_any(&bytes)
        .map_err(|e| anyhow::anyhow!("{}: not a usable model blob: {e}", path.display()))?;
    Ok((bytes, model))
}

/// Decode a blob of any supported dimension through the core's decoder.
pub fn decode_any(bytes: &[u8]) -> Result<Box<dyn AnyModel>, DecodeError> {
    let header = blob::Header::parse(bytes)?;
    let n = usize::from(header.n);
    let fixed_point = header.flags & blob::FLAG_FIXED != 0;
    with_dim!(n, N => {
        if fixed_point {
            FixedModel::<N, { ellipsoid_core::tri(N) }>::from_blob(bytes)
                .map(|m| Box::new(m) as Box<dyn AnyModel>)
        } else {
            Model::<N>::from_blob(bytes).map(|m| Box::new(m) as Box<dyn AnyModel>)
        }
    })
    // A dimension outside 1..=32 has no `Model<N>`; report it with the largest one supported.
    .unwrap_or(Err(DecodeError::Dimension {
        found: header.n,
        expected: MAX_DIM as u8,
    }))
}

#[cfg(test)]
mod tests {
    #[test]
    fn every_dimension_maps_to_its_const() {
        for n in 1..=super::MAX_DIM {
            assert_eq!(with_dim!(n, N => { N }), Some(n));
        }
        assert_eq!(with_dim!(0usize, N => { N }), None);
        assert_eq!(with_dim!(33usize, N => { N }), None);
    }

    #[test]
    fn decode_any_dispatches_to_the_core() {
        use ellipsoid_core::{Preprocess, Verdict};
        let params = super::ModelParams::<3> {
            meta: Default::default(),
            preprocess: Preprocess::identity(),
            mean: [0.0; 3],
            w: [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]],
            thresholds: super::Thresholds {
                alarm: 4.0,
                clear: 1.0,
            },
            policy: Default::default(),
        };
        let mut buf = [0u8; super::blob::max_len(3)];
        let len = super::blob::encode(&params, &mut buf).unwrap();
        let m = super::decode_any(&buf[..len]).unwrap();
        assert_eq!(m.n(), 3);
        let s = m.score(&[1.0, 1.0, 1.0]).unwrap();
        assert_eq!(s.d2, 3.0);
        assert_eq!(s.verdict, Verdict::Below);
        assert!(m.score(&[1.0, f32::NAN, 1.0]).is_err());
        assert!(super::decode_any(&buf[..len - 1]).is_err());
    }
}
