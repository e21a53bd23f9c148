//! The threshold candidates of a fit and what each promises: the finite-sample limit (Phase II
//! Hotelling for a plain fit, simulated refits for shrinkage and robust fits), the confidence
//! limit, the chi-square, empirical and F1 values, the expected and the 90 %-confidence false
//! readings a day, and the baseline length the promise needs.

use anyhow::Result;
use serde::Serialize;

use crate::fit::{refit_rows, Fitted, Shrinkage};
use crate::stats::autocorr::effective_sizes;
use crate::stats::limit::{hotelling_tail, hotelling_ucl, Sizes};
use crate::stats::promise::{
    rows_needed, LengthNeed, Spread, PLAIN_SIMS, ROBUST_SIMS, SHRINK_SIMS, SIM_SEED,
};
pub use crate::stats::threshold::duration_words;
use crate::stats::threshold::{self, Candidates, SECONDS_PER_DAY};

/// The expected and the confidence-level rate at a threshold.
pub type RatesAt = Box<dyn Fn(f64) -> (f64, f64)>;

/// The factors the baseline-length check reports, the first of which it warns about.
pub const LENGTH_FACTORS: [f64; 2] = [2.0, 1.25];

/// Settings of the limits.
#[derive(Clone, Debug)]
pub struct LimitSpec {
    /// Confidence of the per-baseline figure and of the confidence limit (0.9).
    pub confidence: f64,
    /// Simulated baselines (default by estimator: [`PLAIN_SIMS`], [`SHRINK_SIMS`], [`ROBUST_SIMS`]).
    pub sims: Option<usize>,
    /// Seed of the simulations.
    pub seed: u64,
    /// Treat the rows as independent: no effective-size correction for time correlation.
    pub independent_rows: bool,
}

impl Default for LimitSpec {
    fn default() -> Self {
        LimitSpec {
            confidence: crate::stats::promise::DEFAULT_CONFIDENCE,
            sims: None,
            seed: SIM_SEED,
            independent_rows: false,
        }
    }
}

/// How the finite-sample limit was worked out, for the reports.
#[derive(Clone, Debug, Serialize)]
pub struct Simulation {
    /// `"phase-ii-hotelling"` (closed form, with a simulation only for the per-baseline figure)
    /// or `"simulated-refits"`.
    pub kind: &'static str,
    /// The estimator refitted (for simulated refits).
    pub estimator: String,
    /// Simulated baselines.
    pub baselines: usize,
    /// Rows in each simulated baseline.
    pub rows_each: u64,
    /// Seed.
    pub seed: u64,
    /// Relative Monte-Carlo standard error of the expected rate at the limit.
    pub relative_standard_error: f64,
}

/// What the chosen threshold promises.
#[derive(Clone, Debug, Serialize)]
pub struct Promise {
    /// Rows fitted (after the hold-out).
    pub m: u64,
    /// The effective sizes used (see [`crate::stats::autocorr`]).
    pub sizes: Sizes,
    /// Lag-1 autocorrelation of each feature.
    pub lag1: Vec<f64>,
    /// Whether the effective sizes were used (`false` with `--independent-rows`).
    pub time_correlation_used: bool,
    /// How the rates were worked out; `None` when the baseline leaves no degrees of freedom.
    pub simulation: Option<Simulation>,
    /// Confidence of the "at most" figure.
    pub confidence: f64,
    /// Expected (over baselines) share of healthy readings above the chosen threshold.
    pub expected_per_reading: f64,
    /// The same, a day at the reading rate.
    pub expected_per_day: f64,
    /// The share that this baseline's model stays at or below with the stated confidence.
    pub at_most_per_reading: f64,
    /// The same, a day.
    pub at_most_per_day: f64,
    /// Per candidate: name, value, expected a day, at most a day.
    pub candidates: Vec<(String, f64, f64, f64)>,
    /// The baseline length needed for the promise to hold within 2× and 1.25×.
    pub lengths: Vec<LengthNeed>,
    /// The hold-out share, to turn fitted rows into rows logged.
    pub holdout: f64,
}

impl Promise {
    /// Rows to log (fitted rows with the hold-out added back) for `need`.
    pub fn rows_logged(&self, need: &LengthNeed) -> f64 {
        (need.rows_fitted / (1.0 - self.holdout)).ceil()
    }
}

/// The rates of every threshold, from closed forms or simulated baselines.
enum Rates {
    /// Plain fit: the F distribution for the mean, simulated standard baselines for the spread.
    Plain(Sizes, Spread),
    /// Shrinkage or robust: everything from simulated refits.
    Refits(Spread),
    /// No degrees of freedom.
    None,
}

