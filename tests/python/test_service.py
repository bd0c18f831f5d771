"""`leeward serve` end to end: real processes, real files, real inotify.

Each test starts the service binary on temporary directories, feeds it GRIB2
files the way a model's delivery does (written in chunks, renamed into place,
one step split over several files, steps out of order, a backlog at once),
and checks what a downstream reader sees. The reference for the products is
`leeward process` on the same files (the same pipeline, run once, in one
process): the service must publish exactly those data, whatever the order
of arrival, the crashes and the restarts. The demo scenario (our own
invented weather, written by `leeward demo --inputs-only`) is the input.
Everything is bounded in time; no test measures speed.
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import signal
import socket
import subprocess
import threading
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest

from conftest import REPO_ROOT, leeward_bin_path


def fnv1a64_hex(data: bytes) -> str:
    h = 0xCBF29CE484222325
    for b in data:
        h = ((h ^ b) * 0x100000001B3) & 0xFFFFFFFFFFFFFFFF
    return f"{h:016x}"

netCDF4 = pytest.importorskip("netCDF4")

LEVELS_HPA = [1000, 950, 900, 850, 800, 750, 700, 650, 600, 550, 500, 450, 400,
              350, 300, 250, 200, 150, 100, 70, 50]
PATTERN = r"^lwdemo_(?P<cycle>\d{10})_(?P<step>\d{3})(_part\d)?\.grib2$"
DEADLINE_S = 120


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def demo_inputs(dest: Path, cycle: str, leads: list[int]) -> list[Path]:
    """The invented scenario's GRIB2 files for one cycle, by our own encoder."""
    subprocess.run(
        [str(leeward_bin_path()), "demo", "--inputs-only", "--dir", str(dest),
         "--cycle", cycle, "--leads", ",".join(str(x) for x in leads)],
        check=True, capture_output=True, timeout=120)
    return [dest / "incoming" / f"lwdemo_{cycle}_{lead:03d}.grib2" for lead in leads]


def messages(data: bytes) -> list[bytes]:
    """Split GRIB2 bytes into messages (octets 9-16: total length, WMO-No. 306 section 0)."""
    out, k = [], 0
    while k < len(data):
        assert data[k:k + 4] == b"GRIB"
        n = int.from_bytes(data[k + 8:k + 16], "big")
        out.append(data[k:k + n])
        k += n
    return out


