#!/usr/bin/env python3
"""How leeward's cost grows with the grid: one benchmark step at several resolutions.

    python3 tests/bench/scaling.py --leeward target/release/leeward --work DIR
        [--res 1.0 0.5 0.25] [--runs N] [--eccodes-runs N] [--json]

For each resolution the benchmark step is written into DIR (tests/bench/make_input.py,
cached), timed with ecCodes decoding it alone (tests/bench/eccodes_decode.py), and processed
by `leeward process` into a fresh output directory, so that no earlier step is found for the
changes in time. Each run is made on every core and on one thread (RAYON_NUM_THREADS=1),
the two interleaved so that a change of load on the machine hits both alike; the best of N
runs by wall time is kept (default 1 at 0.25 degree, 3 at the coarser grids).

Recorded per run: the wall time, measured here around the child process; the split into
decode, diagnostics and write from leeward's summary line; and the child's own peak
resident memory, from the rusage that os.wait4 returns for that child alone.

Printed: a table per resolution; the exponent b of cost = a * points^b fitted by least
squares in log-log over the resolutions (points = nlon * nlat * fields), on every core and
on one thread (and for each part of the split); the speed-up of every core over one thread
with its parallel efficiency (speed-up / cores); leeward's wall time over ecCodes' decode
time; and the peak memory. With --json, one more line: {"what": "scaling", ...}.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent

#: The summary line of `leeward process`, e.g. "(20.60 s: decode 2.94, diagnostics 10.72, write 6.93)".
SUMMARY = re.compile(r"\((?P<total>\d+(?:\.\d+)?) s: (?P<parts>[a-z_ ]+\d+(?:\.\d+)?(?:, [a-z_ ]+\d+(?:\.\d+)?)*)\)")


def cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:
        return os.cpu_count() or 1


def parse_summary(text: str) -> dict:
    """Seconds of the step as leeward reports them: total and each named part."""
    for line in text.splitlines():
        if not line.startswith("step "):
            continue
        m = SUMMARY.search(line)
        if m:
            out = {"total": float(m.group("total"))}
            for part in m.group("parts").split(", "):
                name, value = part.rsplit(" ", 1)
                out[name.strip().replace(" ", "_")] = float(value)
            return out
    return {}


def run_leeward(binary: str, grib: Path, out_dir: Path, threads: int | None, log: Path) -> dict:
    """One `leeward process` of one step: wall seconds, leeward's split, peak RSS of the child."""
    if out_dir.exists():
        shutil.rmtree(out_dir)
    out_dir.mkdir(parents=True)
    env = dict(os.environ)
    env.pop("RAYON_NUM_THREADS", None)
    if threads is not None:
        env["RAYON_NUM_THREADS"] = str(threads)
    out_log, err_log = log.with_name(log.name + ".out"), log.with_name(log.name + ".err")
    with open(out_log, "wb") as fo, open(err_log, "wb") as fe:
        t0 = time.perf_counter()
        p = subprocess.Popen([binary, "process", "--out", str(out_dir), str(grib)],
                             stdout=fo, stderr=fe, env=env)
        _, status, usage = os.wait4(p.pid, 0)
        wall = time.perf_counter() - t0
    p.returncode = os.waitstatus_to_exitcode(status)
    stdout = out_log.read_text(errors="replace")
    if p.returncode != 0:
        err = err_log.read_text(errors="replace")[-2000:]
        raise RuntimeError(f"leeward process exited with {p.returncode} on {grib}:\n{stdout}\n{err}")
    split = parse_summary(stdout)
    if not split:
        raise RuntimeError(f"no step summary line in the output of leeward process:\n{stdout}")
    products = sum(f.stat().st_size for f in out_dir.iterdir() if f.is_file())
    shutil.rmtree(out_dir)
    return {"wall_s": wall, "split_s": split, "peak_rss_mib": usage.ru_maxrss / 1024.0,
            "product_mb": products / 1e6}


