#!/usr/bin/env python3
"""The coordinator's own limits, on a synthetic backlog of many steps.

    python3 tests/bench/coordinator.py --leeward BIN [--steps 10000] [--jobs 1000] [--work DIR]
        [--skip-slurm] [--max-s 7200]

1. Writes a backlog of --steps small steps (T, Z, u, v on 1000, 850, 700 and
   500 hPa on a 10-degree global grid; 16 GRIB2 messages per step, encoded
   once with ecCodes, then copied with the reference time and forecast time
   of each step set in sections 1 and 4; WMO-No. 306 GRIB2 octet layout)
   into an incoming directory: 40 leads 6-hourly per cycle, as many 6-hourly
   cycles as it takes.
2. Starts `leeward serve` on it (local executor, 2 workers, vorticity,
   stability, thickness and its changes in time) and reads the ledger as it
   grows: how fast files are catalogued, how fast steps are published, how
   many ledger records per second are written (each one fsynced), and the
   service's peak resident memory. The steps are tiny so that what is
   measured is the coordinator (watching, cataloguing, assembling, the ledger,
   publishing, looking up earlier steps in a store of thousands of files),
   not the diagnostics.
3. Stops it and starts it again on the same state: the time to replay the
   ledger and be ready, with every step already published.
4. With a single-node Slurm cluster (tests/slurm/cluster.sh; skipped with
   the reason where it cannot start): submits --jobs held jobs with the
   options the service uses, times the submissions and one `squeue` of all
   of them, and cancels them.

Prints one JSON line per measurement and a summary table.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
import make_input  # noqa: E402  (the benchmark input's own encoder and fields)

LEVELS = (1000, 850, 700, 500)
RES = 10.0
LEADS = list(range(0, 240, 6))  # 40 leads
FIRST_CYCLE = dt.datetime(2026, 1, 1, 0)


def template_messages() -> list[bytes]:
    nlon, nlat = int(360 / RES), int(180 / RES) + 1
    lat = np.linspace(90.0, -90.0, nlat)
    lon = np.arange(nlon) * RES
    out, below = [], None
    for lev in LEVELS:
        if below is None:
            t, z, u, v = make_input.fields_for_level(lev, lat, lon)
        else:
            t, z, u, v = make_input.fields_for_level(lev, lat, lon, *below)
        below = (t, z, lev)
        for values, param in ((t, (0, 0)), (z, (3, 5)), (u, (2, 2)), (v, (2, 3))):
            out.append(bytes(make_input.encode(values, param, lev, RES, nlat, nlon, 16)))
    return out


def sections(msg: bytes):
    """(offset, length, number) of sections 1-7 (section 0 is 16 octets)."""
    k = 16
    while k < len(msg) - 4:
        n = int.from_bytes(msg[k:k + 4], "big")
        yield k, n, msg[k + 4]
        k += n


def retime(msg: bytes, ref: dt.datetime, lead: int) -> bytes:
    """Section 1 octets 13-19: reference time; section 4 (template 4.0) octets 19-22: forecast time."""
    b = bytearray(msg)
    for off, _, num in sections(msg):
        if num == 1:
            b[off + 12:off + 14] = ref.year.to_bytes(2, "big")
            b[off + 14:off + 19] = bytes([ref.month, ref.day, ref.hour, ref.minute, ref.second])
        elif num == 4:
            assert int.from_bytes(msg[off + 7:off + 9], "big") == 0, "template 4.0 expected"
            b[off + 18:off + 22] = lead.to_bytes(4, "big")
    return bytes(b)


def write_backlog(dest: Path, steps: int) -> list[Path]:
    tmpl = template_messages()
    dest.mkdir(parents=True, exist_ok=True)
    files = []
    for k in range(steps):
        cycle = FIRST_CYCLE + dt.timedelta(hours=6 * (k // len(LEADS)))
        lead = LEADS[k % len(LEADS)]
        p = dest / f"syn_{cycle:%Y%m%d%H}_{lead:03d}.grib2"
        p.write_bytes(b"".join(retime(m, cycle, lead) for m in tmpl))
        files.append(p)
    return files


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


CONFIG = """
[service]
watch_dir = "{root}/in"
out_dir = "{root}/out"
state_dir = "{root}/state"
metrics_listen = "127.0.0.1:{port}"
catch_up_hours = 0
workers = 2

