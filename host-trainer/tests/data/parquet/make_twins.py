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

if len(sys.argv) > 1:
    demo = pacsv.read_csv(sys.argv[1])
    pq.write_table(demo, "demo_baseline.parquet", row_group_size=4096)