def fit_power(xs: list[float], ys: list[float]):
    """Least squares of log y = log a + b log x: (a, b), or None with fewer than two points."""
    pts = [(math.log(x), math.log(y)) for x, y in zip(xs, ys) if x > 0 and y and y > 0]
    if len({p[0] for p in pts}) < 2:
        return None
    n = len(pts)
    mx = sum(p[0] for p in pts) / n
    my = sum(p[1] for p in pts) / n
    sxx = sum((p[0] - mx) ** 2 for p in pts)
    sxy = sum((p[0] - mx) * (p[1] - my) for p in pts)
    b = sxy / sxx
    return math.exp(my - b * mx), b


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--leeward", default=str(ROOT / "target/release/leeward"),
                    help="the leeward binary (default target/release/leeward)")
    ap.add_argument("--work", type=Path, required=True,
                    help="directory for the inputs (kept, cached) and the output (removed after each run)")
    ap.add_argument("--res", type=float, nargs="+", default=[1.0, 0.5, 0.25],
                    choices=(0.25, 0.5, 1.0), help="grid spacings, degrees (default 1.0 0.5 0.25)")
    ap.add_argument("--runs", type=int, default=None,
                    help="runs per resolution and thread setting, best kept (default 1 at 0.25, 3 otherwise)")
    ap.add_argument("--eccodes-runs", type=int, default=3, help="runs of the ecCodes decode, best kept (default 3)")
    ap.add_argument("--json", action="store_true", help="also print one JSON line")
    args = ap.parse_args(argv)

    binary = str(Path(args.leeward).resolve())
    if not os.access(binary, os.X_OK):
        print(f"scaling: {binary} is not an executable", file=sys.stderr)
        return 2
    work = args.work.resolve()
    work.mkdir(parents=True, exist_ok=True)
    ncores = cores()
    version = subprocess.run([binary, "--version"], capture_output=True, text=True).stdout.strip()
    started = time.strftime("%Y-%m-%dT%H:%MZ", time.gmtime())
    print(f"machine: {ncores} cores, {platform.system()} {platform.release()}, "
          f"load average {' '.join(f'{x:.2f}' for x in os.getloadavg())}; {version} ({binary}); {started}")

    rows = []
    for res in sorted(args.res, reverse=True):
        grib = work / f"step-{res}deg.grib2"
        made = subprocess.run([sys.executable, str(HERE / "make_input.py"), str(grib), "--res", str(res)],
                              capture_output=True, text=True, check=True)
        info = json.loads(made.stdout.strip().splitlines()[-1])
        fields = len(info["levels_hpa"]) * len(info["fields"])
        points = info["nlon"] * info["nlat"] * fields
        ecc = json.loads(subprocess.run(
            [sys.executable, str(HERE / "eccodes_decode.py"), str(grib), "--runs", str(args.eccodes_runs)],
            capture_output=True, text=True, check=True).stdout.strip().splitlines()[-1])
        runs = args.runs if args.runs is not None else (1 if res == 0.25 else 3)
        runs = max(1, runs)
        best: dict[str, dict] = {}
        peak: dict[str, float] = {}
        walls: dict[str, list] = {"all": [], "one": []}
        for i in range(runs):
            for setting, threads in (("all", None), ("one", 1)):
                r = run_leeward(binary, grib, work / f"out-{res}deg-{setting}", threads,
                                work / f"log-{res}deg-{setting}")
                walls[setting].append(round(r["wall_s"], 3))
                peak[setting] = max(peak.get(setting, 0.0), r["peak_rss_mib"])
                if setting not in best or r["wall_s"] < best[setting]["wall_s"]:
                    best[setting] = r
                print(f"  {res} deg, {'every core' if threads is None else '1 thread'}, run {i + 1}/{runs}: "
                      f"{r['wall_s']:.2f} s wall, leeward {r['split_s']}, peak {r['peak_rss_mib']:.0f} MiB",
                      file=sys.stderr, flush=True)
        t_all, t_one = best["all"]["wall_s"], best["one"]["wall_s"]
        speedup = t_one / t_all
        rows.append({
            "res": res, "nlon": info["nlon"], "nlat": info["nlat"], "fields": fields, "points": points,
            "input_bytes": grib.stat().st_size, "runs": runs,
            "eccodes_decode_s": ecc["seconds"], "eccodes_runs": args.eccodes_runs,
            "all_cores": {"wall_s": round(t_all, 3), "walls_s": walls["all"],
                          "split_s": best["all"]["split_s"], "peak_rss_mib": round(peak["all"], 1),
                          "product_mb": round(best["all"]["product_mb"], 1)},
            "one_thread": {"wall_s": round(t_one, 3), "walls_s": walls["one"],
                           "split_s": best["one"]["split_s"], "peak_rss_mib": round(peak["one"], 1)},
            "speedup": round(speedup, 3), "efficiency": round(speedup / ncores, 3),
            "wall_over_eccodes": round(t_all / ecc["seconds"], 2),
            "wall_over_eccodes_one_thread": round(t_one / ecc["seconds"], 2),
        })

    # Exponents of cost = a * points^b.
    pts = [r["points"] for r in rows]
    exponents = {}
    for name, ys in [
        ("all_cores", [r["all_cores"]["wall_s"] for r in rows]),
        ("one_thread", [r["one_thread"]["wall_s"] for r in rows]),
        ("eccodes_decode", [r["eccodes_decode_s"] for r in rows]),
        *[(f"{setting}_{part}", [r[setting]["split_s"].get(part) for r in rows])
          for setting in ("all_cores", "one_thread") for part in ("decode", "diagnostics", "write")],
        ("peak_rss_all_cores", [r["all_cores"]["peak_rss_mib"] for r in rows]),
    ]:
        f = fit_power(pts, ys)
        exponents[name] = None if f is None else {"b": round(f[1], 3), "a": f[0]}

    # The table.
    print()
    head = (f"{'res':>5} {'grid':>9} {'M points':>8} {'ecCodes':>8} | {'every core: wall':>16} "
            f"{'decode':>7} {'diag':>7} {'write':>7} | {'1 thread: wall':>14} {'decode':>7} {'diag':>7} "
            f"{'write':>7} | {'t1/t' + str(ncores):>6} {'effic.':>6} | {'wall/ecC':>8} {'1t/ecC':>6} | "
            f"{'RSS MiB':>7} {'RSS 1t':>7}")
    print(head)
    print("-" * len(head))
    for r in rows:
        a, o = r["all_cores"], r["one_thread"]
        sa, so = a["split_s"], o["split_s"]
        print(f"{r['res']:>5} {str(r['nlon']) + 'x' + str(r['nlat']):>9} {r['points'] / 1e6:>8.1f} "
              f"{r['eccodes_decode_s']:>8.2f} | {a['wall_s']:>16.2f} {sa.get('decode', float('nan')):>7.2f} "
              f"{sa.get('diagnostics', float('nan')):>7.2f} {sa.get('write', float('nan')):>7.2f} | "
              f"{o['wall_s']:>14.2f} {so.get('decode', float('nan')):>7.2f} "
              f"{so.get('diagnostics', float('nan')):>7.2f} {so.get('write', float('nan')):>7.2f} | "
              f"{r['speedup']:>6.2f} {r['efficiency']:>6.2f} | {r['wall_over_eccodes']:>8.2f} "
              f"{r['wall_over_eccodes_one_thread']:>6.2f} | {a['peak_rss_mib']:>7.0f} {o['peak_rss_mib']:>7.0f}")
    print("(seconds; wall measured around `leeward process`, best of the runs; decode/diag/write from "
          "leeward's summary of that run; ecCodes: decode alone, best of "
          f"{args.eccodes_runs}; RSS: peak resident memory of the child, max over the runs)")
    print()

    def b(name):
        e = exponents.get(name)
        return "n/a" if e is None else f"{e['b']:.3f}"

    if len(rows) < 2:
        print("exponent b of cost = a * points^b: needs at least two resolutions")
    else:
        print(f"exponent b of cost = a * points^b over {len(rows)} resolutions: leeward, every core ({ncores}): "
              f"{b('all_cores')}; leeward, 1 thread: {b('one_thread')}; ecCodes decode: {b('eccodes_decode')}")
        for setting, label in (("all_cores", "every core"), ("one_thread", "1 thread")):
            print(f"  {label}: decode {b(setting + '_decode')}, diagnostics {b(setting + '_diagnostics')}, "
                  f"write {b(setting + '_write')}")
        print(f"  peak memory (every core): {b('peak_rss_all_cores')}")
    for r in rows:
        print(f"{r['res']} deg: speed-up 1 -> {ncores} threads {r['speedup']:.2f} "
              f"(efficiency {r['efficiency']:.2f}); leeward wall / ecCodes decode {r['wall_over_eccodes']:.2f} "
              f"(1 thread {r['wall_over_eccodes_one_thread']:.2f}); peak RSS {r['all_cores']['peak_rss_mib']:.0f} MiB "
              f"(1 thread {r['one_thread']['peak_rss_mib']:.0f} MiB)")

    if args.json:
        print(json.dumps({
            "what": "scaling", "leeward": binary, "version": version, "cores": ncores,
            "started": started, "load_average_end": [round(x, 2) for x in os.getloadavg()],
            "rows": rows, "exponents": exponents,
        }))
    return 0


if __name__ == "__main__":
    sys.exit(main())
