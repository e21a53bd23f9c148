"""The worked Dask example on a real distributed scheduler: a LocalCluster of two worker
processes fits one model per machine from a partitioned Parquet data set by merging partial
moments, and each model equals the single-process fit of that machine's rows."""

import pathlib
import sys

import numpy as np
import pyarrow.parquet as pq
import pytest

import ellipsoid

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1] / "examples"))
import dask_fleet  # noqa: E402


@pytest.fixture(scope="module")
def client():
    from dask.distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            Client(cluster) as c:
        yield c


def rel(a, b):
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return float(np.max(np.abs(a - b) / np.abs(b)))


def test_fleet_fit_on_a_dask_cluster_equals_the_single_process_fit(tmp_path: pathlib.Path, client):
    root = tmp_path / "fleet"
    names = dask_fleet.write_fleet(root, machines=5, days=4, rows_per_day=3000)
    options = dict(rate_hz=1 / 20, trained_at=0)
    models, merged, pids = dask_fleet.fleet_models(root, client, **options)
    assert sorted(models) == names
    assert len(pids) == 2, f"the partitions were gathered by {len(pids)} worker process(es), not 2"
    # The single-process reference: every row of each machine, read back with pyarrow, in time order.
    table = pq.read_table(root).to_pandas()
    for name in names:
        rows = table[table["machine"] == name].sort_values("timestamp")
        x = rows[dask_fleet.FEATURES].to_numpy()
        assert merged[name].n == len(x) == 4 * 3000
        # numpy as the outside reference for the merged covariance and mean.
        assert rel(merged[name].covariance(), np.cov(x, rowvar=False)) < 1e-12
        assert rel(merged[name].mean(), x.mean(axis=0)) < 1e-12
        single = ellipsoid.fit(x, features=dask_fleet.FEATURES, holdout=0.0, source=name, **options)
        a, b = models[name].summary_dict(), single.summary_dict()
        assert a["rows_used"] == b["rows_used"]
        assert rel(a["covariance"], b["covariance"]) < 1e-12
        assert rel(a["mean"], b["mean"]) < 1e-12
        # Four files a machine: three seams, each one lag-1 pair of 11 999 missing.
        assert rel(models[name].threshold, single.threshold) < 1e-3
        # With rows taken as independent nothing depends on the seams: the same blob.
        ind = dict(options, independent_rows=True, model_id=1)
        m = dask_fleet.fit_machine((set(), {name: merged[name].to_bytes()}), name, ind)
        assert m.blob == ellipsoid.fit(x, features=dask_fleet.FEATURES, holdout=0.0, source=name, **ind).blob