[quicklook]
enabled = false

[[feed]]
name = "syn"
file_pattern = '^syn_(?P<cycle>\\d{{10}})_(?P<step>\\d{{3}})\\.grib2$'
levels_hpa = [1000, 850, 700, 500]

[feed.products]
vorticity = true
stability = true
isobaric_pv = false
isentropic = false
tropopause = false
layer_pv = false
thickness = true
thickness_change = true
run_to_run = true
pv_budget = false
cyclones = {cyclones}
"""


def ledger_counts(state: Path) -> dict[str, int]:
    c: dict[str, int] = {}
    p = state / "ledger.jsonl"
    if not p.exists():
        return c
    with open(p, "rb") as f:
        for line in f:
            i = line.find(b'"event":"')
            if i >= 0:
                ev = line[i + 9:line.find(b'"', i + 9)].decode()
                c[ev] = c.get(ev, 0) + 1
    return c


def vm_hwm_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024.0
    return float("nan")


def vm_rss_kib(pid: int) -> float:
    """Resident memory now (VmRSS of proc(5)), KiB: the whole process, children excluded."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return float(line.split()[1])
    return float("nan")


def growth_per_step(samples: list[tuple[int, float]], after: int = 1000
                    ) -> tuple[float, float] | None:
    """Least-squares slope of resident memory (KiB) over steps published, from `after` on,
    in KB (1000 bytes) per step, and its standard error (from the fit's residuals; the
    samples are a second apart and not independent, so take it as a lower bound of the
    uncertainty); None with too few samples."""
    pts = [(n, r) for n, r in samples if n >= after]
    if len(pts) < 4 or pts[-1][0] - pts[0][0] < 100:
        return None
    x = np.array([n for n, _ in pts], dtype=float)
    y = np.array([r for _, r in pts], dtype=float) * 1.024  # KiB to KB
    (slope, _), cov = np.polyfit(x, y, 1, cov=True)
    return float(slope), float(np.sqrt(cov[0, 0]))


def thread_cpu_s(pid: int, tid: int) -> float:
    """utime + stime of one thread (proc(5), fields 14 and 15, in clock ticks)."""
    f = Path(f"/proc/{pid}/task/{tid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(f[11]) + int(f[12])) / os.sysconf("SC_CLK_TCK")


def process_cpu_s(pid: int) -> float:
    f = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(f[11]) + int(f[12])) / os.sysconf("SC_CLK_TCK")


def health(port: int) -> bool:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=1) as r:
            return r.status == 200
    except OSError:
        return False


def emit(rec: dict):
    print(json.dumps(rec), flush=True)


