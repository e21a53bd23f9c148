"""Benchmark (not a test): `ellipsoid.fit` of a 1 M × 16 float64 array against `numpy.cov`.

    python python/bench/fit_vs_numpy_cov.py [--rows 1000000] [--features 16] [--runs 5]

Prints the median wall time of each over `--runs` runs (after one warm-up run), their ratio, and
the largest relative difference between the fit's float64 covariance (its `--json` summary's) and
numpy's. The array is invented: correlated Gaussian readings around offsets of 10 to 160.
`numpy.cov` computes only the covariance; the fit also reads the rows into its moments, checks
them (outliers, constant and collinear features, f32 resolution), computes lag-1
autocorrelations, the distribution diagnostics on a 10 000-row sample, the threshold and its
simulated confidence figure, and encodes the blob. `Moments.of` is the moments alone, and the fit
of the first 20 000 rows shows the part of the fit's time that does not grow with the rows.
"""

import argparse
import statistics
import time

import numpy as np

import ellipsoid


def median_time(f, runs):
    f()
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        f()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), times


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--features", type=int, default=16)
    ap.add_argument("--runs", type=int, default=5)
    a = ap.parse_args()
    rng = np.random.default_rng(16)
    p = a.features
    mix = rng.normal(size=(p, p)) / np.sqrt(p) + np.eye(p)
    x = rng.normal(size=(a.rows, p)) @ mix.T + 10.0 * np.arange(1, p + 1)
    names = [f"s{i}" for i in range(p)]

    t_cov, cov_runs = median_time(lambda: np.cov(x, rowvar=False), a.runs)
    t_fit, fit_runs = median_time(lambda: ellipsoid.fit(x, features=names, holdout=0.0, trained_at=0), a.runs)
    t_mom, mom_runs = median_time(lambda: ellipsoid.Moments.of(x, features=names), a.runs)
    t_def, def_runs = median_time(lambda: ellipsoid.fit(x, features=names, trained_at=0), a.runs)
    small = np.ascontiguousarray(x[:20_000])
    t_fix, fix_runs = median_time(lambda: ellipsoid.fit(small, features=names, holdout=0.0, trained_at=0), a.runs)

    model = ellipsoid.fit(x, features=names, holdout=0.0, trained_at=0)
    ours = np.array(model.summary_dict()["covariance"]).reshape(p, p)
    ref = np.cov(x, rowvar=False)
    worst = float(np.max(np.abs(ours - ref) / np.abs(ref)))
    diag_worst = float(np.max(np.abs(np.diag(ours) - np.diag(ref)) / np.diag(ref)))
    print(f"{a.rows} rows × {p} features, median of {a.runs} runs (after a warm-up)")
    print(f"numpy.cov                          {t_cov * 1e3:8.1f} ms   runs {[round(t * 1e3, 1) for t in cov_runs]}")
    print(f"ellipsoid.Moments.of               {t_mom * 1e3:8.1f} ms   runs {[round(t * 1e3, 1) for t in mom_runs]}")
    print(f"ellipsoid.fit, holdout=0           {t_fit * 1e3:8.1f} ms   runs {[round(t * 1e3, 1) for t in fit_runs]}")
    print(f"ellipsoid.fit, default 0.2 hold-out{t_def * 1e3:8.1f} ms   runs {[round(t * 1e3, 1) for t in def_runs]}")
    print(f"ellipsoid.fit of 20 000 rows      {t_fix * 1e3:8.1f} ms   runs {[round(t * 1e3, 1) for t in fix_runs]}")
    print(f"ratio fit (holdout=0) / numpy.cov: {t_fit / t_cov:.2f}; Moments.of / numpy.cov: {t_mom / t_cov:.2f}")
    print(f"covariance, largest relative difference to numpy.cov: {worst:.2e} (diagonal {diag_worst:.2e})")


if __name__ == "__main__":
    main()
