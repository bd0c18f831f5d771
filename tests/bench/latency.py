#!/usr/bin/env python3
"""The service's own overhead: from the last byte of a step's input to its published manifest,
less leeward's processing time, under `leeward serve` with its default settings.

    python3 tests/bench/latency.py --leeward target/release/leeward --input STEP.grib2 --work DIR
        [--repeat 3] [--step-hours 6] [--timeout 900] [--json]

What it does:
- reads the input's cycle, lead and isobaric levels with ecCodes, and makes one copy per
  repeat with the forecast time moved by a multiple of --step-hours
  (tests/bench/shift_step.py, cached in DIR/steps), so that every repeat is a step of its
  own: the name differs, and so does the valid time inside the file, by which leeward
  groups fields into steps;
- writes a configuration into DIR/serve that keeps every default except the incoming,
  output and state directories (inside DIR/serve, emptied first), the metrics endpoint (a
  free port on 127.0.0.1) and one [[feed]] for these files (complete = "fields" on the
  input's levels); and, only when the input's cycle is older than the default
  service.catch_up_hours (72 h) so that the service would not make it at all,
  catch_up_hours = 0. The file is checked with `leeward check-config` first;
- starts `leeward serve --config FILE` (its log in DIR/serve/serve.log) and waits for
  /health; then, one repeat after the other, copies the step into the incoming directory
  under a hidden name in 4 MB chunks, fsyncs it and renames it to its final name: the time
  right after the rename is the last byte. The products directory is polled every 20 ms
  for the step's manifest (`<name>.json`, written last, beside the `.nc`);
- overhead = (manifest appeared - rename) - timings_s.total of the manifest (the whole step
  in the worker). With the service's log lines (`input for step`, `processing`,
  `step written`) the overhead is split into: found (the change event, the main loop's
  turn, reading the whole file, its checksum and catalogue), queued (from the step being
  complete to a worker taking it), worker before the step (reading the step's messages
  again, cataloguing, planning) and publication (from the step's file being written to
  the manifest in place: the product's checksum, the manifest, their fsync; this part also
  holds up to one poll interval);
- at the end reads /metrics (leeward_publish_latency_seconds _sum and _count, and
  leeward_last_publish_latency_seconds: the service's own figure, which starts when the
  last input had been read and catalogued), then stops the service with SIGTERM (always,
  also when something went wrong) and waits for exit code 0; the service's peak resident
  memory comes from the rusage os.wait4 returns for it.
"""

from __future__ import annotations

import argparse
import datetime as dt
import glob
import json
import os
import re
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import eccodes

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent

FEED = "bench"
CHUNK = 4 * 1024 * 1024
POLL_S = 0.02
DEFAULT_CATCH_UP_HOURS = 72
DEFAULT_GRACE_S = 60.0

LOG_LINE = re.compile(r"^(?P<ts>\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(?:\.\d+)?Z)\s+(?P<level>[A-Z]+)\s+(?P<target>\S+): (?P<rest>.*)$")


def describe_input(path: Path) -> dict:
    """Cycle, lead (hours) and isobaric levels (hPa) of a one-step GRIB2 file."""
    eccodes.codes_grib_multi_support_on()
    cycles, leads, levels = set(), set(), set()
    with open(path, "rb") as f:
        while True:
            h = eccodes.codes_grib_new_from_file(f)
            if h is None:
                break
            try:
                date = eccodes.codes_get_long(h, "dataDate")
                hhmm = eccodes.codes_get_long(h, "dataTime")
                cycles.add(dt.datetime.strptime(f"{date:08d}{hhmm:04d}", "%Y%m%d%H%M"))
                unit = eccodes.codes_get_long(h, "indicatorOfUnitForForecastTime")
                if unit != 1:
                    raise SystemExit(f"latency: {path}: forecast time not in hours (unit {unit})")
                leads.add(eccodes.codes_get_long(h, "forecastTime"))
                if eccodes.codes_get_long(h, "typeOfFirstFixedSurface") == 100:
                    value = eccodes.codes_get_long(h, "scaledValueOfFirstFixedSurface")
                    factor = eccodes.codes_get_long(h, "scaleFactorOfFirstFixedSurface")
                    levels.add(round(value / 10.0 ** factor / 100.0, 4))
            finally:
                eccodes.codes_release(h)
    if len(cycles) != 1 or len(leads) != 1 or not levels:
        raise SystemExit(f"latency: {path} must hold one step on isobaric levels "
                         f"(cycles {sorted(cycles)}, leads {sorted(leads)}, {len(levels)} levels)")
    return {"cycle": cycles.pop(), "lead": leads.pop(), "levels_hpa": sorted(levels, reverse=True)}


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def toml_str(s: str) -> str:
    return json.dumps(s)  # a TOML basic string for these paths


