"""Write the Parquet test files and their CSV twins with pyarrow (the Apache Arrow project's
Python library), an implementation independent of the Rust `parquet` crate the trainer reads with.

Run from this folder, in a virtual environment with pyarrow from PyPI:

    python3 -m venv /tmp/pq-venv && /tmp/pq-venv/bin/pip install pyarrow==26.0.1
    /tmp/pq-venv/bin/python make_twins.py /path/to/demo/baseline.csv

The demo baseline is the one `ellipsoid demo --out DIR` writes (seed 7, the default); it is not
committed, the test regenerates it. The files written (all committed):

  small.csv / small.parquet   12 rows, 3 row groups of 5, 5, 2 rows: a string timestamp, a DOUBLE,
                              a FLOAT, an INT64 and an INT32 feature, a BOOLEAN label; the CSV
                              holds the same numbers as text (the FLOAT as its exact f64 value)
  null.parquet                the same with row 7's `flow` null
  text.parquet                the same with `flow` as strings
  zstd.parquet                3 rows of 2 DOUBLE columns, Zstandard-compressed (a codec we do not read)
  fleet.csv / fleet.parquet   3 machines (`machine` a string column) × 400 rows of 3 channels,
                              interleaved, row groups of 500 rows
  demo_baseline.parquet       the demo baseline read by pyarrow's CSV reader, row groups of 4096
"""

import sys

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

ts = [f"2026-03-02T06:00:{s:02d}Z" for s in range(12)]
pressure = [3.5 + 0.125 * i - 0.001 * i * i for i in range(12)]
flow = [100.0 + 1.5 * i for i in range(12)]
temp = [41.25 + 0.5 * (i % 3) for i in range(12)]  # FLOAT: exact in f32
count = [1000 + 7 * i for i in range(12)]  # INT64
level = [i % 4 for i in range(12)]  # INT32
label = [i in (9, 10) for i in range(12)]


def table(flow_col):
    return pa.table(
        {
            "timestamp": pa.array(ts, pa.string()),
            "pressure": pa.array(pressure, pa.float64()),
            "flow": flow_col,
            "temp": pa.array(temp, pa.float32()),
            "count": pa.array(count, pa.int64()),
            "level": pa.array(level, pa.int32()),
            "fault": pa.array(label, pa.bool_()),
        }
    )


pq.write_table(table(pa.array(flow, pa.float64())), "small.parquet", row_group_size=5)
with open("small.csv", "w") as f:
    f.write("timestamp,pressure,flow,temp,count,level,fault\n")
    for i in range(12):
        f.write(
            f"{ts[i]},{pressure[i]!r},{flow[i]!r},{temp[i]!r},{count[i]},{level[i]},{int(label[i])}\n"
        )
nulled = [None if i == 6 else v for i, v in enumerate(flow)]
pq.write_table(table(pa.array(nulled, pa.float64())), "null.parquet", row_group_size=5)
pq.write_table(table(pa.array([str(v) for v in flow], pa.string())), "text.parquet", row_group_size=5)

pq.write_table(
    pa.table({"a": [1.0, 2.0, 3.0], "b": [2.0, 1.0, 5.0]}), "zstd.parquet", compression="zstd"
)

# A small fleet: a linear congruential generator, so that the numbers need no numpy.
state = 12345


def uniform():
    global state
    state = (state * 6364136223846793005 + 1442695040888963407) % 2**64
    return (state >> 11) / 2**53


ids, xs, ys, zs = [], [], [], []
for i in range(400):
    for k, name in enumerate(["north-1", "north 2", "south/3"]):
        a, b, c = uniform() - 0.5, uniform() - 0.5, uniform() - 0.5
        ids.append(name)
        xs.append(round(10.0 + k + a, 4))
        ys.append(round(3.0 + 0.5 * a + 0.1 * b, 4))
        zs.append(round(40.0 + 2.0 * c * (1 + k), 4))
fleet = pa.table(
    {
        "machine": pa.array(ids, pa.string()),
        "x": pa.array(xs, pa.float64()),
        "y": pa.array(ys, pa.float64()),
        "z": pa.array(zs, pa.float64()),
    }
)
pq.write_table(fleet, "fleet.parquet", row_group_size=500)
with open("fleet.csv", "w") as f:
    f.write("machine,x,y,z\n")
    for r in zip(ids, xs, ys, zs):
        f.write(f"{r[0]},{r[1]!r},{r[2]!r},{r[3]!r}\n")

if len(sys.argv) > 1:
    demo = pacsv.read_csv(sys.argv[1])
    pq.write_table(demo, "demo_baseline.parquet", row_group_size=4096)
