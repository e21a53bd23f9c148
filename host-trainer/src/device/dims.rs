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
        $crate::__dim_arms!($n, $N, $body, [1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16 17 18 19 20 21 22 23 24 25 26 27 28 29 30 31 32])
    };
}

/// Run `$body` with `$N` and `$M` bound as `const usize`s equal to `$n` and `$m`, for the pairs a
/// model bank can have: `M = N` or `M = 2 N` (the first differences doubling the scored vector),
/// N from 1 to 32. Evaluates to `Some(body)`, or `None` for any other pair.
///
/// ```
/// let r = ellipsoid_trainer::with_bank_dims!(3usize, 6usize, N, M => { (N, M) });
/// assert_eq!(r, Some((3, 6)));
/// assert_eq!(ellipsoid_trainer::with_bank_dims!(3usize, 5usize, N, M => { N + M }), None);
/// ```
#[macro_export]
macro_rules! with_bank_dims {
    ($n:expr, $m:expr, $N:ident, $M:ident => $body:block) => {
        $crate::__bank_dim_arms!(($n, $m), $N, $M, $body, [1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16 17 18 19 20 21 22 23 24 25 26 27 28 29 30 31 32], [(1 2) (2 4) (3 6) (4 8) (5 10) (6 12) (7 14) (8 16) (9 18) (10 20) (11 22) (12 24) (13 26) (14 28) (15 30) (16 32) (17 34) (18 36) (19 38) (20 40) (21 42) (22 44) (23 46) (24 48) (25 50) (26 52) (27 54) (28 56) (29 58) (30 60) (31 62) (32 64)])
    };
}

/// The arms of [`with_dim!`]: one per listed dimension.
#[doc(hidden)]
#[macro_export]
macro_rules! __dim_arms {
    ($n:expr, $N:ident, $body:block, [$($k:literal)*]) => {
        match $n {
            $(
                $k => {
                    const $N: usize = $k;
                    Some($body)
                }
            )*
            _ => None,
        }
    };
}

/// The arms of [`with_bank_dims!`]: `(k, k)` for each `k` of the first list, `(k, 2k)` for each
/// pair of the second.
#[doc(hidden)]
#[macro_export]
macro_rules! __bank_dim_arms {
    ($nm:expr, $N:ident, $M:ident, $body:block, [$($k:literal)*], [$(($h:literal $d:literal))*]) => {
        match $nm {
            $(
                ($k, $k) => {
                    const $N: usize = $k;
                    const $M: usize = $k;
                    Some($body)
                }
            )*
            $(
                ($h, $d) => {
                    const $N: usize = $h;
                    const $M: usize = $d;
                    Some($body)
                }
            )*
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

use crate::device::track::{bank_view, BankView};

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

/// A blob of either format, decoded by the core.
pub enum Decoded {
    /// Format 1: a single model (f32 or fixed point).
    Model(Box<dyn AnyModel>),
    /// Format 2: a model bank (modes, window, drift), as the core's bank reader sees it.
    Bank(BankView),
}

impl Decoded {
    /// Raw readings per sample.
    pub fn n(&self) -> usize {
        match self {
            Decoded::Model(m) => m.n(),
            Decoded::Bank(b) => b.n,
        }
    }

    /// Identifier, training time, sequence.
    pub fn meta(&self) -> ModelMeta {
        match self {
            Decoded::Model(m) => m.params().meta,
            Decoded::Bank(b) => b.meta,
        }
    }

    /// The single model, for a format 1 blob.
    pub fn model(&self) -> Option<&dyn AnyModel> {
        match self {
            Decoded::Model(m) => Some(m.as_ref()),
            Decoded::Bank(_) => None,
        }
    }
}

/// The most bytes a blob of either format can have: a bank of the most modes with drift at
/// the largest `(N, M)`, or a single model of the largest N.
pub fn max_blob_len() -> usize {
    blob::max_len(MAX_DIM)
        .max(ellipsoid_core::fixed::max_len(MAX_DIM))
        .max(blob::max_bank_len(
            MAX_DIM,
            2 * MAX_DIM,
            ellipsoid_core::bank::MAX_MODES,
            true,
        ))
}

/// Read and decode a blob file of either format, with errors that name the file (and say
/// plainly when the blob's dimension is one the core has no type for).
pub fn read_blob_file(path: &std::path::Path) -> anyhow::Result<(Vec<u8>, Decoded)> {
    use std::io::Read as _;
    // Read no more than the largest blob and one byte: `/dev/zero` or a log named by mistake
    // is refused at once instead of being read whole.
    let limit = max_blob_len();
    let mut bytes = Vec::new();
    std::fs::File::open(path)
        .and_then(|f| f.take(limit as u64 + 1).read_to_end(&mut bytes))
        .map_err(|e| anyhow::anyhow!("cannot read the model blob {}: {e}", path.display()))?;
    anyhow::ensure!(
        bytes.len() <= limit,
        "{}: longer than any model blob ({limit} bytes at most): not a blob",
        path.display()
    );
    let header = blob::Header::parse(&bytes).ok();
    if let Some(h) = &header {
        anyhow::ensure!(
            (1..=MAX_DIM).contains(&usize::from(h.n)),
            "{}: the blob has {} features; models have 1 to {MAX_DIM}",
            path.display(),
            h.n
        );
    }
    let decoded = match header {
        Some(h) if h.version == blob::VERSION_BANK => bank_view(&bytes).map(Decoded::Bank),
        _ => decode_any(&bytes).map(Decoded::Model),
    }
    .map_err(|e| anyhow::anyhow!("{}: not a usable model blob: {e}", path.display()))?;
    Ok((bytes, decoded))
}

/// Read and decode a single-model (format 1) blob file, with errors that name the file. A
/// model bank (format 2) is refused by name: read it with [`read_blob_file`].
pub fn decode_file(path: &std::path::Path) -> anyhow::Result<(Vec<u8>, Box<dyn AnyModel>)> {
    match read_blob_file(path)? {
        (bytes, Decoded::Model(m)) => Ok((bytes, m)),
        (_, Decoded::Bank(b)) => Err(anyhow::anyhow!(
            "{}: a model bank (format 2: {} mode(s), window {}), not a single model",
            path.display(),
            b.modes.len(),
            b.window.length
        )),
    }
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
    fn every_bank_pair_maps_to_its_consts() {
        let mut pairs = 0;
        for n in 0..=40usize {
            for m in 0..=80usize {
                let got = with_bank_dims!(n, m, N, M => { (N, M) });
                let valid = (1..=super::MAX_DIM).contains(&n) && (m == n || m == 2 * n);
                assert_eq!(got, valid.then_some((n, m)), "N = {n}, M = {m}");
                pairs += usize::from(valid);
            }
        }
        assert_eq!(pairs, 32 + 32);
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