def http_get(url: str, timeout: float = 2.0) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(url, timeout=timeout) as r:
            return r.status, r.read().decode(errors="replace")
    except urllib.error.HTTPError as e:
        return e.code, e.read().decode(errors="replace")


def deliver(src: Path, incoming: Path, name: str) -> float:
    """Copy src to incoming/name the way a feed should: hidden name, fsync, rename. Returns
    time.time() right after the rename."""
    tmp = incoming / f".{name}"
    with open(src, "rb") as fi, open(tmp, "wb") as fo:
        while True:
            b = fi.read(CHUNK)
            if not b:
                break
            fo.write(b)
        fo.flush()
        os.fsync(fo.fileno())
    os.rename(tmp, incoming / name)
    return time.time()


def log_events(log: Path, lead: int) -> dict:
    """Unix times of the service's log lines about the step of this lead."""
    want = {"input for step": "input", "processing": "processing", "step written": "written",
            "published": "published"}
    out = {}
    try:
        text = log.read_text(errors="replace")
    except OSError:
        return out
    for line in text.splitlines():
        m = LOG_LINE.match(line)
        if not m:
            continue
        rest = m.group("rest")
        if not re.search(rf"(?:^| )step={lead}(?: |$)", rest):
            continue
        for msg, key in want.items():
            if rest.startswith(msg + " ") and key not in out:
                out[key] = dt.datetime.fromisoformat(m.group("ts").replace("Z", "+00:00")).timestamp()
    return out


def new_log_problems(log: Path, seen: int) -> tuple[list[str], int]:
    """WARN and ERROR lines of the log after the first `seen` lines."""
    try:
        lines = log.read_text(errors="replace").splitlines()
    except OSError:
        return [], seen
    bad = [l for l in lines[seen:] if re.match(r"^\S+\s+(WARN|ERROR)\s", l)]
    return bad, len(lines)


def metric(text: str, name: str) -> float | None:
    m = re.search(rf'^{re.escape(name)}\{{feed="{FEED}"\}} (\S+)$', text, re.M)
    return float(m.group(1)) if m else None


