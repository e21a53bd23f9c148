#!/usr/bin/env bash
# The Python package `ellipsoid` (python/: a PyO3 crate built by maturin as an abi3 wheel).
#
# Creates a virtualenv in target/python/venv with pinned maturin, numpy, pandas, polars, pyarrow,
# dask[distributed] and pytest (PyPI), checks the crate's formatting and clippy, builds the wheel
# (`maturin build --release`, into target/python/wheels, in the workspace's target folder, whose
# release builds of the shared dependencies the Tennessee Eastman block has made),
# installs it, and runs python/tests (the bit-identity tests against the `ellipsoid` command, the
# partial moments, and the Dask test on a LocalCluster of two worker processes). Prints the
# seconds of each step.
set -euo pipefail
cd "$(dirname "$0")/.."
work="$PWD/target/python"
venv="$work/venv"
export CARGO_TARGET_DIR="$PWD/target"
mkdir -p "$work"
t0=$(date +%s)
if [ ! -x "$venv/bin/python" ]; then
  python3 -m venv "$venv"
fi
"$venv/bin/pip" install --quiet --disable-pip-version-check \
  maturin==1.16.0 numpy==2.4.6 pandas==3.1.1 polars==2.1.0 pyarrow==26.0.1 \
  "dask[distributed]==2026.8.0" pytest==9.2.0
t1=$(date +%s)
cargo fmt --manifest-path python/Cargo.toml -- --check
cargo clippy --manifest-path python/Cargo.toml --all-targets -- -D warnings
t2=$(date +%s)
rm -rf "$work/wheels"
"$venv/bin/maturin" build --release --quiet --manifest-path python/Cargo.toml --out "$work/wheels"
"$venv/bin/pip" install --quiet --disable-pip-version-check --force-reinstall --no-deps "$work"/wheels/ellipsoid-*.whl
t3=$(date +%s)
# The command the bit-identity tests compare against.
cargo build --release -q -p ellipsoid-trainer --bin ellipsoid
t4=$(date +%s)
root=$PWD
(cd "$work" && ELLIPSOID_BIN="$root/target/release/ellipsoid" "$venv/bin/python" -m pytest -q \
  -p no:cacheprovider "$root/python/tests")
t5=$(date +%s)
echo "python: seconds: venv and pip $((t1 - t0)), fmt and clippy $((t2 - t1)), wheel build and install $((t3 - t2)), ellipsoid binary $((t4 - t3)), pytest $((t5 - t4))"
