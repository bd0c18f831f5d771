#!/usr/bin/env bash
# The step benchmark: a 0.25-degree global step of 26 levels x (T, Z, u, v), complex
# packing with spatial differencing, written by ecCodes; decoded by ecCodes alone and
# processed by leeward in the same run. Prints the figures and their ratios.
#   bash tests/bench/run.sh [--res 0.25|0.5|1.0]
set -euo pipefail
cd "$(dirname "$0")/../.."
res=0.25
[ "${1:-}" = "--res" ] && res="$2"
bash tests/setup-system.sh
py="$(bash tests/setup-python.sh)"
mkdir -p target/bench
input="target/bench/step-${res}deg.grib2"
"$py" tests/bench/make_input.py "$input" --res "$res" >&2
next="target/bench/step-${res}deg-next.grib2"
"$py" tests/bench/shift_step.py "$input" "$next" --hours 6
echo "machine: $(nproc) cores, $(free -g | awk '/Mem:/{print $2}') GiB, $(uname -sr); commit $(git rev-parse --short HEAD 2>/dev/null || echo none); $(date -u +%Y-%m-%dT%H:%MZ)"
ecc="$("$py" tests/bench/eccodes_decode.py "$input" --runs 3)"
echo "$ecc"
rm -rf target/bench/out
cargo bench --quiet --bench step -- "$input" target/bench/out "$next" | tee target/bench/leeward.jsonl
rm -rf target/bench/out
"$py" - "$ecc" target/bench/leeward.jsonl <<'PY'
import json, sys
ecc = json.loads(sys.argv[1])
rows = [json.loads(l) for l in open(sys.argv[2]) if l.startswith("{")]
dec = {r["threads"]: r for r in rows if r["what"] == "decode"}
step = [r for r in rows if r["what"] == "step"][0]
pipe = [r for r in rows if r["what"] == "pipeline"][0]
one = dec[1]
many = dec[max(dec)]
print(f"decode, 1 thread: leeward {one['mpoints_per_s']} M points/s vs ecCodes {ecc['mpoints_per_s']} M points/s: ratio {one['mpoints_per_s']/ecc['mpoints_per_s']:.2f}")
print(f"decode, {max(dec)} threads: leeward {many['seconds']:.2f} s vs ecCodes {ecc['seconds']:.2f} s: ratio {ecc['seconds']/many['seconds']:.2f}x faster")
nxt = [r for r in rows if r["what"] == "next_step"]
if nxt:
    print(f"next step 6 h later: {nxt[0]['step_s']:.2f} s, of which changes in time and PV budget {nxt[0]['changes_and_budget_s']:.2f} s")
print(f"whole step: leeward {pipe['seconds']:.2f} s (decode {step['decode_s']:.2f}, diagnostics {step['diagnostics_s']:.2f}, write {step['write_s']:.2f}) vs ecCodes decode alone {ecc['seconds']:.2f} s: ratio {pipe['seconds']/ecc['seconds']:.2f}")
PY