def deliver_chunked(data: bytes, dest: Path, chunks: int = 4, pause: float = 0.1):
    """Written in place in chunks, like a slow transfer, closed at the end."""
    step = max(1, len(data) // chunks)
    with open(dest, "wb") as f:
        for i in range(0, len(data), step):
            f.write(data[i:i + step])
            f.flush()
            time.sleep(pause)


def deliver_renamed(data: bytes, dest: Path):
    """Written under a hidden temporary name, then renamed into place."""
    tmp = dest.parent / f".{dest.name}.tmp"
    tmp.write_bytes(data)
    os.rename(tmp, dest)


def config_text(root: Path, port: int, extra_service: str = "", extra: str = "") -> str:
    return f"""
[service]
watch_dir = "{root}/in"
out_dir = "{root}/out"
state_dir = "{root}/state"
settle_s = 0.5
scan_interval_s = 1.0
catch_up_hours = 0
metrics_listen = "127.0.0.1:{port}"
step_timeout_s = 600.0
workers = 2
retry_first_s = 0.5
retry_max_s = 2.0
shutdown_grace_s = 20.0
{extra_service}

[[feed]]
name = "demo"
file_pattern = '{PATTERN}'
levels_hpa = {LEVELS_HPA}
{extra}
"""


# Every `leeward serve` started by a test; conftest.py's autouse fixture kills
# those still running when the test ends, whichever module the test is in.
_STARTED: list = []


class Service:
    """One `leeward serve` process on a temporary tree."""

    def __init__(self, root: Path, extra_service: str = "", extra: str = "", args=(), env=None,
                 prefix=()):
        self.root = root
        self.prefix = list(prefix)
        self.port = free_port()
        (root / "in").mkdir(parents=True, exist_ok=True)
        self.cfg = root / "leeward.toml"
        self.cfg.write_text(config_text(root, self.port, extra_service, extra))
        self.args = list(args)
        self.env = dict(os.environ, **(env or {}))
        self.env.setdefault("LEEWARD_LOG", "info")
        self.log = root / "serve.log"
        self.proc = None

    def start(self):
        self.logf = open(self.log, "ab")
        self.proc = subprocess.Popen(
            [*self.prefix, str(leeward_bin_path()), *self.args, "serve", "--config", str(self.cfg)],
            stdout=self.logf, stderr=subprocess.STDOUT, env=self.env)
        _STARTED.append(self.proc)
        wait_for(lambda: self.health() is not None or self.proc.poll() is not None, 30,
                 "service up")
        assert self.proc.poll() is None, self.log.read_text()[-3000:]
        return self

    def get(self, path: str):
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{self.port}{path}", timeout=2) as r:
                return r.status, r.read().decode()
        except urllib.error.HTTPError as e:
            return e.code, e.read().decode()
        except OSError:
            return None

    def health(self):
        r = self.get("/health")
        return r[0] if r else None

    def metric(self, name: str, **labels) -> float:
        r = self.get("/metrics")
        assert r and r[0] == 200
        want = ",".join(f'{k}="{v}"' for k, v in labels.items())
        for line in r[1].splitlines():
            if line.startswith(f"{name}{{{want}}} ") or (not labels and line.startswith(name + " ")):
                return float(line.split()[-1])
        raise AssertionError(f"{name}{{{want}}} not in /metrics")

    def stop(self, sig=signal.SIGTERM, timeout=60) -> int:
        self.proc.send_signal(sig)
        rc = self.proc.wait(timeout=timeout)
        self.logf.close()
        return rc

    def kill9(self):
        self.proc.kill()
        self.proc.wait(timeout=30)
        self.logf.close()

    def ledger(self) -> list[dict]:
        p = self.root / "state" / "ledger.jsonl"
        if not p.exists():
            return []
        out = []
        for line in p.read_text().splitlines():
            try:
                out.append(json.loads(line))
            except json.JSONDecodeError:
                pass  # a torn last line after kill -9
        return out

    def published(self) -> list[dict]:
        return [r for r in self.ledger() if r["event"] == "published"]

    def out_files(self):
        # os.walk passes over a directory that vanishes while it walks (a
        # publication's staging directory); Path.rglob raises.
        found = [Path(d) / f for d, _, files in os.walk(self.root / "out") for f in files]
        return sorted(p for p in found if p.is_file())


def wait_for(pred, timeout, what):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if pred():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out after {timeout} s waiting for: {what}")


def step_key(rec):
    s = rec["step"]
    return (s["feed"], s["cycle"], s["lead"], s.get("member"), s["grid"])


def visible_files(out: Path) -> list[Path]:
    """The files of an output tree that a downstream reader sees. Hidden names
    and hidden directories (leeward's work in progress, such as a publication's
    staging directory) are not entered, and a directory that vanishes during the
    walk is passed over (os.walk ignores it), never an error."""
    found = []
    for d, dirs, files in os.walk(out):
        dirs[:] = [x for x in dirs if not x.startswith(".")]
        found += [Path(d) / f for f in files if not f.startswith(".")]
    return found


class Reader(threading.Thread):
    """A downstream reader polling the output tree all the time, opening every
    visible product and manifest: it must never meet a partial file."""

    def __init__(self, out: Path):
        super().__init__(daemon=True)
        self.out = out
        self.stop_flag = False
        self.failures = []
        self.opened = 0

    def run(self):
        try:
            self.read_all_the_time()
        except Exception as e:  # noqa: BLE001 - a reader that dies must fail the test
            self.failures.append(f"the reader stopped: {e!r}")

    def read_all_the_time(self):
        while not self.stop_flag:
            for p in visible_files(self.out):
                if not p.is_file():
                    continue
                try:
                    if p.suffix == ".nc" and "_cyclones" in p.name:
                        # A cycle's cyclone tracks, rewritten with every step (CF trajectories).
                        with netCDF4.Dataset(p) as ds:
                            ds.variables["row_size"][:]
                        self.opened += 1
                    elif p.suffix == ".geojson":
                        assert json.loads(p.read_text())["type"] == "FeatureCollection"
                        self.opened += 1
                    elif p.suffix == ".nc":
                        with netCDF4.Dataset(p) as ds:
                            ds.variables["zeta"][0, 0, 0, 0]
                        self.opened += 1
                    elif p.suffix == ".json":
                        m = json.loads(p.read_text())
                        assert (p.parent / m["product"]).exists(), "manifest before its product"
                        self.opened += 1
                except FileNotFoundError:
                    pass  # replaced between listing and opening: the rename is atomic
                except Exception as e:  # noqa: BLE001
                    self.failures.append(f"{p}: {e!r}")
            time.sleep(0.02)


def reference_products(tmp: Path, inputs: list[Path]) -> dict[str, Path]:
    """`leeward process` of the same files: name -> product."""
    ref = tmp / "reference"
    r = subprocess.run([str(leeward_bin_path()), "process", "--out", str(ref), *map(str, inputs)],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr
    return {p.name: p for p in ref.glob("*.nc")}


def data_variables(path: Path) -> dict[str, np.ndarray]:
    with netCDF4.Dataset(path) as ds:
        ds.set_auto_mask(False)
        return {k: np.array(v[...]) for k, v in ds.variables.items()}


def assert_same_products(service_files: list[Path], ref: dict[str, Path]):
    got = {p.name: p for p in service_files if p.suffix == ".nc"}
    assert sorted(got) == sorted(ref), (sorted(got), sorted(ref))
    for name, p in got.items():
        a, b = data_variables(p), data_variables(ref[name])
        assert sorted(a) == sorted(b), (name, sorted(set(a) ^ set(b)))
        for v in a:
            assert a[v].tobytes() == b[v].tobytes(), f"{name}: {v} differs from leeward process"


def test_a_cycle_fed_slowly_is_published_once_complete_and_never_seen_partial(tmp_path):
    leads = [0, 6, 12, 18]
    files = demo_inputs(tmp_path / "gen", "2026031400", leads)
    ref = reference_products(tmp_path, files)
    svc = Service(tmp_path, args=["--log-format", "json"]).start()
    reader = Reader(tmp_path / "out")
    reader.start()
    inc = tmp_path / "in"
    arrived = {}
    try:
        # +0 h renamed in; +6 h in two files written in chunks; +18 h before +12 h.
        deliver_renamed(files[0].read_bytes(), inc / files[0].name)
        arrived[0] = time.time()
        msgs = messages(files[1].read_bytes())
        half = len(msgs) // 2
        deliver_chunked(b"".join(msgs[:half]), inc / "lwdemo_2026031400_006_part1.grib2")
        time.sleep(1.5)
        assert not any("006h" in p.name for p in svc.out_files()), "published before complete"
        deliver_chunked(b"".join(msgs[half:]), inc / "lwdemo_2026031400_006_part2.grib2")
        arrived[6] = time.time()
        deliver_chunked(files[3].read_bytes(), inc / files[3].name)
        arrived[18] = time.time()
        time.sleep(0.5)
        deliver_renamed(files[2].read_bytes(), inc / files[2].name)
        arrived[12] = time.time()
        wait_for(lambda: len(svc.published()) == 4, DEADLINE_S, "four steps published")
        # Late changes (the +6 h step gets its budget once +12 h is there) are in place
        # when the last step is published; give the reader a moment more.
        time.sleep(1.0)
    finally:
        reader.stop_flag = True
        reader.join(timeout=10)
    assert reader.failures == [], reader.failures[:5]
    assert reader.opened > 0
    pubs = svc.published()
    assert len({step_key(r) for r in pubs}) == 4, "each step published once"
    for r in pubs:
        lead = r["step"]["lead"]
        m = json.loads(Path(r["manifest"]).read_text())
        assert m["state"] == "complete" and not r["partial"]
        assert m["lead_hours"] == lead
        # The latency runs from the moment the service found the last input
        # finished to publication: after the file arrived, before the record.
        # (How long it is depends on the machine: benchmarks measure it.)
        assert 0.0 <= m["timings_s"]["latency"] <= r["at"] + 1.0 - arrived[lead], (
            lead, m["timings_s"], r["at"] - arrived[lead])
        assert m["software"].startswith("leeward ")
        inputs = {Path(i["file"]).name for i in m["inputs"]}
        if lead == 6:
            assert inputs == {"lwdemo_2026031400_006_part1.grib2", "lwdemo_2026031400_006_part2.grib2"}
        for i in m["inputs"]:
            assert i["bytes"] == Path(i["file"]).stat().st_size
            # FNV-1a 64 (offset basis 0xcbf29ce484222325, prime 0x100000001b3; the
            # published FNV parameters), computed here independently.
            assert i["checksum"] == fnv1a64_hex(Path(i["file"]).read_bytes()), i
        # The product's SHA-256 (FIPS 180-4) as Python's hashlib computes it.
        product = Path(r["manifest"]).parent / m["product"]
        assert m["product_bytes"] == product.stat().st_size
        assert m["product_checksum"] == hashlib.sha256(product.read_bytes()).hexdigest()
        # Steps after the first carry the PV budget: the manifest counts the points whose
        # trajectories did not converge, as the file's flag variables mark them.
        if lead > 0:
            import netCDF4
            with netCDF4.Dataset(product) as ds:
                flagged = sum(int(np.nansum(np.ma.filled(ds[n][:].astype(float), np.nan)))
                              for n in ("bud_unconverged", "bud_dpvdt_unconverged"))
            assert m.get("budget_not_converged") == flagged, (lead, m.get("budget_not_converged"))
    # The output tree: <out>/<feed>/<cycle>/, product and manifest side by side, and the
    # cycle's cyclone tracks and its page, which links every step's product.
    cycle_dir = tmp_path / "out" / "demo" / "20260314T0000Z"
    assert sorted(p.name for p in cycle_dir.iterdir()) == sorted(
        [f"c255_20260314T0000Z_{h:03d}h.{x}" for h in leads for x in ("nc", "json")]
        + [f"c255_20260314T0000Z_cyclones.{x}" for x in ("nc", "geojson")]
        + ["c255_20260314T0000Z.html"])
    page = (cycle_dir / "c255_20260314T0000Z.html").read_text()
    for h in leads:
        assert f'href="c255_20260314T0000Z_{h:03d}h.nc"' in page, h
    assert_same_products(svc.out_files(), ref)
    # The ledger record comes first, the counter just after it.
    wait_for(lambda: svc.metric("leeward_steps_published_total", feed="demo", state="complete") >= 4,
             30, "the publication counted")
    assert svc.metric("leeward_steps_published_total", feed="demo", state="complete") == 4
    assert svc.metric("leeward_publish_latency_seconds_count", feed="demo") == 4
    assert svc.metric("leeward_last_success_timestamp_seconds", feed="demo") > 0

    # `leeward status` reads the ledger beside the running service.
    st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(tmp_path / "state")],
                        capture_output=True, text=True, timeout=30)
    assert st.returncode == 0, st.stderr
    assert "service: running" in st.stdout and "20260314T0000Z  4 complete" in st.stdout, st.stdout
    js = json.loads(subprocess.run(
        [str(leeward_bin_path()), "status", "--state-dir", str(tmp_path / "state"), "--json"],
        capture_output=True, text=True, timeout=30).stdout)
    assert js["cycles"][0]["leads"] == leads

    # Reprocess one step: it is made again, once, and its manifest says so.
    old = json.loads((cycle_dir / "c255_20260314T0000Z_006h.json").read_text())
    rp = subprocess.run([str(leeward_bin_path()), "reprocess", "--state-dir", str(tmp_path / "state"),
                         "--feed", "demo", "--cycle", "2026031400", "--lead", "6"],
                        capture_output=True, text=True, timeout=30)
    assert rp.returncode == 0, rp.stderr
    wait_for(lambda: len(svc.published()) == 5, DEADLINE_S, "the reprocessed step published")
    again = [r for r in svc.published()[4:]]
    assert [r["step"]["lead"] for r in again] == [6]
    new = json.loads((cycle_dir / "c255_20260314T0000Z_006h.json").read_text())
    assert new["published_at"] > old["published_at"]
    assert new["revision"] > old["revision"], "a step made again goes on from its revision"
    assert svc.metric("leeward_late_files_total", feed="demo") == 0, "no false late files"
    assert_same_products(svc.out_files(), ref)
    assert svc.stop() == 0
    # Structured logs: JSON lines with feed, cycle, step and file as fields.
    lines = [json.loads(x) for x in svc.log.read_text().splitlines() if x.startswith("{")]
    pub = [x for x in lines if x.get("fields", {}).get("message") == "published"]
    assert pub and all({"feed", "cycle", "step", "file"} <= set(x["fields"]) for x in pub)


