#!/usr/bin/env bash
# The Tennessee Eastman benchmark (Downs and Vogel 1993) through `ellipsoid fit` and `ellipsoid evaluate`.
#
# Creates a virtualenv in target/tennessee-eastman/venv, installs the PyPI package bibmon 1.2.0
# (Apache-2.0, which ships the classic data files) and numpy, converts the files to CSV
# (scripts/tennessee_eastman.py says which 32 variables and why), fits on d00 (500 normal rows,
# 3-minute samples) at a nominal 1 % per reading, three ways, evaluates d00_te and d01_te…d21_te,
# and writes target/tennessee-eastman/table.md.
set -euo pipefail
cd "$(dirname "$0")/.."
work=target/tennessee-eastman
mkdir -p "$work"
if [ ! -x "$work/venv/bin/python" ]; then
  python3 -m venv "$work/venv"
fi
"$work/venv/bin/pip" install --quiet --no-deps bibmon==1.2.0 numpy
cargo build --release -q -p ellipsoid-trainer --bin ellipsoid
bin=target/release/ellipsoid
"$work/venv/bin/python" scripts/tennessee_eastman.py convert "$work"

# One reading every 3 minutes; α = 0.01 a reading, as in the published 99 % limits.
rate=$(python3 -c 'print(1/180)')
common=(--holdout 0 --alpha 0.01 --rate-hz "$rate" --quiet)
"$bin" fit "$work/d00.csv" --out "$work/hotelling.blob" "${common[@]}" > "$work/hotelling-fit.txt"
"$bin" fit "$work/d00.csv" --out "$work/independent.blob" --independent-rows "${common[@]}" > "$work/independent-fit.txt"
"$bin" fit "$work/d00.csv" --out "$work/chi-square.blob" --threshold chi-square "${common[@]}" > "$work/chi-square-fit.txt"
for method in hotelling independent chi-square; do
  for name in d00_te $(seq -f 'd%02g_te' 1 21); do
    "$bin" evaluate --model "$work/$method.blob" --input "$work/$name.csv" --label-column label --json --quiet \
      > "$work/$method-$name.json"
  done
done
"$work/venv/bin/python" scripts/tennessee_eastman.py table "$work" chi-square independent hotelling > "$work/table.md"
grep -h "alarm when" "$work"/{chi-square,independent,hotelling}-fit.txt
cat "$work/table.md"
