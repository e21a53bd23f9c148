"""NASA shuttle data (UCI Statlog "shuttle", Jason Catlett, University of Sydney) for Ellipsoid.

The data come from Debian's package r-cran-mlbench (mlbench 2.1-3, GPL-2), file
usr/lib/R/site-library/mlbench/data/Shuttle.rda, read with the PyPI package rdata. The package's
help page (`?Shuttle`, "Shuttle Dataset (Statlog version)") says: 58 000 observations, 9 numerical
attributes "with the first one being time", and a class with 7 levels Rad.Flow, Fpv.Close,
Fpv.Open, High, Bypass, Bpv.Close, Bpv.Open; about 80 % of the rows are class 1 (Rad.Flow), the
normal state. Source: Jason Catlett, Basser Department of Computer Science, University of Sydney,
via the UCI repository (Newman, Hettich, Blake and Merz 1998); converted to R by Evgenia Dimitriadou.

Protocol (the usual anomaly-detection use of this set): class High is left out; Rad.Flow is normal
(label 0), the other five classes are anomalies (label 1). The model is fitted on the normal rows of
even position in the file (half of them) and scored on everything else: the normal rows of odd
position and all anomalies.

    python shuttle.py convert RDA WORKDIR      # fit.csv (9 sensors) and score.csv (+ label, class)
    python shuttle.py auc WORKDIR FLOOR NAME... # ROC AUC of each NAME.csv (a replay output), checked
"""

import csv
import json
import os
import sys

import numpy as np

SENSORS = [f"V{i}" for i in range(1, 10)]
NORMAL = "Rad.Flow"
LEFT_OUT = "High"


def convert(rda, work):
    import rdata

    df = rdata.read_rda(rda)["Shuttle"]
    assert len(df) == 58000 and list(df.columns) == SENSORS + ["Class"], (len(df), list(df.columns))
    cls = df["Class"].astype(str).to_numpy()
    x = df[SENSORS].to_numpy(dtype=np.float64)
    normal = np.flatnonzero(cls == NORMAL)
    fit_rows = normal[0::2]
    score_rows = np.sort(np.concatenate([normal[1::2], np.flatnonzero((cls != NORMAL) & (cls != LEFT_OUT))]))
    with open(os.path.join(work, "fit.csv"), "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(SENSORS)
        w.writerows([[repr(float(v)) for v in x[i]] for i in fit_rows])
    with open(os.path.join(work, "score.csv"), "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(SENSORS + ["label", "Class"])
        for i in score_rows:
            w.writerow([repr(float(v)) for v in x[i]] + [0 if cls[i] == NORMAL else 1, cls[i]])
    counts = {c: int((cls == c).sum()) for c in sorted(set(cls))}
    print(f"shuttle: {len(df)} rows, classes {counts}; fitted on {len(fit_rows)} normal rows; "
          f"scored {len(score_rows)} rows ({int((cls[score_rows] != NORMAL).sum())} anomalies)")


def roc_auc(score, label):
    """ROC AUC as the Mann-Whitney statistic: P(anomaly's score > normal's), ties count one half."""
    score = np.asarray(score, dtype=np.float64)
    label = np.asarray(label, dtype=bool)
    order = np.argsort(score, kind="mergesort")
    s = score[order]
    ranks = np.empty(len(s))
    i = 0
    while i < len(s):  # average ranks over ties
        j = i
        while j + 1 < len(s) and s[j + 1] == s[i]:
            j += 1
        ranks[order[i:j + 1]] = (i + j) / 2 + 1
        i = j + 1
    n1, n0 = label.sum(), (~label).sum()
    return (ranks[label].sum() - n1 * (n1 + 1) / 2) / (n1 * n0)


def limits(inspect):
    """Each mode's alarm limit, as `ellipsoid inspect --json` reads it from the blob."""
    if "modes" in inspect:
        return [m["alarm_threshold"] for m in inspect["modes"]]
    return [inspect["alarm_threshold"]]


def auc(work, floor, names):
    with open(os.path.join(work, "score.csv")) as f:
        rows = list(csv.DictReader(f))
    label = np.array([int(r["label"]) for r in rows])
    failed = []
    print(f"| model | modes | ROC AUC | detection at the alarm limit | false alarms at it |")
    print(f"|---|---|---|---|---|")
    for name in names:
        lim = np.array(limits(json.load(open(os.path.join(work, f"{name}-inspect.json")))))
        with open(os.path.join(work, f"{name}.csv")) as f:
            rep = list(csv.DictReader(f))
        assert len(rep) == len(rows), (name, len(rep), len(rows))
        # Every reading here is finite and the models have no window: each must have been scored.
        assert all(r["d2"] not in ("", "NaN") and r["fault"] == "0" for r in rep), name
        d2 = np.array([float(r["d2"]) for r in rep])
        mode = np.array([int(r["mode"]) for r in rep]) if "mode" in rep[0] else np.zeros(len(rep), int)
        # A reading is flagged iff the d2 of its chosen mode exceeds that mode's alarm limit, so
        # the score ranked for the ROC curve is d2 / alarm(mode); with one mode it ranks as d2.
        ratio = d2 / lim[mode]
        a = roc_auc(ratio, label)
        flagged = ratio > 1
        assert (flagged == np.array([r["verdict"] == "above" for r in rep])).all(), name
        print(f"| {name} | {len(lim)} | {a:.4f} | {flagged[label == 1].mean():.3f} | "
              f"{flagged[label == 0].mean():.4f} |")
        if len(lim) == 1:
            # One mode: `ellipsoid evaluate` ranks by d2 too, so its ROC AUC must be this one.
            ev = json.load(open(os.path.join(work, f"{name}-evaluate.json")))["per_reading"]["roc_auc"]
            assert abs(ev - a) < 1e-9, (name, ev, a)
        if not a >= floor:
            failed.append(f"{name}: ROC AUC {a:.4f} below the floor {floor}")
    n1 = int(label.sum())
    print(f"({len(label)} readings scored: {len(label) - n1} normal, {n1} anomalies; floor {floor})")
    if failed:
        sys.exit("shuttle: " + "; ".join(failed))


if __name__ == "__main__":
    cmd = sys.argv[1]
    if cmd == "convert":
        convert(sys.argv[2], sys.argv[3])
    elif cmd == "auc":
        auc(sys.argv[2], float(sys.argv[3]), sys.argv[4:])
    else:
        sys.exit(f"unknown command {cmd}")
