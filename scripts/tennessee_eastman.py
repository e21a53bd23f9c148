"""Tennessee Eastman benchmark (Downs and Vogel 1993) for Ellipsoid: data conversion and table.

The data are the classic files shipped by the PyPI package bibmon 1.2.0 (Apache-2.0):
d00.dat is normal operation stored transposed (52 x 500); dNN_te.dat are 960 x 52 with the fault
introduced at row 160; 3-minute samples; columns are XMEAS(1-41) then XMV(1-11).

Variables (32, the model's limit): XMEAS(1-22), the continuous process measurements sampled every
3 minutes, and XMV(1-11) except XMV(9). XMEAS(23-41) are analyser outputs sampled every 6 or 15
minutes and held between samples (piecewise constant), which a Gaussian of 3-minute readings
describes badly. XMV(9) is the stripper steam valve, the actuator of the flow loop whose
measurement XMEAS(19) is kept, so it repeats that information.

The dynamic augmentation (`fit --differences`, Ku, Storer and Georgakis 1995) doubles the scored
values, and a model scores at most 32 (the core's MAX_FEATURES, which its blob layout and log mask
are built on), so it runs on 16 of the 32 variables: the 16 with the highest lag-1
autocorrelation in d00, the training file alone. A difference carries information beyond the
level only where readings are serially correlated (for white noise it is just noise again), and
the choice uses no fault file. `convert` writes those files as sub-*.csv and prints the choice.

    python tennessee_eastman.py convert WORKDIR   # CSV files for ellipsoid
    python tennessee_eastman.py table WORKDIR COLUMN...  # the Markdown tables from the evaluate JSON
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


SUBSET_SIZE = 16


def write_csv(path, rows, labels=None, keep=None):
    keep = list(range(len(KEEP))) if keep is None else keep
    with open(path, "w") as f:
        f.write(",".join([NAMES[j] for j in keep] + (["label"] if labels is not None else [])) + "\n")
        for i, r in enumerate(rows):
            cells = [repr(float(v)) for v in r[KEEP][keep]]
            if labels is not None:
                cells.append(str(labels[i]))
            f.write(",".join(cells) + "\n")


def convert(work):
    d00 = np.loadtxt(data_file("d00"))
    assert d00.shape == (52, 500), d00.shape
    write_csv(os.path.join(work, "d00.csv"), d00.T)
    # Lag-1 autocorrelation of each kept variable in d00.
    x = d00.T[:, KEEP]
    c = x - x.mean(axis=0)
    r1 = (c[1:] * c[:-1]).sum(axis=0) / (c * c).sum(axis=0)
    sub = sorted(np.argsort(-r1, kind="stable")[:SUBSET_SIZE].tolist())
    print("differences on: " + ", ".join(f"{NAMES[j]} (r1 {r1[j]:.2f})" for j in sub))
    print(f"lag-1 autocorrelation of the other {len(KEEP) - SUBSET_SIZE}: at most "
          f"{max(r1[j] for j in range(len(KEEP)) if j not in sub):.2f}")
    write_csv(os.path.join(work, "sub-d00.csv"), d00.T, keep=sub)
    for name in FILES:
        x = np.loadtxt(data_file(name))
        assert x.shape == (960, 52), (name, x.shape)
        normal = name == "d00_te"
        labels = [0 if (normal or i < FAULT_AT) else 1 for i in range(len(x))]
        write_csv(os.path.join(work, f"{name}.csv"), x, labels)
        write_csv(os.path.join(work, f"sub-{name}.csv"), x, labels, keep=sub)


def shares(ev):
    """Per-reading shares above the threshold, before the alarm policy, on the readings that
    could be scored: `(false-alarm share, its denominator, detection share, its denominator)`.

    A reading the window is still filling is a fault that evaluate counts as flagged (the device
    never calls it normal); the window starts with each file, so those are the first w - 1 rows
    (one row with differences and w = 1), all before the fault at row 160. They are taken out of
    the false-alarm share (numerator and denominator); the detection share is over all 800 fault
    readings, none of which is unscored (checked)."""
    c = ev["per_reading"]["confusion"]
    unscored_normal = ev["unscored_labelled_normal"]
    assert ev["unscored"] == unscored_normal == ev["unscored_by_cause"]["window_filling"], ev
    normal = c["fp"] + c["tn"] - unscored_normal
    fault = c["tp"] + c["fn_"]
    return (c["fp"] - unscored_normal) / max(normal, 1), normal, c["tp"] / max(fault, 1), fault


def delay_minutes(ev):
    """Readings from the fault's onset to the alarm (after the policy), in minutes; None if not
    raised while the fault lasted."""
    events = ev["after_policy"]["events"]
    assert len(events) == 1, events
    d = events[0]["delay"]
    return None if d is None else 3 * d


def alarms_raised(ev):
    """False alarms after the policy on a normal file, without the fault line of the window's
    first readings: evaluate counts the alarm-or-fault line, which is on from the first reading
    until the window is full, so that start-up counts as one."""
    fa = ev["after_policy"]["false_alarms"]
    if ev["unscored_by_cause"]["window_filling"] > 0:
        fa -= 1
    assert fa >= 0, ev
    return fa


def table(work, methods):
    out = []
    ev = {m: {n: json.load(open(os.path.join(work, f"{m}-{n}.json"))) for n in FILES} for m in methods}
    heads = " | ".join(f"{m}: detection" for m in methods)
    out.append(f"| data | {heads} | published PCA T² detection (recalled) |")
    out.append("|---|" + "---|" * len(methods) + "---|")
    fa = [shares(ev[m]["d00_te"]) for m in methods]
    out.append("| d00_te (normal), share of readings above | "
               + " | ".join(f"{f[0]:.3f} false alarms (of {f[1]})" for f in fa) + " | — |")
    fa160 = [shares(ev[m]["d01_te"]) for m in methods]
    out.append("| rows 1–160 of d01_te (before the fault) | "
               + " | ".join(f"{f[0]:.3f} (of {f[1]})" for f in fa160) + " | — |")
    for k in range(1, 22):
        n = f"d{k:02d}_te"
        cells = " | ".join(f"{shares(ev[m][n])[2]:.3f}" for m in methods)
        out.append(f"| fault {k} | {cells} | {1 - PUBLISHED_T2_MISSED[k - 1]:.3f} |")
    # Detection delay after the alarm policy (3 readings in a row above the limit).
    delays = {m: [delay_minutes(ev[m][f"d{k:02d}_te"]) for k in range(1, 22)] for m in methods}
    common = [k for k in range(21) if all(delays[m][k] is not None for m in methods)]
    out.append("")
    out.append("| after the alarm policy | " + " | ".join(methods) + " |")
    out.append("|---|" + "---|" * len(methods))
    out.append("| faults alarmed while they lasted (of 21) | "
               + " | ".join(str(sum(d is not None for d in delays[m])) for m in methods) + " |")
    out.append(f"| mean delay to the alarm, minutes, over the {len(common)} faults every column alarms | "
               + " | ".join(f"{np.mean([delays[m][k] for k in common]):.1f}" for m in methods) + " |")
    out.append(f"| median delay, same faults, minutes | "
               + " | ".join(f"{np.median([delays[m][k] for k in common]):.1f}" for m in methods) + " |")
    out.append("| alarms raised on d00_te (960 readings, 48 h) | "
               + " | ".join(str(alarms_raised(ev[m]["d00_te"])) for m in methods) + " |")
    print("\n".join(out))


if __name__ == "__main__":
    cmd, work = sys.argv[1], sys.argv[2]
    if cmd == "convert":
        convert(work)
    elif cmd == "table":
        table(work, sys.argv[3:])
    else:
        sys.exit(f"unknown command {cmd}")
