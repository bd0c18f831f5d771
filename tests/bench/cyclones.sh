#!/usr/bin/env bash
# What the cyclone products cost on top of the rest of a step: the benchmark step with
# relative humidity and mean sea-level pressure added (tests/bench/add_humidity.py), run
# through `cargo bench --bench step` twice, the new products switched off and on (the
# default), each with the next step 6 h later (whose tracks are made from both steps).
#
#   bash tests/bench/cyclones.sh [--res 0.25|0.5|1.0]
#
# Speed is never asserted; the figures go to docs/performance.md.
set -euo pipefail
cd "$(dirname "$0")/../.."
res=0.25
while [ $# -gt 0 ]; do
  case "$1" in
    --res) res="$2"; shift 2 ;;
    *) echo "usage: bash tests/bench/cyclones.sh [--res R]" >&2; exit 2 ;;
  esac
done
py="$(bash tests/setup-python.sh)"
mkdir -p target/bench
base="target/bench/step-${res}deg.grib2"
"$py" tests/bench/make_input.py "$base" --res "$res" >&2
input="target/bench/step-${res}deg-moist.grib2"
[ "$input" -nt "$base" ] || "$py" tests/bench/add_humidity.py "$base" "$input"
next="target/bench/step-${res}deg-moist-next.grib2"
"$py" tests/bench/shift_step.py "$input" "$next" --hours 6
off=target/bench/cyclones-off.toml
cat > "$off" <<'TOML'
[products]
mslp = false
eady = false
theta_e = false
isentropic_humidity = false
low_level_pv = false
cyclones = false
TOML
echo "machine: $(nproc) cores, $(uname -sr); commit $(git rev-parse --short HEAD 2>/dev/null || echo none); $(date -u +%Y-%m-%dT%H:%MZ); load $(cut -d' ' -f1-3 /proc/loadavg)"
for mode in off on; do
  echo "== new products $mode"
  rm -rf target/bench/out-cyc
  if [ "$mode" = off ]; then
    LEEWARD_BENCH_CONFIG="$off" cargo bench --quiet --bench step -- "$input" target/bench/out-cyc "$next" | tee "target/bench/cyclones-$mode.jsonl"
  else
    cargo bench --quiet --bench step -- "$input" target/bench/out-cyc "$next" | tee "target/bench/cyclones-$mode.jsonl"
  fi
done
rm -rf target/bench/out-cyc
"$py" - <<'PY'
import json
def load(mode):
    rows = [json.loads(l) for l in open(f"target/bench/cyclones-{mode}.jsonl") if l.startswith("{")]
    pipe = min(r["seconds"] for r in rows if r["what"] == "pipeline")
    nxt = [r for r in rows if r["what"] == "next_step"]
    fam = {r["name"]: r["seconds"] for r in rows if r["what"] == "family"}
    return pipe, (nxt[0]["step_s"] if nxt else float("nan")), fam
(p0, n0, f0), (p1, n1, f1) = load("off"), load("on")
print(f"step: {p0:.2f} s without the new products, {p1:.2f} s with them: +{p1 - p0:.2f} s ({100 * (p1 - p0) / p0:.1f} %)")
print(f"next step (tracks from both steps): {n0:.2f} s and {n1:.2f} s: +{n1 - n0:.2f} s ({100 * (n1 - n0) / n0:.1f} %)")
for k in sorted(set(f0) | set(f1)):
    print(f"  {k:<12} {f0.get(k, 0.0):7.3f} s  {f1.get(k, 0.0):7.3f} s")
PY
