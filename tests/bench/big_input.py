#!/usr/bin/env python3
"""Peak memory on a 2 GB input: `leeward process` and `leeward serve` against one step.

    python3 tests/bench/big_input.py --leeward target/release/leeward --work DIR
        [--res 0.5] [--gib 2.0] [--json]

The benchmark step (tests/bench/make_input.py, cached in DIR) is copied with its forecast
time moved by 6 h at a time (tests/bench/shift_step.py) and the copies are joined into one
file of at least --gib GiB: many steps in one file, the way some models deliver a whole run.
Then, each in a fresh output tree:

1. `leeward process` of the one step, and of the big file: peak resident memory of the
   child (`ru_maxrss` from os.wait4, for that child alone) and wall time;
2. `leeward serve` given the one step, and (a fresh service) the big file, renamed into
   its incoming directory: the service's peak resident memory (`VmHWM` of
   /proc/PID/status, the service alone) once every step of it is published, and the
   largest and median peak of its step processes (each reports its own `VmHWM`, logged at
   debug level as `peak_rss_mib` when its result is taken).

A file is catalogued section by section and each step reads only its own messages, so
the big file should cost about what one step costs, not its size. Printed: a table, and
with --json one line {"what": "big_input", ...}. Not a test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
LEVELS_HPA = [1000, 975, 950, 925, 900, 850, 800, 750, 700, 650, 600, 550, 500, 450, 400,
              350, 300, 250, 200, 150, 100, 70, 50, 30, 20, 10]


def make_big(py: str, step: Path, big: Path, gib: float) -> int:
    """Join shifted copies of `step` into `big` until it holds `gib` GiB; returns the steps."""
    want = int(gib * (1 << 30))
    n = -(-want // step.stat().st_size)
    if big.exists() and big.stat().st_size >= want:
        return n
    tmp = big.with_suffix(".tmp")
    with open(tmp, "wb") as out:
        for k in range(n):
            shifted = big.parent / f"shifted-{k}.grib2"
            subprocess.run([py, str(HERE / "shift_step.py"), str(step), str(shifted),
                            "--hours", str(6 * k)], check=True)
            with open(shifted, "rb") as f:
                shutil.copyfileobj(f, out, 1 << 24)
            shifted.unlink()
    os.replace(tmp, big)
    return n


def process_peak(binary: str, grib: Path, out: Path) -> dict:
    """One `leeward process`: wall seconds, exit code, peak RSS of the child (MiB)."""
    shutil.rmtree(out, ignore_errors=True)
    out.mkdir(parents=True)
    t0 = time.perf_counter()
    with open(out.with_suffix(".log"), "wb") as log:
        p = subprocess.Popen([binary, "process", "--out", str(out), str(grib)], stdout=log,
                             stderr=subprocess.STDOUT)
        _, status, ru = os.wait4(p.pid, 0)
    wall = time.perf_counter() - t0
    files = len(list(out.glob("*.nc")))
    shutil.rmtree(out, ignore_errors=True)
    return {"seconds": round(wall, 1), "exit": os.waitstatus_to_exitcode(status),
            "peak_rss_mib": round(ru.ru_maxrss / 1024, 1), "files": files}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def vm_hwm_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return 0.0


def serve_peak(binary: str, grib: Path, root: Path, steps: int, timeout_s: float) -> dict:
    """A fresh `leeward serve` given `grib`: its peak RSS once `steps` steps are published."""
    shutil.rmtree(root, ignore_errors=True)
    (root / "in").mkdir(parents=True)
    cfg = root / "leeward.toml"
    cfg.write_text(f"""
[service]
watch_dir = "{root}/in"
out_dir = "{root}/out"
state_dir = "{root}/state"
metrics_listen = "127.0.0.1:{free_port()}"
catch_up_hours = 0
settle_s = 1.0
scan_interval_s = 2.0

