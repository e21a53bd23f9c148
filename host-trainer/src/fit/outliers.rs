//! Gross outliers in the baseline: one absurd cell (`1e30` in a column of pressures) inflates
//! that column's variance so much that the model becomes blind to it, and `fit` would not notice.
//!
//! # The check, and why it stays streaming
//!
//! Each reader thread keeps, per feature, the smallest and the largest value it saw and their
//! lines ([`Extremes`]: two comparisons a value, no second pass). After the pass, the median and
//! the MAD of each feature come from the fit's uniform row sample (at most `SAMPLE_ROWS` rows,
//! all of them for a small file), and the robust z-score of a value is
//! `|x − median| / (1.4826 · MAD)` (1.4826 makes the MAD estimate σ for Gaussian data; this is
//! Iglewicz and Hoaglin's modified z-score, `0.6745 (x − median) / MAD`). The largest robust z of
//! a feature is at its minimum or its maximum, so checking those two finds a gross outlier if
//! there is one. When the MAD is 0 (a quantised column that mostly repeats one value), the
//! first nonzero of the 75th, 90th and 99th percentiles `Q` of the absolute deviations stands in,
//! as `Q / Φ⁻¹((1 + q) / 2)` (the same consistency argument as the MAD's 1.4826, and as robust to
//! a few outliers); when all are 0 the column is almost constant in the sample and is not checked.
//!
//! # The cut-off: [`GROSS_Z`] = 1000
//!
//! Iglewicz and Hoaglin flag `|M| > 3.5` as a possible outlier (common practice): that is for
//! finding unusual readings, and it fires on healthy heavy-tailed data. This check is only for
//! values that cannot be readings at all, and must not fire on a healthy log: the largest robust
//! z of a healthy column grows with the number of rows and the weight of the tail. In 200 000
//! rows drawn by the test `healthy_heavy_tails_stay_below_the_cut` it was 4.8 for a Gaussian, 17
//! for an exponential, 68 for a Student t with 3 degrees of freedom and 390 for a log-normal with
//! σ = 1 (skewness 6). From the Gaussian tail, that log-normal's largest value in 10⁸ rows (three
//! years at 1 Hz) stays below about 900 with probability 0.999. A column as skewed as that is
//! fitted with `--log` (the fit suggests it), which makes it Gaussian. On the other side, one value
//! at 1000 σ in a 500-row baseline multiplies that column's variance by about 1000² / 500 = 2000
//! (its sd by 45), and a sensor code such as `-9999` in a column of 40 ± 2 °C lies at 5000 σ:
//! the model would be blind to the feature. A larger cut-off would let such codes through.

/// Robust z-score above which a baseline value is a gross outlier (see the module docs).
pub const GROSS_Z: f64 = 1000.0;

/// The consistency factor of the MAD for a Gaussian, `1 / Φ⁻¹(3/4)`.
const MAD_TO_SD: f64 = 1.4826;

/// Fallback quantiles `q` of the absolute deviations and `Φ⁻¹((1 + q) / 2)`, for a MAD of 0.
const FALLBACK: [(f64, f64); 3] = [(0.75, 1.1503), (0.90, 1.6449), (0.99, 2.5758)];

/// The smallest and largest value of each feature.
#[derive(Clone, Debug)]
pub(super) struct Extremes {
    pub(super) min: Vec<f64>,
    pub(super) max: Vec<f64>,
}

impl Extremes {
    pub(super) fn new(p: usize) -> Self {
        Self {
            min: vec![f64::INFINITY; p],
            max: vec![f64::NEG_INFINITY; p],
        }
    }

    /// Take in a block of rows (row-major). The values are never NaN (the baseline reader refuses
    /// them), so a plain comparison does: it compiles to one `minpd`/`maxpd` per two values,
    /// where `f64::min` would add NaN handling.
    #[inline]
    pub(super) fn offer_block(&mut self, rows: &[f64]) {
        let p = self.min.len();
        if p == 0 {
            return;
        }
        let (lo, hi) = (&mut self.min[..p], &mut self.max[..p]);
        for r in rows.chunks_exact(p) {
            for k in 0..p {
                let v = r[k];
                lo[k] = if v < lo[k] { v } else { lo[k] };
                hi[k] = if v > hi[k] { v } else { hi[k] };
            }
        }
    }

    /// Take in another range's extremes.
    pub(super) fn merge(&mut self, other: &Extremes) {
        for (a, b) in self.min.iter_mut().zip(&other.min) {
            *a = a.min(*b);
        }
        for (a, b) in self.max.iter_mut().zip(&other.max) {
            *a = a.max(*b);
        }
    }
}

