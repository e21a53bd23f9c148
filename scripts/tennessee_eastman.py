"""Tennessee Eastman benchmark (Downs and Vogel 1993) for Ellipsoid: data conversion and table.

The data are the classic files shipped by the PyPI package bibmon 1.2.0 (Apache-2.0):
d00.dat is normal operation stored transposed (52 x 500); dNN_te.dat are 960 x 52 with the fault
introduced at row 160; 3-minute samples; columns are XMEAS(1-41) then XMV(1-11).

Variables (32, the model's limit): XMEAS(1-22), the continuous process measurements sampled every
3 minutes, and XMV(1-11) except XMV(9). XMEAS(23-41) are analyser outputs sampled every 6 or 15
minutes and held between samples (piecewise constant), which a Gaussian of 3-minute readings
describes badly. XMV(9) is the stripper steam valve, the actuator of the flow loop whose
measurement XMEAS(19) is kept, so it repeats that information.

    python tennessee_eastman.py convert WORKDIR   # CSV files for ellipsoid
    python tennessee_eastman.py table WORKDIR     # the Markdown table from the evaluate JSON
"""

import importlib.metadata
import json
import os
import sys

import numpy as np

FAULT_AT = 160
KEEP = list(range(22)) + [41 + k for k in range(11) if k != 8]  # 0-based columns
NAMES = [f"xmeas_{i + 1}" for i in range(22)] + [f"xmv_{k + 1}" for k in range(11) if k != 8]
FILES = ["d00_te"] + [f"d{n:02d}_te" for n in range(1, 22)]

# Recalled, not read (shared/reference-values.md): missed-detection rates of PCA T^2, faults 1..21,
# Russell, Chiang and Braatz (2000), Chemometrics and Intelligent Laboratory Systems 51: 81-93.
PUBLISHED_T2_MISSED = [.008, .020, .998, .956, .775, .011, .085, .034, .994, .666, .794, .029,
                       .060, .158, .988, .834, .259, .113, .996, .701, .736]


def data_file(name):
    return importlib.metadata.distribution("bibmon").locate_file(f"bibmon/tennessee_eastman/{name}.dat")


def write_csv(path, rows, labels=None):
    with open(path, "w") as f:
        f.write(",".join(NAMES + (["label"] if labels is not None else [])) + "\n")
        for i, r in enumerate(rows):
            cells = [repr(float(v)) for v in r[KEEP]]
            if labels is not None:
                cells.append(str(labels[i]))
            f.write(",".join(cells) + "\n")


def convert(work):
    d00 = np.loadtxt(data_file("d00"))
    assert d00.shape == (52, 500), d00.shape
    write_csv(os.path.join(work, "d00.csv"), d00.T)
    for name in FILES:
        x = np.loadtxt(data_file(name))
        assert x.shape == (960, 52), (name, x.shape)
        normal = name == "d00_te"
        labels = [0 if (normal or i < FAULT_AT) else 1 for i in range(len(x))]
        write_csv(os.path.join(work, f"{name}.csv"), x, labels)


def rate(ev, key):
    """Per-reading share above the threshold: among anomalies (recall) or among normals."""
    c = ev["per_reading"]["confusion"]
    if key == "detect":
        return c["tp"] / max(c["tp"] + c["fn_"], 1)
    return c["fp"] / max(c["fp"] + c["tn"], 1)


def table(work, methods):
    out = []
    heads = " | ".join(f"{m}: detection" for m in methods)
    out.append(f"| data | {heads} | published PCA T² detection (recalled) |")
    out.append("|---|" + "---|" * len(methods) + "---|")
    ev = {m: {n: json.load(open(os.path.join(work, f"{m}-{n}.json"))) for n in FILES} for m in methods}
    fa = " | ".join(f"{rate(ev[m]['d00_te'], 'fa'):.3f} false alarms" for m in methods)
    out.append(f"| d00_te (normal), share of readings above | {fa} | — |")
    fa160 = " | ".join(f"{rate(ev[m]['d01_te'], 'fa'):.3f}" for m in methods)
    out.append(f"| rows 1–160 of d01_te (before the fault) | {fa160} | — |")
    for k in range(1, 22):
        n = f"d{k:02d}_te"
        cells = " | ".join(f"{rate(ev[m][n], 'detect'):.3f}" for m in methods)
        out.append(f"| fault {k} | {cells} | {1 - PUBLISHED_T2_MISSED[k - 1]:.3f} |")
    print("\n".join(out))


if __name__ == "__main__":
    cmd, work = sys.argv[1], sys.argv[2]
    if cmd == "convert":
        convert(work)
    elif cmd == "table":
        table(work, sys.argv[3:])
    else:
        sys.exit(f"unknown command {cmd}")