def test_kill_9_at_random_moments_loses_nothing_and_publishes_nothing_twice(tmp_path):
    seed = int(os.environ.get("LEEWARD_KILL_SEED", time.time_ns() % 100000))
    rng = random.Random(seed)
    print(f"kill -9 test seed {seed} (LEEWARD_KILL_SEED to repeat)")
    files = []
    for cycle in ("2026031400", "2026031406"):
        files += demo_inputs(tmp_path / f"gen{cycle}", cycle, [0, 6, 12])
    ref = reference_products(tmp_path, files)
    svc = Service(tmp_path)
    svc.start()
    kills = 0
    for f in files:
        deliver_renamed(f.read_bytes(), tmp_path / "in" / f.name)
        time.sleep(rng.uniform(0.05, 0.9))
        if rng.random() < 0.6:
            svc.kill9()
            kills += 1
            # While it is down no partial product is visible (the cycle page, too, is
            # written under a hidden name and renamed into place). A step's work in
            # progress lives in a hidden staging directory (`.publish/...`), so a file
            # is visible only when no part of its path under out/ is hidden.
            out = tmp_path / "out"
            shown = [p for p in svc.out_files()
                     if not any(part.startswith(".") for part in p.relative_to(out).parts)]
            odd = [p for p in shown if p.suffix not in (".nc", ".json", ".geojson", ".html")]
            assert odd == [], f"visible files that are not products: {odd}"
            svc.start()
    wait_for(lambda: len({step_key(r) for r in svc.published()}) == 6, DEADLINE_S,
             "all six steps published")
    time.sleep(1.0)
    assert svc.stop() == 0
    print(f"{kills} kill -9 during the feed")
    pubs = svc.published()
    keys = [step_key(r) for r in pubs]
    assert len(keys) == len(set(keys)) == 6, f"published twice or lost: {keys}"
    left = [p for p in svc.out_files() if p.name.startswith(".")]
    assert left == [], f"temporaries left: {left}"
    assert_same_products(svc.out_files(), ref)


