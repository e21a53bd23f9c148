"""Reference Gaussian mixtures on Fisher's iris data (Fisher 1936), made once with scikit-learn.

Writes iris_gmm.json beside this file; the Rust test host-trainer/tests/mixture_reference.rs reads it
and compares `ellipsoid_trainer::fit::mixture` with it. CI does not run this script (it needs
scikit-learn); it is committed so that anyone can make the JSON again:

    python3 -m venv target/reference-venv
    target/reference-venv/bin/pip install scikit-learn==1.7.2 numpy==2.3.4
    target/reference-venv/bin/python tests/reference/gmm/make_reference.py

The data are scikit-learn's own copy (`sklearn.datasets.load_iris`, which follows Fisher's published
values), written into the JSON so that the Rust test uses exactly these 150 rows.

For each K = 1..4 the mixture is fitted from STARTS separate seeds (one k-means++ start each, tight
tolerance, many iterations), so that the JSON records every distinct optimum EM reaches, how often,
and the best (the one with the highest log-likelihood): the test compares against the best and
knows whether the optimum is unique or EM has several local optima at that K.
"""

import json
import os
import platform
import sys

import numpy as np
import sklearn
from sklearn.datasets import load_iris
from sklearn.mixture import GaussianMixture

STARTS = 200
CALL = dict(covariance_type="full", tol=1e-12, max_iter=20000, reg_covar=1e-6, n_init=1,
            init_params="k-means++")


def fit(x, k, seed):
    gm = GaussianMixture(n_components=k, random_state=seed, **CALL).fit(x)
    total = float(gm.score(x) * len(x))  # score() is the mean log-likelihood per row
    return gm, total


def main():
    x = load_iris().data.astype(np.float64)
    assert x.shape == (150, 4), x.shape
    n = len(x)
    out = {
        "source": "Fisher (1936), The use of multiple measurements in taxonomic problems; "
                  "the copy shipped by scikit-learn as sklearn.datasets.load_iris",
        "made_by": "tests/reference/gmm/make_reference.py",
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scikit_learn": sklearn.__version__,
        "call": "GaussianMixture(n_components=K, random_state=seed, "
                + ", ".join(f"{k}={v!r}" for k, v in CALL.items())
                + f").fit(X) for seed in 0..{STARTS}; best = highest score(X)",
        "log_likelihood": "total over the 150 rows: score(X) * 150",
        "bic": "GaussianMixture.bic(X) = -2 * log_likelihood + p * ln(150), "
               "p = K*(d + d*(d+1)/2) + K - 1",
        "reg_covar": CALL["reg_covar"],
        "starts": STARTS,
        "data": x.tolist(),
        "fits": [],
    }
    best_bic = None
    for k in range(1, 5):
        runs = [fit(x, k, seed) for seed in range(STARTS)]
        lls = np.array([t for _, t in runs])
        best_i = int(np.argmax(lls))
        gm, total = runs[best_i]
        assert all(g.converged_ for g, _ in runs)
        # Distinct optima: log-likelihoods rounded to 1e-6 (EM at tol 1e-12 reaches them to ~1e-9).
        optima = {}
        for g, t in runs:
            key = round(float(t), 6)
            floor = min(float(np.linalg.eigvalsh(c).min()) for c in g.covariances_)
            seen = optima.setdefault(key, {"starts": 0, "smallest_eigenvalue": floor})
            seen["starts"] += 1
        order = np.argsort(-gm.weights_)  # heaviest first, only for reading the JSON
        bic = float(gm.bic(x))
        assert abs(bic - (-2 * total + gm._n_parameters() * np.log(n))) < 1e-8
        entry = {
            "k": k,
            "best_seed": best_i,
            "weights": gm.weights_[order].tolist(),
            "means": gm.means_[order].tolist(),
            "covariances": [c.ravel().tolist() for c in gm.covariances_[order]],
            "log_likelihood": total,
            "n_parameters": int(gm._n_parameters()),
            "bic": bic,
            "smallest_eigenvalue": min(float(np.linalg.eigvalsh(c).min()) for c in gm.covariances_),
            "optima": [dict(log_likelihood=t, **v) for t, v in sorted(optima.items(), key=lambda kv: -kv[0])],
        }
        out["fits"].append(entry)
        if best_bic is None or bic < best_bic[1]:
            best_bic = (k, bic)
        print(f"K={k}: best log L {total:.6f}, BIC {bic:.6f}, optima (log L: starts) "
              + ", ".join(f"{t:.4f}: {v['starts']} (smallest eigenvalue {v['smallest_eigenvalue']:.2g})"
                           for t, v in sorted(optima.items(), key=lambda kv: -kv[0])[:6]),
              file=sys.stderr)
    out["chosen_k"] = best_bic[0]
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "iris_gmm.json")
    with open(path, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")
    print(f"chosen K (lowest BIC): {best_bic[0]}; wrote {path}", file=sys.stderr)


if __name__ == "__main__":
    main()
