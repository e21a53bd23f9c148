//! The fitted preprocessing and factor as the core sees them: the core's parameters, the `f64`
//! reference d², and the core's model for checking.

use anyhow::Result;
use ellipsoid_core::{
    AlarmPolicy, Model, ModelMeta, ModelParams, Preprocess, Thresholds, MAX_FEATURES,
};

/// What scoring needs of a fit: the preprocessing and the factor.
#[derive(Clone, Copy)]
pub(super) struct Standardise<'a> {
    pub(super) log_mask: u32,
    pub(super) mean: &'a [f64],
    pub(super) sd: &'a [f64],
    pub(super) w: &'a [f64],
}

impl Standardise<'_> {
    pub(super) fn params<const N: usize>(
        &self,
        thresholds: Thresholds,
        policy: AlarmPolicy,
        meta: ModelMeta,
    ) -> ModelParams<N> {
        let p = self.mean.len();
        assert_eq!(N, p, "params::<{N}>() on a model of {p} features");
        let mut pre = Preprocess::<N>::identity();
        pre.log_mask = self.log_mask;
        let mut w = [[0.0f32; N]; N];
        for (i, row) in w.iter_mut().enumerate() {
            pre.offset[i] = self.mean[i] as f32;
            pre.scale[i] = (1.0 / self.sd[i]) as f32;
            for (j, wij) in row.iter_mut().enumerate().take(i + 1) {
                *wij = self.w[i * p + j] as f32;
            }
        }
        ModelParams {
            meta,
            preprocess: pre,
            mean: [0.0; N],
            w,
            thresholds,
            policy,
        }
    }

    pub(super) fn d2_f64(&self, raw: &[f64]) -> f64 {
        let p = self.mean.len();
        let mut u = [0.0f64; MAX_FEATURES];
        for (i, ui) in u.iter_mut().enumerate().take(p) {
            let t = if (self.log_mask >> i) & 1 == 1 {
                if raw[i] > 0.0 {
                    raw[i].ln()
                } else {
                    f64::NAN
                }
            } else {
                raw[i]
            };
            *ui = (t - self.mean[i]) / self.sd[i];
        }
        (0..p)
            .map(|i| {
                let z: f64 = (0..=i).map(|j| self.w[i * p + j] * u[j]).sum();
                z * z
            })
            .sum()
    }

    /// The core's model, with placeholder thresholds (d² does not depend on them).
    pub(super) fn model<const N: usize>(&self) -> Result<Model<N>> {
        let params = self.params::<N>(
            Thresholds {
                alarm: 1.0,
                clear: 0.0,
            },
            AlarmPolicy::default(),
            ModelMeta::default(),
        );
        Model::<N>::new(params)
            .map_err(|e| anyhow::anyhow!("the fitted model is not valid for the core: {e}"))
    }
}
