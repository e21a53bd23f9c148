"""Shared fixtures: the `ellipsoid` command to compare against, and invented readings."""

import os
import pathlib
import subprocess

import numpy as np
import pytest

ROOT = pathlib.Path(__file__).resolve().parents[2]


@pytest.fixture(scope="session")
def ellipsoid_bin() -> str:
    """The release `ellipsoid` binary (`ELLIPSOID_BIN`, else target/release/ellipsoid)."""
    path = os.environ.get("ELLIPSOID_BIN", str(ROOT / "target" / "release" / "ellipsoid"))
    if not os.access(path, os.X_OK):
        pytest.fail(f"no ellipsoid binary at {path}: run `cargo build --release -p ellipsoid-trainer` "
                    "or set ELLIPSOID_BIN (scripts/python.sh does both)")
    return path


def run_cli(bin_path: str, *args: str) -> str:
    done = subprocess.run([bin_path, *args], capture_output=True, text=True)
    assert done.returncode == 0, f"ellipsoid {' '.join(args)} failed:\n{done.stderr}"
    return done.stdout


def glycol_pump(n: int, seed: int) -> np.ndarray:
    """Invented readings of a glycol-loop pump (flow, pressure, current, temperature, vibration):
    correlated AR(1) sensors around realistic offsets, columns in that order."""
    rng = np.random.default_rng(seed)
    load = np.zeros(n)
    for t in range(1, n):
        load[t] = 0.9 * load[t - 1] + rng.normal(scale=0.4)
    noise = rng.normal(size=(n, 5))
    flow = 42.0 + 3.0 * load + 0.5 * noise[:, 0]
    pressure = 2.4 + 0.15 * load + 0.03 * noise[:, 1]
    current = 6.1 + 0.35 * load + 0.1 * noise[:, 2]
    temperature = 18.0 + 0.4 * load + 0.3 * noise[:, 3]
    vibration = np.exp(0.2 + 0.05 * load + 0.1 * noise[:, 4])
    return np.column_stack([flow, pressure, current, temperature, vibration])


FEATURES = ["flow_l_min", "pressure_bar", "current_a", "temp_c", "vibration_mm_s"]


def write_csv(path: pathlib.Path, names, values: np.ndarray, timestamps=None) -> None:
    """A CSV the command line reads: a header, `%.17g` cells (they read back to the same f64),
    an empty cell for NaN."""
    with open(path, "w") as f:
        head = (["timestamp"] if timestamps is not None else []) + list(names)
        f.write(",".join(head) + "\n")
        for i, row in enumerate(values):
            cells = ["" if np.isnan(v) else "%.17g" % v for v in row]
            if timestamps is not None:
                cells.insert(0, str(timestamps[i]))
            f.write(",".join(cells) + "\n")
