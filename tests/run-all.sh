#!/usr/bin/env bash
# The whole leeward test suite: formatting and lints, Rust unit and integration
# tests, then the Python reference suite (ecCodes-encoded inputs, real model
# samples, CF compliance checker, netCDF4/xarray/pyproj readers).
set -euo pipefail
cd "$(dirname "$0")/.."
bash tests/setup-system.sh
py="$(bash tests/setup-python.sh)"

# The places tests/python/conftest.py looks in, in the same order; the folder found is
# handed to the Rust tests too (tests/common/mod.rs reads LEEWARD_SAMPLES), so that both
# halves of the suite read the same samples or both say they skip.
samples="${LEEWARD_SAMPLES:-$(pwd)/../shared/data/grib2}"
if [ -z "${LEEWARD_SAMPLES:-}" ] && [ ! -d "$samples" ]; then
  samples=/work/shared/data/grib2
fi
if [ -f "$samples/reference-decode.json" ]; then
  export LEEWARD_SAMPLES="$samples"
  echo "real GRIB2 samples: $samples"
else
  echo "=================================================================="
  echo "NOTE: real GRIB2 samples not found at $samples:"
  echo "      the tests that need them are SKIPPED (set LEEWARD_SAMPLES)."
  echo "=================================================================="
fi

cargo fmt --check
cargo clippy --all-targets --quiet -- -D warnings
cargo build --quiet
cargo test --quiet
# The temporary folders of passed tests are removed (about 1.6 GB a run); a failed
# test's stay under pytest's base temporary folder for a look.
LEEWARD_BIN="$(pwd)/target/debug/leeward" "$py" -m pytest -q -rs --durations=30 \
  -o tmp_path_retention_policy=failed tests/python
