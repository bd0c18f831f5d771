"""The service holds its state directory; it does not assume it.

- The state directory removed under a running service (rm -rf): the service
  notices within seconds, says so (journal, /health 503,
  leeward_state_dir_usable 0), takes no new work, and a second service on the
  same directory is refused all the while. When the directory is made again
  the service writes its ledger anew from what it holds and takes work again:
  the step delivered meanwhile is published once, and the new ledger knows
  every step.
- The state directory full (a 1 MiB tmpfs filled up, so that appending to the
  ledger fails with ENOSPC): the same stop, and once there is room the records
  kept meanwhile are written in order and work goes on; every line of the
  ledger parses (a write that failed part of the way is cut back).
- A holder that lets go within seconds (a service killed a moment ago can
  leave a step process between fork and exec that still holds copies of the
  socket and the lock): a new service waits for it and starts; one that does
  not let go has the new service refused after the wait.

Steps are the invented demo scenario's (`leeward demo --inputs-only`).
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
import shutil
import socket
import subprocess
import threading
import time
from pathlib import Path

import pytest

from conftest import leeward_bin_path
from test_service import Service, deliver_renamed, demo_inputs, wait_for

CYCLE = "2026031400"


def products(root: Path, lead: int) -> list[Path]:
    return sorted((root / "out").rglob(f"*_{lead:03d}h.nc"))


def second_service(svc: Service) -> subprocess.CompletedProcess:
    return subprocess.run([str(leeward_bin_path()), "serve", "--config", str(svc.cfg)],
                          capture_output=True, text=True, timeout=60, env=svc.env)


def assert_no_work_taken(svc: Service, lead: int, seconds: float = 3.0):
    t0 = time.monotonic()
    while time.monotonic() - t0 < seconds:
        assert products(svc.root, lead) == [], f"+{lead} h made while the state directory was unusable"
        time.sleep(0.1)


def test_a_removed_state_directory_stops_new_work_until_it_is_back(tmp_path):
    files = dict(zip([0, 6], demo_inputs(tmp_path / "gen", CYCLE, [0, 6])))
    svc = Service(tmp_path).start()
    deliver_renamed(files[0].read_bytes(), tmp_path / "in" / files[0].name)
    wait_for(lambda: len(svc.published()) == 1, 120, "+0 h published")
    shutil.rmtree(tmp_path / "state")
    wait_for(lambda: "state directory unusable" in svc.log.read_text(), 10,
             "the service noticed its state directory is gone")
    code, body = svc.get("/health")
    assert code == 503 and "state directory unusable" in body, (code, body)
    assert svc.metric("leeward_state_dir_usable") == 0
    deliver_renamed(files[6].read_bytes(), tmp_path / "in" / files[6].name)
    assert_no_work_taken(svc, 6)
    # A second service is refused, and leaves nothing behind.
    r = second_service(svc)
    assert r.returncode == 2 and "another leeward serve" in r.stderr, (r.returncode, r.stderr)
    assert not (tmp_path / "state").exists()
    # The directory is back (empty): the ledger is written anew and work goes on.
    (tmp_path / "state").mkdir()
    wait_for(lambda: products(tmp_path, 6), 120, "+6 h published once the directory is back")
    wait_for(lambda: len(svc.published()) == 2, 30, "both steps in the new ledger")
    assert sorted(r["step"]["lead"] for r in svc.published()) == [0, 6]
    assert "ledger written anew from the service's state" in svc.log.read_text()
    assert svc.health() == 200 and svc.metric("leeward_state_dir_usable") == 1
    r = second_service(svc)
    assert r.returncode == 2 and "another leeward serve" in r.stderr, r.stderr
    st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(tmp_path / "state")],
                        capture_output=True, text=True, timeout=30)
    assert f"service: running (pid {svc.proc.pid})" in st.stdout and "2 complete" in st.stdout, st.stdout
    assert svc.stop() == 0
    # A restart from the new ledger makes nothing again.
    svc = Service(tmp_path).start()
    time.sleep(3.0)
    assert svc.stop() == 0
    assert sorted(r["step"]["lead"] for r in svc.published()) == [0, 6]


@pytest.fixture
def small_state_dir(tmp_path):
    d = tmp_path / "state"
    d.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", str(d)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs for the state directory (needs root): {r.stderr.strip()}")
    yield d
    subprocess.run(["umount", "-l", str(d)], capture_output=True)


def test_a_full_state_directory_stops_new_work_and_keeps_the_records(tmp_path, small_state_dir):
    files = dict(zip([0, 6], demo_inputs(tmp_path / "gen", CYCLE, [0, 6])))
    svc = Service(tmp_path).start()
    deliver_renamed(files[0].read_bytes(), tmp_path / "in" / files[0].name)
    wait_for(lambda: len(svc.published()) == 1, 120, "+0 h published")
    filler = small_state_dir / "filler"
    subprocess.run(["dd", "if=/dev/zero", f"of={filler}", "bs=4k"], capture_output=True)
    wait_for(lambda: "state directory unusable" in svc.log.read_text(), 30,
             "the service noticed its state directory is full")
    deliver_renamed(files[6].read_bytes(), tmp_path / "in" / files[6].name)
    assert_no_work_taken(svc, 6)
    code, body = svc.get("/health")
    assert code == 503 and "No space left on device" in body, (code, body)
    filler.unlink()
    wait_for(lambda: products(tmp_path, 6), 120, "+6 h published once there is room")
    wait_for(lambda: len(svc.published()) == 2, 30, "the records kept written")
    assert "state directory usable again" in svc.log.read_text()
    assert svc.stop() == 0
    lines = (small_state_dir / "ledger.jsonl").read_text().splitlines()
    events = [json.loads(x)["event"] for x in lines]  # every line parses
    seen6 = [k for k, x in enumerate(lines) if "lwdemo_2026031400_006" in x and '"seen"' in x]
    pub6 = [k for k, x in enumerate(lines) if '"published"' in x and '"lead":6' in x]
    assert len(seen6) == 1 and len(pub6) == 1 and seen6[0] < pub6[0], events


def state_dir_socket(state: Path) -> socket.socket:
    """Bind the abstract socket a service holds its state directory with: the
    name is "leeward-state-" and the hex of the first 20 bytes of the SHA-256
    of the directory's canonical path (docs/operations.md)."""
    digest = hashlib.sha256(os.fsencode(os.path.realpath(state))).hexdigest()[:40]
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    s.bind("\0leeward-state-" + digest)
    return s


