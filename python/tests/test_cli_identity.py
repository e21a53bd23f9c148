"""The package against the `ellipsoid` command on the same rows written as CSV: the same blob and
card bytes from `fit`, the same d² bits and alarm stream from `replay`."""

import csv
import json
import pathlib

import numpy as np
import pandas as pd
import polars as pl
import pytest

import ellipsoid
from conftest import FEATURES, glycol_pump, run_cli, write_csv

TRAINED_AT = 1_790_000_000

CASES = {
    "defaults": ({}, []),
    "log, diagonal loading, alpha, chi-square, policy": (
        dict(log=["vibration_mm_s"], shrinkage="diagonal", loading=0.05, alpha=1e-3,
             threshold="chi-square", raise_after=2, clear_after=5, latch=True, sequence=7,
             holdout=0.25),
        ["--log", "vibration_mm_s", "--shrinkage", "diagonal", "--loading", "0.05", "--alpha", "0.001",
         "--threshold", "chi-square", "--raise-after", "2", "--clear-after", "5", "--latch",
         "--sequence", "7", "--holdout", "0.25"],
    ),
    "ledoit-wolf, confidence, per day at 0.2 Hz": (
        dict(shrinkage="ledoit-wolf", threshold="confidence", rate_hz=0.2, alarms_per_day=2.0,
             simulations=200, model_id=12345),
        ["--shrinkage", "ledoit-wolf", "--threshold", "confidence", "--rate-hz", "0.2",
         "--alarms-per-day", "2", "--simulations", "200", "--model-id", "12345"],
    ),
    "independent rows, no hold-out": (
        dict(independent_rows=True, holdout=0.0),
        ["--independent-rows", "--holdout", "0"],
    ),
}


@pytest.mark.parametrize("case", list(CASES))
def test_fit_writes_the_bytes_of_the_command(tmp_path: pathlib.Path, ellipsoid_bin: str, case: str):
    kwargs, flags = CASES[case]
    x = glycol_pump(4000, seed=3)
    csv_path = tmp_path / "baseline.csv"
    write_csv(csv_path, FEATURES, x)
    out = tmp_path / "cli.blob"
    run_cli(ellipsoid_bin, "fit", str(csv_path), "--out", str(out), "--threads", "1",
            "--trained-at", str(TRAINED_AT), "--quiet", *flags)
    model = ellipsoid.fit(x, features=FEATURES, source=str(csv_path), trained_at=TRAINED_AT, **kwargs)
    assert model.blob == out.read_bytes()
    assert model.card == (tmp_path / "cli.json").read_text()
    assert model.features == FEATURES
    # And the same again from a pandas frame (with a timestamp column the fit skips, as the
    # command line does) and from a polars frame.
    ts = pd.date_range("2026-03-01", periods=len(x), freq="s")
    df = pd.DataFrame(x, columns=FEATURES)
    df.insert(0, "timestamp", ts)
    from_pandas = ellipsoid.fit(df, source=str(csv_path), trained_at=TRAINED_AT, **kwargs)
    assert from_pandas.blob == model.blob and from_pandas.card == model.card
    from_polars = ellipsoid.fit(pl.from_pandas(df), source=str(csv_path), trained_at=TRAINED_AT, **kwargs)
    assert from_polars.blob == model.blob


