"""Each step of `leeward serve` is made by a process of its own.

The service starts `leeward process --job DIR` for every local step, as a
batch job runs on a node, and takes its result as it takes a job's. What is
checked is what an operator relies on: the step process is a child of the
service working in a staging directory of the feed's output tree; when it
dies (here: SIGKILL, as the kernel's out-of-memory killer sends it) only its
step fails, named with the signal, nothing is published for it, and the
service goes on making the next steps; when the service dies, its step
processes die with it and the step is made again at the next start.

Real processes and signals; the step process is held with SIGSTOP as soon
as it is seen, so that nothing depends on how long a step takes.
"""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

import netCDF4

from test_service import Service, demo_inputs, deliver_renamed, wait_for

CYCLE = "2026031400"


def children(pid: int) -> list[int]:
    """Child processes of `pid` (proc(5): /proc/PID/task/TID/children)."""
    out = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            out += [int(x) for x in (task / "children").read_text().split()]
        except OSError:
            pass
    return out


def cmdline(pid: int) -> list[str]:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().decode(errors="replace").split("\0")
    except OSError:
        return []


def state(pid: int) -> str | None:
    """The process's state letter (proc(5) stat field 3), None once it is gone."""
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return None


def hold_step_process(svc: Service, timeout: float = 60) -> int:
    """The service's first step process, stopped (SIGSTOP) as soon as it is seen."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        for c in children(svc.proc.pid):
            if "--job" in cmdline(c):
                os.kill(c, signal.SIGSTOP)
                return c
        time.sleep(0.002)
    raise AssertionError("no step process of its own was seen")


def test_a_step_process_that_dies_fails_its_step_alone(tmp_path):
    gen = demo_inputs(tmp_path / "gen", CYCLE, [0, 6])
    svc = Service(tmp_path).start()
    inc = tmp_path / "in"
    deliver_renamed(gen[0].read_bytes(), inc / gen[0].name)
    pid = hold_step_process(svc)
    cmd = cmdline(pid)
    stage = Path(cmd[cmd.index("--job") + 1])
    # A child of the service, working in a staging directory of the feed's output tree.
    assert cmd[1:4] == ["--log-format", "text", "process"], cmd
    assert stage.parent == tmp_path / "out" / "demo" / ".publish", stage
    assert (stage / "spec.json").is_file()
    os.kill(pid, signal.SIGKILL)
    wait_for(lambda: any(r["event"] == "failed" for r in svc.ledger()), 60, "the step failed")
    failed = [r for r in svc.ledger() if r["event"] == "failed"]
    assert len(failed) == 1 and failed[0]["step"]["lead"] == 0, failed
    assert failed[0]["kind"] == "internal", failed
    assert "signal 9 (SIGKILL" in failed[0]["reason"], failed
    assert svc.health() == 200
    # Nothing published for it, and its staging directory is gone.
    assert not list((tmp_path / "out" / "demo").glob("*/*.nc"))
    assert not stage.exists()
    # The service goes on: the next step is made and published.
    deliver_renamed(gen[1].read_bytes(), inc / gen[1].name)
    wait_for(lambda: len(svc.published()) == 1, 120, "the next step published")
    pub = svc.published()[0]
    assert pub["step"]["lead"] == 6, pub
    with netCDF4.Dataset(pub["path"]) as ds:
        assert "zeta" in ds.variables
    assert svc.stop() == 0


def test_step_processes_end_with_the_service_and_the_step_is_made_again(tmp_path):
    gen = demo_inputs(tmp_path / "gen", CYCLE, [0])
    svc = Service(tmp_path).start()
    deliver_renamed(gen[0].read_bytes(), tmp_path / "in" / gen[0].name)
    pid = hold_step_process(svc)
    svc.kill9()
    # The held step process is killed with its parent (a stopped process still
    # dies by SIGKILL); gone, or a zombie until the reaper collects it.
    wait_for(lambda: state(pid) in (None, "Z", "X"), 30, "the step process ended with the service")
    svc.start()
    wait_for(lambda: len(svc.published()) == 1, 120, "the step made again after the restart")
    assert svc.published()[0]["step"]["lead"] == 0
    stages = tmp_path / "out" / "demo" / ".publish"
    wait_for(lambda: not stages.exists() or not any(stages.iterdir()), 30,
             "no staging directory left")
    assert svc.stop() == 0