/// Median and robust scale of each feature, from the row sample: values beyond [`GROSS_Z`]
/// robust z are gross outliers.
#[derive(Clone, Debug)]
pub(super) struct Gate {
    pub(super) median: Vec<f64>,
    /// Robust σ of each feature; 0 where the sample is almost constant (not checked).
    pub(super) scale: Vec<f64>,
    /// Rows the median and scale come from.
    pub(super) rows: usize,
}

fn median_of(v: &mut [f64]) -> f64 {
    let n = v.len();
    if n == 0 {
        return f64::NAN;
    }
    let mid = n / 2;
    let (_, m, _) = v.select_nth_unstable_by(mid, f64::total_cmp);
    let m = *m;
    if n % 2 == 1 {
        m
    } else {
        let lower = v[..mid].iter().copied().fold(f64::NEG_INFINITY, f64::max);
        (lower + m) / 2.0
    }
}

impl Gate {
    /// The gate of `rows` (row-major, `p` columns, in the model's space).
    pub(super) fn from_rows(rows: &[f64], p: usize) -> Self {
        let m = rows.len() / p.max(1);
        let mut median = Vec::with_capacity(p);
        let mut scale = Vec::with_capacity(p);
        let mut col = Vec::with_capacity(m);
        for j in 0..p {
            col.clear();
            col.extend(rows.chunks_exact(p).map(|r| r[j]));
            let med = median_of(&mut col);
            for v in col.iter_mut() {
                *v = (*v - med).abs();
            }
            let mad = median_of(&mut col);
            let s = if mad > 0.0 {
                MAD_TO_SD * mad
            } else {
                col.sort_unstable_by(f64::total_cmp);
                FALLBACK
                    .iter()
                    .map(|(q, z)| {
                        let k = ((q * m as f64) as usize).min(m.saturating_sub(1));
                        col.get(k).map_or(0.0, |d| d / z)
                    })
                    .find(|s| *s > 0.0 && s.is_finite())
                    .unwrap_or(0.0)
            };
            median.push(med);
            scale.push(s);
        }
        Gate {
            median,
            scale,
            rows: m,
        }
    }

    /// The robust z-score of `v` in feature `j` (0 for an unchecked feature).
    pub(super) fn z(&self, j: usize, v: f64) -> f64 {
        if self.scale[j] > 0.0 {
            (v - self.median[j]).abs() / self.scale[j]
        } else {
            0.0
        }
    }

    /// The first feature of `row` whose value is a gross outlier.
    #[inline]
    pub(super) fn first_gross(&self, row: &[f64]) -> Option<usize> {
        (0..row.len()).find(|&j| self.z(j, row[j]) > GROSS_Z)
    }

    /// What to say about a gross value `v` of feature `j` (in the model's space; `log`: it is
    /// the logarithm of the cell).
    pub(super) fn detail(&self, j: usize, v: f64, log: bool) -> String {
        format!(
            "lies {} robust standard deviations from the column's median{} {} (the cut-off is \
             {GROSS_Z}; median and MAD of {} sampled rows): a fault of the log, not a reading, and \
             it would leave the model blind to this feature. Fix or remove the row, or pass \
             --skip-bad-rows to skip such rows, or --robust to set them aside (for a healthy but \
             strongly right-skewed positive column, --log)",
            short(self.z(j, v)),
            if log { " (of its logarithm)" } else { "" },
            short(self.median[j]),
            self.rows
        )
    }
}

/// A number for a message: plain when moderate, in exponent form when huge or tiny (so that
/// `1e308` is not printed with 309 digits).
pub(crate) fn short(x: f64) -> String {
    let a = x.abs();
    if x == 0.0 || (1e-4..1e7).contains(&a) || !x.is_finite() {
        format!("{}", (x * 1e4).round() / 1e4)
    } else {
        format!("{x:.4e}")
    }
}

/// Whether a feature's smallest or largest value is a gross outlier. The largest robust z of
/// a feature is at one of them, so this finds one if there is any.
pub(super) fn any_gross(gate: &Gate, ext: &Extremes) -> bool {
    (0..gate.median.len()).any(|j| {
        [ext.min[j], ext.max[j]]
            .iter()
            .any(|&v| v.is_finite() && gate.z(j, v) > GROSS_Z)
    })
}