def let_go_after(seconds: float, release):
    t = threading.Timer(seconds, release)
    t.start()
    return t


@pytest.mark.parametrize("held", ["socket", "lock file"])
def test_a_holder_that_lets_go_within_seconds_is_waited_for(tmp_path, held):
    state = tmp_path / "state"
    state.mkdir()
    if held == "socket":
        holder = state_dir_socket(state)
        release = holder.close
    else:
        holder = open(state / "leeward.lock", "a+")
        fcntl.flock(holder, fcntl.LOCK_EX)
        release = holder.close
    svc = Service(tmp_path)
    t0 = time.monotonic()
    timer = let_go_after(1.5, release)
    svc.start()
    timer.join()
    assert time.monotonic() - t0 >= 1.5
    assert "waiting for it to let go" in svc.log.read_text()
    assert svc.stop() == 0


def test_a_holder_that_does_not_let_go_has_the_new_service_refused_after_the_wait(tmp_path):
    state = tmp_path / "state"
    state.mkdir()
    holder = state_dir_socket(state)
    svc = Service(tmp_path)
    t0 = time.monotonic()
    r = second_service(svc)
    waited = time.monotonic() - t0
    holder.close()
    assert r.returncode == 2 and "still held after 5 s" in r.stderr, (r.returncode, r.stderr)
    assert waited >= 5.0, waited
    assert not (state / "leeward.lock").exists(), "nothing taken in the directory"