impl Rates {
    fn expected(&self, t: f64) -> f64 {
        match self {
            Rates::Plain(s, _) => hotelling_tail(s, t),
            Rates::Refits(sp) => sp.mean_rate(t).0,
            Rates::None => f64::NAN,
        }
    }

    fn at_most(&self, t: f64, level: f64) -> f64 {
        match self {
            Rates::Plain(_, sp) | Rates::Refits(sp) => sp.quantile_rate(t, level),
            Rates::None => f64::NAN,
        }
    }
}

/// The finite-sample limits of a baseline, without the file: features `p`, `m` rows fitted with
/// per-feature lag-1 autocorrelations `lag1` (empty: independent), the correlation `corr` that
/// simulated baselines are drawn from (see [`candidates`]), and the estimator. The plain fit's limit is the closed form; shrinkage and robust fits are refitted.
pub struct FiniteLimits {
    /// The effective sizes.
    pub sizes: Sizes,
    /// The expected-rate limit ([`crate::stats::threshold::Method::Hotelling`]).
    pub hotelling: Option<f64>,
    /// The confidence limit.
    pub confidence: Option<f64>,
    /// Why there is none.
    pub problem: Option<String>,
    /// How it was worked out.
    pub simulation: Option<Simulation>,
    rates: Rates,
    level: f64,
}

impl FiniteLimits {
    /// Expected rate (over baselines) at `t`.
    pub fn expected(&self, t: f64) -> f64 {
        self.rates.expected(t)
    }

    /// The rate this baseline stays at or below with the confidence level, at `t`.
    pub fn at_most(&self, t: f64) -> f64 {
        self.rates.at_most(t, self.level)
    }
}

/// See [`FiniteLimits`].
#[allow(clippy::too_many_arguments)]
pub fn finite_limits(
    p: usize,
    m: u64,
    lag1: &[f64],
    corr: &[f64],
    robust: bool,
    shrinkage: Shrinkage,
    alpha: f64,
    spec: &LimitSpec,
) -> Result<FiniteLimits> {
    anyhow::ensure!(
        spec.confidence > 0.5 && spec.confidence < 1.0,
        "--confidence must lie strictly between 0.5 and 1, not {}",
        spec.confidence
    );
    let lag1 = if spec.independent_rows { &[][..] } else { lag1 };
    let sizes = effective_sizes(p, m as f64, lag1);
    let plain = !robust && shrinkage == Shrinkage::None;
    let level = spec.confidence;
    let mut problem = None;
    let (rates, simulation) = if !sizes.usable() {
        problem = Some(format!(
            "the baseline is too short for a finite-sample limit: {m} rows fitted carry about {:.0} \
             independent rows' worth for the covariance (time correlation, see the lag-1 autocorrelations), \
             and {p} features need more than {p}; log a longer baseline or fit fewer features",
            sizes.m_cov()
        ));
        (Rates::None, None)
    } else if plain {
        let sims = spec.sims.unwrap_or(PLAIN_SIMS);
        let sp = Spread::plain(&sizes, sims, spec.seed, alpha);
        let sim = Simulation {
            kind: "phase-ii-hotelling",
            estimator: "sample covariance".into(),
            baselines: sims,
            rows_each: sizes.m_cov().round() as u64,
            seed: spec.seed,
            relative_standard_error: 0.0,
        };
        (Rates::Plain(sizes, sp), Some(sim))
    } else {
        let sims = spec
            .sims
            .unwrap_or(if robust { ROBUST_SIMS } else { SHRINK_SIMS });
        let mut refit = |x: &[f64], n: usize| refit_rows(x, n, p, robust, shrinkage);
        let sp = Spread::refits(corr, &sizes, sims, spec.seed, alpha, &mut refit)?;
        let estimator = match (robust, shrinkage) {
            (true, Shrinkage::None) => "FAST-MCD".to_string(),
            (true, s) => format!("FAST-MCD then {}", shrink_name(s)),
            (false, s) => shrink_name(s),
        };
        let sim = Simulation {
            kind: "simulated-refits",
            estimator,
            baselines: sims,
            rows_each: sizes.m_cov().round().max(p as f64 + 2.0) as u64,
            seed: spec.seed,
            relative_standard_error: sp.rel_se,
        };
        (Rates::Refits(sp), Some(sim))
    };
    let (hotelling, confidence) = match &rates {
        Rates::Plain(s, sp) => (
            hotelling_ucl(s, alpha),
            Some(sp.solve_quantile(alpha, level)),
        ),
        Rates::Refits(sp) => (
            Some(sp.solve_mean(alpha)),
            Some(sp.solve_quantile(alpha, level)),
        ),
        Rates::None => (None, None),
    };
    Ok(FiniteLimits {
        sizes,
        hotelling,
        confidence,
        problem,
        simulation,
        rates,
        level,
    })
}

