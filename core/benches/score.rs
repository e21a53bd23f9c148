//! `score` against a naive baseline that forms the full precision matrix Σ⁻¹ and computes
//! (x − μ)ᵀ Σ⁻¹ (x − μ): N² + N multiply-adds against the core's N(N+1)/2 + 2N.
//!
//! Run with `cargo bench -p ellipsoid-core --bench score`.

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use ellipsoid_core::{AlarmPolicy, Model, ModelMeta, ModelParams, Preprocess, Thresholds};
use std::hint::black_box;

/// A deterministic well-conditioned lower-triangular factor (no RNG crate needed here).
fn factor<const N: usize>() -> [[f32; N]; N] {
    let mut w = [[0.0f32; N]; N];
    let mut state = 0x2545_f491_u32;
    for (i, row) in w.iter_mut().enumerate() {
        for (j, v) in row.iter_mut().enumerate().take(i + 1) {
            state ^= state << 13;
            state ^= state >> 17;
            state ^= state << 5;
            let r = (state as f32 / u32::MAX as f32) - 0.5;
            *v = if i == j { 1.0 + r.abs() } else { 0.3 * r };
        }
    }
    w
}

/// The naive model: P = Wᵀ W, the full precision matrix.
struct Naive<const N: usize> {
    mean: [f32; N],
    precision: [[f32; N]; N],
}

impl<const N: usize> Naive<N> {
    fn new(mean: [f32; N], w: &[[f32; N]; N]) -> Self {
        let mut precision = [[0.0f32; N]; N];
        for (i, prow) in precision.iter_mut().enumerate() {
            for (j, p) in prow.iter_mut().enumerate() {
                *p = (0..N).map(|k| w[k][i] * w[k][j]).sum();
            }
        }
        Self { mean, precision }
    }

    fn d2(&self, x: &[f32; N]) -> f32 {
        let mut d = [0.0f32; N];
        for ((di, xi), mi) in d.iter_mut().zip(x).zip(&self.mean) {
            *di = xi - mi;
        }
        let mut acc = 0.0f32;
        for (prow, di) in self.precision.iter().zip(&d) {
            let mut s = 0.0f32;
            for (p, dj) in prow.iter().zip(&d) {
                s += p * dj;
            }
            acc += di * s;
        }
        acc
    }
}

fn bench_n<const N: usize>(c: &mut Criterion) {
    let w = factor::<N>();
    let mean = core::array::from_fn(|i| i as f32 * 0.1);
    let model = Model::new(ModelParams {
        meta: ModelMeta::default(),
        preprocess: Preprocess::identity(),
        mean,
        w,
        thresholds: Thresholds {
            alarm: 1.0e6,
            clear: 1.0,
        },
        policy: AlarmPolicy::default(),
    })
    .unwrap();
    let naive = Naive::new(mean, &w);
    let x: [f32; N] = core::array::from_fn(|i| (i as f32 * 0.37).sin());
    let ours = model.score(&x).unwrap().d2;
    assert!((ours - naive.d2(&x)).abs() <= 1e-3 * ours.max(1.0));
    let mut g = c.benchmark_group("score");
    g.bench_with_input(BenchmarkId::new("ellipsoid", N), &x, |b, x| {
        b.iter(|| model.score(black_box(x)))
    });
    g.bench_with_input(BenchmarkId::new("naive_precision", N), &x, |b, x| {
        b.iter(|| naive.d2(black_box(x)))
    });
    g.finish();
}

fn benches(c: &mut Criterion) {
    bench_n::<4>(c);
    bench_n::<8>(c);
    bench_n::<16>(c);
    bench_n::<32>(c);
}

criterion_group!(score, benches);
criterion_main!(score);
