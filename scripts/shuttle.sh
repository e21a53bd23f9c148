#!/usr/bin/env bash
# The NASA shuttle data (UCI Statlog "shuttle", Jason Catlett) through `ellipsoid fit` and
# `ellipsoid replay`: ROC AUC of one Gaussian and of the nearest-mode bank (`--modes auto`).
#
# Takes Debian's r-cran-mlbench (`apt-get download`, unpacked with `dpkg-deb -x`, never installed:
# only its Shuttle.rda is read), reads it with the PyPI package rdata in a virtualenv in
# target/shuttle/venv, fits on half the normal (Rad.Flow) rows and scores the other half with the
# anomalies (scripts/shuttle.py says which rows and why), and checks each ROC AUC against a floor
# of 0.99: the figure issue 10 states for one Gaussian fitted this way (computed there with
# numpy, 0.993), fixed before the bank was run, and not tuned to what this script measures.
set -euo pipefail
cd "$(dirname "$0")/.."
work=target/shuttle
floor=0.99
mkdir -p "$work"
if [ ! -x "$work/venv/bin/python" ]; then
  python3 -m venv "$work/venv"
fi
"$work/venv/bin/pip" install --quiet rdata==0.11.2 numpy==2.3.4 pandas==3.1.1 xarray==2026.9.0
rda="$work/deb/usr/lib/R/site-library/mlbench/data/Shuttle.rda"
if [ ! -f "$rda" ]; then
  sudo=""
  if [ "$(id -u)" != 0 ] && command -v sudo >/dev/null; then sudo="sudo"; fi
  rm -f "$work"/r-cran-mlbench_*.deb
  if ! (cd "$work" && apt-get download r-cran-mlbench); then
    $sudo apt-get update
    (cd "$work" && apt-get download r-cran-mlbench)
  fi
  dpkg-deb -x "$work"/r-cran-mlbench_*.deb "$work/deb"
fi
echo "data: $(basename "$work"/r-cran-mlbench_*.deb 2>/dev/null || echo r-cran-mlbench), $rda"
cargo build --release -q -p ellipsoid-trainer --bin ellipsoid
bin=target/release/ellipsoid
"$work/venv/bin/python" -W ignore scripts/shuttle.py convert "$rda" "$work"

# The rows are not a time series (the file mixes flights), so no window. Ten of the 22 793
# normal rows hold values over 1000 robust standard deviations from the median (V4 = -3939,
# V6 = 13148, ...), which `fit` refuses as log faults; --skip-bad-rows skips them and says so.
common=(--holdout 0 --alpha 0.01 --skip-bad-rows --quiet)
"$bin" fit "$work/fit.csv" --out "$work/single.blob" "${common[@]}" > "$work/single-fit.txt"
# The bank: modes by EM and BIC over 1..=4 (the default --max-modes). A mode count whose EM
# modes the per-mode fit cannot take (on this integer-valued data EM puts a mode on rows where
# V1 = 37 and V2 = 0 are constant) is skipped, and the fit summary says which and why.
"$bin" fit "$work/fit.csv" --out "$work/bank.blob" --modes auto "${common[@]}" \
  > "$work/bank-fit.txt"
grep -h "^Mode count" "$work/bank-fit.txt" || true
grep -h "^Bank of" "$work/bank-fit.txt"
for name in single bank; do
  grep -h "rows used" "$work/$name-fit.txt" | sed "s/^/$name: /"
  "$bin" inspect "$work/$name.blob" --json > "$work/$name-inspect.json"
  "$bin" replay --model "$work/$name.blob" --input "$work/score.csv" --out "$work/$name.csv" --quiet
  "$bin" evaluate --model "$work/$name.blob" --input "$work/score.csv" --label-column label --json \
    --quiet > "$work/$name-evaluate.json"
done
"$work/venv/bin/python" scripts/shuttle.py auc "$work" "$floor" single bank