def service_part(leeward: str, root: Path, steps: int, max_s: float = 7200.0,
                 cyclones: bool = True) -> dict:
    (root / "in").mkdir(parents=True, exist_ok=True)
    t0 = time.monotonic()
    files = write_backlog(root / "in", steps)
    gen_s = time.monotonic() - t0
    size = sum(f.stat().st_size for f in files)
    emit({"what": "backlog written", "steps": steps, "files": len(files), "bytes": size,
          "seconds": round(gen_s, 1)})
    port = free_port()
    cfg = root / "leeward.toml"
    cfg.write_text(CONFIG.format(root=root, port=port, cyclones=str(cyclones).lower()))
    log = open(root / "serve.log", "wb")
    env = dict(os.environ, LEEWARD_LOG="warn")
    t_start = time.monotonic()
    p = subprocess.Popen([leeward, "serve", "--config", str(cfg)], stdout=log,
                         stderr=subprocess.STDOUT, env=env)
    seen_at = published_at = first_seen = None
    hwm = 0.0
    samples = []
    rss = []  # (steps published, resident KiB)
    trace = open(root / "rss.jsonl", "w")  # the samples, as they are taken
    try:
        while True:
            time.sleep(1.0)
            if p.poll() is not None:
                raise SystemExit(f"leeward serve exited with {p.returncode}; see {root}/serve.log")
            c = ledger_counts(root / "state")
            hwm = max(hwm, vm_hwm_mib(p.pid))
            rss.append((c.get("published", 0), vm_rss_kib(p.pid)))
            now = time.monotonic() - t_start
            trace.write(json.dumps({"s": round(now, 1), "published": rss[-1][0],
                                    "rss_kib": rss[-1][1]}) + "\n")
            trace.flush()
            samples.append((now, c.get("seen", 0), c.get("published", 0)))
            if first_seen is None and c.get("seen", 0) > 0:
                first_seen = now
            if seen_at is None and c.get("seen", 0) >= steps:
                seen_at = now
            if c.get("published", 0) + c.get("failed", 0) >= steps or now > max_s:
                # Out of time (--max-s): what was done so far is reported.
                published_at = now
                main_cpu = thread_cpu_s(p.pid, p.pid)
                all_cpu = process_cpu_s(p.pid)
                break
        c = ledger_counts(root / "state")
        records = sum(c.values())
        ledger_bytes = (root / "state" / "ledger.jsonl").stat().st_size
        # Ledger records per second while the backlog was worked off.
        rate = records / published_at
        first_pub = next(t for t, _, n in samples if n > 0)
        pub_rate = (c.get("published", 0)) / (published_at - first_pub) if published_at > first_pub else float("nan")
        growth = growth_per_step(rss)
        res = {"what": "backlog worked off (local executor)", "steps": steps,
               "done": c.get("published", 0) + c.get("failed", 0),
               # The files were there before the start, so they count only after
               # the settle time (10 s): the rate is from the first to the last.
               "catalogued_all_s": round(seen_at, 1) if seen_at else None,
               "files_catalogued_per_s": round(steps / max(1.0, seen_at - first_seen), 1)
               if seen_at else None,
               "published_all_s": round(published_at, 1),
               "steps_published_per_s": round(pub_rate, 1),
               "published": c.get("published", 0), "failed": c.get("failed", 0),
               "ledger_records": records, "ledger_bytes": ledger_bytes,
               "ledger_records_per_s": round(rate, 1),
               "peak_rss_mib": round(hwm, 1),
               "rss_end_mib": round(rss[-1][1] / 1024, 1) if rss else None,
               # Growth of resident memory per step published after the first 1,000
               # (least squares over the samples taken each second).
               "rss_growth_kb_per_step_after_1000": None if growth is None else round(growth[0], 3),
               "rss_growth_kb_per_step_stderr": None if growth is None else round(growth[1], 3),
               # The main loop is the coordinator (watching is a thread of its
               # own, steps run on worker threads): its CPU per step is what
               # bounds how many steps one service can coordinate.
               "main_loop_cpu_s": round(main_cpu, 2),
               "main_loop_ms_per_step": round(1000 * main_cpu / steps, 2),
               "process_cpu_s": round(all_cpu, 1)}
        emit(res)
        p.send_signal(signal.SIGTERM)
        p.wait(timeout=120)
        # Restart on the same state: replay and readiness.
        t1 = time.monotonic()
        p = subprocess.Popen([leeward, "serve", "--config", str(cfg)], stdout=log,
                             stderr=subprocess.STDOUT, env=env)
        while not health(port):
            if p.poll() is not None:
                raise SystemExit("restart failed")
            time.sleep(0.02)
        ready = time.monotonic() - t1
        time.sleep(max(1.0, 2.0 * ready))
        c2 = ledger_counts(root / "state")
        res2 = {"what": "restart on the backlog's state", "ready_s": round(ready, 2),
                "ledger_records_replayed": records,
                "steps_published_again": c2.get("published", 0) - c.get("published", 0),
                "rss_after_mib": round(vm_hwm_mib(p.pid), 1)}
        emit(res2)
        p.send_signal(signal.SIGTERM)
        p.wait(timeout=120)
        res.update({"restart_ready_s": res2["ready_s"], "restart_republished": res2["steps_published_again"]})
        return res
    finally:
        if p.poll() is None:
            p.kill()
        log.close()
        trace.close()