def reduced_grid_message() -> bytes:
    """A valid GRIB2 message on a reduced Gaussian grid (encoded by ecCodes), which leeward does not support."""
    import eccodes
    h = eccodes.codes_grib_new_from_samples("reduced_gg_pl_32_grib2")
    try:
        eccodes.codes_set_long(h, "discipline", 0)
        eccodes.codes_set_long(h, "parameterCategory", 0)
        eccodes.codes_set_long(h, "parameterNumber", 0)
        eccodes.codes_set_long(h, "typeOfFirstFixedSurface", 100)
        eccodes.codes_set_long(h, "scaledValueOfFirstFixedSurface", 50000)
        n = eccodes.codes_get_size(h, "values")
        eccodes.codes_set_values(h, np.full(n, 250.0))
        return eccodes.codes_get_message(h)
    finally:
        eccodes.codes_release(h)


def mount(*args) -> bool:
    return subprocess.run(["mount", *args], capture_output=True).returncode == 0


def test_bad_input_and_a_full_or_read_only_disk_keep_the_service_up(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    if not mount("-t", "tmpfs", "-o", "size=1m", "tmpfs", str(out)):
        pytest.skip("cannot mount a small tmpfs here (needs root); the full-disk test is skipped")
    try:
        svc = Service(tmp_path).start()
        inc = tmp_path / "in"
        deliver_renamed(b"this is not GRIB2 at all\n" * 100, inc / "lwdemo_2026031400_099.grib2")
        deliver_renamed(reduced_grid_message(), inc / "lwdemo_2026031400_098.grib2")
        wait_for(lambda: svc.metric("leeward_files_quarantined_total", feed="demo") == 2, 30,
                 "two files quarantined")
        q = tmp_path / "state" / "quarantine" / "demo"
        notes = {p.name: p.read_text() for p in q.glob("*.reason.txt")}
        assert "no GRIB" in notes["lwdemo_2026031400_099.grib2.reason.txt"] or "GRIB" in notes[
            "lwdemo_2026031400_099.grib2.reason.txt"], notes
        assert "unsupported grid" in notes["lwdemo_2026031400_098.grib2.reason.txt"], notes
        assert not (inc / "lwdemo_2026031400_099.grib2").exists()

        # A good step onto a 1 MB disk: not written, retried, nothing partial visible.
        f = demo_inputs(tmp_path / "gen", "2026031400", [0])[0]
        deliver_renamed(f.read_bytes(), inc / f.name)
        wait_for(lambda: svc.metric("leeward_step_retries_total", feed="demo") >= 2, 60,
                 "retries after a full disk")
        assert svc.health() == 200
        assert svc.metric("leeward_steps_failed_total", feed="demo", reason="output") >= 2
        assert [p for p in svc.out_files() if p.suffix == ".nc"] == []
        # Read-only: still refused, still up.
        assert "No space left on device" in svc.log.read_text()
        # Read-only (room enough now, but no writing): still refused, still up.
        assert mount("-o", "remount,ro,size=64m", str(out))
        n = svc.metric("leeward_step_retries_total", feed="demo")
        wait_for(lambda: svc.metric("leeward_step_retries_total", feed="demo") >= n + 2, 60,
                 "retries on a read-only disk")
        assert "Read-only file system" in svc.log.read_text()
        assert svc.proc.poll() is None and svc.health() == 200
        # Room again: the next retry publishes it.
        assert mount("-o", "remount,rw,size=64m", str(out))
        wait_for(lambda: len(svc.published()) == 1, 60, "published once there is room")
        # The ledger record comes first, the counter just after it.
        wait_for(lambda: svc.metric("leeward_steps_published_total", feed="demo", state="complete") >= 1,
                 30, "the publication counted")
        assert svc.metric("leeward_steps_published_total", feed="demo", state="complete") == 1
        st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(tmp_path / "state")],
                            capture_output=True, text=True, timeout=30).stdout
        assert "quarantined files" in st and "unsupported grid" in st, st
        assert svc.stop() == 0
        assert [p for p in svc.out_files() if p.name.startswith(".")] == []
    finally:
        subprocess.run(["umount", "-l", str(out)], capture_output=True)