def stop(proc: subprocess.Popen) -> tuple[object, float | None]:
    """SIGTERM the service and wait for it (os.wait4, for its own rusage): (exit code, peak RSS MiB)."""
    if proc.returncode is not None:
        return proc.returncode, None
    try:
        proc.send_signal(signal.SIGTERM)
    except ProcessLookupError:
        pass
    deadline = time.time() + DEFAULT_GRACE_S + 30
    while True:
        pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
        if pid == proc.pid:
            proc.returncode = os.waitstatus_to_exitcode(status)
            return proc.returncode, usage.ru_maxrss / 1024.0
        if time.time() > deadline:
            proc.kill()
            _, status, usage = os.wait4(proc.pid, 0)
            proc.returncode = os.waitstatus_to_exitcode(status)
            return f"killed: no exit within {DEFAULT_GRACE_S + 30:.0f} s of SIGTERM", usage.ru_maxrss / 1024.0
        time.sleep(0.05)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--leeward", default=str(ROOT / "target/release/leeward"),
                    help="the leeward binary (default target/release/leeward)")
    ap.add_argument("--input", type=Path, required=True, help="one step, in one GRIB2 file")
    ap.add_argument("--work", type=Path, required=True, help="work directory (DIR/serve is emptied each run)")
    ap.add_argument("--repeat", type=int, default=3, help="steps delivered, one after the other (default 3)")
    ap.add_argument("--step-hours", type=int, default=6,
                    help="lead hours between the repeats' steps (default 6: a usual step spacing, so that "
                         "the changes in time and the PV budget run against the step before, as in service)")
    ap.add_argument("--timeout", type=float, default=900.0, help="seconds to wait for one step's manifest (default 900)")
    ap.add_argument("--json", action="store_true", help="also print one JSON line")
    args = ap.parse_args(argv)

    binary = str(Path(args.leeward).resolve())
    src = args.input.resolve()
    work = args.work.resolve()
    if not os.access(binary, os.X_OK):
        print(f"latency: {binary} is not an executable", file=sys.stderr)
        return 2
    if not src.is_file():
        print(f"latency: no input {src}", file=sys.stderr)
        return 2
    repeat = max(1, args.repeat)

    # The steps, made beforehand (outside the timed part).
    info = describe_input(src)
    cycle = info["cycle"]
    steps_dir = work / "steps"
    steps_dir.mkdir(parents=True, exist_ok=True)
    steps = []
    for i in range(repeat):
        shift = i * args.step_hours
        path = src
        if shift:
            path = steps_dir / f"{src.stem}+{shift}h.grib2"
            subprocess.run([sys.executable, str(HERE / "shift_step.py"), str(src), str(path), "--hours", str(shift)],
                           check=True)
        steps.append((info["lead"] + shift, path))

    # A fresh service tree and its configuration.
    base = work / "serve"
    if base.exists():
        shutil.rmtree(base)
    incoming, products, state = base / "incoming", base / "products", base / "state"
    for d in (incoming, products, state):
        d.mkdir(parents=True)
    port = free_port()
    age_h = (dt.datetime.now(dt.timezone.utc).replace(tzinfo=None) - cycle).total_seconds() / 3600.0
    catch_up_line = ""
    if age_h > DEFAULT_CATCH_UP_HOURS - 1:
        catch_up_line = (f"# The input's cycle is {age_h:.0f} h old: with the default catch_up_hours "
                         f"({DEFAULT_CATCH_UP_HOURS}) its steps would be skipped, not made.\ncatch_up_hours = 0\n")
    levels = ", ".join(repr(float(l)) for l in info["levels_hpa"])
    config = base / "leeward.toml"
    config.write_text(
        "# leeward serve for the latency measurement: every default but these.\n"
        "[service]\n"
        f"watch_dir = {toml_str(str(incoming))}\n"
        f"out_dir = {toml_str(str(products))}\n"
        f"state_dir = {toml_str(str(state))}\n"
        f"metrics_listen = \"127.0.0.1:{port}\"\n"
        f"{catch_up_line}"
        "\n[[feed]]\n"
        f"name = \"{FEED}\"\n"
        "file_pattern = '^lwstep_(?P<cycle>\\d{10})_(?P<step>\\d{3})\\.grib2$'\n"
        "complete = \"fields\"\n"
        f"levels_hpa = [{levels}]\n")
    check = subprocess.run([binary, "check-config", str(config)], capture_output=True, text=True)
    (base / "check-config.txt").write_text(check.stdout + check.stderr)
    if check.returncode != 0:
        print(f"latency: leeward check-config {config} failed ({check.returncode}):\n{check.stdout}{check.stderr}",
              file=sys.stderr)
        return 2
    print(f"configuration {config}: checked (leeward check-config: 0); metrics on 127.0.0.1:{port}"
          + ("; catch_up_hours = 0 (old cycle)" if catch_up_line else ""))
    print(f"input {src} ({src.stat().st_size / 1e6:.1f} MB): cycle {cycle:%Y-%m-%dT%H:%MZ}, "
          f"{len(info['levels_hpa'])} levels; steps +{', +'.join(str(l) for l, _ in steps)} h")

    env = dict(os.environ)
    env.pop("JOURNAL_STREAM", None)  # keep the timestamps in the log
    env["LEEWARD_LOG"] = "info"      # the default level of `leeward serve`, made explicit
    log = base / "serve.log"
    results = []
    metrics = {}
    exit_code = peak_rss_mib = None
    with open(log, "wb") as logf:
        proc = subprocess.Popen([binary, "serve", "--config", str(config)], stdout=logf, stderr=subprocess.STDOUT,
                                env=env)
        try:
            t_start = time.time()
            while True:
                if proc.poll() is not None:
                    raise RuntimeError(f"leeward serve exited with {proc.returncode} at start; see {log}")
                try:
                    status, body = http_get(f"http://127.0.0.1:{port}/health", timeout=1.0)
                    if status == 200:
                        break
                except (OSError, urllib.error.URLError):
                    pass
                if time.time() - t_start > 60:
                    raise RuntimeError(f"/health did not answer within 60 s; see {log}")
                time.sleep(0.05)
            print(f"service up: /health answered after {time.time() - t_start:.2f} s")

            log_seen = 0
            known: set[str] = set()
            for i, (lead, path) in enumerate(steps):
                name = f"lwstep_{cycle:%Y%m%d%H}_{lead:03d}.grib2"
                t_rename = deliver(path, incoming, name)
                manifest = mpath = None
                t_seen = None
                last_check = time.time()
                while manifest is None:
                    for m in glob.glob(str(products / FEED / "*" / "*.json")):
                        if m in known or os.path.basename(m).startswith("."):
                            continue
                        now = time.time()
                        try:
                            doc = json.loads(Path(m).read_text())
                        except (OSError, ValueError):
                            continue
                        known.add(m)
                        if doc.get("lead_hours") == lead:
                            manifest, mpath, t_seen = doc, m, now
                            break
                    if manifest is not None:
                        break
                    now = time.time()
                    if now - last_check >= 1.0:
                        last_check = now
                        if proc.poll() is not None:
                            raise RuntimeError(f"leeward serve exited with {proc.returncode}; see {log}")
                        bad, log_seen = new_log_problems(log, log_seen)
                        for b in bad:
                            print(f"  service: {b}", file=sys.stderr)
                    if now - t_rename > args.timeout:
                        raise RuntimeError(f"no manifest for +{lead} h within {args.timeout:g} s; see {log}")
                    time.sleep(POLL_S)
                # Let the main loop record the step before the next one comes.
                ev = log_events(log, lead)
                t_wait = time.time()
                while "published" not in ev and time.time() - t_wait < 10:
                    time.sleep(POLL_S)
                    ev = log_events(log, lead)
                timings = manifest.get("timings_s", {})
                total = float(timings.get("total", float("nan")))
                e2e = t_seen - t_rename
                published_at = manifest.get("published_at")
                stamp = (dt.datetime.fromisoformat(published_at.replace("Z", "+00:00")).timestamp()
                         if published_at else None)
                parts = {}
                if {"input", "processing", "written"} <= ev.keys():
                    parts = {
                        "found": ev["input"] - t_rename,
                        "queued": ev["processing"] - ev["input"],
                        "worker_before_step": (ev["written"] - ev["processing"]) - total,
                        "publication": t_seen - ev["written"],
                    }
                    if stamp is not None:
                        # published_at is taken once the product's checksum is made,
                        # before the manifest is written and renamed into place.
                        parts["of_which_product_checksum"] = stamp - ev["written"]
                        parts["of_which_manifest"] = t_seen - stamp
                r = {
                    "lead": lead, "file": name, "manifest": mpath, "state": manifest.get("state"),
                    "processing_s": total, "end_to_end_s": e2e, "overhead_s": e2e - total,
                    "manifest_stamp_minus_rename_s": None if stamp is None else stamp - t_rename,
                    "service_latency_s": timings.get("latency"),
                    "timings_s": timings, "parts_s": parts,
                }
                results.append(r)
                pt = (" (" + ", ".join(f"{k.replace('_', ' ')} {v:.3f}" for k, v in parts.items()) + ")") if parts else ""
                print(f"  step +{lead} h: processing {total:.3f} s, end-to-end {e2e:.3f} s, overhead {e2e - total:.3f} s"
                      f"{pt}; service latency {timings.get('latency', float('nan')):.3f} s", flush=True)

            status, text = http_get(f"http://127.0.0.1:{port}/metrics")
            if status == 200:
                metrics = {
                    "publish_latency_sum_s": metric(text, "leeward_publish_latency_seconds_sum"),
                    "publish_latency_count": metric(text, "leeward_publish_latency_seconds_count"),
                    "last_publish_latency_s": metric(text, "leeward_last_publish_latency_seconds"),
                }
            else:
                metrics = {"error": f"/metrics answered {status}"}
        finally:
            exit_code, peak_rss_mib = stop(proc)
            print(f"leeward serve stopped with SIGTERM: exit code {exit_code}"
                  + (f"; its peak resident memory {peak_rss_mib:.0f} MiB" if peak_rss_mib else ""))

    print()
    print(f"{'step':>6} {'processing s':>12} {'end-to-end s':>12} {'overhead s':>10} | {'found':>6} {'queued':>6} "
          f"{'worker':>6} {'publish':>7} {'(chksum':>7} {'manif.)':>7} | {'service latency s':>17}")
    for r in results:
        p = r["parts_s"]
        cols = " ".join(f"{p[k]:>{w}.3f}" if k in p else f"{'-':>{w}}"
                        for k, w in (("found", 6), ("queued", 6), ("worker_before_step", 6), ("publication", 7),
                                     ("of_which_product_checksum", 7), ("of_which_manifest", 7)))
        print(f"{'+' + str(r['lead']) + 'h':>6} {r['processing_s']:>12.3f} {r['end_to_end_s']:>12.3f} "
              f"{r['overhead_s']:>10.3f} | {cols} | {r['service_latency_s'] or float('nan'):>17.3f}")
    median = statistics.median(r["overhead_s"] for r in results) if results else None
    if median is not None:
        print(f"median overhead: {median:.3f} s over {len(results)} step(s)")
    print("(found: rename to `input for step` (event, main loop turn, reading, checksum, catalogue); queued: to "
          "`processing`; worker: before the step's own timing starts; publish: `step written` to the manifest seen, "
          f"polled every {POLL_S * 1000:.0f} ms, of which chksum: to the manifest's published_at, taken after the "
          "product's checksum, and manif.: from then on)")
    if metrics:
        s, c, last = (metrics.get(k) for k in ("publish_latency_sum_s", "publish_latency_count", "last_publish_latency_s"))
        print(f"/metrics: leeward_publish_latency_seconds_sum {s}, _count {c}, "
              f"leeward_last_publish_latency_seconds {last}")
    if args.json:
        print(json.dumps({
            "what": "latency", "leeward": binary, "input": str(src), "input_bytes": src.stat().st_size,
            "config": str(config), "catch_up_hours_zero": bool(catch_up_line), "repeats": results,
            "median_overhead_s": median, "metrics": metrics, "exit_code": exit_code,
            "service_peak_rss_mib": peak_rss_mib,
        }))
    return 0 if exit_code == 0 and len(results) == repeat else 1


if __name__ == "__main__":
    try:
        sys.exit(main())
    except RuntimeError as e:
        print(f"latency: {e}", file=sys.stderr)
        sys.exit(1)
