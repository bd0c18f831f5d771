#!/usr/bin/env bash
# Bad input at length, and memory on a huge input, with the release build:
#
#   1. tests/python/mutation.py --long: 100,000 mutated GRIB2 files (the suite's
#      seeds plus the first messages of the large real samples) through
#      `leeward inspect` and `leeward process`; prints the counts: files, runs,
#      exit codes, panics, signal deaths, time-outs and refusals that do not name
#      their file (failing cases kept in target/mutation-failures/);
#   2. tests/bench/big_input.py: peak resident memory of `leeward process` and of
#      `leeward serve` (the service and its step processes) on one step and on a
#      2 GiB file of many steps.
#
#   bash tests/bench/robustness.sh [--files N] [--seed S] [--gib G] [--res R]
#                                  [--skip-mutation] [--skip-big]
#
# Prints figures; exits 1 when the mutation run found a panic, a signal death, a
# time-out or an unnamed refusal. Several hours on 2 shared cores (the mutation
# run takes most of it); the 2 GiB file needs about 4 GiB of free disk in target/.
set -euo pipefail
cd "$(dirname "$0")/../.."
files=100000
seed=20260314
gib=2.0
res=0.5
skip_mut=0
skip_big=0
while [ $# -gt 0 ]; do
  case "$1" in
    --files) files="$2"; shift 2 ;;
    --seed) seed="$2"; shift 2 ;;
    --gib) gib="$2"; shift 2 ;;
    --res) res="$2"; shift 2 ;;
    --skip-mutation) skip_mut=1; shift ;;
    --skip-big) skip_big=1; shift ;;
    *) echo "usage: bash tests/bench/robustness.sh [--files N] [--seed S] [--gib G] [--res R] [--skip-mutation] [--skip-big]" >&2; exit 2 ;;
  esac
done
bash tests/setup-system.sh
py="$(bash tests/setup-python.sh)"
cargo build --release --quiet
bin="$(pwd)/target/release/leeward"
mkdir -p target/bench
echo "machine: $(nproc) cores, $(free -g | awk '/Mem:/{print $2}') GiB, $(uname -sr); commit $(git rev-parse --short HEAD 2>/dev/null || echo none); $(date -u +%Y-%m-%dT%H:%MZ); load $(cut -d' ' -f1-3 /proc/loadavg)"
status=0
if [ "$skip_mut" = 0 ]; then
  echo "== 1. $files mutated files through inspect and process"
  "$py" tests/python/mutation.py --long --files "$files" --seed "$seed" --bin "$bin" || status=1
fi
if [ "$skip_big" = 0 ]; then
  echo "== 2. peak memory on a ${gib} GiB input of ${res}-degree steps"
  "$py" tests/bench/big_input.py --leeward "$bin" --work target/bench/big --res "$res" \
    --gib "$gib" --json
fi
exit "$status"