def test_readiness_watchdog_status_reload_and_stop(tmp_path):
    sock_path = tmp_path / "notify.sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(sock_path))
    sock.settimeout(0.2)
    got = []
    done = threading.Event()

    def listen():
        while not done.is_set():
            try:
                got.append((time.monotonic(), sock.recv(4096).decode()))
            except socket.timeout:
                pass

    t = threading.Thread(target=listen, daemon=True)
    t.start()
    svc = Service(tmp_path, env={"NOTIFY_SOCKET": str(sock_path), "WATCHDOG_USEC": "600000"})
    svc.start()
    wait_for(lambda: any("READY=1" in m for _, m in got), 10, "READY=1")
    wait_for(lambda: sum("WATCHDOG=1" in m for _, m in got) >= 3, 10, "watchdog pings")
    pings = [ts for ts, m in got if "WATCHDOG=1" in m]
    assert max(b - a for a, b in zip(pings, pings[1:])) < 0.6, "pinged within WATCHDOG_USEC"
    assert any(m.startswith("STATUS=") for _, m in got)

    # SIGHUP with an invalid file: refused, the old configuration kept.
    good = svc.cfg.read_text()
    svc.cfg.write_text(good + "\n[service]\nworkers = 0\n")
    svc.proc.send_signal(signal.SIGHUP)
    wait_for(lambda: svc.metric("leeward_config_reloads_refused_total") == 1, 10, "reload refused")
    assert svc.proc.poll() is None
    # SIGHUP with a second feed: taken, and the new feed is served.
    svc.cfg.write_text(good + f"""
[[feed]]
name = "second"
incoming = "second"
file_pattern = '{PATTERN}'
complete = "files"
files_per_step = 1
""")
    svc.proc.send_signal(signal.SIGHUP)
    wait_for(lambda: svc.metric("leeward_config_reloads_total") == 1, 10, "reload accepted")
    f = demo_inputs(tmp_path / "gen", "2026031400", [0, 6])
    wait_for(lambda: (tmp_path / "in" / "second").is_dir(), 10, "second incoming directory")
    deliver_renamed(f[0].read_bytes(), tmp_path / "in" / "second" / f[0].name)
    wait_for(lambda: any(r["step"]["feed"] == "second" for r in svc.published()), DEADLINE_S,
             "a step of the new feed published")
    assert (tmp_path / "out" / "second" / "20260314T0000Z" / "c255_20260314T0000Z_000h.json").exists()
    # The status line follows the ledger record on the main loop's next turn.
    wait_for(lambda: any(m.startswith("STATUS=") and "last published second/" in m for _, m in got),
             10, "STATUS naming the new feed's step")

    # SIGTERM while a step is in hand: finished or cleanly left, exit 0, bounded.
    deliver_renamed(f[1].read_bytes(), tmp_path / "in" / f[1].name)
    wait_for(lambda: "processing" in svc.log.read_text().split("reload")[-1], 30, "a step in hand")
    t0 = time.monotonic()
    assert svc.stop(timeout=30) == 0
    assert time.monotonic() - t0 < 25.0
    assert any("STOPPING=1" in m for _, m in got)
    done.set()
    visible = [p for p in svc.out_files() if not p.name.startswith(".")]
    for p in visible:
        if p.suffix == ".nc":
            with netCDF4.Dataset(p):
                pass
    assert "stopped cleanly" in svc.log.read_text()
    # A second service on the same state directory is refused while one runs.
    svc.start()
    other = subprocess.run([str(leeward_bin_path()), "serve", "--config", str(svc.cfg)],
                           capture_output=True, text=True, timeout=30)
    assert other.returncode == 2 and "another leeward serve" in other.stderr, other.stderr
    assert svc.stop() == 0


