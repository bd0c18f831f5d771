#!/usr/bin/env bash
# Builds leeward (installing the system libraries it needs on Debian 12 when run
# as root) and runs `leeward demo`: the invented demo scenario written as GRIB2
# and processed into CF NetCDF. Extra arguments go to `leeward demo`.
set -euo pipefail
cd "$(dirname "$0")/.."
bash tests/setup-system.sh
cargo build --quiet
exec target/debug/leeward demo "$@"