/// Keep the rows of `rows` (row-major) and `lines` that pass the gate; the file lines of the
/// rows dropped.
pub(super) fn drop_gross(
    gate: &Gate,
    rows: &mut Vec<f64>,
    lines: &mut Vec<u64>,
    p: usize,
) -> Vec<u64> {
    let mut kept = Vec::with_capacity(rows.len());
    let mut kept_lines = Vec::with_capacity(lines.len());
    let mut dropped = Vec::new();
    for (r, &l) in rows.chunks_exact(p).zip(lines.iter()) {
        if gate.first_gross(r).is_some() {
            dropped.push(l);
        } else {
            kept.extend_from_slice(r);
            kept_lines.push(l);
        }
    }
    *rows = kept;
    *lines = kept_lines;
    dropped
}

/// Remove the gross rows from the raw sample (for the diagnostics and the `f32` check), in
/// place; the gate is in the model's space, so log features are compared by their logarithm.
pub(super) fn sample_without_gross(gate: &Gate, sample: &mut Vec<f64>, p: usize, log_mask: u32) {
    if p == 0 {
        return;
    }
    let mut t = vec![0.0; p];
    let mut kept = 0;
    for r in 0..sample.len() / p {
        for (k, d) in t.iter_mut().enumerate() {
            let v = sample[r * p + k];
            *d = if (log_mask >> k) & 1 == 1 { v.ln() } else { v };
        }
        if gate.first_gross(&t).is_none() {
            sample.copy_within(r * p..(r + 1) * p, kept * p);
            kept += 1;
        }
    }
    sample.truncate(kept * p);
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, Exp, LogNormal, Normal, StudentT};

    fn worst_z(values: &[f64]) -> f64 {
        let gate = Gate::from_rows(values, 1);
        let mut ext = Extremes::new(1);
        ext.offer_block(values);
        gate.z(0, ext.min[0]).max(gate.z(0, ext.max[0]))
    }

    /// Healthy heavy-tailed columns stay well below the cut-off (the module docs' figures).
    #[test]
    fn healthy_heavy_tails_stay_below_the_cut() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let n = 200_000;
        let draws: Vec<(&str, Vec<f64>)> = vec![
            (
                "normal",
                (0..n)
                    .map(|_| Normal::new(0.0, 1.0).unwrap().sample(&mut rng))
                    .collect(),
            ),
            (
                "exponential",
                (0..n)
                    .map(|_| Exp::new(1.0).unwrap().sample(&mut rng))
                    .collect(),
            ),
            (
                "t3",
                (0..n)
                    .map(|_| StudentT::new(3.0).unwrap().sample(&mut rng))
                    .collect(),
            ),
            (
                "lognormal",
                (0..n)
                    .map(|_| LogNormal::new(0.0, 1.0).unwrap().sample(&mut rng))
                    .collect(),
            ),
        ];
        for (name, v) in draws {
            let z = worst_z(&v);
            // At least a factor of two below the cut at 200 000 rows.
            assert!(z < GROSS_Z / 2.0, "{name}: worst robust z {z}");
            assert!(
                z > 3.0,
                "{name}: worst robust z {z} (the sample should reach its tail)"
            );
        }
    }

    #[test]
    fn one_absurd_cell_is_found() {
        let mut rng = ChaCha8Rng::seed_from_u64(12);
        let mut v: Vec<f64> = (0..500)
            .map(|_| 3.0 + 0.2 * Normal::new(0.0, 1.0).unwrap().sample(&mut rng))
            .collect();
        let check = |v: &[f64]| {
            let gate = Gate::from_rows(v, 1);
            let mut ext = Extremes::new(1);
            for chunk in v.chunks(128) {
                ext.offer_block(chunk);
            }
            (any_gross(&gate, &ext), gate)
        };
        assert!(!check(&v).0, "a healthy column");
        for bad in [1e30, 1e39, -1e308, 9999.0] {
            v[321] = bad;
            let (gross, gate) = check(&v);
            assert!(gross, "{bad}");
            assert_eq!(gate.first_gross(&[bad]), Some(0));
            assert_eq!(gate.first_gross(&[3.5]), None);
        }
        // A quantised column (MAD 0) with a glitch: a higher percentile of the deviations stands in.
        let mut q = vec![5.0; 1000];
        for x in q.iter_mut().step_by(7) {
            *x = 5.5;
        }
        q[10] = 1e20;
        let gate = Gate::from_rows(&q, 1);
        assert!(gate.z(0, 1e20) > GROSS_Z);
        assert!(gate.z(0, 5.5) < 10.0);
    }

    #[test]
    fn short_numbers() {
        assert_eq!(short(1e308), "1.0000e308");
        assert_eq!(short(3.01), "3.01");
        assert_eq!(short(-2.5e-9), "-2.5000e-9");
    }
}
