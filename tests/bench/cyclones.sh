#!/usr/bin/env bash
# What the cyclone products cost on top of the rest of a step: the benchmark step with
# relative humidity and mean sea-level pressure added (tests/bench/add_humidity.py) and
# the same step 6 h later (whose tracks are made from both steps), through
# `cargo bench --bench step` in paired rounds: in each round the two steps without the
# new products and the two with them (the default), side by side, the order switched
# every round, so that the machine's drift and the order fall on both. Medians over the
# rounds, and the share of each round's pair, first against the step without the
# products and then against the step with; then the same in processor seconds.
#
#   bash tests/bench/cyclones.sh [--res 0.25|0.5|1.0] [--rounds N]
#
# Speed is never asserted; the figures go to docs/performance.md.
set -euo pipefail
cd "$(dirname "$0")/../.."
res=0.25
rounds=5
while [ $# -gt 0 ]; do
  case "$1" in
    --res) res="$2"; shift 2 ;;
    --rounds) rounds="$2"; shift 2 ;;
    *) echo "usage: bash tests/bench/cyclones.sh [--res R] [--rounds N]" >&2; exit 2 ;;
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
rm -rf target/bench/out-cyc
LEEWARD_BENCH_PAIRED="$off" LEEWARD_BENCH_ROUNDS="$rounds" \
  cargo bench --quiet --bench step -- "$input" target/bench/out-cyc "$next" | tee target/bench/cyclones.jsonl
rm -rf target/bench/out-cyc
"$py" - <<'PY'
import json
import statistics as st
rows = [json.loads(l) for l in open("target/bench/cyclones.jsonl") if l.startswith("{")]
rows = [r for r in rows if r["what"] == "pair"]
rounds = sorted({r["round"] for r in rows})
def at(rnd, mode, step):
    return next(r for r in rows if (r["round"], r["mode"], r["step"]) == (rnd, mode, step))
for step, what in (("first", "first step"), ("next", "next step (changes, PV budget, tracks from both steps)")):
    off = [at(k, "off", step)["seconds"] for k in rounds]
    on = [at(k, "on", step)["seconds"] for k in rounds]
    share_off = [100 * (b - a) / a for a, b in zip(off, on)]
    share_on = [100 * (b - a) / b for a, b in zip(off, on)]
    print(f"{what}, {len(rounds)} rounds: median {st.median(off):.2f} s without the new products, "
          f"{st.median(on):.2f} s with them (rounds {min(off):.2f}-{max(off):.2f} and {min(on):.2f}-{max(on):.2f} s)")
    print(f"  added, median of the rounds' pairs: {st.median(share_off):.1f} % of the step without "
          f"(rounds {min(share_off):.1f} to {max(share_off):.1f} %), {st.median(share_on):.1f} % of the step with "
          f"(rounds {min(share_on):.1f} to {max(share_on):.1f} %)")
    # Processor seconds (every thread): what the products cost the machine, less
    # swayed than the wall clock by other work on a shared machine.
    c_off = [at(k, "off", step)["cpu_seconds"] for k in rounds]
    c_on = [at(k, "on", step)["cpu_seconds"] for k in rounds]
    c_share = [100 * (b - a) / a for a, b in zip(c_off, c_on)]
    print(f"  processor seconds: median {st.median(c_off):.2f} without, {st.median(c_on):.2f} with; added, "
          f"median of the pairs: {st.median(c_share):.1f} % of the step without "
          f"(rounds {min(c_share):.1f} to {max(c_share):.1f} %)")
    fams = {}
    for k in rounds:
        for mode in ("off", "on"):
            for n, s in at(k, mode, step)["families"].items():
                fams.setdefault((n, mode), []).append(s)
    for n in sorted({n for n, _ in fams}):
        a, b = st.median(fams.get((n, "off"), [0.0])), st.median(fams.get((n, "on"), [0.0]))
        print(f"    {n:<14} {a:7.3f} s  {b:7.3f} s  {b - a:+.3f} s")
PY