/// Work out the candidates and the rates. `f1` is the F1 candidate, if any.
#[allow(clippy::too_many_arguments)]
pub fn candidates(
    fitted: &Fitted,
    alpha: f64,
    rate_hz: f64,
    holdout: f64,
    robust: bool,
    shrinkage: Shrinkage,
    f1: Option<(f64, f64)>,
    spec: &LimitSpec,
) -> Result<(Candidates, Promise, RatesAt)> {
    let p = fitted.dim();
    let m = fitted.rows_used;
    // The simulated baselines of a shrinkage fit are drawn from the plain sample correlation:
    // drawn from the shrunk one, whose structure is already pulled towards the identity, the
    // refits were measured to under-state what shrinkage does to real data (a Ledoit–Wolf limit
    // gave 0.69× its target rate at p = 4, m = 30, against 0.91× this way;
    // tests/threshold_calibration.rs). A robust fit draws from its own robust estimate.
    let truth = if shrinkage == Shrinkage::None || fitted.sample_corr.iter().any(|v| !v.is_finite())
    {
        &fitted.corr
    } else {
        &fitted.sample_corr
    };
    // The limits and the two baseline-length searches are independent simulations with their own
    // seeds: run them side by side (the same numbers as one after the other, in about half the
    // wall time on two cores).
    let lag1 = if spec.independent_rows {
        &[][..]
    } else {
        &fitted.lag1[..]
    };
    let length_sizes = effective_sizes(p, m as f64, lag1);
    let (fl, lengths) = std::thread::scope(|scope| {
        let lengths = scope.spawn(|| {
            if !length_sizes.usable() {
                return Vec::new();
            }
            LENGTH_FACTORS
                .iter()
                .map(|&within| {
                    let rows = rows_needed(&length_sizes, alpha, within, spec.confidence)
                        .unwrap_or(f64::INFINITY);
                    LengthNeed {
                        within,
                        rows_fitted: rows,
                        met: m as f64 >= rows,
                    }
                })
                .collect::<Vec<_>>()
        });
        let fl = finite_limits(p, m, &fitted.lag1, truth, robust, shrinkage, alpha, spec);
        (
            fl,
            lengths.join().expect("the baseline-length search panicked"),
        )
    });
    let fl = fl?;
    let FiniteLimits {
        sizes,
        hotelling,
        confidence,
        problem,
        simulation,
        rates,
        level,
    } = fl;
    let c = Candidates {
        alpha,
        hotelling,
        confidence,
        confidence_level: level,
        hotelling_problem: problem,
        chi_square: threshold::chi_square(p, alpha),
        empirical: threshold::empirical(&fitted.holdout_d2, alpha),
        f1,
        rate_hz,
    };
    let day = SECONDS_PER_DAY * rate_hz;
    let mut named = vec![];
    if let Some(v) = c.hotelling {
        named.push(("hotelling".to_string(), v));
    }
    if let Some(v) = c.confidence {
        named.push(("confidence".to_string(), v));
    }
    named.push(("chi-square".to_string(), c.chi_square));
    if let Some(v) = c.empirical.and_then(|e| e.value) {
        named.push(("empirical".to_string(), v));
    }
    if let Some((v, _)) = c.f1 {
        named.push(("f1".to_string(), v));
    }
    let rows = named
        .into_iter()
        .map(|(n, v)| {
            let e = rates.expected(v) * day;
            let a = rates.at_most(v, level) * day;
            (n, v, e, a)
        })
        .collect();
    let promise = Promise {
        m,
        sizes,
        lag1: fitted.lag1.clone(),
        time_correlation_used: !spec.independent_rows,
        simulation,
        confidence: level,
        expected_per_reading: f64::NAN,
        expected_per_day: f64::NAN,
        at_most_per_reading: f64::NAN,
        at_most_per_day: f64::NAN,
        candidates: rows,
        lengths,
        holdout,
    };
    let at = move |t: f64| (rates.expected(t), rates.at_most(t, level));
    Ok((c, promise, Box::new(at)))
}

fn shrink_name(s: Shrinkage) -> String {
    match s {
        Shrinkage::None => "sample covariance".into(),
        Shrinkage::LedoitWolf => "Ledoit-Wolf".into(),
        Shrinkage::Diagonal(l) => format!("diagonal loading {l}"),
    }
}

/// Fill in the figures of the chosen threshold `t`.
pub fn settle(promise: &mut Promise, at: &dyn Fn(f64) -> (f64, f64), t: f64, rate_hz: f64) {
    let (e, a) = at(t);
    let day = SECONDS_PER_DAY * rate_hz;
    promise.expected_per_reading = e;
    promise.expected_per_day = e * day;
    promise.at_most_per_reading = a;
    promise.at_most_per_day = a * day;
}