def test_the_summary_is_the_commands(tmp_path: pathlib.Path, ellipsoid_bin: str):
    x = glycol_pump(3000, seed=5)
    csv_path = tmp_path / "baseline.csv"
    write_csv(csv_path, FEATURES, x)
    text = run_cli(ellipsoid_bin, "fit", str(csv_path), "--out", str(tmp_path / "m.blob"), "--threads", "1",
                   "--trained-at", str(TRAINED_AT), "--quiet")
    model = ellipsoid.fit(x, features=FEATURES, source=str(csv_path), trained_at=TRAINED_AT)
    # The command adds the line naming the files it wrote.
    assert text.startswith(model.summary) and len(model.summary) > 200
    as_json = run_cli(ellipsoid_bin, "fit", str(csv_path), "--out", str(tmp_path / "m.blob"), "--threads", "1",
                      "--trained-at", str(TRAINED_AT), "--quiet", "--json")
    assert json.loads(as_json) == model.summary_dict()
    # The HTML report too, and all three files written together.
    run_cli(ellipsoid_bin, "fit", str(csv_path), "--out", str(tmp_path / "m.blob"), "--threads", "1",
            "--trained-at", str(TRAINED_AT), "--quiet", "--report", str(tmp_path / "cli.html"))
    with_report = ellipsoid.fit(x, features=FEATURES, source=str(csv_path), trained_at=TRAINED_AT, report=True)
    assert with_report.report_html == (tmp_path / "cli.html").read_text()
    with_report.save(str(tmp_path / "py.blob"), report=str(tmp_path / "py.html"))
    assert (tmp_path / "py.html").read_text() == with_report.report_html
    assert (tmp_path / "py.blob").read_bytes() == (tmp_path / "m.blob").read_bytes()
    with pytest.raises(ValueError, match="no report"):
        model.save(str(tmp_path / "x.blob"), report=str(tmp_path / "x.html"))


def read_replay_csv(path: pathlib.Path):
    with open(path) as f:
        return list(csv.DictReader(f))


def test_replay_gives_the_bits_of_the_command(tmp_path: pathlib.Path, ellipsoid_bin: str):
    train = glycol_pump(5000, seed=11)
    model = ellipsoid.fit(train, features=FEATURES, trained_at=TRAINED_AT)
    blob = tmp_path / "m.blob"
    model.save(str(blob))
    # Readings with drift, a stuck sensor and dropouts (empty cells: faults on the device).
    week = glycol_pump(3000, seed=12)
    week[1000:1400, 1] = week[1000, 1]
    week[2000:, 0] -= np.linspace(0, 6, 1000)
    week[[5, 6, 2500], 3] = np.nan
    week_csv = tmp_path / "week.csv"
    write_csv(week_csv, FEATURES, week)
    run_cli(ellipsoid_bin, "replay", "--model", str(blob), "--input", str(week_csv), "--out",
            str(tmp_path / "r.csv"), "--quiet")
    cli = read_replay_csv(tmp_path / "r.csv")
    py = model.replay(week, frame=False)
    assert len(cli) == len(py["d2"]) == len(week)
    bits = [format(int(b), "08x") if v == "above" or v == "below" else "" for b, v in zip(py["d2_bits"], py["verdict"])]
    assert bits == [r["d2_bits"] for r in cli]
    assert list(py["verdict"]) == [r["verdict"] for r in cli]
    assert [str(int(a)) for a in py["alarm"]] == [r["alarm"] for r in cli]
    assert [str(int(a)) for a in py["fault"]] == [r["fault"] for r in cli]
    assert list(py["event"]) == [r["event"] for r in cli]
    assert [t or "" for t in py["top_feature"]] == [r["top_feature"] for r in cli]
    assert list(py["verdict"]).count("fault") == 3
    assert list(py["verdict"]).count("above") > 100, "the faults of the invented week must show"
    # score() is the same d² as replay, and a loaded model scores the same.
    d2 = model.score(week)
    assert d2.dtype == np.float32
    same = np.isnan(d2) == np.isnan(py["d2"])
    assert same.all()
    ok = ~np.isnan(d2)
    assert (d2[ok].view(np.uint32) == py["d2_bits"][ok]).all()
    # The data-frame form has the replay CSV's columns, contributions included.
    frame = model.replay(week)
    assert list(frame.columns) == list(cli[0].keys())
    got = frame["c_flow_l_min"].to_numpy()[ok]
    assert (got.astype(np.float32) == np.array([float(r["c_flow_l_min"]) for r, k in zip(cli, ok) if k], dtype=np.float32)).all()
    loaded = ellipsoid.load(str(blob))
    assert loaded.blob == model.blob
    assert (loaded.score(week)[ok].view(np.uint32) == d2[ok].view(np.uint32)).all()
    # A data frame with the columns in another order is matched by name.
    df = pd.DataFrame(week, columns=FEATURES)[list(reversed(FEATURES))]
    assert (model.score(df)[ok].view(np.uint32) == d2[ok].view(np.uint32)).all()