def test_a_backlog_of_fifty_steps_is_worked_off_newest_cycle_first_with_bounded_memory(tmp_path):
    cycles = ["2026031400", "2026031406", "2026031412", "2026031418", "2026031500"]
    leads = list(range(0, 60, 6))
    files = []
    for c in cycles:
        files += demo_inputs(tmp_path / f"gen{c}", c, leads)
    assert len(files) == 50
    inc = _mkin(tmp_path)
    for f in files:
        deliver_renamed(f.read_bytes(), inc / f.name)
    svc = Service(tmp_path)
    t0 = time.monotonic()
    svc.start()
    seen_queue = 0.0
    peak = 0
    while len({step_key(r) for r in svc.published()}) < 50:
        assert time.monotonic() - t0 < 600, "backlog not worked off in 10 minutes"
        try:
            seen_queue = max(seen_queue, svc.metric("leeward_queue_steps", feed="demo", phase="ready"))
        except AssertionError:
            pass
        peak = max(peak, vm_hwm_kib(svc.proc.pid))
        time.sleep(0.2)
    took = time.monotonic() - t0
    peak = max(peak, vm_hwm_kib(svc.proc.pid))
    assert svc.stop() == 0
    pubs = svc.published()
    assert len(pubs) == 50
    print(f"backlog of 50 steps: {took:.1f} s, peak RSS {peak / 1024:.0f} MiB, "
          f"largest ready queue {seen_queue:.0f}")
    assert seen_queue >= 10, "the backlog was queued"
    first_ten = [r["step"]["cycle"] for r in pubs[:10]]
    assert first_ten.count("20260315T0000Z") >= 9, f"newest cycle first: {first_ten}"
    # Bounded memory: a step of this grid needs tens of MiB; two at a time stay far below this.
    assert peak < 1024 * 1024, f"peak RSS {peak} KiB"


def _mkin(root: Path) -> Path:
    (root / "in").mkdir(parents=True, exist_ok=True)
    return root / "in"


def vm_hwm_kib(pid: int) -> int:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        pass
    return 0