[[feed]]
name = "big"
levels_hpa = {LEVELS_HPA}
""")
    log = open(root / "serve.log", "wb")
    # The step processes' own peaks are logged at debug level ("step process's result taken").
    env = dict(os.environ, LEEWARD_LOG="info,leeward::service=debug")
    p = subprocess.Popen([binary, "serve", "--config", str(cfg)], stdout=log,
                         stderr=subprocess.STDOUT, env=env)
    try:
        time.sleep(1.0)
        before = vm_hwm_mib(p.pid)
        tmp = root / "in" / ".input.tmp"
        t0 = time.perf_counter()
        if grib.stat().st_dev == tmp.parent.stat().st_dev:
            os.link(grib, tmp)  # no second copy of 2 GB on the disk
        else:
            shutil.copy(grib, tmp)
        os.rename(tmp, root / "in" / "input.grib2")
        ledger = root / "state" / "ledger.jsonl"
        published = 0
        while time.perf_counter() - t0 < timeout_s:
            if ledger.exists():
                published = sum('"event":"published"' in ln for ln in ledger.read_text().splitlines())
            if published >= steps or p.poll() is not None:
                break
            time.sleep(1.0)
        took = round(time.perf_counter() - t0, 1)
        peak = round(vm_hwm_mib(p.pid), 1)
    finally:
        p.terminate()
        p.wait(timeout=120)
        log.close()
    steps_mib = [int(k) for k in re.findall(r"result taken.*peak_rss_mib=(\d+)",
                                            (root / "serve.log").read_text(errors="replace"))]
    shutil.rmtree(root / "out", ignore_errors=True)
    return {"seconds": took, "published": published,
            "steps": steps, "rss_before_mib": round(before, 1), "peak_rss_mib": peak,
            "step_processes": len(steps_mib),
            "step_process_peak_mib": max(steps_mib) if steps_mib else None,
            "step_process_median_mib": sorted(steps_mib)[len(steps_mib) // 2] if steps_mib else None}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--leeward", default="target/release/leeward")
    ap.add_argument("--work", default="target/bench/big")
    ap.add_argument("--res", default="0.5")
    ap.add_argument("--gib", type=float, default=2.0)
    ap.add_argument("--timeout", type=float, default=7200.0)
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--skip-process", action="store_true",
                    help="measure the service only, not `leeward process`")
    a = ap.parse_args()
    py = sys.executable
    work = Path(a.work).resolve()
    work.mkdir(parents=True, exist_ok=True)
    step = work / f"step-{a.res}deg.grib2"
    subprocess.run([py, str(HERE / "make_input.py"), str(step), "--res", a.res], check=True)
    big = work / f"big-{a.gib:g}GiB-{a.res}deg.grib2"
    n = make_big(py, step, big, a.gib)
    binary = str(Path(a.leeward).resolve())
    print(f"one step: {step.stat().st_size / 2**20:.0f} MiB; big file: "
          f"{big.stat().st_size / 2**30:.2f} GiB, {n} steps", flush=True)
    r = {"what": "big_input", "res": a.res, "step_mib": round(step.stat().st_size / 2**20, 1),
         "big_gib": round(big.stat().st_size / 2**30, 2), "steps": n}
    if not a.skip_process:
        r["process_step"] = process_peak(binary, step, work / "out-step")
        print(f"process, one step:  {r['process_step']}", flush=True)
        r["process_big"] = process_peak(binary, big, work / "out-big")
        print(f"process, big file:  {r['process_big']}", flush=True)
    r["serve_step"] = serve_peak(binary, step, work / "serve-step", 1, a.timeout)
    print(f"serve, one step:    {r['serve_step']}", flush=True)
    r["serve_big"] = serve_peak(binary, big, work / "serve-big", n, a.timeout)
    print(f"serve, big file:    {r['serve_big']}", flush=True)
    if a.json:
        print(json.dumps(r))
    return 0


if __name__ == "__main__":
    sys.exit(main())
