"""Partial moments: merging in any order gives the fit of all rows; pickles and the byte form;
options that need rows are refused; bad rows are named."""

import pickle

import numpy as np
import pandas as pd
import pytest

import ellipsoid
from conftest import FEATURES, glycol_pump


def rel(a, b):
    return np.max(np.abs(np.asarray(a) - np.asarray(b)) / np.abs(np.asarray(b)))


def test_merged_partitions_fit_like_all_rows():
    x = glycol_pump(30_000, seed=21)
    cuts = [0, 1, 700, 9_999, 10_000, 21_234, 30_000]
    parts = [ellipsoid.Moments.of(x[a:b], features=FEATURES) for a, b in zip(cuts, cuts[1:])]
    # Through pickle (as a cluster ships them) and merged right to left.
    parts = [pickle.loads(pickle.dumps(p)) for p in parts]
    merged = ellipsoid.Moments.merged(reversed(parts))
    assert merged.n == len(x)
    # numpy as the outside reference for the covariance (denominator n - 1) and the mean.
    assert rel(merged.covariance(), np.cov(x, rowvar=False)) < 1e-12
    assert rel(merged.mean(), x.mean(axis=0)) < 1e-12
    whole = ellipsoid.Moments.of(x, features=FEATURES)
    assert rel(merged.covariance(), whole.covariance()) < 1e-12
    # The fits: with rows taken as independent nothing depends on the seams, and the model (with
    # a fixed id, since a derived id hashes the float64 bits) is the same bytes.
    opts = dict(independent_rows=True, model_id=77, trained_at=0)
    from_moments = ellipsoid.fit_moments(merged, **opts)
    from_rows = ellipsoid.fit(x, features=FEATURES, holdout=0.0, **opts)
    assert from_moments.blob == from_rows.blob
    # With the time-correlation correction the six seams lose six of 29 999 lag pairs.
    a = ellipsoid.fit_moments(merged, trained_at=0)
    b = ellipsoid.fit(x, features=FEATURES, holdout=0.0, trained_at=0)
    assert abs(a.threshold - b.threshold) / b.threshold < 1e-3
    # The fitted float64 covariance and mean (the --json summary's) agree to 1e-12.
    sa, sb = a.summary_dict(), b.summary_dict()
    assert sa["rows_used"] == sb["rows_used"] == len(x)
    assert rel(sa["covariance"], sb["covariance"]) < 1e-12
    assert rel(sa["mean"], sb["mean"]) < 1e-12


def test_log_features_and_frames():
    x = glycol_pump(5000, seed=4)
    df = pd.DataFrame(x, columns=FEATURES)
    m = ellipsoid.Moments(FEATURES, log=["vibration_mm_s"])
    m.push(df.iloc[:2000]).push(df.iloc[2000:][list(reversed(FEATURES))])
    assert m.log_features == ["vibration_mm_s"]
    t = x.copy()
    t[:, 4] = np.log(t[:, 4])
    assert rel(m.covariance(), np.cov(t, rowvar=False)) < 1e-12
    a = ellipsoid.fit_moments(m, independent_rows=True, model_id=1, trained_at=0)
    b = ellipsoid.fit(df, log=["vibration_mm_s"], holdout=0.0, independent_rows=True, model_id=1,
                      trained_at=0)
    assert a.blob == b.blob


def test_byte_form_is_versioned_and_checked():
    m = ellipsoid.Moments.of(glycol_pump(300, seed=1), features=FEATURES)
    b = m.to_bytes()
    assert b[:4] == b"ELPM"
    assert int.from_bytes(b[4:6], "little") == ellipsoid.MOMENTS_VERSION == 1
    back = ellipsoid.Moments.from_bytes(b)
    assert back.to_bytes() == b
    assert (back.covariance() == m.covariance()).all()
    with pytest.raises(ValueError, match="version 9"):
        ellipsoid.Moments.from_bytes(b[:4] + (9).to_bytes(2, "little") + b[6:])
    with pytest.raises(ValueError, match="end early"):
        ellipsoid.Moments.from_bytes(b[:-3])
    with pytest.raises(ValueError, match="ELPM"):
        ellipsoid.Moments.from_bytes(b"PK\x03\x04" + b[4:])
    with pytest.raises(ValueError, match="other features"):
        m.merge(ellipsoid.Moments(["a", "b"]))


def test_options_that_need_rows_are_refused():
    m = ellipsoid.Moments.of(glycol_pump(2000, seed=2), features=FEATURES)
    with pytest.raises(ValueError, match="FAST-MCD"):
        ellipsoid.fit_moments(m, robust=True)
    with pytest.raises(ValueError, match="Ledoit-Wolf"):
        ellipsoid.fit_moments(m, shrinkage="ledoit-wolf")
    with pytest.raises(ValueError, match="hold-out"):
        ellipsoid.fit_moments(m, holdout=0.2)
    with pytest.raises(ValueError, match="empirical"):
        ellipsoid.fit_moments(m, threshold="empirical")
    assert ellipsoid.fit_moments(m, shrinkage="diagonal", loading=0.1).threshold > 0


def test_bad_rows_are_named_or_skipped():
    x = glycol_pump(1000, seed=6)
    x[123, 2] = np.nan
    with pytest.raises(ValueError, match=r"pump 7: row 123, column `current_a`"):
        ellipsoid.fit(x, features=FEATURES, source="pump 7")
    fitted = ellipsoid.fit(x, features=FEATURES, skip_bad_rows=True, holdout=0.0)
    assert "1 bad training row(s) skipped" in fitted.summary
    m = ellipsoid.Moments(FEATURES)
    with pytest.raises(ValueError, match=r"row 123, column `current_a`"):
        m.push(x)
    assert m.n == 0, "nothing of a refused push is kept"
    m.push(x, skip_bad_rows=True)
    assert (m.n, m.skipped) == (999, 1)
    with pytest.raises(ValueError, match="not numeric"):
        ellipsoid.fit(pd.DataFrame({"a": ["x"] * 50, "b": np.arange(50.0)}))


def test_models_pickle_and_save(tmp_path):
    model = ellipsoid.fit(glycol_pump(2000, seed=8), features=FEATURES, trained_at=0)
    back = pickle.loads(pickle.dumps(model))
    assert back.blob == model.blob and back.card == model.card and back.features == FEATURES
    assert back.summary == model.summary and back.summary_dict() == model.summary_dict()
    model.save(str(tmp_path / "pump.blob"))
    assert (tmp_path / "pump.blob").read_bytes() == model.blob
    assert (tmp_path / "pump.json").read_text() == model.card
    with pytest.raises(ValueError, match="own model card"):
        model.save(str(tmp_path / "pump.json"))
