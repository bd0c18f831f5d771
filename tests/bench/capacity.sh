#!/usr/bin/env bash
# Capacity and coordinator benchmark for running steps on a batch scheduler.
#
#   bash tests/bench/capacity.sh [--steps N] [--jobs N] [--res "1.0 0.5 0.25"]
#
#   1. tests/bench/capacity.py: per-step cost at 1, 0.5 and 0.25 degree (a first step
#      and a later one with the changes in time and the PV budget), steps per hour per
#      node, and the nodes a 51-member, 0-240 h, 6-hourly feed needs within 30 minutes;
#   2. tests/bench/coordinator.py: `leeward serve` on a synthetic backlog of N steps
#      (default 10000): files catalogued, ledger records and steps per second, the main
#      loop's CPU per step, peak memory, restart time; sbatch and squeue on a
#      single-node Slurm cluster (tests/slurm/cluster.sh) with N held jobs (default 1000).
# Prints figures only; nothing is asserted. About 20 minutes on 2 cores.
set -euo pipefail
cd "$(dirname "$0")/../.."
steps=10000
jobs=1000
res="1.0 0.5 0.25"
while [ $# -gt 0 ]; do
  case "$1" in
    --steps) steps="$2"; shift 2 ;;
    --jobs) jobs="$2"; shift 2 ;;
    --res) res="$2"; shift 2 ;;
    *) echo "usage: bash tests/bench/capacity.sh [--steps N] [--jobs N] [--res \"1.0 0.5 0.25\"]" >&2; exit 2 ;;
  esac
done
bash tests/setup-system.sh
py="$(bash tests/setup-python.sh)"
cargo build --release --quiet
bin="$(pwd)/target/release/leeward"
mkdir -p target/bench
echo "machine: $(nproc) cores, $(free -g | awk '/Mem:/{print $2}') GiB, $(uname -sr); commit $(git rev-parse --short HEAD 2>/dev/null || echo none); $(date -u +%Y-%m-%dT%H:%MZ); load $(cut -d' ' -f1-3 /proc/loadavg)"
echo "== 1. per-step cost and capacity"
# shellcheck disable=SC2086
"$py" tests/bench/capacity.py --leeward "$bin" --work target/bench/capacity --res $res
echo "== 2. the coordinator on a backlog of $steps steps"
"$py" tests/bench/coordinator.py --leeward "$bin" --steps "$steps" --jobs "$jobs"