def slurm_part(jobs: int, repo: Path) -> dict | None:
    d = Path(tempfile.mkdtemp(prefix="lwb", dir="/tmp"))
    cluster = repo / "tests" / "slurm" / "cluster.sh"
    r = subprocess.run(["bash", str(cluster), "start", str(d)], capture_output=True, text=True,
                       timeout=600)
    if r.returncode != 0:
        emit({"what": "slurm", "skipped": r.stderr.strip().splitlines()[-1:]})
        subprocess.run(["bash", str(cluster), "stop", str(d)], capture_output=True)
        return None
    env = dict(os.environ, SLURM_CONF=r.stdout.strip().split("=", 1)[1])
    stage = d / "stage"
    stage.mkdir()
    try:
        t0 = time.monotonic()
        ids = []
        for k in range(jobs):
            out = subprocess.run(
                ["sbatch", "--parsable", "--hold", f"--job-name=lw_syn_{k:05d}",
                 f"--output={stage}/job.log", "--open-mode=append", f"--chdir={stage}",
                 "--requeue", "--nodes=1", "--ntasks=1", "--cpus-per-task=1", "--mem=100M",
                 "--time=00:01:00", "--wrap", "true"],
                capture_output=True, text=True, env=env, timeout=60)
            if out.returncode != 0:
                raise SystemExit(f"sbatch failed: {out.stderr}")
            ids.append(out.stdout.strip())
        submit_s = time.monotonic() - t0
        t1 = time.monotonic()
        q = subprocess.run(["squeue", "--me", "--noheader", "--states=all", "--format=%i|%T|%r"],
                           capture_output=True, text=True, env=env, timeout=120)
        squeue_s = time.monotonic() - t1
        listed = len([x for x in q.stdout.splitlines() if x.strip()])
        res = {"what": "slurm submissions", "jobs": jobs,
               "sbatch_per_s": round(jobs / submit_s, 1),
               "sbatch_ms_each": round(1000 * submit_s / jobs, 1),
               "squeue_s_all_jobs": round(squeue_s, 3), "squeue_listed": listed}
        emit(res)
        subprocess.run(["scancel", *ids], env=env, capture_output=True, timeout=300)
        return res
    finally:
        subprocess.run(["bash", str(cluster), "stop", str(d)], capture_output=True, timeout=300)
        shutil.rmtree(d, ignore_errors=True)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--leeward", required=True)
    ap.add_argument("--steps", type=int, default=10000)
    ap.add_argument("--jobs", type=int, default=1000)
    ap.add_argument("--work", type=Path)
    ap.add_argument("--skip-slurm", action="store_true")
    ap.add_argument("--max-s", type=float, default=7200.0,
                    help="stop the backlog after this many seconds and report the steps done")
    ap.add_argument("--no-cyclones", action="store_true",
                    help="turn the cyclone tracks off (the service makes them from the "
                         "published steps when it takes each result)")
    a = ap.parse_args(argv)
    work = a.work or Path(tempfile.mkdtemp(prefix="leeward-coord-"))
    if work.exists():
        shutil.rmtree(work)
    work.mkdir(parents=True)
    repo = HERE.parents[1]
    svc = service_part(a.leeward, work, a.steps, a.max_s, cyclones=not a.no_cyclones)
    sl = None if a.skip_slurm else slurm_part(a.jobs, repo)
    print()
    print(f"coordinator on a backlog of {a.steps} steps ({len(LEADS)} leads x "
          f"{a.steps // len(LEADS)} cycles), 2 workers:")
    print(f"  files catalogued            {svc['files_catalogued_per_s']} per s "
          f"(all in {svc['catalogued_all_s']} s)")
    print(f"  steps published (tiny)      {svc['steps_published_per_s']} per s "
          f"({svc['done']} of {a.steps} in {svc['published_all_s']} s; {svc['failed']} failed)")
    print(f"  ledger records, fsynced     {svc['ledger_records_per_s']} per s "
          f"({svc['ledger_records']} records, {svc['ledger_bytes'] / 1e6:.1f} MB)")
    print(f"  main loop CPU               {svc['main_loop_ms_per_step']} ms per step "
          f"({svc['main_loop_cpu_s']} s of {svc['process_cpu_s']} s for the whole service)")
    print(f"  peak resident memory        {svc['peak_rss_mib']} MiB "
          f"(at the end {svc['rss_end_mib']} MiB)")
    print(f"  memory growth               {svc['rss_growth_kb_per_step_after_1000']} KB per step "
          f"(standard error {svc['rss_growth_kb_per_step_stderr']}) published after the first 1,000")
    print(f"  restart: ready after        {svc['restart_ready_s']} s "
          f"({svc['restart_republished']} steps published again)")
    if sl:
        print(f"  sbatch                      {sl['sbatch_per_s']} submissions per s "
              f"({sl['sbatch_ms_each']} ms each)")
        print(f"  squeue of {sl['jobs']} jobs          {sl['squeue_s_all_jobs']} s")
    if not a.work:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