def test_retention_removes_old_cycles_and_timeout_publishes_partial(tmp_path):
    from datetime import datetime, timedelta, timezone
    now = datetime.now(timezone.utc)
    old = (now - timedelta(days=3)).strftime("%Y%m%dT0000Z")
    recent = now.strftime("%Y%m%dT0000Z")
    for c in (old, recent):
        d = tmp_path / "out" / "demo" / c
        d.mkdir(parents=True)
        (d / "x.json").write_text("{}")
    # A step whose marker never comes: made at the timeout with what is there, as partial.
    svc = Service(tmp_path, extra_service="retention_days = 1",
                  extra="complete = \"marker\"\nmarker_pattern = '^(?P<cycle>\\d{10})\\.done$'")
    svc.cfg.write_text(svc.cfg.read_text().replace("step_timeout_s = 600.0", "step_timeout_s = 3.0"))
    svc.start()
    # The status endpoint answers before the start-up work is done: wait for the
    # start-up retention (the next periodic one is 600 s away), not for a fixed time.
    wait_for(lambda: not (tmp_path / "out" / "demo" / old).exists(), 30, "old cycle removed at start")
    assert (tmp_path / "out" / "demo" / recent).exists(), "recent cycle kept"
    f = demo_inputs(tmp_path / "gen", "2026031400", [0, 6])
    deliver_renamed(f[0].read_bytes(), tmp_path / "in" / f[0].name)
    wait_for(lambda: len(svc.published()) == 1, 60, "partial step at the timeout")
    assert svc.published()[0]["partial"] is True
    # The manifest says what the rule waited for and did not get.
    m = json.loads(Path(svc.published()[0]["manifest"]).read_text())
    assert "the marker file (not arrived)" in m["missing"], m["missing"]
    # The ledger record comes first, the counter just after it.
    wait_for(lambda: svc.metric("leeward_steps_published_total", feed="demo", state="partial") >= 1,
             30, "the publication counted")
    assert svc.metric("leeward_steps_published_total", feed="demo", state="partial") == 1
    # With the marker, the next step goes at once.
    deliver_renamed(f[1].read_bytes(), tmp_path / "in" / f[1].name)
    (tmp_path / "in" / "2026031400.done").write_text("")
    wait_for(lambda: len(svc.published()) == 2, 30, "step complete by its marker")
    assert svc.published()[1]["partial"] is False
    assert svc.stop() == 0


def test_the_unit_file_verifies_and_scores_well(tmp_path):
    unit = (REPO_ROOT / "deploy" / "leeward.service").read_text()
    if subprocess.run(["which", "systemd-analyze"], capture_output=True).returncode != 0:
        pytest.skip("systemd-analyze is not installed here")
    local = tmp_path / "leeward.service"
    local.write_text(unit.replace("/usr/local/bin/leeward", str(leeward_bin_path())))
    v = subprocess.run(["systemd-analyze", "verify", str(local)], capture_output=True, text=True,
                       timeout=60)
    assert v.returncode == 0, v.stdout + v.stderr
    s = subprocess.run(["systemd-analyze", "security", "--offline=yes", str(local)],
                       capture_output=True, text=True, timeout=60)
    line = [x for x in s.stdout.splitlines() if "Overall exposure level" in x]
    assert line, s.stdout + s.stderr
    score = float(line[0].split("level for")[1].split(":")[1].split()[0])
    print(line[0])
    assert score <= 2.0, line[0]
    for key in ("Type=notify", "WatchdogSec=", "Restart=on-failure", "ProtectSystem=strict",
                "ReadWritePaths=", "NoNewPrivileges=yes", "PrivateTmp=yes", "User=leeward"):
        assert key in unit, key


def test_an_input_that_vanishes_is_retried_then_the_step_goes_on_without_it(tmp_path):
    svc = Service(tmp_path, extra="complete = \"files\"\nfiles_per_step = 2")
    svc.cfg.write_text(svc.cfg.read_text().replace('levels_hpa = [', '# levels_hpa = ['))
    svc.start()
    f = demo_inputs(tmp_path / "gen", "2026031400", [0])[0]
    msgs = messages(f.read_bytes())
    half = len(msgs) // 2
    p1 = tmp_path / "in" / "lwdemo_2026031400_000_part1.grib2"
    deliver_renamed(b"".join(msgs[:half]), p1)
    wait_for(lambda: "input for step" in svc.log.read_text(), 30, "first part catalogued")
    p1.unlink()
    deliver_renamed(b"".join(msgs[half:]), tmp_path / "in" / "lwdemo_2026031400_000_part2.grib2")
    wait_for(lambda: len(svc.published()) == 1, 60, "published without the vanished part")
    log = svc.log.read_text()
    assert "input cannot be read; retrying" in log and str(p1) in log
    assert "input gone; the step goes on without it" in log
    r = svc.published()[0]
    assert r["partial"] is True
    m = json.loads(Path(r["manifest"]).read_text())
    assert [Path(i["file"]).name for i in m["inputs"]] == ["lwdemo_2026031400_000_part2.grib2"]
    assert svc.metric("leeward_step_retries_total", feed="demo") >= 3
    assert svc.stop() == 0


