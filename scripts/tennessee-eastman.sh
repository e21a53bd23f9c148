#!/usr/bin/env bash
# The Tennessee Eastman benchmark (Downs and Vogel 1993) through `ellipsoid fit` and `ellipsoid evaluate`.
#
# Creates a virtualenv in target/tennessee-eastman/venv, installs the PyPI package bibmon 1.2.0
# (Apache-2.0, which ships the classic data files) and numpy, converts the files to CSV
# (scripts/tennessee_eastman.py says which 32 variables and why), fits on d00 (500 normal rows,
# 3-minute samples) at a nominal 1 % per reading, six ways, evaluates d00_te and d01_te…d21_te,
# and writes target/tennessee-eastman/table.md; then asks `--modes auto` how many operating modes
# d00 holds.
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
# The mean of the last 3 readings: the 9 minutes (the newest reading and 2 lags) that the
# published dynamic PCA of this process stacks into one vector (2 lags, Ku, Storer and Georgakis
# 1995; Russell, Chiang and Braatz 2000; the lag count from memory), at a cost of at most 2
# readings (6 minutes) of delay. Chosen before the table was seen, not tuned on it.
"$bin" fit "$work/d00.csv" --out "$work/window-3.blob" --window 3 "${common[@]}" > "$work/window-3-fit.txt"
# The dynamic augmentation (--differences) on 16 variables (16 levels + 16 differences = 32, the
# core's limit; the script says which 16 and why), beside the same 16 without it.
"$bin" fit "$work/sub-d00.csv" --out "$work/16-levels.blob" "${common[@]}" > "$work/16-levels-fit.txt"
"$bin" fit "$work/sub-d00.csv" --out "$work/16-differences.blob" --differences "${common[@]}" \
  > "$work/16-differences-fit.txt"
methods=(chi-square independent hotelling window-3 16-levels 16-differences)
for method in "${methods[@]}"; do
  prefix=""
  case "$method" in 16-*) prefix="sub-" ;; esac
  for name in d00_te $(seq -f 'd%02g_te' 1 21); do
    "$bin" evaluate --model "$work/$method.blob" --input "$work/$prefix$name.csv" --label-column label --json --quiet \
      > "$work/$method-$name.json"
  done
done
"$work/venv/bin/python" scripts/tennessee_eastman.py table "$work" "${methods[@]}" > "$work/table.md"
for method in "${methods[@]}"; do
  echo "$method: $(grep -h "alarm when" "$work/$method-fit.txt" | head -n 1)"
done
cat "$work/table.md"
# How many operating modes does d00 hold? One operating point by design; BIC's answer:
"$bin" fit "$work/d00.csv" --out "$work/modes-auto.blob" --modes auto "${common[@]}" > "$work/modes-auto-fit.txt"
grep -h "^Bank of\|^Mode count" "$work/modes-auto-fit.txt"
