"""One model per machine from a partitioned Parquet data set, on a Dask cluster.

Each Dask task reads one Parquet file (one machine's day, as a data lake would hold it) and
gathers `ellipsoid.Moments` for each machine in it; the partial moments travel between worker
processes as their versioned byte form (pickle), merge in a tree of tasks, and each machine's
merged moments are fitted on a worker. No row leaves the task that read it, and a worker holds a
machine's moments (a few kilobytes and a bounded sample), never its rows. Dask's own distributed
scheduler does all the placing and shipping; this file only says what to compute.

Run it: `python python/examples/dask_fleet.py OUT_DIR` (writes an invented fleet's data set,
fits it on a local cluster of two worker processes, and writes one blob and card per machine).
The test `python/tests/test_dask.py` runs the same functions and checks them against a fit of
each machine's rows in one process.
"""

from __future__ import annotations

import os
import pathlib
import sys
import time
from typing import Dict, List, Set, Tuple

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

import ellipsoid

FEATURES = ["supply_temp_c", "return_temp_c", "flow_m3_h", "compressor_kw", "suction_bar"]


def write_fleet(root: pathlib.Path, machines: int = 6, days: int = 4, rows_per_day: int = 4320,
                seed: int = 2026) -> List[str]:
    """An invented fleet of chillers in cold stores: `machines` units, one reading every 20 s,
    each day of each unit in its own file `machine=<id>/day=<n>.parquet` (hive layout, as
    `pyarrow.dataset` and Dask read it). Each unit has its own operating point and correlations."""
    rng = np.random.default_rng(seed)
    names = [f"chiller-{k:02d}" for k in range(1, machines + 1)]
    start = np.datetime64("2026-05-01T00:00:00")
    for k, name in enumerate(names):
        base = np.array([6.0 + 0.3 * k, 11.5 + 0.2 * k, 40.0 + 5.0 * k, 55.0 + 4.0 * k, 3.1 + 0.05 * k])
        mix = np.eye(5) + rng.normal(scale=0.25, size=(5, 5))
        scale = np.array([0.2, 0.25, 1.5, 2.0, 0.04])
        state = np.zeros(5)
        for d in range(days):
            rows = np.empty((rows_per_day, 5))
            for t in range(rows_per_day):
                state = 0.95 * state + rng.normal(size=5) * 0.3
                rows[t] = base + scale * (mix @ state)
            ts = start + np.timedelta64(20, "s") * (d * rows_per_day + np.arange(rows_per_day))
            table = pa.table({"timestamp": ts, **{f: rows[:, j] for j, f in enumerate(FEATURES)}})
            folder = root / f"machine={name}"
            folder.mkdir(parents=True, exist_ok=True)
            pq.write_table(table, folder / f"day={d}.parquet")
    return names


def partition_moments(df: pd.DataFrame) -> Tuple[Set[int], Dict[str, bytes]]:
    """A Dask task: the partial moments of each machine in one partition (rows in time order),
    as bytes, with the id of the process that computed them."""
    out = {}
    for machine, rows in df.groupby("machine", observed=True, sort=True):
        rows = rows.sort_values("timestamp")
        out[str(machine)] = ellipsoid.Moments.of(rows[FEATURES], name=f"{machine}").to_bytes()
    return {os.getpid()}, out


def merge_partials(*parts: Tuple[Set[int], Dict[str, bytes]]) -> Tuple[Set[int], Dict[str, bytes]]:
    """A Dask task: merge the per-machine moments of several partitions (and the sets of
    processes that gathered them)."""
    acc: Dict[str, ellipsoid.Moments] = {}
    pids: Set[int] = set()
    for who, moments in parts:
        pids |= who
        for machine, b in moments.items():
            m = ellipsoid.Moments.from_bytes(b)
            if machine in acc:
                acc[machine].merge(m)
            else:
                acc[machine] = m
    return pids, {k: v.to_bytes() for k, v in acc.items()}


def fit_machine(merged: Tuple[Set[int], Dict[str, bytes]], machine: str, options: dict) -> ellipsoid.Model:
    """A Dask task: fit one machine's merged moments."""
    m = ellipsoid.Moments.from_bytes(merged[1][machine])
    return ellipsoid.fit_moments(m, source=machine, **options)


def fleet_models(root: pathlib.Path, client, fan_in: int = 4, **options):
    """Fit every machine of the data set at `root` on the cluster of `client`. Returns the models,
    each machine's merged moments, and the process ids that gathered the partitions."""
    import cloudpickle
    import dask
    import dask.dataframe as dd

    if __name__ != "__main__":
        # The workers import `ellipsoid`, but not this file: ship its functions by value.
        cloudpickle.register_pickle_by_value(sys.modules[__name__])

    ddf = dd.read_parquet(str(root), columns=["timestamp", "machine", *FEATURES])
    level = [dask.delayed(partition_moments)(p) for p in ddf.to_delayed()]
    while len(level) > 1:
        level = [dask.delayed(merge_partials)(*level[i:i + fan_in]) for i in range(0, len(level), fan_in)]
    merged_future = client.compute(level[0])
    pids, merged_bytes = merged_future.result()
    machines = sorted(merged_bytes)
    fits = [client.submit(fit_machine, merged_future, m, options, pure=False) for m in machines]
    models = dict(zip(machines, client.gather(fits)))
    merged = {k: ellipsoid.Moments.from_bytes(v) for k, v in merged_bytes.items()}
    return models, merged, pids


def main(out: pathlib.Path) -> None:
    from dask.distributed import Client, LocalCluster

    out.mkdir(parents=True, exist_ok=True)
    data = out / "fleet.parquet"
    names = write_fleet(data)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        t0 = time.perf_counter()
        models, merged, pids = fleet_models(data, client, rate_hz=1 / 20, alarms_per_day=1.0)
        took = time.perf_counter() - t0
    for name in names:
        model = models[name]
        model.save(str(out / f"{name}.blob"))
        print(f"{name}: {merged[name].n} rows, alarm when d² > {model.threshold:.3f}")
    print(f"{len(names)} models from {sum(m.n for m in merged.values())} rows on {len(pids)} worker "
          f"processes in {took:.1f} s; blobs and cards in {out}")


if __name__ == "__main__":
    main(pathlib.Path(sys.argv[1] if len(sys.argv) > 1 else "fleet-out"))