def test_old_cycles_are_skipped_not_left_waiting_and_reprocess_makes_them(tmp_path):
    svc = Service(tmp_path)
    svc.cfg.write_text(svc.cfg.read_text().replace("catch_up_hours = 0", "catch_up_hours = 24"))
    svc.start()
    f = demo_inputs(tmp_path / "gen", "2026031400", [0, 6])
    for x in f:
        deliver_renamed(x.read_bytes(), tmp_path / "in" / x.name)
    wait_for(lambda: svc.metric("leeward_steps_failed_total", feed="demo", reason="skipped") == 2,
             30, "old cycle skipped")
    st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(tmp_path / "state")],
                        capture_output=True, text=True, timeout=30).stdout
    assert "0 waiting, 2 failed" in st and "skipped (older than catch_up_hours)" in st, st
    rp = subprocess.run([str(leeward_bin_path()), "reprocess", "--state-dir", str(tmp_path / "state"),
                         "--feed", "demo", "--cycle", "2026-03-14T00:00Z", "--lead", "6"],
                        capture_output=True, text=True, timeout=30)
    assert rp.returncode == 0, rp.stderr
    wait_for(lambda: len(svc.published()) == 1, DEADLINE_S, "the asked step made")
    time.sleep(1.5)
    assert [r["step"]["lead"] for r in svc.published()] == [6], "only the asked step"
    assert svc.stop() == 0


def test_permission_denied_on_the_output_is_retried_until_it_is_fixed():
    """As an unprivileged user (root ignores permissions), an output tree it may
    not write: retried with back-off, then published once the owner is fixed."""
    if os.geteuid() != 0 or subprocess.run(["which", "setpriv"], capture_output=True).returncode:
        pytest.skip("needs root and setpriv to run the service as another user")
    import shutil
    import tempfile
    root = Path(tempfile.mkdtemp(prefix="leeward-perm-"))
    try:
        os.chmod(root, 0o755)
        for d in ("in", "state", "out"):
            (root / d).mkdir()
        nobody = 65534
        os.chown(root / "in", nobody, nobody)
        os.chown(root / "state", nobody, nobody)
        svc = Service(root, prefix=["setpriv", f"--reuid={nobody}", f"--regid={nobody}",
                                    "--clear-groups"])
        os.chmod(svc.cfg, 0o644)
        svc.start()
        f = demo_inputs(root / "gen", "2026031400", [0])[0]
        deliver_renamed(f.read_bytes(), root / "in" / f.name)
        wait_for(lambda: svc.metric("leeward_step_retries_total", feed="demo") >= 2, 60,
                 "retries on a directory it may not write")
        log = svc.log.read_text()
        assert "Permission denied" in log and str(root / "out") in log, log[-2000:]
        assert svc.proc.poll() is None and svc.health() == 200
        os.chown(root / "out", nobody, nobody)
        wait_for(lambda: len(svc.published()) == 1, 60, "published once it may write")
        assert svc.stop() == 0
    finally:
        shutil.rmtree(root, ignore_errors=True)


def test_the_manifest_lists_the_variables_left_out_and_why(tmp_path):
    # Output contract (docs/output.md "Variables left out"): a step whose input has one
    # isobaric level (500 hPa) cannot bracket an isentropic surface nor take a vertical
    # derivative; those variables are not written, and the manifest's left_out says which
    # and why, beside the log's warning per variable.
    import eccodes
    svc = Service(tmp_path, extra='complete = "files"\nfiles_per_step = 1')
    svc.cfg.write_text(svc.cfg.read_text().replace(f"levels_hpa = {LEVELS_HPA}", "levels_hpa = [500]"))
    svc.start()
    f = demo_inputs(tmp_path / "gen", "2026031400", [0])[0]
    keep = []
    for m in messages(f.read_bytes()):
        h = eccodes.codes_new_from_message(m)
        try:
            isobaric = eccodes.codes_get_long(h, "typeOfFirstFixedSurface") == 100
            hpa = eccodes.codes_get_double(h, "level")
        finally:
            eccodes.codes_release(h)
        if not isobaric or hpa == 500:
            keep.append(m)
    deliver_renamed(b"".join(keep), tmp_path / "in" / f.name)
    wait_for(lambda: len(svc.published()) == 1, 120, "the one-level step published")
    m = json.loads(Path(svc.published()[0]["manifest"]).read_text())
    out = {x.split(":")[0]: x for x in m["left_out"]}
    for name in ("isen_p", "isen_t", "stab", "n2"):
        assert name in out and "every point is missing" in out[name], (name, m["left_out"])
        assert name not in m["variables"], (name, m["variables"])
    assert "zeta" in m["variables"], m["variables"]
    log = svc.log.read_text()
    assert "variable left out: no valid point" in log and "isen_p" in log, log[-3000:]
    assert svc.stop() == 0
